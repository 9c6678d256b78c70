"""Removing one individual moves each noise-free aggregate by no more than the sensitivity the
engine claims (L1 over all cells), on real PostgreSQL, for row tables and for tables with
individuals owning many rows in many cells.

The random choice of cells per individual is keyed by a per-query salt; the test fixes it, so
both neighbouring databases make the same choice for every remaining individual, which is what
the privacy argument in proxy.sql.rewrite couples on.
"""

from __future__ import annotations

import psycopg
import pytest

from proxy.policy import load_policies
from proxy.sql.analyse import analyse
from proxy.sql.rewrite import PICK_SALT_SETTING, rewrite
from tests.policy_fixtures import load_clinic, write_policies


@pytest.fixture(scope="module")
def clinic(module_dsn: str, tmp_path_factory: pytest.TempPathFactory):
    load_clinic(module_dsn, people=600)
    policies = load_policies(write_policies(tmp_path_factory.mktemp("policies"),
                                            groups_cap=2, rows_cap=3))
    with psycopg.connect(module_dsn) as conn:
        yield conn, policies


def noise_free(conn: psycopg.Connection, sql: str) -> list[list[int]]:
    """Measure vectors (one list per measure, over cells) of the rewritten query."""
    conn.execute("SELECT set_config(%s, 'neighbour-test', true)", (PICK_SALT_SETTING,))
    return [list(map(int, column)) for column in zip(*conn.execute(sql).fetchall())]


QUERIES = [
    ("visits", "SELECT COUNT(*), SUM(minutes), COUNT(DISTINCT person_id) FROM visits"),
    ("visits", "SELECT ward, COUNT(*), SUM(minutes), COUNT(DISTINCT person_id) FROM visits GROUP BY ward"),
    ("visits", "SELECT ward, SUM(fee), AVG(fee) FROM visits GROUP BY ward"),
    ("visits", "SELECT date_trunc('month', visited) AS m, ward, COUNT(*), AVG(minutes) "
               "FROM visits WHERE minutes > 5 GROUP BY 1, 2"),
    ("people", "SELECT ward, COUNT(*), SUM(weight), SUM(age) FROM people GROUP BY ward"),
    ("people", "SELECT age, COUNT(*) FROM people GROUP BY age"),
]


@pytest.mark.parametrize("exact", [frozenset(), frozenset({"weight", "fee"})], ids=["per-row", "exact"])
@pytest.mark.parametrize("table, sql", QUERIES, ids=[q[1][:50] for q in QUERIES])
def test_one_individual_moves_each_measure_at_most_its_sensitivity(
        clinic, table: str, sql: str, exact: frozenset[str]) -> None:
    conn, policies = clinic
    plan = analyse(sql, policies, "tester")
    rewritten = rewrite(plan, exact)
    keys = len(plan.keys)
    with conn.transaction():
        full = noise_free(conn, rewritten.sql)[keys:]
    # The heaviest individuals (most rows) and a few ordinary ones.
    people = [row[0] for row in conn.execute(
        f"SELECT person_id FROM clinic.{table} GROUP BY person_id "
        f"ORDER BY count(*) DESC, person_id LIMIT 6").fetchall()] + [3, 50, 301]
    largest_move = [0] * len(plan.measures)
    for person in people:
        with conn.transaction(force_rollback=True):
            conn.execute(f"DELETE FROM clinic.{table} WHERE person_id = %s", (person,))
            without = noise_free(conn, rewritten.sql)[keys:]
        for n, (a, b) in enumerate(zip(full, without)):
            move = sum(abs(x - y) for x, y in zip(a, b))
            assert move <= rewritten.sensitivities[n], (person, plan.measures[n])
            largest_move[n] = max(largest_move[n], move)
    # The test would catch a broken bound: some individual does move every measure.
    assert all(m > 0 for m in largest_move)


def test_claimed_sensitivities_follow_the_caps(clinic) -> None:
    _, policies = clinic
    grouped = rewrite(analyse(
        "SELECT ward, COUNT(*), SUM(minutes), COUNT(DISTINCT person_id) FROM visits GROUP BY ward",
        policies, "tester"))
    # groups_cap 2 of 3 cells, rows_cap 3, minutes in [0, 60]: g*r, g*r*60, g.
    assert grouped.sensitivities == (2 * 3, 2 * 3 * 60, 2)
    single = rewrite(analyse("SELECT COUNT(*), SUM(minutes) FROM visits", policies, "tester"))
    assert single.sensitivities == (3, 3 * 60)  # one cell: g is replaced by 1
    rows = rewrite(analyse("SELECT ward, COUNT(*), SUM(weight) FROM people GROUP BY ward",
                           policies, "tester"))
    # Row table: count and histogram sensitivity 1 (common practice); weight in [-5, 120] with
    # step 0.5 is 240 units at most.
    assert rows.sensitivities == (1, 240)


def test_each_individual_reaches_at_most_groups_cap_cells(clinic) -> None:
    conn, policies = clinic
    plan = analyse("SELECT ward, COUNT(DISTINCT person_id) FROM visits GROUP BY ward", policies, "tester")
    rewritten = rewrite(plan)
    with conn.transaction():
        counts = noise_free(conn, rewritten.sql)[1]
    people = conn.execute("SELECT count(DISTINCT person_id) FROM clinic.visits "
                          "WHERE ward IN ('north','south','east')").fetchone()[0]
    # Each counted person lands in at most 2 of the 3 wards, and everyone lands somewhere.
    assert people <= sum(counts) <= 2 * people
    spread = conn.execute("SELECT count(*) FROM (SELECT person_id FROM clinic.visits WHERE ward IN "
                          "('north','south','east') GROUP BY person_id HAVING count(DISTINCT ward) = 3) s"
                          ).fetchone()[0]
    assert spread > 0 and sum(counts) < sum(
        conn.execute("SELECT count(DISTINCT person_id) FROM clinic.visits WHERE ward = %s", (w,)).fetchone()[0]
        for w in ("north", "south", "east"))
