"""A longer fuzz run of the analyser than the test suite's: the same generated statements and
the same property (tests/test_analyse_fuzz.py), with many more examples.

    .venv/bin/python benchmarks/fuzz_analyse.py [--examples 20000] [--seed 1]

Prints how many statements were refused (by SQLSTATE) and how many planned; a violation of the
property stops the run with hypothesis's smallest failing statement.
"""

from __future__ import annotations

import argparse
import sys
import time
from collections import Counter
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from hypothesis import HealthCheck, given, seed, settings  # noqa: E402

from proxy.errors import HushError  # noqa: E402
from proxy.sql.analyse import analyse  # noqa: E402
from tests.test_analyse import POLICIES  # noqa: E402
from tests.test_analyse_fuzz import check_statement, statements  # noqa: E402


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--examples", type=int, default=20_000)
    parser.add_argument("--seed", type=int, default=1)
    args = parser.parse_args()
    if not 1 <= args.examples <= 10_000_000:
        parser.error("examples must be 1..10000000")
    outcomes: Counter[str] = Counter()
    began = time.perf_counter()

    @seed(args.seed)
    @settings(max_examples=args.examples, deadline=None, database=None,
              suppress_health_check=list(HealthCheck))
    @given(statements)
    def run(sql: str) -> None:
        check_statement(sql)
        try:
            analyse(sql, POLICIES, "planner")
            outcomes["planned"] += 1
        except HushError as error:
            outcomes[error.sqlstate] += 1

    run()
    print(f"{sum(outcomes.values())} statements in {time.perf_counter() - began:.0f} s, "
          "property held for all:")
    for outcome, count in outcomes.most_common():
        print(f"  {outcome:>8}  {count}")


if __name__ == "__main__":
    main()
