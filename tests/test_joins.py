"""Joins that keep the protected unit (proxy.sql.joins, and "Joins" in proxy.sql.rewrite).

On the invented clinic (tests/policy_fixtures.py) plus three policies of this module's own:
``residents`` (clinic.people protected per person, most_rows 1, the population of visits),
``wards`` (a public lookup table keyed by ward) and ``staff`` (clinic.people as another
population). Checked: each accepted shape's noise-free answer against PostgreSQL's own answer
to the same question; removing one person from both tables moves each measure by at most its
sensitivity; refusals with their SQLSTATE.
"""

from __future__ import annotations

import dataclasses
from decimal import Decimal

import psycopg
import pytest
import sqlglot.expressions as exp

from proxy.errors import HushError
from proxy.policy import load_policies
from proxy.sql.analyse import analyse
from proxy.sql.rewrite import rewrite
from tests.bounds_helpers import run_with_bounds
from tests.policy_fixtures import load_clinic, write_policies
from tests.proxy_fixtures import demo_proxy  # noqa: F401  (fixture)

RESIDENTS = """
table = "residents"
source = "clinic.people"

[individual]
column = "person_id"
population = "people"
most_rows = 1

[columns.person_id]
kind = "integer"
range = [1, 100000]

[columns.ward]
kind = "category"
values = ["north", "south", "east"]

[columns.age]
kind = "integer"
range = [0, 100]

[columns.smoker]
kind = "boolean"
"""

STAFF = RESIDENTS.replace('table = "residents"', 'table = "staff"').replace(
    'population = "people"', 'population = "staff"')

WARDS = """
table = "wards"
source = "clinic.wards"
public = true
key = "ward"

[columns.ward]
kind = "category"
values = ["north", "south", "east", "west"]

[columns.region]
kind = "category"
values = ["upper", "lower"]

[columns.rate]
kind = "number"
range = [0, 10]
step = 0.5
"""


def write_join_policies(root, most_cells: int = 10000) -> None:
    write_policies(root, most_rows=10, most_cells=most_cells)
    for name, text in [("residents", RESIDENTS), ("staff", STAFF), ("wards", WARDS)]:
        (root / "tables" / f"{name}.toml").write_text(text)
    access = (root / "access.toml").read_text()
    (root / "access.toml").write_text(access.replace(
        'tables = ["people", "visits"]',
        'tables = ["people", "visits", "residents", "staff", "wards"]').replace(
        'tables = []', 'tables = ["visits"]'))


def load_wards(dsn: str) -> None:
    with psycopg.connect(dsn, autocommit=True) as conn:
        conn.execute("CREATE TABLE clinic.wards (ward text, region text, rate numeric)")
        conn.execute("INSERT INTO clinic.wards VALUES ('north', 'upper', 1.5), "
                     "('south', 'lower', 2.0), ('east', 'upper', 3.5), ('west', 'lower', 1.0)")


@pytest.fixture(scope="module")
def clinic(module_dsn: str, tmp_path_factory: pytest.TempPathFactory):
    load_clinic(module_dsn, people=600)
    load_wards(module_dsn)
    root = tmp_path_factory.mktemp("policies")
    write_join_policies(root)
    with psycopg.connect(module_dsn) as conn:
        yield conn, load_policies(root)


def noise_free(conn, policies, sql: str, values: tuple[int, ...] | None = None) -> list[list[int]]:
    """Per cell, the measures (in the plan's order) with the bounds at ``values`` (default:
    the ceilings, which no clinic person exceeds: at most 9 visits of one person)."""
    plan = analyse(sql, policies, "tester")
    rewritten = rewrite(plan, frozenset())
    rows = run_with_bounds(conn, rewritten, values)
    keys = len(plan.keys)
    return [[int(v) for v in row[keys:keys + len(plan.measures)]] for row in rows]


WARD_CELLS = "(VALUES (0, 'north'), (1, 'south'), (2, 'east')) AS d(i, v)"
CLAMPED_MINUTES = "CASE WHEN v.minutes < 0 THEN 0 WHEN v.minutes > 60 THEN 60 ELSE v.minutes END"
FEE_UNITS = "round(CASE WHEN v.fee < 0 THEN 0 WHEN v.fee > 50 THEN 50 ELSE v.fee END / 0.25)"

# (the analyst's query, PostgreSQL's own answer: one row per declared cell, measures in order)
CASES = [
    # Same population, grouped by a column of the one-row-per-person table.
    ("SELECT r.ward, COUNT(*), SUM(v.minutes) FROM visits v "
     "JOIN residents r ON r.person_id = v.person_id GROUP BY r.ward",
     f"SELECT (SELECT count(*) FROM clinic.visits v JOIN clinic.people p ON p.person_id = v.person_id "
     f"WHERE p.ward = d.v), (SELECT coalesce(sum({CLAMPED_MINUTES}), 0) FROM clinic.visits v "
     f"JOIN clinic.people p ON p.person_id = v.person_id WHERE p.ward = d.v) "
     f"FROM {WARD_CELLS} ORDER BY d.i"),
    # USING, a filter on each table, AVG (sum and count of values), COUNT(DISTINCT individual).
    ("SELECT AVG(fee), COUNT(DISTINCT person_id) FROM residents JOIN visits USING (person_id) "
     "WHERE smoker AND minutes > 10",
     f"SELECT coalesce(sum({FEE_UNITS}), 0), count(v.fee), count(DISTINCT v.person_id) "
     "FROM clinic.visits v JOIN clinic.people p ON p.person_id = v.person_id "
     "WHERE p.smoker AND v.minutes > 10"),
    # INNER JOIN written out, unaliased tables qualified by name (and by schema public).
    ("SELECT COUNT(*) FROM visits INNER JOIN residents ON residents.person_id = visits.person_id "
     "WHERE public.residents.age < 30",
     "SELECT count(*) FROM clinic.visits v JOIN clinic.people p ON p.person_id = v.person_id "
     "WHERE p.age < 30"),
    # A public lookup: grouped by its column, joined on its key to the visits' ward.
    ("SELECT w.region, COUNT(*) FROM visits v JOIN wards w ON w.ward = v.ward GROUP BY w.region",
     "SELECT (SELECT count(*) FROM clinic.visits v JOIN clinic.wards w ON w.ward = v.ward "
     "WHERE w.region = r.v) FROM (VALUES (0, 'upper'), (1, 'lower')) AS r(i, v) ORDER BY r.i"),
    # A row table (each row one person) and a public table: still one row per person.
    ("SELECT w.region, COUNT(*), SUM(p.age) FROM people p JOIN wards w ON w.ward = p.ward "
     "WHERE p.smoker GROUP BY w.region",
     "SELECT (SELECT count(*) FROM clinic.people p JOIN clinic.wards w ON w.ward = p.ward "
     "WHERE p.smoker AND w.region = r.v), (SELECT coalesce(sum(CASE WHEN p.age < 0 THEN 0 "
     "WHEN p.age > 100 THEN 100 ELSE p.age END), 0) FROM clinic.people p JOIN clinic.wards w "
     "ON w.ward = p.ward WHERE p.smoker AND w.region = r.v) "
     "FROM (VALUES (0, 'upper'), (1, 'lower')) AS r(i, v) ORDER BY r.i"),
    # Three tables: same population, then a public table joined to the residents' ward,
    # filtered by a public column.
    ("SELECT v.ward, COUNT(*) FROM visits v JOIN residents r ON v.person_id = r.person_id "
     "JOIN wards w ON w.ward = r.ward WHERE w.rate >= 2 GROUP BY v.ward",
     "SELECT (SELECT count(*) FROM clinic.visits v JOIN clinic.people p ON p.person_id = v.person_id "
     f"JOIN clinic.wards w ON w.ward = p.ward WHERE w.rate >= 2 AND v.ward = d.v) "
     f"FROM {WARD_CELLS} ORDER BY d.i"),
    # A semi-join: visits of people aged over 40, the inner WHERE checked like any other.
    ("SELECT ward, COUNT(*) FROM visits "
     "WHERE person_id IN (SELECT person_id FROM residents WHERE age > 40) AND minutes < 30 "
     "GROUP BY ward",
     "SELECT (SELECT count(*) FROM clinic.visits v WHERE v.ward = d.v AND v.minutes < 30 AND "
     f"v.person_id IN (SELECT person_id FROM clinic.people WHERE age > 40)) "
     f"FROM {WARD_CELLS} ORDER BY d.i"),
]


@pytest.mark.parametrize("query, expected", CASES, ids=[c[0][:60] for c in CASES])
def test_joined_answers_match_postgresql(clinic, query: str, expected: str) -> None:
    conn, policies = clinic
    want = [[int(v) for v in row] for row in conn.execute(expected).fetchall()]
    assert noise_free(conn, policies, query) == want
    assert any(any(row) for row in want)  # the comparison is not between empty answers


def test_a_repeated_public_key_joins_nothing(clinic) -> None:
    """A key value that repeats in the public table would count a row twice: it is dropped."""
    conn, policies = clinic
    query = "SELECT w.region, COUNT(*) FROM visits v JOIN wards w ON w.ward = v.ward GROUP BY w.region"
    before = noise_free(conn, policies, query)
    with conn.transaction(force_rollback=True):
        conn.execute("INSERT INTO clinic.wards VALUES ('north', 'lower', 9)")
        after = noise_free(conn, policies, query)
        north = conn.execute("SELECT count(*) FROM clinic.visits WHERE ward = 'north'").fetchone()[0]
    assert north > 0
    # north's visits were counted under 'upper'; now they meet two rows and are not counted.
    assert after == [[before[0][0] - north], before[1]]


NEIGHBOUR_QUERIES = [
    "SELECT r.ward, COUNT(*), SUM(v.minutes), COUNT(DISTINCT v.person_id) FROM visits v "
    "JOIN residents r ON r.person_id = v.person_id GROUP BY r.ward",
    "SELECT r.smoker, v.ward, AVG(v.fee) FROM visits v JOIN residents r ON r.person_id = v.person_id "
    "JOIN wards w ON w.ward = v.ward WHERE w.region = 'upper' GROUP BY r.smoker, v.ward",
    "SELECT ward, COUNT(*), SUM(minutes) FROM visits "
    "WHERE person_id IN (SELECT person_id FROM residents WHERE NOT smoker) GROUP BY ward",
]


@pytest.mark.parametrize("sql", NEIGHBOUR_QUERIES, ids=[q[:50] for q in NEIGHBOUR_QUERIES])
def test_removing_one_person_from_both_tables_moves_each_measure_at_most_its_sensitivity(
        clinic, sql: str) -> None:
    conn, policies = clinic
    plan = analyse(sql, policies, "tester")
    rewritten = rewrite(plan, frozenset())
    # The rows bound's ceiling is the product of most_rows (visits 10, residents 1).
    assert [b.ceiling for b in rewritten.bounds if b.subject == "rows"] == [10]
    keys, measures = len(plan.keys), len(plan.measures)
    people = [row[0] for row in conn.execute(
        "SELECT person_id FROM clinic.visits GROUP BY 1 ORDER BY count(*) DESC, 1 LIMIT 5")] + [3, 50, 301]
    ceilings = tuple(b.ceiling for b in rewritten.bounds)
    small = tuple(min(b.candidates, key=lambda c: abs(3 * c - b.ceiling)) for b in rewritten.bounds)
    for values in (ceilings, small):
        full = run_with_bounds(conn, rewritten, values)
        sensitivities = rewritten.sensitivities(values)
        largest = [0] * measures
        for person in people:
            with conn.transaction(force_rollback=True):
                # Neighbours: the person's rows leave every table of the population.
                conn.execute("DELETE FROM clinic.visits WHERE person_id = %s", (person,))
                conn.execute("DELETE FROM clinic.people WHERE person_id = %s", (person,))
                without = run_with_bounds(conn, rewritten, values)
            for n in range(measures):
                move = sum(abs(int(a[keys + n]) - int(b[keys + n])) for a, b in zip(full, without))
                assert move <= sensitivities[n], (person, plan.measures[n], values)
                largest[n] = max(largest[n], move)
        assert all(m > 0 for m in largest), (largest, values)  # the check can fail


def test_neighbour_check_fails_on_a_join_that_mixes_individuals(clinic) -> None:
    """The same check catches a broken rewrite: joining visits to people on ward (not on the
    individual) makes one person's removal move the count by far more than the bound."""
    conn, policies = clinic
    rewritten = rewrite(analyse(NEIGHBOUR_QUERIES[0], policies, "tester"), frozenset())
    broken = rewritten.sql.replace('ON t1."person_id" = t0."person_id"', 'ON t1."ward" = t0."ward"')
    assert broken != rewritten.sql
    broken_rewrite = dataclasses.replace(rewritten, sql=broken)
    values = tuple(b.ceiling for b in rewritten.bounds)
    full = run_with_bounds(conn, broken_rewrite, values)
    with conn.transaction(force_rollback=True):
        conn.execute("DELETE FROM clinic.visits WHERE person_id = 3")
        conn.execute("DELETE FROM clinic.people WHERE person_id = 3")
        without = run_with_bounds(conn, broken_rewrite, values)
    move = sum(abs(int(a[1]) - int(b[1])) for a, b in zip(full, without))
    assert move > rewritten.sensitivities(values)[0]


REFUSALS = [
    ("SELECT COUNT(*) FROM visits v LEFT JOIN residents r ON r.person_id = v.person_id", "0A000"),
    ("SELECT COUNT(*) FROM visits v FULL JOIN residents r ON r.person_id = v.person_id", "0A000"),
    ("SELECT COUNT(*) FROM visits v CROSS JOIN residents r", "0A000"),
    ("SELECT COUNT(*) FROM visits v, residents r", "0A000"),
    ("SELECT COUNT(*) FROM visits v NATURAL JOIN residents r", "0A000"),
    ("SELECT COUNT(*) FROM visits v JOIN residents r ON r.ward = v.ward", "0A000"),
    ("SELECT COUNT(*) FROM visits v JOIN residents r ON r.person_id = v.person_id "
     "AND r.ward = v.ward", "0A000"),
    ("SELECT COUNT(*) FROM visits v JOIN residents r ON r.person_id > v.person_id", "0A000"),
    ("SELECT COUNT(*) FROM visits a JOIN visits b ON a.person_id = b.person_id", "0A000"),
    ("SELECT COUNT(*) FROM visits v JOIN staff s ON s.person_id = v.person_id", "0A000"),
    ("SELECT COUNT(*) FROM visits v JOIN people p ON p.person_id = v.person_id", "0A000"),
    ("SELECT COUNT(*) FROM visits v JOIN wards w ON w.region = v.ward", "0A000"),
    ("SELECT COUNT(*) FROM visits v JOIN (SELECT * FROM residents) r ON r.person_id = v.person_id",
     "0A000"),
    ("SELECT COUNT(*) FROM residents r JOIN wards w ON w.ward = r.ward "
     "JOIN visits v ON v.ward = w.ward", "0A000"),
    ("SELECT COUNT(*) FROM wards", "0A000"),
    ("SELECT COUNT(*) FROM visits v JOIN residents r ON r.person_id = v.person_id "
     "WHERE ward = 'north'", "42702"),
    ("SELECT COUNT(*) FROM visits v JOIN residents r ON r.person_id = v.person_id "
     "WHERE x.ward = 'north'", "42P01"),
    ("SELECT COUNT(*) FROM visits v JOIN nowhere n ON n.person_id = v.person_id", "42P01"),
    ("SELECT COUNT(*) FROM visits x JOIN residents x ON x.person_id = x.person_id", "42712"),
    ("SELECT COUNT(*) FROM visits v LEFT OUTER JOIN residents r ON r.person_id = v.person_id",
     "0A000"),
    ("SELECT COUNT(*) FROM visits WHERE ward IN (SELECT ward FROM residents)", "0A000"),
    ("SELECT COUNT(*) FROM visits WHERE person_id IN (SELECT person_id FROM staff)", "0A000"),
    ("SELECT COUNT(*) FROM visits WHERE person_id IN (SELECT person_id FROM people)", "0A000"),
    ("SELECT COUNT(*) FROM visits WHERE person_id IN "
     "(SELECT person_id FROM residents WHERE age / 0 > 1)", "0A000"),
    ("SELECT COUNT(*) FROM visits WHERE person_id IN "
     "(SELECT person_id FROM residents GROUP BY person_id)", "0A000"),
    ("SELECT COUNT(*) FROM visits WHERE minutes > 3 OR person_id IN "
     "(SELECT person_id FROM residents)", "0A000"),
    ("SELECT COUNT(*) FROM visits WHERE person_id NOT IN (SELECT person_id FROM residents)", "0A000"),
]


@pytest.mark.parametrize("sql, sqlstate", REFUSALS, ids=[r[0][22:80] for r in REFUSALS])
def test_other_joins_are_refused_with_a_hint(clinic, sql: str, sqlstate: str) -> None:
    _, policies = clinic
    with pytest.raises(HushError) as caught:
        analyse(sql, policies, "tester")
    assert caught.value.sqlstate == sqlstate, caught.value
    assert caught.value.hint


def test_every_joined_table_must_be_granted(clinic) -> None:
    _, policies = clinic
    # "outsider" is granted visits only.
    for sql in ["SELECT COUNT(*) FROM visits v JOIN residents r ON r.person_id = v.person_id",
                "SELECT COUNT(*) FROM visits WHERE person_id IN (SELECT person_id FROM residents)"]:
        with pytest.raises(HushError) as caught:
            analyse(sql, policies, "outsider")
        assert caught.value.sqlstate == "42501"


def test_plan_lists_every_table_read(clinic) -> None:
    _, policies = clinic
    plan = analyse("SELECT w.region, COUNT(*) FROM visits v JOIN residents r ON r.person_id = "
                   "v.person_id JOIN wards w ON w.ward = v.ward "
                   "WHERE v.person_id IN (SELECT person_id FROM residents WHERE smoker) "
                   "GROUP BY w.region", policies, "tester")
    assert [t.table for t in plan.tables] == ["visits", "residents", "wards", "residents"]
    assert [j.kind for j in plan.joins] == ["from", "inner", "inner", "semi"]
    assert plan.table.individual is not None and plan.table.individual.most_rows == 10
    assert [o.name for o in plan.visible_outputs] == ["region", "count"]


# ---- through the engine: charges, public reads --------------------------------------------

@pytest.fixture
def make_engine(clinic, module_dsn: str, tmp_path):
    """Engines on the clinic with the join policies and a fresh ledger schema each."""
    from proxy.backend import Backend
    from proxy.engine import Engine
    from proxy.ledger import Ledger

    made: list[Engine] = []

    def make(most_cells: int = 10000) -> Engine:
        folder = tmp_path / f"policies{len(made)}"
        write_join_policies(folder, most_cells)
        schema = f"ledger_joins_{abs(hash((str(tmp_path), len(made)))) % 10**9}"
        made.append(Engine(load_policies(folder), Backend(module_dsn, pool_size=2),
                           Ledger(module_dsn, schema=schema)))
        return made[-1]

    yield make
    for engine in made:
        engine.close()


def _ledger_rows(dsn: str, engine, sql: str, *args) -> list[tuple]:
    with psycopg.connect(dsn) as conn:
        return conn.execute(sql.format(schema=engine.ledger.schema), args).fetchall()


def test_a_join_charges_every_table_and_its_population_once(make_engine, module_dsn: str) -> None:
    engine = make_engine()
    answer = engine.answer("tester", "SELECT r.ward, COUNT(*) FROM visits v JOIN residents r "
                                     "ON r.person_id = v.person_id JOIN wards w ON w.ward = r.ward "
                                     "GROUP BY r.ward", epsilon=Decimal("0.5"))
    assert answer.tables == ["visits", "residents"]  # the public table charges nothing
    assert [row[0] for row in answer.rows] == ["north", "south", "east"]
    [(tables,)] = _ledger_rows(module_dsn, engine, "SELECT tables FROM {schema}.charges WHERE id = %s",
                               answer.charge_id)
    assert tables == ["residents", "visits"]
    # Both tables protect the population "people": its cap is charged 0.5 once, not twice.
    [(spent,)] = _ledger_rows(module_dsn, engine, "SELECT spent FROM {schema}.population_budgets "
                                                  "WHERE population = 'people'")
    assert spent == Decimal("0.5")
    assert engine.remaining("tester") == Decimal("999.5")
    semi = engine.answer("tester", "SELECT COUNT(*) FROM visits WHERE person_id IN "
                                   "(SELECT person_id FROM residents WHERE smoker)",
                         epsilon=Decimal("0.25"))
    assert semi.tables == ["visits", "residents"]
    itself = engine.answer("tester", "SELECT COUNT(*) FROM visits WHERE person_id IN "
                                     "(SELECT person_id FROM visits WHERE minutes > 50)",
                           epsilon=Decimal("0.25"))
    assert itself.tables == ["visits"]


def test_public_rows_are_read_as_stored_and_cost_nothing(make_engine, module_dsn: str) -> None:
    engine = make_engine()
    answer = engine.answer("tester", "SELECT * FROM wards WHERE rate > 1 ORDER BY ward DESC")
    with psycopg.connect(module_dsn) as conn:  # PostgreSQL's own answer
        want = conn.execute("SELECT ward, region, rate FROM clinic.wards WHERE rate > 1 "
                            "ORDER BY ward DESC").fetchall()
    assert [tuple(row) for row in answer.rows] == want and len(want) == 3
    assert [(c.name, c.type) for c in answer.columns] == [
        ("ward", "text"), ("region", "text"), ("rate", "numeric")]
    assert answer.epsilon == 0 and answer.accuracy == [] and answer.charge_id is None
    assert _ledger_rows(module_dsn, engine, "SELECT count(*) FROM {schema}.charges") == [(0,)]
    assert engine.remaining("tester") == Decimal("1000")
    named = engine.answer("tester", "SELECT region AS r, ward FROM wards ORDER BY 2 LIMIT 2")
    assert [c.name for c in named.columns] == ["r", "ward"]
    assert [tuple(row) for row in named.rows] == [("upper", "east"), ("upper", "north")]
    assert engine.describe("tester", "SELECT rate FROM wards")[0].type == "numeric"


@pytest.mark.parametrize("sql, sqlstate", [
    ("SELECT COUNT(*) FROM wards", "0A000"),
    ("SELECT rate * 2 FROM wards", "0A000"),
    ("SELECT ward FROM wards GROUP BY ward", "0A000"),
    ("SELECT nothing FROM wards", "42703"),
    ("SELECT * FROM wards WHERE rate / 0 > 1", "0A000"),
])
def test_public_reads_refuse_other_shapes(clinic, sql: str, sqlstate: str) -> None:
    _, policies = clinic
    with pytest.raises(HushError) as caught:
        analyse(sql, policies, "tester")
    assert caught.value.sqlstate == sqlstate and caught.value.hint


def test_a_public_read_holds_at_most_most_cells_rows(make_engine) -> None:
    engine = make_engine(most_cells=3)
    with pytest.raises(HushError) as caught:
        engine.answer("tester", "SELECT * FROM wards")
    assert caught.value.sqlstate == "54000"
    assert len(engine.answer("tester", "SELECT ward FROM wards LIMIT 3").rows) == 3


# ---- end to end: the demo behind a proxy, through psycopg -----------------------------------

JOIN_SQL = ("SELECT h.tariff, COUNT(*) AS readings, AVG(r.litres) FROM readings r "
            "JOIN households h ON h.household_id = r.household_id GROUP BY h.tariff")


def test_join_public_read_and_refusal_through_psycopg(demo_proxy) -> None:
    notices: list[str] = []
    with psycopg.connect(demo_proxy.conninfo("planner"), autocommit=True) as conn:
        conn.add_notice_handler(lambda diag: notices.append(diag.message_primary or ""))
        conn.execute("SET hushql.epsilon = 1")
        rows = conn.execute(JOIN_SQL).fetchall()
        assert [r[0] for r in rows] == ["standard", "saver", "social"]
        assert any("spent epsilon 1" in n for n in notices), notices
        with psycopg.connect(demo_proxy.backend_dsn) as backend:
            exact = dict(backend.execute(
                "SELECT h.tariff, count(*) FROM utility.meter_readings r JOIN utility.households h "
                "ON h.household_id = r.household_id GROUP BY 1").fetchall())
        # Noisy counts: no one's rows are counted above what they own, so each count stays
        # below the exact one plus the noise; the noise scale is at most the rows ceiling (366)
        # over the measures' epsilon share, far below the 10^6 margin used here.
        assert all(0 <= r[1] <= exact[r[0]] + 10**6 for r in rows)
        explained = dict(conn.execute("EXPLAIN " + JOIN_SQL).fetchall())
        assert explained["table"] == "readings, households"
        assert "join households on households.household_id = readings.household_id" \
            in explained["joins"]
        assert "up to the ceiling 366" in explained["bound on rows per individual"]

        tariffs = conn.execute("SELECT * FROM tariffs ORDER BY price_per_m3").fetchall()
        with psycopg.connect(demo_proxy.backend_dsn) as backend:
            assert tariffs == backend.execute(
                "SELECT tariff, price_per_m3, description FROM utility.tariffs "
                "ORDER BY price_per_m3").fetchall()
        grouped = conn.execute("SELECT t.description, COUNT(*) FROM households h JOIN tariffs t "
                               "ON t.tariff = h.tariff WHERE t.price_per_m3 < 2 GROUP BY 1")
        assert len(grouped.fetchall()) == 3  # the public column's declared values

        with pytest.raises(psycopg.errors.FeatureNotSupported) as caught:
            conn.execute("SELECT COUNT(*) FROM readings r LEFT JOIN households h "
                         "ON h.household_id = r.household_id")
        assert caught.value.diag.message_hint and "joins accepted" in caught.value.diag.message_hint


def test_spark_refuses_joins_before_any_charge(clinic) -> None:
    """The Spark backend's check (run by the engine before reserving) refuses joined rows; one
    table's rewrite passes this test of it."""
    from proxy.spark_backend import refuse_joins

    _, policies = clinic
    single = rewrite(analyse("SELECT COUNT(*) FROM visits", policies, "tester"), frozenset())
    refuse_joins(single.sql)
    for sql in [NEIGHBOUR_QUERIES[0], NEIGHBOUR_QUERIES[2]]:
        with pytest.raises(HushError) as caught:
            refuse_joins(rewrite(analyse(sql, policies, "tester"), frozenset()).sql)
        assert caught.value.sqlstate == "0A000"


def test_parameters_compared_with_joined_columns_are_typed(clinic) -> None:
    from proxy.sql.parameters import parameter_types
    import sqlglot

    _, policies = clinic
    tree = sqlglot.parse_one(
        "SELECT COUNT(*) FROM visits v JOIN residents r ON r.person_id = v.person_id "
        "WHERE r.age > $1 AND v.ward = $2 AND minutes < $3 AND ward = $4", read="postgres")
    # ward is in both tables (both categories), so even unqualified it is text.
    # integer columns whose declared range fits 32 bits are integer (proxy.sql.vocabulary)
    assert parameter_types(tree, policies) == ["integer", "text", "integer", "text"]


def test_tables_with_different_timing_are_not_joined(tmp_path) -> None:
    """[timing] promises an answer time per table; a join of tables promising different times
    could keep only one promise, so it is refused (one table at a time still answers)."""
    write_join_policies(tmp_path)
    residents = tmp_path / "tables" / "residents.toml"
    residents.write_text(residents.read_text().replace(
        "[columns.person_id]", "[timing]\nanswer_after_ms = 200\n\n[columns.person_id]", 1))
    policies = load_policies(tmp_path)
    with pytest.raises(HushError) as caught:
        analyse("SELECT COUNT(*) FROM visits v JOIN residents r ON r.person_id = v.person_id",
                policies, "tester")
    assert caught.value.sqlstate == "0A000" and "[timing]" in str(caught.value)
    assert analyse("SELECT COUNT(*) FROM residents", policies, "tester").table.timing is not None


def test_analysing_a_semi_join_leaves_the_tree_as_it_was(clinic) -> None:
    import sqlglot

    _, policies = clinic
    text = ("SELECT ward, COUNT(*) FROM visits WHERE minutes > 3 AND person_id IN "
            "(SELECT person_id FROM residents WHERE smoker) AND ward <> 'east' GROUP BY ward")
    tree = sqlglot.parse_one(text, read="postgres")
    before = tree.sql(dialect="postgres")
    terms = list(tree.args["where"].this.flatten())
    analyse(tree, policies, "tester")
    assert tree.sql(dialect="postgres") == before
    assert all(term.parent is not None and term.root() is tree for term in terms)


def test_a_column_named_like_the_other_tables_individual_stays_its_own(tmp_path) -> None:
    """wards gains a column person_id that is not an individual: joined to visits, it must not
    be mistaken for the shared individual column."""
    write_join_policies(tmp_path)
    wards = tmp_path / "tables" / "wards.toml"
    wards.write_text(wards.read_text() + '\n[columns.person_id]\nkind = "integer"\nrange = [0, 9]\n')
    policies = load_policies(tmp_path)
    plan = analyse("SELECT COUNT(*) FROM visits v JOIN wards w ON w.ward = v.ward "
                   "WHERE w.person_id = 3", policies, "tester")
    assert plan.table.individual.column == "person_id"
    assert dict(plan.joins[1].columns)["wards.person_id"] == "person_id"
    assert [c.name for c in plan.where.find_all(exp.Column)] == ["wards.person_id"]
