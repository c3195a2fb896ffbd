"""The service manager's notification protocol (sd_notify): datagrams of ``KEY=VALUE`` lines
sent to the Unix socket named by ``$NOTIFY_SOCKET``.

The daemon says ``READY=1`` once its state is replayed and its sockets are bound (a unit with
``Type=notify`` is started only then), ``STOPPING=1`` when it begins to shut down, and
``WATCHDOG=1`` from its loop at half the ``$WATCHDOG_USEC`` period, so a loop that hangs is
restarted by the manager. Without ``$NOTIFY_SOCKET`` every call does nothing. A failing send is
logged once and never stops the daemon: the manager's view is not worth a plant's soft sensor.
"""

from __future__ import annotations

import logging
import os
import socket
import time

log = logging.getLogger("posteriord.notify")


class Notifier:
    """Sends notifications to ``address`` (a path, or ``@name`` for the abstract namespace)."""

    def __init__(self, address: str | None, watchdog_usec: int | None = None):
        self.address = address
        self.sock = None
        self._failed = False
        self.sent: list[str] = []
        # the watchdog is pinged at half its period, as the protocol asks
        self.interval = None if not watchdog_usec else watchdog_usec / 2e6
        self._next = 0.0
        if address:
            target = "\0" + address[1:] if address.startswith("@") else address
            self._target = target
            self.sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM | socket.SOCK_CLOEXEC)

    @classmethod
    def from_environment(cls, env=None) -> Notifier:
        env = os.environ if env is None else env
        address = env.get("NOTIFY_SOCKET") or None
        usec = None
        raw = env.get("WATCHDOG_USEC")
        pid = env.get("WATCHDOG_PID")
        if raw:
            try:
                usec = int(raw)
            except ValueError:
                log.warning("WATCHDOG_USEC=%r is not an integer; no watchdog pings", raw[:40])
            # the watchdog is meant for the process named by WATCHDOG_PID when it is set
            if pid and pid != str(os.getpid()):
                usec = None
            if usec is not None and usec <= 0:
                usec = None
        return cls(address, usec)

    @property
    def poll_ms(self) -> int | None:
        """The longest the loop may sleep between two pings, or None without a watchdog."""
        return None if self.interval is None else max(1, int(self.interval * 1000))

    def send(self, text: str) -> bool:
        if self.sock is None:
            return False
        try:
            self.sock.sendto(text.encode(), self._target)
        except OSError as exc:
            if not self._failed:
                self._failed = True
                log.warning("cannot notify the service manager at %s: %s", self.address, exc)
            return False
        self.sent.append(text)
        return True

    def ready(self, status: str = "") -> None:
        self.send("READY=1" + (f"\nSTATUS={status}" if status else ""))
        self._next = time.monotonic()
        self.tick()

    def stopping(self) -> None:
        self.send("STOPPING=1")

    def tick(self) -> None:
        """A watchdog ping if one is due (called from the loop at every turn)."""
        if self.interval is None:
            return
        now = time.monotonic()
        if now >= self._next:
            self._next = now + self.interval
            self.send("WATCHDOG=1")

    def close(self) -> None:
        if self.sock is not None:
            self.sock.close()
            self.sock = None
