"""Checks made before a command starts work, so that expected failures read as one line.

Rules: each check either returns quietly or raises a HushError whose message says what failed
(in the operator's own terms: the address, the database role, the file) and whose hint says
what to do. They run before anything slow or stateful (initdb, loading, pools), so that a busy
port is reported before a million rows are loaded for nothing. The address check is advisory:
another program can take the port between the check and the bind, and ``listen_error`` words
that case the same way.
"""

from __future__ import annotations

import errno
import socket
import ssl
import urllib.parse
from pathlib import Path

import psycopg

from proxy.errors import CANNOT_CONNECT, CONFIG_FILE_ERROR, HushError
from proxy.localpg import free_port

# The errors of bind() that mean "this address cannot be listened on" (Linux errno names).
LISTEN_ERRNOS = frozenset({errno.EADDRINUSE, errno.EADDRNOTAVAIL, errno.EACCES})


def check_can_listen(host: str, port: int) -> None:
    """Raise HushError naming ``--listen`` unless every address ``host`` resolves to can be bound
    on ``port`` now (the same addresses and SO_REUSEADDR as the server's own bind)."""
    try:
        addresses = socket.getaddrinfo(host, port, type=socket.SOCK_STREAM,
                                       flags=socket.AI_PASSIVE)
        for family, kind, protocol, _, address in addresses:
            with socket.socket(family, kind, protocol) as probe:
                probe.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
                probe.bind(address)
    except OSError as error:
        raise listen_error(host, port, error) from None


def listen_error(host: str, port: int, error: OSError) -> HushError:
    """The one-line error for an address that cannot be listened on, suggesting a free port."""
    reason = error.strerror or str(error)
    if error.errno == errno.EADDRINUSE:
        reason += " (another program is listening there)"
    return HushError(CONFIG_FILE_ERROR, f"cannot listen on {_address(host, port)}: {reason}",
                     hint=f"choose another address with --listen, e.g. --listen "
                          f"127.0.0.1:{free_port()}")


def is_listen_error(error: OSError) -> bool:
    """Whether an OSError raised while starting a server is about its listening address."""
    return isinstance(error, socket.gaierror) or error.errno in LISTEN_ERRNOS


def check_reachable(dsn: str, role: str, flag: str, *, timeout: int = 10) -> None:
    """Raise HushError unless ``dsn`` accepts a connection within ``timeout`` seconds.

    ``role`` names the database in the message ("backend", "ledger"); ``flag`` is the option or
    variable that sets it. The driver's first line says why (refused, unknown host, password):
    it is about the connection only, and this is the operator's terminal, not an analyst's.
    """
    try:
        psycopg.connect(dsn, connect_timeout=timeout).close()
    except psycopg.Error as error:
        raise HushError(CANNOT_CONNECT, f"cannot connect to the {role} database: "
                        f"{first_line(error)}",
                        hint=f"check {flag}, and that PostgreSQL runs there and accepts this "
                             "user") from None


def check_spark_reachable(dsn: str, flag: str, *, timeout: float = 10) -> None:
    """Raise HushError unless the Spark Connect server of ``sc://HOST:PORT[/;options]``
    accepts a TCP connection within ``timeout`` seconds (15002, Spark's default, when no
    port is given)."""
    parts = urllib.parse.urlsplit(dsn)
    host, port = parts.hostname or "localhost", 15002
    try:
        port = parts.port or port
        socket.create_connection((host, port), timeout=timeout).close()
    except (OSError, ValueError) as error:  # ValueError: a port that is not a number
        raise HushError(CANNOT_CONNECT, f"cannot connect to the Spark Connect server {host}:{port}: "
                        f"{first_line(error)}",
                        hint=f"check {flag}, and that a Spark Connect server runs there "
                             "(sbin/start-connect-server.sh)") from None


def tls_context(cert: Path | None, key: Path | None) -> ssl.SSLContext | None:
    """A server TLS context from PEM files, None without them; HushError naming the file and
    the problem when one is missing, unreadable or not a matching certificate and key."""
    if cert is None and key is None:
        return None
    if cert is None or key is None:
        raise HushError(CONFIG_FILE_ERROR, "TLS needs both --tls-cert and --tls-key",
                        hint="pass both PEM files, or neither to serve without TLS")
    for what, path in (("certificate", cert), ("private key", key)):
        if not path.is_file():
            raise HushError(CONFIG_FILE_ERROR, f"the TLS {what} {path} does not exist",
                            hint=f"give the path of a PEM {what} file")
    context = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
    try:
        context.load_cert_chain(str(cert), str(key))
    except (OSError, ssl.SSLError) as error:
        raise HushError(CONFIG_FILE_ERROR, f"cannot load the TLS certificate {cert} with key "
                        f"{key}: {first_line(error)}",
                        hint="both must be PEM files, the key unencrypted and matching the "
                             "certificate") from None
    return context


def first_line(error: BaseException) -> str:
    """The first non-empty line of an exception's text (driver messages run on)."""
    text = str(error).strip()
    return text.splitlines()[0] if text else type(error).__name__


def _address(host: str, port: int) -> str:
    return f"[{host}]:{port}" if ":" in host else f"{host}:{port}"
