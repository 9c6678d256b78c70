"""Pooled connections that notice a restarted or vanished server without a round trip.

When PostgreSQL shuts down or restarts it ends every session (FATAL 57P01, then it closes the
socket); a crash closes the sockets too. An idle pooled connection only finds out at its next
query, which then fails. ``check_idle`` is the pools' borrow-time check: an idle connection in
autocommit mode receives next to nothing unless its server is ending it, so a socket with data
(or EOF) waiting marks the connection dead, and the pool replaces it before handing it out (a
rare harmless message, such as a changed server setting, costs one needless reconnection). It costs one
``select`` with a zero timeout, not a query, so it runs on every borrow.
"""

from __future__ import annotations

import select
from typing import Any

import psycopg


RECONNECT_GIVE_UP_SECONDS = 5.0
"""The pools' ``reconnect_timeout``."""


def check_idle(conn: psycopg.Connection[Any]) -> None:
    """Raises psycopg.OperationalError, having closed it, when the server has ended this idle
    connection."""
    if conn.closed:
        raise psycopg.OperationalError("the connection is closed")
    readable, _, _ = select.select([conn.pgconn.socket], [], [], 0)
    if readable:
        # Closed, so that the pool discards it rather than taking it back as good.
        conn.close()
        raise psycopg.OperationalError("the server sent something to an idle connection")
