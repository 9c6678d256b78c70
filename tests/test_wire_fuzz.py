"""Random and mutated protocol messages against a running server (bounded for CI; the longer
run is benchmarks/fuzz_wire.py): every answer is well-formed and never an internal error, a
healthy client is still answered afterwards, and memory stays flat."""

from __future__ import annotations

import random
from typing import Iterator

import psycopg
import pytest

from proxy.policy import Connections
from proxy.wire.server import start_in_thread
from tests.test_wire_fakes import FakeEngine, dsn
from proxy.wire import codec
from tests.wire_fuzzing import BadAnswer, Case, make_case, run_case

CASES_PER_ROUND = 80
# Generous limits: the fuzzer logs in and fails logins far more often than anyone should.
FUZZ_LIMITS = Connections(failed_logins_allowed=1_000_000, refusals_allowed=1_000_000)


def resident_bytes() -> int:
    """This process's resident memory (Linux /proc)."""
    with open("/proc/self/status") as status:
        for line in status:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) * 1024
    raise RuntimeError("no VmRSS")


@pytest.fixture
def fuzz_server() -> Iterator[tuple[str, int]]:
    host, port, stop = start_in_thread(FakeEngine(budget=10**9), limits=FUZZ_LIMITS,
                                       max_message_bytes=64 * 1024)
    try:
        yield host, port
    finally:
        stop()


def test_fuzzed_messages_leave_the_server_healthy_and_memory_flat(fuzz_server) -> None:
    rng = random.Random(20261202)  # fixed: a failure can be replayed
    sizes = []
    for _ in range(3):  # the first round warms caches; the later ones must not grow
        for _ in range(CASES_PER_ROUND):
            run_case(fuzz_server, make_case(rng), quiet_seconds=0.04)
        with psycopg.connect(dsn(fuzz_server), autocommit=True) as conn:
            assert conn.execute("SELECT count(*) FROM households").fetchone()
        sizes.append(resident_bytes())
    assert sizes[2] - sizes[1] < 16 * 1024 * 1024, sizes


def test_the_fuzz_check_catches_an_internal_error(fuzz_server) -> None:
    # The fake engine fails with an unexpected exception on "explode": the check must see it.
    case = Case(True, codec.Query("SELECT explode FROM households").encode())
    with pytest.raises(BadAnswer):
        run_case(fuzz_server, case)
    assert run_case(fuzz_server, Case(True, codec.Query("SHOW hushql.epsilon").encode())) > 0
