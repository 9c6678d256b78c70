"""The server end to end: the real psycopg client, raw sockets, and bad input (fake engine)."""

from __future__ import annotations

import logging
import shutil
import socket
import ssl
import struct
import subprocess
import threading
import time
from decimal import Decimal
from pathlib import Path

import psycopg
import pytest

from proxy.policy import Connections
from proxy.wire import codec
from proxy.wire.server import start_in_thread
from tests.test_wire_fakes import ANALYST, PASSWORD, FakeEngine, RawClient, dsn
from tests.test_wire_fakes import engine, server  # noqa: F401  (fixtures)

COUNT = "SELECT district, count(*) FROM households GROUP BY district"


def test_psycopg_connects_and_queries(server, engine: FakeEngine) -> None:
    notices: list[tuple[str | None, str | None]] = []
    with psycopg.connect(dsn(server), autocommit=True) as conn:
        # A Diagnostic is only readable inside the handler.
        conn.add_notice_handler(lambda d: notices.append((d.message_primary, d.message_detail)))
        assert conn.info.server_version == 150000
        assert conn.info.parameter_status("server_encoding") == "UTF8"
        assert conn.info.parameter_status("integer_datetimes") == "on"
        rows = conn.execute(COUNT).fetchall()  # extended protocol, text results
        assert rows[0] == ("Northbank", 120, 2.5, Decimal("1234.5"))
        with psycopg.ClientCursor(conn) as cur:  # simple query protocol
            cur.execute(COUNT + "; " + COUNT)
            assert len(cur.fetchall()) == 3
    assert len(notices) == 3
    assert "spent epsilon 0.1" in notices[0][0]
    assert "within ±30" in notices[0][1]
    assert len(engine.calls) == 3


def test_parameters_in_text_and_binary(server, engine: FakeEngine) -> None:
    sql = ("SELECT district, count(*) FROM households WHERE district = %s AND occupants > %s "
           "GROUP BY district")
    with psycopg.connect(dsn(server), autocommit=True) as conn:
        for binary in (False, True):
            rows = conn.execute(sql, ["Old Mill", 2], binary=binary).fetchall()
            assert rows[1][1] == 80 and rows[1][2] == 3.25
    texts = [FakeEngine.text_of(statement) for _, statement, _ in engine.calls]
    assert texts == ["SELECT district, COUNT(*) FROM households WHERE district = 'Old Mill' "
                     "AND occupants > 2 GROUP BY district"] * 2


def test_set_and_show_epsilon(server, engine: FakeEngine) -> None:
    with psycopg.connect(dsn(server), autocommit=True) as conn:
        assert conn.execute("SHOW hushql.epsilon").fetchone() == ("0.1",)
        conn.execute("SET hushql.epsilon = 0.25")
        assert conn.execute("SHOW hushql.epsilon").fetchone() == ("0.25",)
        conn.execute(COUNT)
        assert conn.execute("SHOW hushql.remaining").fetchone() == ("2.75",)
        with pytest.raises(psycopg.errors.InvalidParameterValue) as caught:
            conn.execute("SET hushql.epsilon = 2")
        assert caught.value.diag.message_hint
        assert conn.execute("SHOW hushql.epsilon").fetchone() == ("0.25",)


def test_sqlstates_reach_the_client(server) -> None:
    with psycopg.connect(dsn(server), autocommit=True) as conn:
        with pytest.raises(psycopg.errors.FeatureNotSupported) as caught:
            conn.execute("SELECT * FROM elsewhere")
        assert caught.value.sqlstate == "0A000"
        assert caught.value.diag.message_hint and caught.value.diag.message_detail
        with pytest.raises(psycopg.errors.SyntaxError):
            conn.execute("SELECT FROM WHERE")
        with pytest.raises(psycopg.errors.InternalError_) as caught:
            conn.execute("SELECT explode FROM households")
        assert FakeEngine.SECRET_TEXT not in str(caught.value)
        assert conn.execute(COUNT).fetchone()  # the session carries on


def test_transactions_through_psycopg(server) -> None:
    with psycopg.connect(dsn(server)) as conn:  # psycopg opens a block itself
        conn.execute(COUNT)
        assert conn.info.transaction_status == psycopg.pq.TransactionStatus.INTRANS
        with pytest.raises(psycopg.errors.FeatureNotSupported):
            conn.execute("SELECT * FROM elsewhere")
        assert conn.info.transaction_status == psycopg.pq.TransactionStatus.INERROR
        with pytest.raises(psycopg.errors.InFailedSqlTransaction):
            conn.execute(COUNT)
        conn.rollback()
        assert conn.execute(COUNT).fetchone()
        conn.commit()


def _connect_error(address, user: str, password: str) -> str:
    with pytest.raises(psycopg.OperationalError) as caught:
        psycopg.connect(dsn(address, user=user, password=password))
    return str(caught.value)


def test_unknown_user_and_wrong_password_get_the_same_error(server) -> None:
    wrong = _connect_error(server, ANALYST, "not the password")
    unknown = _connect_error(server, "nobody", PASSWORD)
    assert 'password authentication failed for user "planner"' in wrong
    assert unknown == wrong.replace('"planner"', '"nobody"')


def test_auth_failure_at_the_protocol_level(server) -> None:
    for user in (ANALYST, "nobody"):
        client = RawClient(server)
        [err] = client.login(user=user, password="wrong")
        assert isinstance(err, codec.ErrorResponse)
        assert (err.get("S"), err.get("C")) == ("FATAL", "28P01")
        assert client.closed()
        client.close()


def test_bad_connections_do_not_hurt_a_good_one(server) -> None:
    with psycopg.connect(dsn(server), autocommit=True) as conn:
        assert conn.execute(COUNT).fetchone()
        bad_inputs = [
            b"\x00\x00\x00\x08\x00\x02\x00\x00",  # protocol 2.0
            b"GET / HTTP/1.1\r\nHost: x\r\n\r\n",  # not the protocol at all
            b"\x00\x00\x00\x05",  # a startup packet too short to hold a version
        ]
        for data in bad_inputs:
            raw = RawClient(server)
            raw.send(data)
            msg = raw.receive()
            assert isinstance(msg, codec.ErrorResponse) and msg.get("C") == "08P01"
            assert raw.closed()
            raw.close()
        # A client that sends half a message and vanishes.
        raw = socket.create_connection(server)
        raw.sendall(codec.StartupMessage({"user": ANALYST}).encode()[:10])
        raw.close()
        assert conn.execute(COUNT).fetchone()


@pytest.mark.parametrize("payload, needle", [
    (b"Q" + struct.pack("!i", 10_000_000), "exceeds the limit"),
    (b"z\x00\x00\x00\x04", "invalid frontend message type"),
    (codec.PasswordData(b"again").encode(), "unexpected password message"),
    (b"P\x00\x00\x00\x05\x00", "unterminated string"),
])
def test_bad_messages_after_login_end_that_connection(server, payload, needle) -> None:
    client = RawClient(server)
    assert isinstance(client.login()[-1], codec.ReadyForQuery)
    client.send(payload)
    msg = client.receive()
    assert isinstance(msg, codec.ErrorResponse)
    assert msg.get("S") == "FATAL" and msg.get("C") == "08P01" and needle in msg.get("M")
    assert client.closed()
    client.close()
    with psycopg.connect(dsn(server), autocommit=True) as conn:  # others are still served
        assert conn.execute(COUNT).fetchone()


def test_negotiation_without_tls(server) -> None:
    client = RawClient(server)
    client.send(codec.GSSENCRequest().encode())
    client.reader.expect_negotiation_answer()
    assert client.receive() == codec.NegotiationAnswer(False)
    client.send(codec.SSLRequest().encode())
    client.reader.expect_negotiation_answer()
    assert client.receive() == codec.NegotiationAnswer(False)
    assert isinstance(client.login()[-1], codec.ReadyForQuery)
    client.close()
    with psycopg.connect(dsn(server, sslmode="prefer")) as conn:  # libpq's own negotiation
        assert conn.execute("SHOW hushql.epsilon").fetchone() == ("0.1",)


def test_pipelined_extended_batch_and_utf8_errors(server) -> None:
    client = RawClient(server)
    client.login()
    client.send(codec.Parse("", "SELECT count(*) FROM households").encode()
                + b"P\x00\x00\x00\x08\x00\xff\x00\x00"  # a statement text that is not UTF-8
                + codec.Bind("", "", (), (), ()).encode() + codec.Execute("", 0).encode()
                + codec.Sync().encode() + codec.Query("SHOW hushql.epsilon").encode())
    got = client.until(codec.ReadyForQuery)
    assert [type(m).__name__ for m in got] == ["ParseComplete", "ErrorResponse",
                                               "ReadyForQuery"]
    assert got[1].get("C") == "22021"
    got = client.until(codec.ReadyForQuery)
    assert [m.values for m in got if isinstance(m, codec.DataRow)] == [(b"0.1",)]
    client.close()


def test_connection_limit(engine: FakeEngine) -> None:
    host, port, stop = start_in_thread(engine, limits=Connections(most_sessions=2,
                                                                  admin_sessions_kept=0))
    try:
        address = (host, port)
        first = psycopg.connect(dsn(address))
        second = psycopg.connect(dsn(address))
        message = _connect_error(address, ANALYST, PASSWORD)
        assert "too many connections" in message
        second.close()
        time.sleep(0.2)
        with psycopg.connect(dsn(address), autocommit=True) as conn:  # a freed slot is reused
            assert conn.execute(COUNT).fetchone()
        first.close()
    finally:
        stop()


def test_cancel_request_cancels_the_running_query(server, engine: FakeEngine) -> None:
    with psycopg.connect(dsn(server), autocommit=True) as conn:
        def cancel_when_running() -> None:
            engine.started.wait(5)
            conn.cancel_safe()
        threading.Thread(target=cancel_when_running, daemon=True).start()
        started = time.monotonic()
        with pytest.raises(psycopg.errors.QueryCanceled):
            conn.execute("SELECT slow_query FROM households")
        assert time.monotonic() - started < 4  # well before the slow query's 5 s
        assert engine.cancelled.is_set()
        assert conn.execute(COUNT).fetchone()


def test_a_client_vanishing_mid_query_cancels_it(server, engine: FakeEngine) -> None:
    client = RawClient(server)
    client.login()
    client.send(codec.Query("SELECT slow_query FROM households").encode())
    assert engine.started.wait(5)
    client.close()
    assert engine.cancelled.wait(4)
    with psycopg.connect(dsn(server), autocommit=True) as conn:
        assert conn.execute(COUNT).fetchone()


def test_logs_name_the_analyst_but_hold_no_values(server, caplog) -> None:
    caplog.set_level(logging.INFO, logger="hushql.wire")
    secret_value = "Harbourside-7731"
    with psycopg.connect(dsn(server), autocommit=True) as conn:
        conn.execute("SELECT district, count(*) FROM households WHERE district = %s "
                     "GROUP BY district", [secret_value]).fetchall()
        conn.execute(f"SELECT count(*) FROM households WHERE district = '{secret_value}'")
    deadline = time.monotonic() + 2
    while "connection peer=" not in caplog.text and time.monotonic() < deadline:
        time.sleep(0.05)
    assert "answer analyst=planner epsilon=0.1 outcome=ok" in caplog.text
    assert "analyst=planner" in caplog.text and "outcome=ended" in caplog.text
    assert secret_value not in caplog.text


def _self_signed(folder: Path) -> ssl.SSLContext:
    cert, key = folder / "server.crt", folder / "server.key"
    subprocess.run(["openssl", "req", "-x509", "-newkey", "rsa:2048", "-nodes", "-days", "1",
                    "-subj", "/CN=localhost", "-keyout", str(key), "-out", str(cert)],
                   check=True, capture_output=True, timeout=60)
    context = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
    context.load_cert_chain(str(cert), str(key))
    return context


@pytest.mark.skipif(shutil.which("openssl") is None, reason="openssl is needed to make a cert")
def test_tls_when_a_certificate_is_configured(engine: FakeEngine, tmp_path: Path) -> None:
    host, port, stop = start_in_thread(engine, ssl_context=_self_signed(tmp_path))
    try:
        with psycopg.connect(dsn((host, port), sslmode="require"), autocommit=True) as conn:
            assert conn.info.pgconn.ssl_in_use
            assert conn.execute(COUNT).fetchone()
        # Plaintext sent along with the SSLRequest would be read as if encrypted: refused.
        raw = socket.create_connection((host, port), timeout=5)
        raw.sendall(codec.SSLRequest().encode() + codec.StartupMessage({"user": "x"}).encode())
        data = b""
        while chunk := raw.recv(4096):
            data += chunk
        assert b"08P01" in data and b"unencrypted data" in data
        raw.close()
    finally:
        stop()


def test_an_extended_error_is_sent_without_waiting_for_sync(server) -> None:
    client = RawClient(server)
    client.login()
    # asyncpg's way: Parse, Describe, Flush, and wait; the error must come back now.
    client.send(codec.Parse("s", "SELECT * FROM elsewhere").encode()
                + codec.Describe("S", "s").encode() + codec.Flush().encode())
    got = client.until(codec.ErrorResponse)
    assert got[-1].get("C") == "0A000"
    client.send(codec.Sync().encode())
    assert client.until(codec.ReadyForQuery)[-1].status == "I"
    client.close()


def test_run_server_stops_cleanly_on_sigterm() -> None:
    import signal
    import sys

    with socket.socket() as probe:  # a free port for the child to take
        probe.bind(("127.0.0.1", 0))
        port = probe.getsockname()[1]
    repo = str(Path(__file__).resolve().parents[1])
    script = ("from tests.test_wire_fakes import FakeEngine\n"
              "from proxy.wire.server import run_server\n"
              f"run_server(FakeEngine(), host='127.0.0.1', port={port})\n")
    child = subprocess.Popen([sys.executable, "-c", script], cwd=repo, stderr=subprocess.PIPE,
                             text=True)
    try:
        deadline = time.monotonic() + 20
        while True:
            try:
                conn = psycopg.connect(dsn(("127.0.0.1", port)), autocommit=True)
                break
            except psycopg.OperationalError:
                if time.monotonic() > deadline or child.poll() is not None:
                    raise
                time.sleep(0.1)
        assert conn.execute(COUNT).fetchone()
        child.send_signal(signal.SIGTERM)
        assert child.wait(15) == 0
        with pytest.raises(psycopg.OperationalError):
            conn.execute(COUNT)
        conn.close()
        log = child.stderr.read()
        assert "stopped" in log and "outcome=server shutting down" in log
        assert "Traceback" not in log
    finally:
        if child.poll() is None:
            child.kill()
            child.wait()
