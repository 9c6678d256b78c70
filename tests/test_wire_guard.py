"""What a client may hold or try for free: logins in progress, sessions, failed logins, refused
statements, long statements, unknown messages (proxy/wire/guard.py and its use by the server)."""

from __future__ import annotations

import re
import socket
import threading
import time
from types import SimpleNamespace
from typing import Any, Iterator

import psycopg
import pytest

from proxy.policy import Connections
from proxy.wire import codec, session, statements
from proxy.wire.auth import make_verifier
from proxy.wire.cache import SizedCache
from proxy.wire.guard import (REFUSAL_UNIT_BYTES, Buckets, ConnectionGate, LoginThrottle,
                              address_key, refusal_cost)
from proxy.wire.server import start_in_thread
from tests.test_wire_fakes import ANALYST, PASSWORD, FakeEngine, RawClient, dsn
from tests.test_wire_fakes import engine, server  # noqa: F401  (fixtures)

ADMIN, ADMIN_PASSWORD = "auditor", "admin horse"
COUNT = "SELECT count(*) FROM households"
REFUSED = "SELECT * FROM elsewhere"  # the fake engine refuses it with 0A000


class Clock:
    def __init__(self) -> None:
        self.now = 1000.0

    def __call__(self) -> float:
        return self.now


# ---------------------------------------------------------------- buckets and the gate

def test_buckets_refill_and_may_go_below_zero() -> None:
    clock = Clock()
    buckets: Buckets[str] = Buckets(3, 2.0, clock=clock)
    assert buckets.wait("a") == 0.0
    for _ in range(3):
        buckets.take("a")
    assert buckets.wait("a") == pytest.approx(2.0)  # one token back after 2 s
    assert buckets.wait("b") == 0.0  # keys are apart
    buckets.take("a", 5)  # a cost above what is left: the balance goes to -5
    assert buckets.wait("a", 10) == pytest.approx(16.0)  # back to full (3) takes 8 tokens
    clock.now += 16.0
    assert buckets.wait("a", 10) == 0.0
    buckets.give_back("a", 100)
    assert buckets.balance("a") == 3  # never above the capacity
    assert len(buckets) == 0  # full buckets are not stored


def test_bucket_tables_stay_bounded() -> None:
    clock = Clock()
    buckets: Buckets[int] = Buckets(2, 1.0, most_keys=50, clock=clock)
    for key in range(500):
        buckets.take(key)
    assert len(buckets) <= 50


def test_login_throttle_counts_addresses_and_names_and_forgives_success() -> None:
    clock = Clock()
    throttle = LoginThrottle(Connections(failed_logins_allowed=2, seconds_per_failed_login=10),
                             clock=clock)
    for _ in range(2):
        assert throttle.wait("10.0.0.1", "planner") == 0.0
        throttle.start("10.0.0.1", "planner")
    assert throttle.wait("10.0.0.1", "someone") == pytest.approx(10.0)  # the address is spent
    assert throttle.wait("10.0.0.2", "planner") == pytest.approx(10.0)  # so is the account
    assert throttle.wait("10.0.0.2", "someone") == 0.0
    for _ in range(5):  # successful logins cost nothing
        throttle.start("10.0.0.2", "someone")
        throttle.succeeded("10.0.0.2", "someone")
    assert throttle.wait("10.0.0.2", "someone") == 0.0


def test_addresses_are_counted_by_ipv4_or_ipv6_64() -> None:
    assert address_key(("192.0.2.7", 5432)) == "192.0.2.7"
    assert address_key(("2001:db8:1:2::5", 1, 0, 0)) == address_key(("2001:db8:1:2:ffff::9", 1))
    assert address_key(("2001:db8:1:2::5", 1)) != address_key(("2001:db8:1:3::5", 1))
    assert address_key(("::ffff:192.0.2.7", 1)) == "192.0.2.7"


def test_the_gate_drops_the_oldest_login_of_the_busiest_address() -> None:
    gate: ConnectionGate[str] = ConnectionGate(Connections(
        most_logins_in_progress=4, most_logins_in_progress_per_address=3))
    assert gate.arrive("a1", "A") == [] and gate.arrive("a2", "A") == []
    assert gate.arrive("a3", "A") == []
    assert gate.arrive("a4", "A") == ["a1"]  # the address's own oldest
    assert gate.arrive("b1", "B") == []
    assert gate.arrive("c1", "C") == ["a2"]  # the total is full: the busiest address pays
    gate.open_session("a3")
    assert not gate.is_logging_in("a3") and gate.sessions == 1 and gate.logging_in == 3
    gate.leave("a3")
    gate.leave("b1")
    assert gate.sessions == 0 and gate.logging_in == 2


def test_the_gate_keeps_sessions_for_administrators() -> None:
    gate: ConnectionGate[str] = ConnectionGate(Connections(most_sessions=3,
                                                           admin_sessions_kept=1))
    for conn in ("s1", "s2"):
        assert gate.session_refusal(admin=False) is None
        gate.open_session(conn)
    assert "reserved for administrators" in (gate.session_refusal(admin=False) or "")
    assert gate.session_refusal(admin=True) is None
    gate.open_session("admin")
    assert gate.session_refusal(admin=True) == "too many connections"


def test_refusal_cost_grows_with_the_text() -> None:
    assert refusal_cost("SELECT 1") == 1
    assert refusal_cost("x" * (3 * REFUSAL_UNIT_BYTES)) == 4


# ---------------------------------------------------------------- through a running server

@pytest.fixture
def engine_with_admin() -> FakeEngine:
    engine = FakeEngine()
    engine.policies.admins = {ADMIN: SimpleNamespace(password=make_verifier(ADMIN_PASSWORD),
                                                       disabled=False)}
    return engine


def _serve(engine: FakeEngine, **limits: Any) -> Iterator[tuple[str, int]]:
    host, port, stop = start_in_thread(engine, limits=Connections(**limits))
    try:
        yield host, port
    finally:
        stop()


def _refusal(address: tuple[str, int], user: str, password: str) -> codec.ErrorResponse:
    """The error ending a login (libpq gives no SQLSTATE for those: a raw client does)."""
    client = RawClient(address)
    try:
        got = client.login(user=user, password=password)
    finally:
        client.close()
    assert isinstance(got[-1], codec.ErrorResponse), got
    return got[-1]


def _said(error: codec.ErrorResponse) -> str:
    return f"{error.get('M')} / {error.get('H')}"


def test_idle_connections_do_not_block_an_administrator(engine_with_admin: FakeEngine) -> None:
    # A login timeout far longer than the test: nothing here waits for idle sockets to expire.
    for address in _serve(engine_with_admin, login_timeout_seconds=120):
        idle = [socket.create_connection(address, timeout=5) for _ in range(200)]
        try:
            started = time.monotonic()
            with psycopg.connect(dsn(address, user=ADMIN, password=ADMIN_PASSWORD),
                                 autocommit=True) as conn:
                assert conn.execute("SHOW hushql.epsilon").fetchone() == ("0.1",)
            with psycopg.connect(dsn(address), autocommit=True) as conn:
                assert conn.execute(COUNT).fetchone()
            assert time.monotonic() - started < 60
            # The oldest idle sockets were dropped, with a reason.
            oldest = RawClient.__new__(RawClient)
            oldest.sock, oldest.reader = idle[0], codec.BackendReader()
            msg = oldest.receive()
            assert isinstance(msg, codec.ErrorResponse) and msg.get("C") == "53300"
        finally:
            for sock in idle:
                sock.close()


def test_a_silent_connection_is_closed_at_the_login_timeout(engine_with_admin: FakeEngine
                                                             ) -> None:
    for address in _serve(engine_with_admin, login_timeout_seconds=0.5):
        client = RawClient(address)
        msg = client.receive()  # sent nothing: the server speaks first, then closes
        assert isinstance(msg, codec.ErrorResponse) and msg.get("C") == "08P01"
        assert "too long" in msg.get("M")
        assert client.closed()
        client.close()


def test_sessions_are_kept_for_administrators(engine_with_admin: FakeEngine) -> None:
    for address in _serve(engine_with_admin, most_sessions=3, admin_sessions_kept=1):
        first, second = psycopg.connect(dsn(address)), psycopg.connect(dsn(address))
        try:
            refused = _refusal(address, ANALYST, PASSWORD)
            assert refused.get("C") == "53300"
            assert "reserved for administrators" in refused.get("M")
            with psycopg.connect(dsn(address, user=ADMIN, password=ADMIN_PASSWORD)) as admin:
                assert _refusal(address, ADMIN, ADMIN_PASSWORD).get("M") == "too many connections"
                admin.close()
        finally:
            first.close()
            second.close()


def test_failed_logins_are_throttled_alike_for_known_and_unknown_names(
        engine_with_admin: FakeEngine) -> None:
    for address in _serve(engine_with_admin, failed_logins_allowed=3,
                          seconds_per_failed_login=60):
        for _ in range(5):  # successful logins cost nothing
            psycopg.connect(dsn(address)).close()
        for user in (ANALYST, "nobody", ANALYST):
            refused = _refusal(address, user, "wrong")
            assert refused.get("C") == "28P01" and refused.get("H") is None
        # The address has spent its failures: refused before the exchange, even with the right
        # password, with the same answer whether the account exists or not.
        known = _refusal(address, ANALYST, PASSWORD)
        unknown = _refusal(address, "nobody", PASSWORD)
        assert known.get("C") == unknown.get("C") == "28P01"
        assert "try again in" in known.get("H")
        shown = [re.sub(r"\d+ seconds", "N seconds", _said(e)) for e in (known, unknown)]
        assert shown[1] == shown[0].replace('"planner"', '"nobody"')
        raw = RawClient(address)
        raw.send(codec.StartupMessage({"user": ADMIN, "database": "demo"}).encode())
        first = raw.receive()  # no SASL exchange is started at all
        assert isinstance(first, codec.ErrorResponse) and first.get("C") == "28P01"
        raw.close()


@pytest.fixture
def short_refusal_wait(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(session, "LONGEST_REFUSAL_WAIT_SECONDS", 0.05)


def test_refused_statements_cost_time_per_account(engine_with_admin: FakeEngine,
                                                  short_refusal_wait: None) -> None:
    for address in _serve(engine_with_admin, refusals_allowed=3, seconds_per_refusal=60):
        with psycopg.connect(dsn(address), autocommit=True) as conn:
            for _ in range(10):  # accepted statements cost nothing
                assert conn.execute(COUNT).fetchone()
            for _ in range(3):
                with pytest.raises(psycopg.errors.FeatureNotSupported):
                    conn.execute(REFUSED)
            with pytest.raises(psycopg.errors.ConfigurationLimitExceeded) as caught:
                conn.execute(REFUSED)
            assert "refused statements" in str(caught.value)
            assert re.search(r"wait \d+ seconds", caught.value.diag.message_hint or "")
            calls = len(engine_with_admin.calls)
            with pytest.raises(psycopg.errors.ConfigurationLimitExceeded):
                conn.execute(COUNT)  # nothing is read while the allowance is spent
            assert len(engine_with_admin.calls) == calls
        with psycopg.connect(dsn(address), autocommit=True) as again:  # per account, not session
            with pytest.raises(psycopg.errors.ConfigurationLimitExceeded):
                again.execute(COUNT)


def test_a_long_statement_costs_in_proportion(engine_with_admin: FakeEngine,
                                              short_refusal_wait: None) -> None:
    long_refused = REFUSED + " WHERE " + " OR ".join(["x = 1"] * (REFUSAL_UNIT_BYTES // 4))
    assert refusal_cost(long_refused) >= 3
    for address in _serve(engine_with_admin, refusals_allowed=3, seconds_per_refusal=60):
        with psycopg.connect(dsn(address), autocommit=True) as conn:
            # Refused as too long (54000, the statement limit) or as a shape (0A000): either way
            # its cost is in proportion to its length.
            with pytest.raises((psycopg.errors.FeatureNotSupported,
                                psycopg.errors.ProgramLimitExceeded)):
                conn.execute(long_refused)
            with pytest.raises(psycopg.errors.ConfigurationLimitExceeded):
                conn.execute(COUNT)


def test_long_statements_are_split_on_the_parse_lane(server, monkeypatch) -> None:
    threads: list[str] = []
    real_split = statements.split

    def recording(sql: str) -> Any:
        threads.append(threading.current_thread().name)
        return real_split(sql)

    monkeypatch.setattr(statements, "split", recording)
    long_count = COUNT + " WHERE " + " OR ".join(["occupants = 1"] * 200)
    with psycopg.connect(dsn(server), autocommit=True) as conn:
        with psycopg.ClientCursor(conn) as cur:  # the simple protocol, then Parse
            cur.execute(COUNT)
            cur.execute(long_count)
        conn.execute(long_count)
    assert len(threads) == 3
    assert not threads[0].startswith("hushql-parse")
    assert threads[1].startswith("hushql-parse") and threads[2].startswith("hushql-parse")


def test_the_split_cache_is_bounded_in_bytes() -> None:
    cache: SizedCache[str, tuple] = SizedCache(statements.estimated_bytes, most_bytes=200_000,
                                               most_entry_bytes=50_000)
    for i in range(300):
        sql = f"SELECT count(*) FROM households WHERE occupants > {i}"
        cache.put(sql, statements.split(sql))
    assert 0 < cache.bytes <= 200_000 and len(cache) < 300
    heavy = COUNT + " WHERE " + " OR ".join(f"occupants = {i}" for i in range(300))
    cache.put(heavy, statements.split(heavy))
    assert cache.get(heavy) is None  # heavier than one entry may be
    # The module's own cache never keeps a text longer than MAX_CACHED_TEXT.
    huge = COUNT + " WHERE " + " OR ".join(["occupants = 1"] * 2000)
    assert len(huge) > statements.MAX_CACHED_TEXT
    statements.split(huge)
    assert statements._SPLIT_CACHE.get(huge) is None


# ---------------------------------------------------------------- small things

@pytest.mark.parametrize("command", ["CHECKPOINT", "LISTEN hushql", "UNLISTEN *",
                                     "NOTIFY hushql, 'x'"])
def test_server_commands_are_refused_by_name(server, command: str) -> None:
    name = command.split()[0]
    with psycopg.connect(dsn(server), autocommit=True) as conn:
        with pytest.raises(psycopg.errors.FeatureNotSupported) as caught:
            conn.execute(command)
        assert caught.value.diag.message_primary == f"{name} is not supported"
        assert caught.value.diag.message_hint
    client = RawClient(server)  # statements before it in one message still run
    client.login()
    client.send(codec.Query(f"SHOW hushql.epsilon; {command}").encode())
    got = client.until(codec.ReadyForQuery)
    assert [type(m).__name__ for m in got] == ["RowDescription", "DataRow", "CommandComplete",
                                               "ErrorResponse", "ReadyForQuery"]
    client.close()


def test_an_unknown_message_type_is_answered_before_its_body_arrives(server) -> None:
    client = RawClient(server)
    client.login()
    client.send(b"z")  # announces nothing more; the server must not wait for a length
    msg = client.receive()
    assert isinstance(msg, codec.ErrorResponse)
    assert (msg.get("S"), msg.get("C")) == ("FATAL", "08P01")
    assert "invalid frontend message type 122" in msg.get("M")
    assert client.closed()
    client.close()
