"""ZeroMQ endpoint strings: their form, and whether another machine can reach them.

Shared by the config checks and the CURVE rules (a non-loopback bind needs CURVE).
"""

from __future__ import annotations

import ipaddress

SCHEMES = ("tcp://", "ipc://", "inproc://")


def split_host_port(text: str) -> tuple[str, str]:
    if text.startswith("["):
        host, sep, rest = text[1:].partition("]")
        if not sep or not rest.startswith(":"):
            return "", ""
        return host, rest[1:]
    host, _, port = text.rpartition(":")
    return host, port


def endpoint_problem(text: str) -> str | None:
    """Why ``text`` is not a usable ZeroMQ endpoint, or None if it is."""
    if not text.startswith(SCHEMES):
        return "it must start with tcp://, ipc:// or inproc://"
    scheme, _, rest = text.partition("://")
    if not rest:
        return "nothing follows the scheme"
    if scheme == "tcp":
        # a connect may name a source address first: tcp://src;host:port
        rest = rest.rpartition(";")[2]
        host, port = split_host_port(rest)
        if not host:
            return "a tcp endpoint needs host:port"
        if port != "*" and not (port.isdigit() and 1 <= int(port) <= 65535):
            return "the port must be 1..65535 (or * to bind any)"
    return None


def is_loopback(endpoint: str) -> bool:
    """True if ``endpoint`` cannot be reached from another machine.

    ``ipc://`` and ``inproc://`` endpoints, and ``tcp://`` on ``127.0.0.0/8``, ``[::1]`` or
    ``localhost``. Wildcards (``tcp://*:5556``), interface names and other addresses are not.

    Raises
    ------
    ValueError
        If ``endpoint`` is not a string starting with tcp://, ipc:// or inproc://.
    """
    if not isinstance(endpoint, str) or not endpoint.startswith(SCHEMES):
        raise ValueError(f"endpoint must start with tcp://, ipc:// or inproc://, "
                         f"got {endpoint!r}")
    scheme, _, rest = endpoint.partition("://")
    if scheme != "tcp":
        return True
    host, _ = split_host_port(rest.rpartition(";")[2])
    if host.lower() == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False
