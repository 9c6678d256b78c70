"""A longer fuzz run of the wire front than the test suite's (tests/test_wire_fuzz.py).

    .venv/bin/python benchmarks/fuzz_wire.py [--seconds 120] [--seed N]

Serves the fake engine of the wire tests on a loopback port (no database needed) and sends it
random and mutated protocol input (tests/wire_fuzzing.py), one connection per case, until the
time is up. Stops at the first malformed answer or internal error and prints the case; at the
end checks that a healthy client is still answered and prints resident memory every tenth of
the run, so growth shows.
"""

from __future__ import annotations

import argparse
import random
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

import psycopg  # noqa: E402

from proxy.wire.server import start_in_thread  # noqa: E402
from tests.test_wire_fakes import FakeEngine, dsn  # noqa: E402
from tests.test_wire_fuzz import FUZZ_LIMITS, resident_bytes  # noqa: E402
from tests.wire_fuzzing import BadAnswer, make_case, run_case  # noqa: E402


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=120.0)
    parser.add_argument("--seed", type=int, default=int(time.time()))
    args = parser.parse_args()
    host, port, stop = start_in_thread(FakeEngine(budget=10**9), limits=FUZZ_LIMITS,
                                       max_message_bytes=64 * 1024)
    rng = random.Random(args.seed)
    print(f"seed {args.seed}, {args.seconds:.0f} s, resident {resident_bytes() / 2**20:.1f} MiB")
    started = time.monotonic()
    cases = answers = 0
    next_report = args.seconds / 10
    try:
        while time.monotonic() - started < args.seconds:
            case = make_case(rng)
            try:
                answers += run_case((host, port), case, quiet_seconds=0.02)
            except BadAnswer as bad:
                print(f"FAILED after {cases} cases: {bad}\ncase: {case!r}")
                return 1
            cases += 1
            if time.monotonic() - started >= next_report:
                print(f"{time.monotonic() - started:6.0f} s  {cases:7d} cases  "
                      f"{answers:8d} answers  resident {resident_bytes() / 2**20:.1f} MiB")
                next_report += args.seconds / 10
        with psycopg.connect(dsn((host, port)), autocommit=True) as conn:
            assert conn.execute("SELECT count(*) FROM households").fetchone()
        print(f"healthy after {cases} cases ({cases / args.seconds:.0f}/s)")
        return 0
    finally:
        stop()


if __name__ == "__main__":
    sys.exit(main())
