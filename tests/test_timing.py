"""Time is the proxy's: its own timeout for every query, and a table's steady answer time.

On real PostgreSQL with the clinic tables. A slow backend query is made by wrapping the
backend's run so that it runs pg_sleep under exactly the timeout the engine asked for.
"""

from __future__ import annotations

import threading
import time
from decimal import Decimal
from pathlib import Path

import psycopg
import pytest

from proxy.backend import Backend, QueryControl
from proxy.engine import Engine
from proxy.errors import HushError
from proxy.ledger import Ledger
from proxy.policy import PolicyError, load_policies
from tests.policy_fixtures import load_clinic, write_policies

STEADY_MS = 400
COUNT = "SELECT COUNT(*) FROM people"


@pytest.fixture(scope="module")
def clinic_dsn(module_dsn: str) -> str:
    load_clinic(module_dsn, people=300)
    return module_dsn


def _policies(folder: Path, *, steady_ms: int | None = None, timeout_ms: int | None = None):
    root = write_policies(folder)
    if steady_ms is not None:
        people = root / "tables" / "people.toml"
        people.write_text(people.read_text().replace(
            'source = "clinic.people"', f'source = "clinic.people"\n\n[timing]\nanswer_after_ms = '
            f'{steady_ms}\n', 1))
    if timeout_ms is not None:
        access = root / "access.toml"
        access.write_text(access.read_text() + f"\n[limits]\nquery_timeout_ms = {timeout_ms}\n")
    return load_policies(root)


@pytest.fixture
def make_engine(clinic_dsn: str, tmp_path: Path, request):
    made: list[Engine] = []

    def make(**options) -> Engine:
        schema = f"ledger_timing_{len(made)}_{abs(hash(request.node.name)) % 10**8}"
        engine = Engine(_policies(tmp_path / f"p{len(made)}", **options),
                        Backend(clinic_dsn, pool_size=2), Ledger(clinic_dsn, schema=schema))
        made.append(engine)
        return engine

    yield make
    for engine in made:
        engine.close()


def _slow_backend(engine: Engine, monkeypatch, seconds: float) -> list[int | None]:
    """Make every backend query sleep ``seconds`` under the timeout the engine gives; returns
    the list of timeouts asked for."""
    asked: list[int | None] = []
    real_run = engine.backend.run

    def slow(sql, control=None, settings=None, *, timeout_ms=None):
        asked.append(timeout_ms)
        real_run(f"SELECT pg_sleep({seconds})", control, None, timeout_ms=timeout_ms)
        return real_run(sql, control, settings, timeout_ms=timeout_ms)

    monkeypatch.setattr(engine.backend, "run", slow)
    return asked


def _timed(call) -> tuple[float, object]:
    start = time.monotonic()
    try:
        result: object = call()
    except HushError as error:
        result = error
    return time.monotonic() - start, result


def _outcomes(engine: Engine, dsn: str) -> list[str]:
    with psycopg.connect(dsn) as conn:
        return [row[0] for row in conn.execute(
            f"SELECT outcome FROM {engine.ledger.schema}.charges ORDER BY id").fetchall()]


def test_the_proxys_timeout_ends_a_slow_query_and_the_charge_stands(make_engine, monkeypatch,
                                                                       clinic_dsn) -> None:
    engine = make_engine(timeout_ms=300)
    asked = _slow_backend(engine, monkeypatch, 5)
    took, result = _timed(lambda: engine.answer("tester", COUNT, epsilon=Decimal("0.5")))
    assert isinstance(result, HushError) and result.sqlstate == "57014"
    assert asked == [300] and took < 3
    assert engine.remaining("tester") == Decimal("999.5")
    assert _outcomes(engine, clinic_dsn) == ["cancelled"]


def test_steady_answers_and_timeouts_come_at_the_same_time(make_engine, monkeypatch,
                                                            clinic_dsn) -> None:
    engine = make_engine(steady_ms=STEADY_MS)
    took_fast, answer = _timed(lambda: engine.answer("tester", COUNT, epsilon=Decimal("0.5")))
    assert not isinstance(answer, HushError)
    asked = _slow_backend(engine, monkeypatch, 5)
    took_slow, error = _timed(lambda: engine.answer("tester", COUNT, epsilon=Decimal("0.5"),
                                                         fresh=True))
    assert isinstance(error, HushError) and error.sqlstate == "57014"
    assert f"exactly {STEADY_MS} ms" in error.message
    assert asked and 0 < asked[0] <= STEADY_MS  # the backend's timeout is what is left
    # Both no earlier than the steady time; the slack allows for a loaded test machine.
    for took in (took_fast, took_slow):
        assert STEADY_MS / 1000 <= took < STEADY_MS / 1000 + 0.3, took
    assert engine.remaining("tester") == Decimal("999")
    assert _outcomes(engine, clinic_dsn) == ["answered", "cancelled"]


def test_without_steady_time_a_fast_answer_is_not_held(make_engine) -> None:
    # The companion: the same answer on a table without [timing] comes well before 400 ms.
    engine = make_engine()
    engine.answer("tester", COUNT, epsilon=Decimal("0.5"))  # warm the plan cache and the pools
    took, answer = _timed(lambda: engine.answer("tester", COUNT, epsilon=Decimal("0.5"),
                                                    fresh=True))
    assert not isinstance(answer, HushError) and took < STEADY_MS / 1000


def test_a_cancel_ends_the_steady_wait_at_once(make_engine) -> None:
    engine = make_engine(steady_ms=3000)
    control = QueryControl()
    threading.Timer(0.2, control.cancel).start()
    took, error = _timed(lambda: engine.answer("tester", COUNT, epsilon=Decimal("0.5"),
                                               control=control))
    assert isinstance(error, HushError) and error.sqlstate == "57014"
    assert took < 2


def test_refusals_are_not_held(make_engine) -> None:
    engine = make_engine(steady_ms=3000)
    took, error = _timed(lambda: engine.answer("tester", "SELECT * FROM people"))
    assert isinstance(error, HushError) and error.sqlstate == "0A000" and took < 2


def test_a_bad_steady_time_is_a_policy_problem(tmp_path: Path) -> None:
    with pytest.raises(PolicyError) as caught:
        _policies(tmp_path, steady_ms=0)
    assert "tables/people.toml: timing.answer_after_ms: must be a whole number of milliseconds" \
        in "\n".join(caught.value.problems)
