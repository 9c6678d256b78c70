"""Few rows per individual, held by the database (proxy.sql.rewrite, module notes 8).

When the backend enforces a unique key holding each individual to K <= most_rows counted rows
(the individual column alone: K = 1; with a grouped date: K days) and no bound is chosen, the
rewrite skips the per-individual steps. Checked here on real PostgreSQL: which constraints
count (only enforced, non-partial, immediate ones on plain columns of an ordinary table, whose
other columns are grouped by over few enough declared values of a type taking no others), that
the fast query's noise-free cells equal the per-individual query's and PostgreSQL's own answer,
that removing one household moves each measure by no more than the sensitivity stated, and that
the engine's EXPLAIN and notes say what is applied.
"""

from __future__ import annotations

import textwrap
from decimal import Decimal
from pathlib import Path

import psycopg
import pytest

from proxy.backend import Backend
from proxy.engine import Engine
from proxy.ledger import Ledger
from proxy.policy import Policies, load_policies
from proxy.spark_backend import SparkBackend
from proxy.sql.analyse import analyse
from proxy.sql.rewrite import rewrite, whole_step_columns
from tests.bounds_helpers import run_with_bounds
from tests.policy_fixtures import DUMMY_VERIFIER

# Every table has the same columns; the policy of each differs only in name, source, most_rows
# and bounds. (The daily tables below share its first part.)
HOUSEHOLD = """
table = "{name}"
source = "{schema}.{source}"

[individual]
column = "household_id"
population = "homes"
most_rows = {most_rows}
bounds = "{bounds}"

[columns.household_id]
kind = "integer"
range = [1, 100000]

[columns.district]
kind = "category"
values = ["Northbank", "Old Mill", "Harbourside"]
"""
TABLE = HOUSEHOLD + """
[columns.occupants]
kind = "integer"
range = [1, 8]

[columns.floor_area]
kind = "number"
range = [20, 300]
step = 0.5
"""

# Source relations over the same rows, each with a different (or no) uniqueness on household_id.
# The unique keys the database enforces there, as ``Backend.unique_keys`` should read them.
ALONE = frozenset({frozenset({"household_id"})})
SOURCES = {
    "keyed": (ALONE, "ALTER TABLE homes.keyed ADD PRIMARY KEY (household_id)"),
    "unique_nulls": (ALONE, "ALTER TABLE homes.unique_nulls ADD UNIQUE (household_id)"),
    "plain": (frozenset(), ""),
    "partial": (frozenset(), "CREATE UNIQUE INDEX ON homes.partial (household_id) "
                             "WHERE household_id > 10"),
    # A key of two columns (module notes 8: it holds a household to one row per district).
    "pair": (frozenset({frozenset({"household_id", "district"})}),
             "ALTER TABLE homes.pair ADD UNIQUE (household_id, district)"),
    # Not a key of columns: an expression, a non-default equality, an INCLUDE column.
    "lowered": (frozenset(), "CREATE UNIQUE INDEX ON homes.lowered (household_id, lower(district))"),
    "patterned": (frozenset(), "CREATE UNIQUE INDEX ON homes.patterned "
                               "(household_id, district text_pattern_ops)"),
    "included": (ALONE, "CREATE UNIQUE INDEX ON homes.included (household_id) INCLUDE (district)"),
    "deferred": (frozenset(), "ALTER TABLE homes.deferred ADD UNIQUE (household_id) "
                              "DEFERRABLE INITIALLY IMMEDIATE"),
    # A primary key on the parent, but the child's rows (which it does not cover) are read too.
    "parent": (frozenset(), "ALTER TABLE homes.parent ADD PRIMARY KEY (household_id); "
                            "CREATE TABLE homes.child () INHERITS (homes.parent); "
                            "INSERT INTO homes.child SELECT * FROM homes.parent WHERE household_id < 50"),
    "view": (frozenset(), None),
}
HOUSEHOLDS = 900


def _load(dsn: str) -> None:
    """The same invented households in each source: occupants and floor areas partly outside the
    declared ranges, NULL areas, districts outside the domain; rows without an individual in the
    tables that allow them."""
    with psycopg.connect(dsn, autocommit=True) as conn:
        conn.execute("DROP SCHEMA IF EXISTS homes CASCADE; CREATE SCHEMA homes")
        rows = f"""
            SELECT g AS household_id,
                   (ARRAY['Northbank', 'Old Mill', 'Harbourside', 'Riverside'])[1 + g % 4] AS district,
                   CASE WHEN g % 31 = 0 THEN 12 WHEN g % 37 = 0 THEN 0 ELSE 1 + g % 6 END AS occupants,
                   CASE WHEN g % 23 = 0 THEN NULL WHEN g % 41 = 0 THEN 900.25
                        ELSE 18 + (g * 7) % 250 + (g % 4) * 0.25 END::numeric(6, 2) AS floor_area
            FROM generate_series(1, {HOUSEHOLDS}) AS g"""
        for name, (_, constraint) in SOURCES.items():
            if constraint is None:
                continue
            conn.execute(f"CREATE TABLE homes.{name} AS {rows}")
            if name in ("unique_nulls", "plain"):  # rows of no identifiable household
                conn.execute(f"INSERT INTO homes.{name} SELECT NULL, 'Old Mill', 3, 50 "
                             "FROM generate_series(1, 7)")
            if constraint:
                conn.execute(constraint)
        conn.execute("CREATE VIEW homes.view AS SELECT * FROM homes.keyed")


def _policies(root: Path, tables: dict[str, tuple[object, ...]], text: str = TABLE,
              schema: str = "homes") -> Policies:
    """A policy folder: table name -> (source in ``schema``, most_rows, bounds, and any further
    fields of ``text``) written into ``text``, all granted to ``tester``."""
    (root / "tables").mkdir(parents=True)
    fields = ("source", "most_rows", "bounds", "last")
    for name, values in tables.items():
        (root / "tables" / f"{name}.toml").write_text(
            text.format(name=name, schema=schema, **dict(zip(fields, values))))
    (root / "access.toml").write_text(textwrap.dedent(f"""
        [defaults]
        epsilon_per_query = 1.0
        largest_epsilon_per_query = 100

        [analysts.tester]
        password = "{DUMMY_VERIFIER}"
        budget = 1000
        tables = {list(tables)!r}
        """).replace("'", '"'))
    return load_policies(root)


@pytest.fixture(scope="module")
def homes(module_dsn: str, tmp_path_factory: pytest.TempPathFactory):
    _load(module_dsn)
    policies = _policies(tmp_path_factory.mktemp("policies"), {
        **{name: (name, 1, "chosen") for name in SOURCES},
        "keyed_declared": ("keyed", 3, "declared"),
        "keyed_chosen": ("keyed", 3, "chosen")})
    backend = Backend(module_dsn, pool_size=2)
    engine = Engine(policies, backend, Ledger(module_dsn, schema="ledger_one_row"))
    with psycopg.connect(module_dsn) as conn:
        yield conn, policies, engine
    engine.close()


QUERIES = [
    "SELECT COUNT(*) FROM {t} WHERE occupants = 3",
    "SELECT district, COUNT(*), SUM(occupants), AVG(occupants), COUNT(DISTINCT household_id) "
    "FROM {t} GROUP BY district",
    "SELECT district, SUM(floor_area), COUNT(floor_area) FROM {t} WHERE occupants >= 2 "
    "GROUP BY district",
]

# PostgreSQL's own answer of each query over the rows with a household, clamped as the policy
# declares (occupants is never NULL; floor_area's clamp keeps NULL), one row per declared
# district in domain order (the no-key query has one cell). Sums of floor_area in steps of 0.5,
# rounded once per cell: floor(x + 0.5).
DISTRICTS = "(VALUES (0, 'Northbank'), (1, 'Old Mill'), (2, 'Harbourside')) AS d(i, v)"
AREA = "CASE WHEN floor_area < 20 THEN 20 WHEN floor_area > 300 THEN 300 ELSE floor_area END"
EXACT = [
    "SELECT count(*) FROM homes.{s} WHERE occupants = 3 AND household_id IS NOT NULL",
    f"SELECT count(h.*), coalesce(sum(least(greatest(h.occupants, 1), 8)), 0), count(h.occupants), "
    f"count(DISTINCT h.household_id) FROM {DISTRICTS} LEFT JOIN homes.{{s}} h "
    f"ON h.district = d.v AND h.household_id IS NOT NULL GROUP BY d.i ORDER BY d.i",
    f"SELECT coalesce(floor(sum({AREA}) / 0.5 + 0.5), 0), count(h.floor_area) FROM {DISTRICTS} "
    f"LEFT JOIN homes.{{s}} h ON h.district = d.v AND h.household_id IS NOT NULL "
    f"AND h.occupants >= 2 GROUP BY d.i ORDER BY d.i",
]


def _measures(plan, rows) -> list[tuple[int, ...]]:
    keys = len(plan.keys)
    return [tuple(int(v) for v in row[keys:keys + len(plan.measures)]) for row in rows]


def test_only_an_enforced_key_of_plain_columns_counts(homes) -> None:
    conn, policies, engine = homes
    for name, (keys, _) in SOURCES.items():
        found = engine.backend.unique_keys(f"homes.{name}")
        assert found == keys, name
        unique = keys == ALONE
        prepared = engine.prepare("tester", f"SELECT COUNT(*) FROM {name} WHERE occupants = 3")
        assert bool(prepared.rewritten.held_by) is unique, name
        # The slow path's per-individual totals are in the SQL exactly when it is taken.
        assert ("n_rows" in prepared.rewritten.sql) is not unique, name
    # Declared bounds above one row keep the fast path; a chosen bound could fall below one
    # row's value, so it keeps the per-individual query.
    assert engine.prepare("tester", "SELECT SUM(occupants) FROM keyed_declared") \
        .rewritten.held_rows == 1
    assert not engine.prepare("tester", "SELECT SUM(occupants) FROM keyed_chosen") \
        .rewritten.held_by
    # Spark enforces no constraint: no table takes the fast path there.
    assert SparkBackend.__new__(SparkBackend).unique_keys("homes.keyed") == frozenset()


@pytest.mark.parametrize("exact", [frozenset(), frozenset({"floor_area"})], ids=["per-row", "exact"])
@pytest.mark.parametrize("n", range(len(QUERIES)), ids=[q[:40] for q in QUERIES])
def test_fast_cells_equal_postgresql_and_the_per_individual_query(homes, n: int,
                                                                  exact: frozenset[str]) -> None:
    conn, policies, _ = homes
    for table in ("keyed", "unique_nulls"):
        plan = analyse(QUERIES[n].format(t=table), policies, "tester")
        fast = rewrite(plan, exact, ALONE)
        slow = rewrite(plan, exact)
        assert fast.held_rows == 1 and not slow.held_by
        assert (fast.bounds, fast.declared_sensitivities) == (slow.bounds, slow.declared_sensitivities)
        fast_rows, slow_rows = run_with_bounds(conn, fast), run_with_bounds(conn, slow)
        # Same keys and bound values as the per-individual query, nothing clipped by either
        # (a household whose floor area is NULL loses nothing: module notes, 7).
        keys, measures, count = len(plan.keys), len(plan.measures), len(fast.bounds)
        assert [r[:keys] + r[keys + measures:keys + measures + count] for r in fast_rows] == \
            [r[:keys] + r[keys + measures:keys + measures + count] for r in slow_rows]
        assert all(v == 0 for r in fast_rows + slow_rows for v in r[keys + measures + count:])
        got = _measures(plan, fast_rows)
        if not exact:  # the same rounding (per row): equal cells
            assert got == _measures(plan, slow_rows), table
        expected = conn.execute(EXACT[n].format(s=table)).fetchall()
        if exact or "floor_area" not in QUERIES[n]:  # per cell rounding is PostgreSQL's
            # AVG's count is a count of occupants: the exact query's third column.
            assert got == [tuple(int(v) for v in row) for row in expected], table


def test_one_household_moves_each_measure_at_most_its_stated_sensitivity(homes) -> None:
    conn, policies, _ = homes
    sql = ("SELECT district, COUNT(*), SUM(occupants), SUM(floor_area), "
           "COUNT(DISTINCT household_id) FROM keyed GROUP BY district")
    plan = analyse(sql, policies, "tester")
    rewritten = rewrite(plan, frozenset({"floor_area"}), ALONE)
    assert rewritten.held_rows == 1
    # most_rows 1: R = 1 row, T = 8 occupants and 300 / 0.5 = 600 steps; the row tables' 1 and M.
    sensitivities = rewritten.sensitivities(tuple(b.ceiling for b in rewritten.bounds))
    assert sensitivities == (1, 8, 600, 1)
    # Ordinary households, and ones outside the ranges (12 occupants, 900.25 square metres,
    # no area, 0 occupants) or outside the districts (g % 4 = 3).
    largest = _largest_moves(conn, plan, rewritten, "homes.keyed",
                             (1, 2, 6, 31, 41, 23, 37, 3, 62, 82, 123, 246))
    # The check can fail: the largest moves reach each sensitivity (600 steps from the 900.25
    # area clamped at 300; 8 from the household of 12).
    assert largest == list(sensitivities)


def _largest_moves(conn: psycopg.Connection, plan, rewritten, source: str,
                   households: tuple[int, ...]) -> list[int]:
    """Per measure, the largest L1 move of the noise-free answer when one of ``households``
    is removed from ``source``; each move checked against the stated sensitivity."""
    sensitivities = rewritten.sensitivities(tuple(b.ceiling for b in rewritten.bounds))
    full = _measures(plan, run_with_bounds(conn, rewritten))
    largest = [0] * len(plan.measures)
    for household in households:
        with conn.transaction(force_rollback=True):
            conn.execute(f"DELETE FROM {source} WHERE household_id = %s", (household,))
            without = _measures(plan, run_with_bounds(conn, rewritten))
        for m in range(len(plan.measures)):
            move = sum(abs(a[m] - b[m]) for a, b in zip(full, without))
            assert move <= sensitivities[m], (household, plan.measures[m])
            largest[m] = max(largest[m], move)
    return largest


def test_explain_and_notes_say_the_database_holds_the_bound(homes) -> None:
    _, _, engine = homes
    for table, unique in (("keyed", True), ("plain", False)):
        sql = f"SELECT district, COUNT(*), SUM(occupants) FROM {table} GROUP BY district"
        explained = dict(engine.explain("tester", sql, epsilon=Decimal(1)).rows)
        held = "held by the database, which keeps household_id unique"
        assert (held in explained["bound on rows per individual"]) is unique
        assert explained["bound on rows per individual"].startswith(
            "declared: 1 (the policy's most_rows)")
        assert explained["measure count(*)"].startswith("sensitivity 1,")
        assert explained["measure sum(occupants)"].startswith("sensitivity 8,")
        answer = engine.answer("tester", sql, epsilon=Decimal(1))
        assert [a.sensitivity for a in answer.accuracy] == [1, 8]
        scaled = [n for n in answer.notes if "scaled down to at most" in n]
        one_row = [n for n in answer.notes if n.startswith("each individual has at most one row")]
        assert (len(scaled), len(one_row)) == ((0, 1) if unique else (2, 0)), answer.notes
        assert "rows without a household_id are not counted" in answer.notes


def test_the_constraint_is_read_once_and_again_on_reload(homes, module_dsn: str,
                                                         tmp_path: Path) -> None:
    conn, _, _ = homes
    with psycopg.connect(module_dsn, autocommit=True) as admin:
        admin.execute("CREATE TABLE homes.changing AS SELECT * FROM homes.keyed")
    policies = _policies(tmp_path / "policies", {"changing": ("changing", 1, "chosen")})
    engine = Engine(policies, Backend(module_dsn, pool_size=1),
                    Ledger(module_dsn, schema="ledger_one_row_reload"))
    sql = "SELECT COUNT(*) FROM changing"

    def fast() -> bool:
        return bool(engine.prepare("tester", sql).rewritten.held_by)

    try:
        assert not fast()
        with psycopg.connect(module_dsn, autocommit=True) as admin:
            admin.execute("ALTER TABLE homes.changing ADD PRIMARY KEY (household_id)")
        assert not fast()  # read when the table was first planned
        engine.reload(policies)
        assert fast()
        with psycopg.connect(module_dsn, autocommit=True) as admin:
            admin.execute("ALTER TABLE homes.changing DROP CONSTRAINT changing_pkey")
        engine.reload(policies)
        assert not fast()
    finally:
        engine.close()


def test_the_demo_households_take_the_fast_query_and_readings_do_not(fresh_dsn: str) -> None:
    from proxy.demo import load_scenario

    load_scenario(fresh_dsn, households=40, progress=False)
    policies = load_policies(Path(__file__).resolve().parent.parent / "policies")
    backend = Backend(fresh_dsn, pool_size=1)
    try:
        # households: PRIMARY KEY (household_id); readings: (household_id, reading_date).
        unique = {name: backend.unique_keys(policies.tables[name].source)
                  for name in ("households", "readings")}
    finally:
        backend.close()
    assert unique == {"households": ALONE,
                      "readings": frozenset({frozenset({"household_id", "reading_date"})})}
    for name, sql in (("households", "SELECT COUNT(*) FROM households WHERE occupants = 3"),
                      ("readings", "SELECT COUNT(*) FROM readings")):
        rewritten = rewrite(analyse(sql, policies, "planner"), frozenset(), unique[name])
        assert bool(rewritten.held_by) is (name == "households")


# ---- a unique key of several columns: at most K counted rows per individual (notes 8) -------

DAILY = HOUSEHOLD + """
[columns.reading_date]
kind = "date"
range = ["2026-01-01", "{last}"]

[columns.litres]
kind = "number"
range = [0, 500]
step = 0.1
"""

# Sources of the same daily readings: the key (household_id, reading_date) enforced or not.
DAILY_SOURCES = {
    "keyed": "ALTER TABLE days.keyed ADD PRIMARY KEY (household_id, reading_date)",
    # Rows of no household, and several rows of household 5 without a date (NULLs are distinct
    # to UNIQUE): none of them is counted by a key on the date.
    "unique_nulls": "ALTER TABLE days.unique_nulls ADD UNIQUE (household_id, reading_date); "
                    "INSERT INTO days.unique_nulls SELECT NULL, 'Old Mill', DATE '2026-01-04', 7 "
                    "FROM generate_series(1, 5); INSERT INTO days.unique_nulls "
                    "SELECT 5, 'Old Mill', NULL, 9 FROM generate_series(1, 40)",
    "plain": "",
    # Enforced, but a timestamp takes many values inside a day: not a key that bounds rows.
    "stamped": "ALTER TABLE days.stamped ALTER reading_date TYPE timestamp; "
               "ALTER TABLE days.stamped ADD PRIMARY KEY (household_id, reading_date)",
    # Keyed, and every reading in January (the declared days of the jan_ tables).
    "january": "DELETE FROM days.january WHERE reading_date NOT BETWEEN '2026-01-01' AND "
               "'2026-01-31'; ALTER TABLE days.january ADD PRIMARY KEY (household_id, reading_date)",
    # January too, but household 5 has 40 more readings without a date (distinct to UNIQUE).
    "nulled": "DELETE FROM days.nulled WHERE reading_date NOT BETWEEN '2026-01-01' AND "
              "'2026-01-31'; ALTER TABLE days.nulled ADD UNIQUE (household_id, reading_date); "
              "INSERT INTO days.nulled SELECT 5, 'Old Mill', NULL, 9 FROM generate_series(1, 40)",
}

# name -> (source, most_rows, bounds, last declared day)
DAILY_TABLES = {
    **{f"jan_{source}": (source, 31, "declared", "2026-01-31") for source in DAILY_SOURCES},
    "jan_chosen": ("keyed", 31, "chosen", "2026-01-31"),
    "jan_30": ("keyed", 30, "declared", "2026-01-31"),
    "two_months": ("keyed", 31, "declared", "2026-02-28"),
}


@pytest.fixture(scope="module")
def days(module_dsn: str, tmp_path_factory: pytest.TempPathFactory):
    """Households 1..60 reading daily from 2025-12-29 to 2026-02-03 (days outside January
    too), litres in steps of 0.1 partly above the range or NULL, districts (one outside the
    domain) changing with the day; household 60 reads only in January."""
    with psycopg.connect(module_dsn, autocommit=True) as conn:
        conn.execute("DROP SCHEMA IF EXISTS days CASCADE; CREATE SCHEMA days")
        for name, constraint in DAILY_SOURCES.items():
            conn.execute(f"""
                CREATE TABLE days.{name} AS
                SELECT h AS household_id,
                       (ARRAY['Northbank', 'Old Mill', 'Harbourside', 'Riverside'])[1 + (h + d) % 4]
                           AS district,
                       DATE '2025-12-29' + d AS reading_date,
                       CASE WHEN (h * d) % 29 = 0 THEN NULL
                            ELSE ((h * 37 + d * 11) % 620 + (d % 10) / 10.0) END::numeric(7, 1)
                           AS litres
                FROM generate_series(1, 60) AS h, generate_series(0, 36) AS d
                WHERE h < 60 OR d BETWEEN 3 AND 33""")
            if constraint:
                conn.execute(constraint)
    policies = _policies(tmp_path_factory.mktemp("daily"), DAILY_TABLES, DAILY, "days")
    engine = Engine(policies, Backend(module_dsn, pool_size=2),
                    Ledger(module_dsn, schema="ledger_daily"))
    with psycopg.connect(module_dsn) as conn:
        yield conn, policies, engine
    engine.close()


DATE_KEY = frozenset({frozenset({"household_id", "reading_date"})})
DAILY_QUERIES = [
    "SELECT reading_date, COUNT(*), SUM(litres), AVG(litres), COUNT(DISTINCT household_id) "
    "FROM {t} GROUP BY reading_date",
    "SELECT date_trunc('week', reading_date) AS w, district, SUM(litres) FILTER (WHERE litres > 100), "
    "VARIANCE(litres) FROM {t} GROUP BY 1, 2",
    "SELECT extract(dow FROM reading_date) AS d, COUNT(*), COUNT(litres) FROM {t} "
    "WHERE district = 'Old Mill' GROUP BY 1",
]


def test_which_daily_queries_the_key_holds(days) -> None:
    _, _, engine = days

    def held(sql: str) -> tuple[tuple[str, ...], int]:
        rewritten = engine.prepare("tester", sql).rewritten
        assert ("n_rows" in rewritten.sql) is not rewritten.held_by, sql  # one path or the other
        return rewritten.held_by, rewritten.held_rows

    by_day = ("household_id", "reading_date"), 31
    group = "SELECT reading_date, SUM(litres) FROM {} {}GROUP BY reading_date"
    assert held(group.format("jan_keyed", "")) == by_day
    assert held(group.format("jan_unique_nulls", "")) == by_day
    # No key, a timestamp (many values a day), a chosen bound: the per-individual query.
    for table in ("jan_plain", "jan_stamped", "jan_chosen"):
        assert held(group.format(table, "")) == ((), 0), table
    # The date not grouped by: kept in its declared days, so the key holds too (notes 10).
    assert held("SELECT COUNT(*), SUM(litres) FROM jan_keyed") == by_day
    assert held("SELECT district, COUNT(*) FROM jan_keyed GROUP BY district") == by_day
    # K = 31 days against most_rows 30: held only once the WHERE leaves 30 days.
    assert held(group.format("jan_30", "")) == ((), 0)
    assert held(group.format("jan_30", "WHERE reading_date > '2026-01-01' ")) == \
        (("household_id", "reading_date"), 30)
    # A domain of 59 days against most_rows 31: held once the WHERE narrows it to January,
    # and any bucket of the date holds the same way.
    assert held(group.format("two_months", "")) == ((), 0)
    assert held(group.format("two_months", "WHERE reading_date <= '2026-02-01' ")) == ((), 0)
    assert held(group.format("two_months", "WHERE reading_date <= '2026-01-31' ")) == by_day
    assert held("SELECT date_trunc('month', reading_date), COUNT(*) FROM two_months "
                "WHERE reading_date BETWEEN '2026-01-01' AND '2026-01-31' GROUP BY 1") == by_day


@pytest.mark.parametrize("exact", [frozenset(), frozenset({"litres"})], ids=["per-row", "exact"])
@pytest.mark.parametrize("n", range(len(DAILY_QUERIES)), ids=[q[:40] for q in DAILY_QUERIES])
def test_held_daily_cells_equal_the_per_individual_query(days, n: int, exact: frozenset[str]) -> None:
    """Exactly equal, noise off: litres are numeric(7, 1) in steps of 0.1, so even rounding to
    steps once per cell instead of once per (household, cell) gives the same integers."""
    conn, policies, _ = days
    for table in ("jan_keyed", "jan_unique_nulls"):
        plan = analyse(DAILY_QUERIES[n].format(t=table), policies, "tester")
        fast, slow = rewrite(plan, exact, DATE_KEY), rewrite(plan, exact)
        assert fast.held_rows == 31 and not slow.held_by
        assert (fast.bounds, fast.declared_sensitivities) == (slow.bounds, slow.declared_sensitivities)
        fast_rows, slow_rows = run_with_bounds(conn, fast), run_with_bounds(conn, slow)
        cells = len(plan.keys) + len(plan.measures) + len(fast.bounds)
        assert len(fast_rows) == fast.cells > 1
        assert [row[:cells] for row in fast_rows] == [row[:cells] for row in slow_rows], table
        assert any(row[len(plan.keys)] for row in fast_rows)  # not all empty
        # Nothing clipped, by either query: households 29 and 58, whose litres are all NULL in
        # January, lose nothing (module notes, 7).
        assert all(v == 0 for row in fast_rows + slow_rows for v in row[cells:]), table


def test_one_daily_household_moves_each_measure_at_most_its_stated_sensitivity(days) -> None:
    conn, policies, _ = days
    sql = ("SELECT reading_date, COUNT(*), SUM(litres), COUNT(DISTINCT household_id) "
           "FROM jan_keyed GROUP BY reading_date")
    plan = analyse(sql, policies, "tester")
    rewritten = rewrite(plan, frozenset({"litres"}), DATE_KEY)
    assert rewritten.held_rows == 31
    # R = 31 rows, T = 31 x 5000 steps of 0.1 litres, min(R, 31 cells).
    sensitivities = rewritten.sensitivities(tuple(b.ceiling for b in rewritten.bounds))
    assert sensitivities == (31, 155000, 31)
    largest = _largest_moves(conn, plan, rewritten, "days.keyed", (1, 2, 29, 31, 58, 60))
    # The check can fail: a household reading every day of January moves the counts by 31.
    assert (largest[0], largest[2]) == (31, 31)


def test_explain_and_notes_say_the_key_holds_the_bound(days) -> None:
    _, _, engine = days
    sql = "SELECT reading_date, COUNT(*) FROM jan_keyed GROUP BY reading_date"
    explained = dict(engine.explain("tester", sql, epsilon=Decimal(1)).rows)
    assert explained["bound on rows per individual"] == (
        "declared: 31 (the policy's most_rows); held by the database, which keeps "
        "(household_id, reading_date) unique and the query counts at most 31 values of "
        "reading_date, so nothing is scaled")
    answer = engine.answer("tester", sql, epsilon=Decimal(1))
    assert [a.sensitivity for a in answer.accuracy] == [31]
    assert ("each individual has at most 31 rows here (the database keeps (household_id, "
            "reading_date) unique and the query counts at most 31 values of reading_date), so "
            "nothing is scaled down") in answer.notes
    assert not [n for n in answer.notes if "scaled down to at most" in n]


# Keys as written that, with the individual, cover the unique key: one row per (household,
# cell), read without grouping (module notes, 1); FILTER, distinct households, a spread.
ONE_ROW_QUERIES = [
    "SELECT reading_date, COUNT(*), SUM(litres), AVG(litres) FROM {t} GROUP BY reading_date",
    "SELECT reading_date, district, COUNT(*) FILTER (WHERE litres > 50), COUNT(DISTINCT "
    "household_id), VARIANCE(litres) FROM {t} WHERE reading_date < '2026-01-20' GROUP BY 1, 2",
    "SELECT reading_date, COUNT(DISTINCT household_id) FILTER (WHERE litres > 100), "
    "SUM(litres) FILTER (WHERE district = 'Old Mill') FROM {t} GROUP BY reading_date",
]


@pytest.mark.parametrize("exact,whole", [(frozenset(), frozenset()), (frozenset({"litres"}), frozenset()),
                                         (frozenset({"litres"}), frozenset({"litres"}))],
                         ids=["per-row", "exact", "exact-whole-steps"])
@pytest.mark.parametrize("n", range(len(ONE_ROW_QUERIES)), ids=[q[:40] for q in ONE_ROW_QUERIES])
def test_partials_of_one_row_cells_equal_the_grouped_ones(days, n: int, exact: frozenset[str],
                                                          whole: frozenset[str]) -> None:
    """Chosen bounds (so the per-individual query): the partials read row by row where the key
    holds each (household, cell) to one row give every figure the grouped partials give, bound
    values and clipped-away totals included, at the ceilings and at about 2/5 of them (which
    clip most households); with sums in whole steps, the partials' cell sums come from the row
    query (module notes, 5)."""
    conn, policies, _ = days
    plan = analyse(ONE_ROW_QUERIES[n].format(t="jan_chosen"), policies, "tester")
    fast, slow = rewrite(plan, exact, DATE_KEY, whole), rewrite(plan, exact, frozenset(), whole)
    by_rows = exact <= whole or not any(m.kind in ("sum", "midpoint_sum") and m.column in exact
                                         for m in plan.measures)
    assert ("qc AS" in fast.sql) is by_rows and "qc AS" not in slow.sql
    # The partials grouped per (household, cell) in the slow query only.
    partials = f"GROUP BY {', '.join(str(j + 1) for j in range(len(plan.keys) + 1))}) AS p"
    assert not fast.held_by and partials in slow.sql and partials not in fast.sql
    clipped = 0
    for values in (tuple(b.ceiling for b in fast.bounds),
                   tuple(min(b.candidates, key=lambda c: abs(5 * c - 2 * b.ceiling))
                         for b in fast.bounds)):
        fast_rows = run_with_bounds(conn, fast, values)
        assert fast_rows == run_with_bounds(conn, slow, values), values
        clipped += sum(fast_rows[0][-len(fast.bounds):])
    assert clipped > 0  # the smaller bounds did clip


def test_a_household_whose_sum_is_all_null_loses_nothing(days) -> None:
    """Chosen bounds at their ceilings clip nobody in January (31 days at most): households 29
    and 58, whose litres there are all NULL, add nothing to the clipped-away figure (their
    partials and kept shares are NULL together: module notes, 7). With LEAST(NULL, cap) = cap
    each of them added a full cap."""
    conn, policies, _ = days
    sql = "SELECT reading_date, COUNT(*), SUM(litres) FROM jan_chosen GROUP BY reading_date"
    rewritten = rewrite(analyse(sql, policies, "tester"), frozenset({"litres"}))
    nulls = conn.execute("SELECT household_id FROM days.keyed WHERE reading_date BETWEEN "
                         "'2026-01-01' AND '2026-01-31' GROUP BY 1 HAVING COUNT(litres) = 0 "
                         "ORDER BY 1").fetchall()
    assert nulls == [(29,), (58,)]
    rows = run_with_bounds(conn, rewritten)
    assert all(v == 0 for row in rows for v in row[-len(rewritten.bounds):])


# ---- a key column not grouped by: the query checks its domain (module notes, 9) -------------

LITRES = frozenset({"litres"})


def _checked(rewritten) -> bool:
    return "WITH g AS MATERIALIZED" in rewritten.sql


def test_no_query_picks_its_branch_by_a_count_of_the_data(days) -> None:
    """Rewrite notes 9 and 10: a whole-table or per-district query over a (household, date)
    key whose date is not grouped by is never split into a row-query branch and a
    per-individual branch chosen by a count the query makes: one row a WHERE picks out would
    switch the branch, and with it the answer's time. The path is fixed by the text, the
    policy and the keys: the row query alone, its dates kept in the declared days, or the
    per-individual query alone."""
    _, policies, engine = days
    for sql in ("SELECT COUNT(*), SUM(litres) FROM jan_keyed",
                "SELECT district, SUM(litres) FROM jan_keyed GROUP BY district",
                "SELECT COUNT(*) FROM jan_keyed WHERE household_id = 7",
                "SELECT COUNT(*), SUM(litres) FROM jan_30"):
        rewritten = rewrite(analyse(sql, policies, "tester"), LITRES, DATE_KEY, LITRES)
        assert not _checked(rewritten), sql
        # One path or the other, never both in one query.
        assert ("n_rows" in rewritten.sql) is not rewritten.held_by, sql
        assert rewritten.kept_in_domains == ("reading_date",), sql
    assert not _checked(engine.prepare("tester", "SELECT SUM(litres) FROM jan_keyed").rewritten)


def test_whole_step_columns_follow_the_type_scale(days) -> None:
    _, policies, _ = days
    policy = policies.tables["jan_keyed"]  # litres in steps of 0.1
    for kind, whole in (("numeric(7,1)", True), ("numeric(7,0)", True), ("numeric(9,3)", False),
                        ("numeric", False), ("double precision", False)):
        assert whole_step_columns(policy, {"litres": kind}) == (LITRES if whole else frozenset()), kind
    coarse = policy.model_copy(update={"columns": {**policy.columns, "litres": policy.columns[
        "litres"].model_copy(update={"step": Decimal("0.05")})}})
    assert whole_step_columns(coarse, {"litres": "numeric(7,1)"}) == LITRES  # 0.1 = 2 x 0.05
    assert whole_step_columns(policy, {"district": "numeric(7,1)"}) == frozenset()  # not a number




# ---- a key column not grouped by: kept in its declared days (module notes, 10) --------------

JANUARY = "reading_date BETWEEN '2026-01-01' AND '2026-01-31'"


def _kept(engine: Engine, sql: str) -> tuple[tuple[str, ...], int, tuple[str, ...]]:
    rewritten = engine.prepare("tester", sql).rewritten
    assert ("n_rows" in rewritten.sql) is not rewritten.held_by, sql  # one path or the other
    return rewritten.held_by, rewritten.held_rows, rewritten.kept_in_domains


def test_which_whole_table_queries_keep_the_date(days) -> None:
    _, _, engine = days
    key = ("household_id", "reading_date")
    whole = "SELECT COUNT(*), SUM(litres) FROM {} {}"
    # Declared bounds, the date not grouped by: kept in January, K = 31 days <= most_rows.
    for sql in (whole.format("jan_keyed", ""), whole.format("jan_unique_nulls", ""),
                "SELECT district, COUNT(*), AVG(litres) FROM jan_keyed GROUP BY district",
                "SELECT CASE WHEN litres > 100 THEN 'high' ELSE 'low' END, COUNT(*) "
                "FROM jan_keyed GROUP BY 1"):
        assert _kept(engine, sql) == (key, 31, ("reading_date",)), sql
    # The WHERE's literals on the date narrow K.
    assert _kept(engine, whole.format("jan_keyed", "WHERE reading_date >= '2026-01-10'")) == \
        (key, 22, ("reading_date",))
    assert _kept(engine, whole.format(
        "jan_keyed", "WHERE reading_date IN ('2026-01-02', '2026-01-05', '2027-01-01')")) == \
        (key, 2, ("reading_date",))
    # K = 31 against most_rows 30: the per-individual query, over the same kept rows, until
    # the WHERE leaves 30 days.
    assert _kept(engine, whole.format("jan_30", "")) == ((), 0, ("reading_date",))
    assert _kept(engine, whole.format("jan_30", "WHERE reading_date > '2026-01-01'")) == \
        (key, 30, ("reading_date",))
    assert _kept(engine, whole.format("two_months", "")) == ((), 0, ("reading_date",))
    assert _kept(engine, whole.format("two_months", "WHERE reading_date < '2026-02-01'")) == \
        (key, 31, ("reading_date",))
    # No enforced key, a timestamp (no declared values of its type), a chosen bound:
    # unchanged, every row with a household counted, the per-individual query.
    for table in ("jan_plain", "jan_stamped", "jan_chosen"):
        assert _kept(engine, whole.format(table, "")) == ((), 0, ()), table
    # Grouped by the date (or a bucket of it): nothing more to keep.
    assert _kept(engine, "SELECT date_trunc('week', reading_date), COUNT(*) FROM jan_keyed "
                         "GROUP BY 1") == (key, 31, ())


# (query over {t}, the same with the declared days written in its WHERE)
KEPT_QUERIES = [
    ("SELECT COUNT(*), SUM(litres), AVG(litres), COUNT(DISTINCT household_id) FROM {t}",
     f"SELECT COUNT(*), SUM(litres), AVG(litres), COUNT(DISTINCT household_id) FROM {{t}} "
     f"WHERE {JANUARY}"),
    ("SELECT district, COUNT(*), SUM(litres) FILTER (WHERE litres > 100), VARIANCE(litres) "
     "FROM {t} GROUP BY district",
     f"SELECT district, COUNT(*), SUM(litres) FILTER (WHERE litres > 100), VARIANCE(litres) "
     f"FROM {{t}} WHERE {JANUARY} GROUP BY district"),
    ("SELECT COUNT(*), COUNT(litres) FROM {t} WHERE reading_date >= '2026-01-10'",
     f"SELECT COUNT(*), COUNT(litres) FROM {{t}} WHERE reading_date >= '2026-01-10' AND {JANUARY}"),
]


@pytest.mark.parametrize("exact", [frozenset(), LITRES], ids=["per-row", "exact"])
@pytest.mark.parametrize("n", range(len(KEPT_QUERIES)), ids=[q[0][:40] for q in KEPT_QUERIES])
def test_kept_rows_give_the_per_individual_answer(days, n: int, exact: frozenset[str]) -> None:
    """Noise off: the row query with the date kept in January equals the per-individual query
    (no key known) of the same question with January written in its WHERE, on sources with
    readings outside January, NULL dates (household 5: 40 more rows) and households reading
    every day of January (31 rows = most_rows); and at most_rows 30, where the per-individual
    query runs with the date kept and scales those households down, the same again."""
    conn, policies, _ = days
    kept_sql, written_sql = KEPT_QUERIES[n]
    days_counted = 22 if "2026-01-10" in kept_sql else 31
    for table, held in (("jan_keyed", days_counted), ("jan_unique_nulls", days_counted),
                        ("jan_30", 0 if days_counted > 30 else days_counted)):
        plan = analyse(kept_sql.format(t=table), policies, "tester")
        kept = rewrite(plan, exact, DATE_KEY, LITRES)
        written = rewrite(analyse(written_sql.format(t=table), policies, "tester"), exact,
                          frozenset(), LITRES)
        assert kept.held_rows == held and kept.kept_in_domains == ("reading_date",), table
        assert not written.held_by and not written.kept_in_domains
        assert (kept.bounds, kept.declared_sensitivities) == \
            (written.bounds, written.declared_sensitivities)
        kept_rows, written_rows = run_with_bounds(conn, kept), run_with_bounds(conn, written)
        assert kept_rows == written_rows, table
        assert any(row[len(plan.keys)] for row in kept_rows)  # not all empty
        clipped = [v for row in kept_rows for v in row[-len(kept.bounds):]]
        # Only most_rows 30 scales anyone, and only a household counted on all 31 days (by
        # district, a day in 'Riverside' is outside the cells).
        assert any(clipped) is (table == "jan_30" and n == 0), table
    # And PostgreSQL's own count of the first query: the rows with a household in January.
    if n == 0:
        rows = run_with_bounds(conn, rewrite(analyse(kept_sql.format(t="jan_unique_nulls"),
                                                     policies, "tester"), exact, DATE_KEY, LITRES))
        expected = conn.execute(f"SELECT count(*) FROM days.unique_nulls WHERE {JANUARY} "
                                "AND household_id IS NOT NULL").fetchone()[0]
        everything = conn.execute("SELECT count(*) FROM days.unique_nulls "
                                  "WHERE household_id IS NOT NULL").fetchone()[0]
        assert rows[0][0] == expected < everything


def test_one_household_moves_a_kept_answer_at_most_its_sensitivity(days) -> None:
    """Removing one household moves the whole-table row query by at most R = 31 rows (and T,
    distinct households 1), though households own 37 rows in the source (days outside
    January) and household 5 of unique_nulls 77 (40 without a date)."""
    conn, policies, _ = days
    for table, source in (("jan_keyed", "days.keyed"), ("jan_unique_nulls", "days.unique_nulls")):
        sql = f"SELECT COUNT(*), SUM(litres), COUNT(DISTINCT household_id) FROM {table}"
        plan = analyse(sql, policies, "tester")
        rewritten = rewrite(plan, LITRES, DATE_KEY, LITRES)
        assert rewritten.held_rows == 31
        assert rewritten.sensitivities(tuple(b.ceiling for b in rewritten.bounds)) == \
            (31, 155000, 1)
        largest = _largest_moves(conn, plan, rewritten, source, (1, 2, 5, 29, 59, 60))
        # The check can fail: a household of 31 January readings moves the count by 31.
        assert largest[0] == 31 and largest[2] == 1, table


def test_explain_and_notes_say_the_date_is_kept(days) -> None:
    _, _, engine = days
    sql = "SELECT COUNT(*) FROM jan_keyed"
    explained = dict(engine.explain("tester", sql, epsilon=Decimal(1)).rows)
    assert explained["counted reading_date"] == (
        "31 values: 2026-01-01 .. 2026-01-31 only: rows whose value is NULL or outside them are "
        "not counted (a declared bound and an enforced unique key)")
    assert explained["bound on rows per individual"] == (
        "declared: 31 (the policy's most_rows); held by the database, which keeps "
        "(household_id, reading_date) unique and the query counts at most 31 values of "
        "reading_date, so nothing is scaled")
    answer = engine.answer("tester", sql, epsilon=Decimal(1))
    kept = "rows whose reading_date is NULL or outside its declared values are not counted"
    assert kept in answer.notes
    assert [a.sensitivity for a in answer.accuracy] == [31]
    # The per-individual query keeps the date too (most_rows 30), and says so; a chosen bound
    # keeps nothing, and says nothing.
    for table, said in (("jan_30", True), ("jan_chosen", False)):
        explained = dict(engine.explain("tester", f"SELECT COUNT(*) FROM {table}",
                                        epsilon=Decimal(1)).rows)
        assert ("counted reading_date" in explained) is said, table
        notes = engine.answer("tester", f"SELECT COUNT(*) FROM {table}", epsilon=Decimal(1)).notes
        assert (kept in notes) is said, table


def test_a_late_date_that_moves_k_is_planned_per_value(days) -> None:
    """A prepared statement's slot on the kept date decides K (31 days against most_rows 30),
    so each value is planned: bound late into the plan of 2027-01-01 (K = 0, the row query,
    the same plan as the marker's, so the check against fresh analysis passes), 2025-12-01
    would run the row query with K = 31 > most_rows."""
    import datetime as dt

    from tests.test_statement import bound

    _, _, engine = days
    text = "SELECT COUNT(*) FROM jan_30 WHERE reading_date > $1"
    held = [(bool(rewritten.held_by), rewritten.held_rows) for rewritten in (
        engine.prepare("tester", bound(text, [day], (1082,))).rewritten
        for day in (dt.date(2027, 1, 1), dt.date(2025, 12, 1), dt.date(2026, 1, 20)))]
    assert held == [(True, 0), (False, 0), (True, 11)]
    # A date column of no key is still bound late.
    from proxy.sql import statement as slots
    tree = bound(text, [dt.date(2026, 1, 1)], (1082,)).tree
    assert slots.late_slots(tree, engine.policies) == {1}
    assert slots.late_slots(tree, engine.policies, engine._narrowed_columns) == set()


def test_a_percentile_keeps_the_date_on_the_per_individual_query(days) -> None:
    """A percentile's histogram always takes the per-individual query (notes 8); with declared
    bounds it keeps the date too, and its histogram is the one of January written in WHERE."""
    conn, policies, _ = days
    sql = "SELECT PERCENTILE_CONT(0.5) WITHIN GROUP (ORDER BY litres) FROM {t}{w}"
    kept = rewrite(analyse(sql.format(t="jan_keyed", w=""), policies, "tester"), LITRES,
                   DATE_KEY, LITRES)
    written = rewrite(analyse(sql.format(t="jan_keyed", w=f" WHERE {JANUARY}"), policies,
                              "tester"), LITRES, frozenset(), LITRES)
    assert not kept.held_by and kept.kept_in_domains == ("reading_date",)
    rows = run_with_bounds(conn, kept)
    assert rows == run_with_bounds(conn, written) and sum(row[1] for row in rows) > 0
