"""ZeroMQ CURVE security for the daemon's sockets.

The daemon is a CURVE *server* on the sockets it binds (publish and control) and a CURVE
*client* on the feed socket it connects. A ZAP authenticator (pyzmq's thread authenticator)
checks every connecting client's public key against a folder of allowed keys, per ZAP domain:
``publish`` admits the keys in ``clients``, ``control`` only the keys in ``admins``. A client
without CURVE, or with a key not listed, gets nothing: no predictions, no replies.

Keys are ZeroMQ certificate files as written by ``posteriord keys new NAME``: ``NAME.key``
(public, to hand out) and ``NAME.key_secret`` (secret, mode 0600, never leaves the host).
"""

from __future__ import annotations

import os
import stat
from dataclasses import dataclass
from pathlib import Path

import zmq
import zmq.auth
from zmq.auth.thread import ThreadAuthenticator

from daemon.endpoints import is_loopback

DOMAIN_PUBLISH = "publish"
DOMAIN_CONTROL = "control"


class SecurityError(ValueError):
    """Keys missing or unsafe, or an insecure bind refused."""


@dataclass(frozen=True)
class CurveKeys:
    """Where the key material lives (all paths; None where not configured)."""

    server_secret: str | None = None   # the daemon's own NAME.key_secret
    clients: str | None = None         # folder of public keys allowed to subscribe
    admins: str | None = None          # folder of public keys allowed to send commands
    feed_server: str | None = None     # public key of the feed publisher (NAME.key)

    @property
    def enabled(self) -> bool:
        return self.server_secret is not None

    @classmethod
    def from_config(cls, d) -> CurveKeys:
        """The key settings of a :class:`daemon.config.DaemonConfig` ("" means not set)."""
        return cls(d.curve_secret_key or None, d.curve_clients or None,
                   d.curve_admins or None, d.curve_feed_server_key or None)


def new_keys(folder: str, name: str) -> tuple[str, str]:
    """Write a key pair ``folder/name.key`` and ``folder/name.key_secret`` (secret 0600)."""
    if not name or "/" in name or name.startswith("."):
        raise SecurityError(f"key name must be a plain file name, got {name!r}")
    os.makedirs(folder, mode=0o700, exist_ok=True)
    public, secret = Path(folder) / f"{name}.key", Path(folder) / f"{name}.key_secret"
    if public.exists() or secret.exists():
        raise SecurityError(f"{public} or {secret} exists already; not overwriting keys")
    old = os.umask(0o077)
    try:
        pub_path, sec_path = zmq.auth.create_certificates(folder, name)
    finally:
        os.umask(old)
    os.chmod(sec_path, 0o600)
    os.chmod(pub_path, 0o644)
    return str(pub_path), str(sec_path)


def _load_secret(path: str) -> tuple[bytes, bytes]:
    st = os.stat(path)
    if st.st_mode & (stat.S_IRWXG | stat.S_IRWXO):
        raise SecurityError(f"{path}: secret key file is readable by others "
                            f"(mode {stat.S_IMODE(st.st_mode):o}); chmod 600 it")
    public, secret = zmq.auth.load_certificate(path)
    if secret is None:
        raise SecurityError(f"{path}: not a secret key file (no secret-key)")
    return public, secret


def _load_public(path: str) -> bytes:
    public, _ = zmq.auth.load_certificate(path)
    return public


def check_binds(endpoints: dict[str, str], keys: CurveKeys) -> None:
    """Refuse a non-loopback bind of publish or control unless CURVE is configured."""
    if keys.enabled:
        return
    for what, ep in endpoints.items():
        if not is_loopback(ep):
            raise SecurityError(
                f"daemon.{what} = {ep!r} binds beyond this host without CURVE: anyone on the "
                f"network could {'read the predictions' if what == 'publish' else 'send commands'}"
                f". Bind to 127.0.0.1 or ipc://, or set curve_secret_key, curve_clients and "
                f"curve_admins in [daemon] (see `posteriord keys new`)")


class Security:
    """CURVE setup of one daemon: the authenticator and the socket options."""

    def __init__(self, ctx: zmq.Context, keys: CurveKeys):
        self.keys = keys
        self.ctx = ctx
        self.auth: ThreadAuthenticator | None = None
        self._public = self._secret = None
        if keys.enabled:
            self._public, self._secret = _load_secret(keys.server_secret)
            for what, folder in (("clients", keys.clients), ("admins", keys.admins)):
                if folder is None or not os.path.isdir(folder):
                    raise SecurityError(f"CURVE needs a folder of allowed {what} public keys; "
                                        f"got {folder!r}")

    def start(self) -> None:
        """Start the ZAP authenticator (before any secured socket binds)."""
        if not self.keys.enabled:
            return
        self.auth = ThreadAuthenticator(self.ctx)
        self.auth.start()
        self.reload()

    def reload(self) -> None:
        """Re-read the allowed key folders (on SIGHUP)."""
        if self.auth is None:
            return
        self.auth.configure_curve(domain=DOMAIN_PUBLISH, location=self.keys.clients)
        self.auth.configure_curve(domain=DOMAIN_CONTROL, location=self.keys.admins)

    def server(self, sock: zmq.Socket, domain: str) -> None:
        """Make ``sock`` a CURVE server in ``domain``; call before bind."""
        if not self.keys.enabled:
            return
        sock.setsockopt(zmq.ZAP_DOMAIN, domain.encode())
        sock.curve_secretkey = self._secret
        sock.curve_publickey = self._public
        sock.curve_server = True

    def client(self, sock: zmq.Socket) -> None:
        """Make the feed socket a CURVE client of the feed publisher; call before connect."""
        if not self.keys.enabled or self.keys.feed_server is None:
            return
        sock.curve_secretkey = self._secret
        sock.curve_publickey = self._public
        sock.curve_serverkey = _load_public(self.keys.feed_server)

    def stop(self) -> None:
        if self.auth is not None:
            self.auth.stop()
            self.auth = None


def preflight(d) -> list[str]:
    """Check the CURVE settings of a :class:`daemon.config.DaemonConfig` before anything starts.

    Raises :class:`SecurityError` for what ``run`` would refuse (a secret key others can read
    or that is no secret key, a missing key folder, an unreadable feed server key, a bind
    beyond this host without CURVE). Returns lines describing the settings, for
    ``check-config``.
    """
    keys = CurveKeys.from_config(d)
    check_binds({"publish": d.publish, "control": d.control}, keys)
    if not keys.enabled:
        if keys.feed_server:
            raise SecurityError("daemon.curve_feed_server_key is set but curve_secret_key is "
                                "not: the feed is a CURVE client only with a key pair of its "
                                "own")
        return ["curve: off (plain ZeroMQ; publish and control bind to this host only)"]
    try:
        public, _ = _load_secret(keys.server_secret)
    except OSError as exc:
        raise SecurityError(f"daemon.curve_secret_key: {keys.server_secret}: "
                            f"{exc.strerror or exc}") from None
    except ValueError as exc:  # zmq.auth's parser on a file that is no key file
        raise SecurityError(f"daemon.curve_secret_key: {keys.server_secret}: not a key file "
                            f"({exc})") from None
    lines = [f"curve: on; server key {keys.server_secret} (public {public.decode()})"]
    for what, folder in (("clients", keys.clients), ("admins", keys.admins)):
        if folder is None or not os.path.isdir(folder):
            raise SecurityError(f"daemon.curve_{what}: CURVE needs a folder of allowed {what}' "
                                f"public keys; got {folder!r}")
        n = len([f for f in os.listdir(folder) if f.endswith(".key")])
        lines.append(f"  {what}: {folder} ({n} public key{'s' if n != 1 else ''}"
                     f"{'; nobody is admitted' if n == 0 else ''})")
    if keys.feed_server:
        try:
            _load_public(keys.feed_server)
        except (OSError, ValueError) as exc:
            raise SecurityError(f"daemon.curve_feed_server_key: {keys.feed_server}: {exc}") \
                from None
        lines.append(f"  feed: CURVE client of the publisher with key {keys.feed_server}")
    else:
        lines.append("  feed: plain (set curve_feed_server_key to make it a CURVE client too)")
    return lines
