"""ZeroMQ CURVE security for the daemon's sockets.

The daemon is a CURVE *server* on the sockets it binds (publish and control) and a CURVE
*client* on the feed socket it connects. A ZAP authenticator (pyzmq's thread authenticator)
checks every connecting client's public key against a folder of allowed keys, per ZAP domain:
``publish`` admits the keys in ``clients``, ``control`` only the keys in ``admins``. A client
without CURVE, or with a key not listed, gets nothing: no predictions, no replies.

Keys are ZeroMQ certificate files as written by ``posteriord keys new NAME``: ``NAME.key``
(public, to hand out) and ``NAME.key_secret`` (secret, mode 0600, never leaves the host).

The project's clients (``ctl``, ``record``, ``watch``, the relay's upstream side) take
``--curve-key NAME.key_secret`` and ``--curve-server-key SERVER.key`` (:func:`client_keys`);
the tools that bind a socket of their own (replay's feed, the relay's dashboard side) are
CURVE servers with :class:`CurveServer`. A refused client gets nothing from libzmq, so
:class:`Handshake` reads the socket monitor's handshake events and says why.
"""

from __future__ import annotations

import contextlib
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


# ---------------------------------------------------------------------------------- clients
# The project's own clients (ctl, record, watch, relay) and the tools that bind a socket of
# their own (replay's feed, the relay's downstream side) take their keys from these options.
KEY_HELP = ("this client's key pair: the NAME.key_secret file written by `posteriord keys new` "
            "(it holds both keys; mode 0600)")


@dataclass(frozen=True)
class ClientKeys:
    """A CURVE client's key pair and the public key of the server it talks to (Z85 bytes)."""

    public: bytes
    secret: bytes
    server: bytes


def _read_key(path: str, what: str) -> tuple[bytes, bytes | None]:
    try:
        public, secret = zmq.auth.load_certificate(path)
    except OSError as exc:
        raise SecurityError(f"{path}: cannot read {what}: {exc.strerror or exc}") from None
    except (ValueError, KeyError, IndexError) as exc:
        raise SecurityError(f"{path}: not a ZeroMQ key file ({what}): {exc}") from None
    if not public:
        raise SecurityError(f"{path}: no public-key in this {what} file")
    return public, secret


def load_secret_key(path: str) -> tuple[bytes, bytes]:
    """``(public, secret)`` of a NAME.key_secret file (refused when readable by others)."""
    public, secret = _read_key(path, "secret key")
    if secret is None:
        raise SecurityError(f"{path}: not a secret key file (no secret-key); give the "
                            f"NAME.key_secret, not the public NAME.key")
    return _load_secret(path)


def client_keys(key: str | None, server_key: str | None) -> ClientKeys | None:
    """The keys of ``--curve-key`` and ``--curve-server-key``: both, or neither (None)."""
    if key is None and server_key is None:
        return None
    if key is None or server_key is None:
        missing = "--curve-key" if key is None else "--curve-server-key"
        raise SecurityError(f"CURVE needs both --curve-key (this client's NAME.key_secret) "
                            f"and --curve-server-key (the server's NAME.key); {missing} "
                            f"is missing")
    public, secret = load_secret_key(key)
    server, _ = _read_key(server_key, "server public key")
    return ClientKeys(public, secret, server)


def apply_client(sock: zmq.Socket, keys: ClientKeys | None) -> None:
    """Make ``sock`` a CURVE client with ``keys`` (nothing for None); call before connect."""
    if keys is None:
        return
    sock.curve_publickey = keys.public
    sock.curve_secretkey = keys.secret
    sock.curve_serverkey = keys.server


def add_client_key_options(parser, server: str = "the daemon") -> None:
    """``--curve-key`` and ``--curve-server-key`` on a client command's parser."""
    parser.add_argument("--curve-key", metavar="PATH", help=KEY_HELP + "; with "
                        "--curve-server-key, talk CURVE to " + server)
    parser.add_argument("--curve-server-key", metavar="PATH",
                        help=f"the public key file of {server} (its NAME.key); with "
                             f"--curve-key")


class CurveServer:
    """A tool's own CURVE server socket (replay's feed, the relay's dashboard side).

    Its key pair comes from a NAME.key_secret file; a ZAP authenticator in ``ctx`` admits
    only the public keys in the folder ``clients``. One per context: ZeroMQ has a single
    ZAP handler per context.
    """

    def __init__(self, ctx: zmq.Context, secret_key: str, clients: str,
                 domain: str = DOMAIN_PUBLISH):
        self.public, self.secret = load_secret_key(secret_key)
        if not clients or not os.path.isdir(clients):
            raise SecurityError(f"a CURVE server needs a folder of allowed client public "
                                f"keys (--curve-clients); got {clients!r}")
        self.domain = domain
        self.auth: ThreadAuthenticator | None = ThreadAuthenticator(ctx)
        self.auth.start()
        self.auth.configure_curve(domain=domain, location=clients)

    def apply(self, sock: zmq.Socket) -> None:
        """Make ``sock`` a CURVE server; call before bind."""
        sock.setsockopt(zmq.ZAP_DOMAIN, self.domain.encode())
        sock.curve_secretkey = self.secret
        sock.curve_publickey = self.public
        sock.curve_server = True

    def stop(self) -> None:
        if self.auth is not None:
            self.auth.stop()
            self.auth = None


class HandshakeError(RuntimeError):
    """A peer refused the connection in the CURVE (or NULL) handshake."""


_HANDSHAKE_EVENTS = (zmq.EVENT_HANDSHAKE_SUCCEEDED | zmq.EVENT_HANDSHAKE_FAILED_AUTH
                     | zmq.EVENT_HANDSHAKE_FAILED_PROTOCOL
                     | zmq.EVENT_HANDSHAKE_FAILED_NO_DETAIL | zmq.EVENT_CONNECTED
                     | zmq.EVENT_DISCONNECTED)


class Handshake:
    """Watch the handshakes of one socket through libzmq's socket monitor.

    A client refused by a CURVE server receives nothing and, without this, cannot tell a
    refusal from silence. Create it before ``connect``; :meth:`read` turns the pending
    monitor events into explanations. ``peer`` names the other side in those ("the
    daemon"), ``admit`` says where its key must be listed.
    """

    def __init__(self, sock: zmq.Socket, *, curve: bool, peer: str = "the daemon",
                 admit: str = "curve_clients", server: bool = False):
        self.sock = sock
        self.curve = curve
        self.server = server     # ``sock`` binds and its peers are the clients
        self.peer = peer
        self.admit = admit
        self.monitor = sock.get_monitor_socket(_HANDSHAKE_EVENTS)
        self.monitor.setsockopt(zmq.LINGER, 0)
        self.connected = False
        self.succeeded = False
        self.dropped = False       # disconnected after a successful handshake (sticky)
        self.failures: dict[tuple[str, str], int] = {}   # (endpoint, message) -> how often

    def explain(self, event: int, value: int) -> str | None:
        """The message for one monitor event, or None when it is not a failure."""
        if self.server:
            return self._explain_server(event, value)
        peer = self.peer
        if event == zmq.EVENT_HANDSHAKE_FAILED_AUTH:
            return (f"{peer} refused this client's key (CURVE handshake failed, ZAP status "
                    f"{value}): add this client's public key (its NAME.key) to {peer}'s "
                    f"{self.admit} folder")
        # a client without keys meets a CURVE server: over tcp the server just closes
        # (no detail), over ipc the client sees the mechanism mismatch
        mismatch = (event == zmq.EVENT_HANDSHAKE_FAILED_PROTOCOL
                    and value == zmq.PROTOCOL_ERROR_ZMTP_MECHANISM_MISMATCH)
        if not self.curve and (mismatch or event == zmq.EVENT_HANDSHAKE_FAILED_NO_DETAIL):
            return (f"{peer} speaks CURVE; give --curve-server-key (its public NAME.key) "
                    f"and --curve-key (this client's NAME.key_secret)")
        if event == zmq.EVENT_HANDSHAKE_FAILED_NO_DETAIL:
            # the peer closed without a word: a wrong server key, or (when the peer's side
            # of the mismatch wins the race) a peer without CURVE
            return (f"{peer} dropped the CURVE handshake (CURVE handshake failed): either "
                    f"--curve-server-key is not {peer}'s public key or {peer} does not speak "
                    f"CURVE")
        if event == zmq.EVENT_HANDSHAKE_FAILED_PROTOCOL:
            if mismatch:
                return (f"{peer} does not speak CURVE (handshake failed: mechanism "
                        f"mismatch); leave out --curve-key and --curve-server-key")
            return f"handshake with {peer} failed (ZMTP protocol error 0x{value:x})"
        return None

    def _explain_server(self, event: int, value: int) -> str | None:
        peer = self.peer
        if event == zmq.EVENT_HANDSHAKE_FAILED_AUTH:
            return (f"refused {peer} whose key is not in --curve-clients (CURVE handshake "
                    f"failed, ZAP status {value}): put its public key (NAME.key) there")
        if event == zmq.EVENT_HANDSHAKE_FAILED_PROTOCOL:
            if value == zmq.PROTOCOL_ERROR_ZMTP_MECHANISM_MISMATCH:
                if self.curve:
                    return (f"{peer} connected without CURVE (handshake failed: mechanism "
                            f"mismatch)")
                return (f"{peer} connected with CURVE; give --curve-key (and --curve-clients)"
                        f" to serve it")
            if value == zmq.PROTOCOL_ERROR_ZMTP_CRYPTOGRAPHIC:
                return (f"{peer} used another server key (CURVE handshake failed: cannot "
                        f"decrypt): its server key must be this side's public key")
            return f"handshake with {peer} failed (ZMTP protocol error 0x{value:x})"
        if event == zmq.EVENT_HANDSHAKE_FAILED_NO_DETAIL:
            return f"handshake with {peer} failed"
        return None

    def read(self, timeout: int = 0) -> list[tuple[str, str]]:
        """``(endpoint, message)`` of each failed handshake among the pending events.

        Waits up to ``timeout`` ms for the first event; then takes what is queued. Every
        failure is also counted in ``failures``.
        """
        from zmq.utils.monitor import recv_monitor_message

        out = []
        wait = timeout
        while self.monitor.poll(wait):
            wait = 0
            ev = recv_monitor_message(self.monitor)
            event, value = int(ev["event"]), int(ev["value"])
            if event == zmq.EVENT_CONNECTED:
                self.connected = True
            elif event == zmq.EVENT_HANDSHAKE_SUCCEEDED:
                self.succeeded = True
            elif event == zmq.EVENT_DISCONNECTED:
                self.dropped = self.dropped or self.succeeded
            else:
                text = self.explain(event, value)
                if text is not None:
                    ep = ev.get("endpoint", b"")
                    key = (ep.decode() if isinstance(ep, bytes) else str(ep), text)
                    self.failures[key] = self.failures.get(key, 0) + 1
                    out.append(key)
        return out

    def check(self, timeout: int = 0) -> None:
        """Raise :class:`HandshakeError` on the first failed handshake pending."""
        failures = self.read(timeout)
        if failures:
            ep, text = failures[0]
            raise HandshakeError(f"{ep}: {text}")

    def close(self) -> None:
        """Stop the monitor (idempotent); before closing the socket."""
        if self.monitor.closed:
            return
        # disable first: libzmq would otherwise keep sending into a closed PAIR
        with contextlib.suppress(zmq.ZMQError):
            self.sock.disable_monitor()
        self.monitor.close(linger=0)
