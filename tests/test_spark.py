"""The rewrite on Apache Spark (through Spark Connect) computes what it does on PostgreSQL.

The clinic tables are loaded into PostgreSQL and copied, row for row, into Spark tables. Then
- every reference query's noise-free measures, with a fixed salt, are the same on Spark as on
  PostgreSQL (same random choice of cells: md5 of the same text), and a few are also checked
  against aggregates Spark computes itself from plain GROUP BY queries;
- removing one individual's rows moves Spark's answers by no more than the sensitivity;
- the engine over Spark answers with noise and a charge in the PostgreSQL ledger, refuses what
  it refuses on PostgreSQL without running anything, cancels and times out;
- the places where Spark SQL differs from PostgreSQL are pinned.
"""

from __future__ import annotations

import dataclasses
from decimal import Decimal

import psycopg
import pytest

from proxy.backend import QueryControl
from proxy.errors import HushError
from proxy.policy import load_policies
from proxy.sql.analyse import analyse
from proxy.sql.rewrite import PICK_SALT_SETTING, rewrite
from tests.policy_fixtures import load_clinic, write_policies
from tests.spark_server import spark_dsn  # noqa: F401  (the session's Spark server)

SALT = {PICK_SALT_SETTING: "fixed-test-salt"}
PEOPLE_COLUMNS = "person_id INT, ward STRING, age INT, weight DECIMAL(10,2), smoker BOOLEAN, admitted DATE"
VISITS_COLUMNS = "person_id INT, ward STRING, minutes INT, visited DATE, fee DECIMAL(10,3)"


@pytest.fixture(scope="module")
def clinic(spark_dsn: str, module_dsn: str, tmp_path_factory: pytest.TempPathFactory):  # noqa: F811
    """(Spark backend, PostgreSQL connection, policies) over the same clinic rows."""
    from proxy.spark_backend import SparkBackend

    load_clinic(module_dsn, people=600)
    policies = load_policies(write_policies(tmp_path_factory.mktemp("policies"), groups_cap=2))
    backend = SparkBackend(spark_dsn, statement_timeout_ms=60_000)
    session = backend._session
    session.sql("CREATE DATABASE IF NOT EXISTS clinic")
    with psycopg.connect(module_dsn, autocommit=True) as conn:
        for table, columns in (("people", PEOPLE_COLUMNS), ("visits", VISITS_COLUMNS)):
            names = ", ".join(part.split()[0] for part in columns.split(", "))
            rows = conn.execute(f"SELECT {names} FROM clinic.{table}").fetchall()
            session.createDataFrame(rows, schema=columns).write.mode("overwrite") \
                .format("parquet").saveAsTable(f"clinic.{table}")
        yield backend, conn, policies
    backend.close()


def noise_free_both(clinic, sql: str, exact: frozenset[str] = frozenset()) -> tuple[list, list]:
    """The rewrite's noise-free rows for ``sql`` on Spark and on PostgreSQL, as ints."""
    backend, conn, policies = clinic
    rewritten = rewrite(analyse(sql, policies, "tester"), exact)
    on_spark = backend.run(rewritten.sql, None, SALT if rewritten.needs_salt else None)
    with conn.transaction():
        conn.execute("SELECT set_config(%s, %s, true)", (PICK_SALT_SETTING, SALT[PICK_SALT_SETTING]))
        on_postgres = conn.execute(rewritten.sql).fetchall()
    assert len(on_spark) == rewritten.cells
    as_ints = lambda rows: [tuple(int(v) for v in row) for row in rows]  # noqa: E731
    return as_ints(on_spark), as_ints(on_postgres)


SAME_ON_BOTH = [
    "SELECT COUNT(*) FROM people",
    "SELECT COUNT(age), SUM(age) FROM people",
    "SELECT ward, COUNT(*) FROM people GROUP BY ward",
    "SELECT ward, SUM(weight) AS w, AVG(weight) FROM people GROUP BY ward",
    "SELECT age, COUNT(*) FROM people WHERE smoker GROUP BY age",
    "SELECT smoker, COUNT(*) FROM people GROUP BY smoker",
    "SELECT date_trunc('quarter', admitted) AS q, COUNT(*) FROM people GROUP BY 1",
    "SELECT ward, COUNT(*) FROM people WHERE age BETWEEN 20 AND 60 AND ward IN ('north', 'east') "
    "OR weight IS NULL GROUP BY ward",
    "SELECT COUNT(*) FROM people WHERE ward LIKE 'no%' AND NOT smoker",
    "SELECT COUNT(*), SUM(minutes), COUNT(DISTINCT person_id) FROM visits",
    # groups_cap 2 below the 3 wards and 12 months: the salted random choice of cells runs.
    "SELECT ward, COUNT(*), SUM(minutes), COUNT(DISTINCT person_id) FROM visits GROUP BY ward",
    "SELECT date_trunc('month', visited) AS m, ward, COUNT(*), AVG(minutes), SUM(fee) "
    "FROM visits WHERE minutes > 5 GROUP BY 1, 2",
]


# Number columns (weight, fee) are summed per row in steps, or exactly in column units when the
# backend type is decimal: both ways for the queries that sum them, once for the others.
CASES = [(sql, exact) for sql in SAME_ON_BOTH
         for exact in ([frozenset(), frozenset({"weight", "fee"})]
                       if "weight" in sql or "fee" in sql else [frozenset()])]


@pytest.mark.parametrize("sql, exact", CASES,
                         ids=[f"{q[:55]}-{'exact' if e else 'per-row'}" for q, e in CASES])
def test_spark_answers_as_postgresql_does(clinic, sql: str, exact: frozenset[str]) -> None:
    on_spark, on_postgres = noise_free_both(clinic, sql, exact)
    assert on_spark == on_postgres
    assert any(any(row) for row in on_spark)  # not a comparison of two empty answers


def spark_rows(clinic, sql: str) -> list[tuple]:
    backend, _, _ = clinic
    return [tuple(row) for row in backend._session.sql(sql).collect()]


def test_counts_and_clamped_sums_match_spark_itself(clinic) -> None:
    # Spark's own plain aggregates, written by hand (a CASE clamp, a GROUP BY, zeros filled in
    # Python for the declared wards), against the rewrite run on Spark.
    on_spark, _ = noise_free_both(clinic, "SELECT ward, COUNT(*), SUM(age) FROM people GROUP BY ward")
    by_ward = {ward: (count, total) for ward, count, total in spark_rows(
        clinic, "SELECT ward, count(*), sum(CASE WHEN age > 100 THEN 100 WHEN age < 0 THEN 0 "
                "ELSE age END) FROM clinic.people GROUP BY ward")}
    want = [(i, *(int(v or 0) for v in by_ward.get(w, (0, 0))))
            for i, w in enumerate(["north", "south", "east"])]
    assert on_spark == want


def test_per_individual_caps_match_spark_itself(clinic) -> None:
    # rows_cap 3: each person's count is capped at 3 before summing; minutes capped at 60 per
    # row and at 180 per person.
    on_spark, _ = noise_free_both(clinic, "SELECT COUNT(*), SUM(minutes) FROM visits")
    (want,) = spark_rows(clinic, (
        "SELECT sum(least(c, 3)), sum(least(s, 180)) FROM (SELECT person_id, count(*) AS c, "
        "sum(CASE WHEN minutes > 60 THEN 60 WHEN minutes < 0 THEN 0 ELSE minutes END) AS s "
        "FROM clinic.visits WHERE person_id IS NOT NULL GROUP BY person_id)"))
    assert on_spark == [tuple(int(v) for v in want)]


def test_exact_decimal_sum_matches_spark_itself(clinic) -> None:
    on_spark, _ = noise_free_both(clinic, "SELECT SUM(weight) FROM people", frozenset({"weight"}))
    (total,) = spark_rows(clinic, "SELECT sum(CASE WHEN weight > 120 THEN 120 WHEN weight < -5 "
                                  "THEN -5 ELSE weight END) FROM clinic.people")[0]
    assert on_spark == [(int((Decimal(total) / Decimal("0.5") + Decimal("0.5")).to_integral_value(
        rounding="ROUND_FLOOR")),)]


def test_one_individual_moves_spark_answers_at_most_the_sensitivity(clinic) -> None:
    backend, _, policies = clinic
    session = backend._session
    heaviest = spark_rows(clinic, "SELECT person_id FROM clinic.visits GROUP BY person_id "
                                  "ORDER BY count(*) DESC, person_id LIMIT 2")
    sql = "SELECT ward, COUNT(*), SUM(minutes), COUNT(DISTINCT person_id) FROM visits GROUP BY ward"
    plan = analyse(sql, policies, "tester")
    full_rewrite = rewrite(plan)
    full = backend.run(full_rewrite.sql, None, SALT)
    session.sql("CREATE DATABASE IF NOT EXISTS neighbour")
    for (person,) in heaviest:
        session.sql(f"SELECT * FROM clinic.visits WHERE person_id <> {int(person)}").write \
            .mode("overwrite").format("parquet").saveAsTable("neighbour.visits")
        table = plan.table.model_copy(update={"source": "neighbour.visits"})
        without = backend.run(rewrite(dataclasses.replace(plan, table=table)).sql, None, SALT)
        moves = [sum(abs(int(a[1 + n]) - int(b[1 + n])) for a, b in zip(full, without))
                 for n in range(len(full_rewrite.sensitivities))]
        assert all(moved <= bound for moved, bound in zip(moves, full_rewrite.sensitivities)), \
            (person, moves, full_rewrite.sensitivities)
        assert any(moves), person  # the person was really removed (the check could fail)


# ---- the engine over Spark, ledger in PostgreSQL ----------------------------------------------

@pytest.fixture(scope="module")
def engine(clinic, module_dsn: str):
    from proxy.engine import Engine
    from proxy.ledger import Ledger

    backend, _, policies = clinic
    engine = Engine(policies, backend, Ledger(module_dsn, pool_size=2))
    yield engine
    engine._notes.shutdown(wait=True)
    engine.ledger.close()


def test_engine_answers_from_spark_with_noise_and_a_charge(engine) -> None:
    before = engine.ledger.remaining("tester")
    answer = engine.answer("tester", "SELECT ward, COUNT(*) FROM visits GROUP BY ward",
                           epsilon=Decimal("0.5"))
    assert [row[0] for row in answer.rows] == ["north", "south", "east"]
    assert answer.epsilon == Decimal("0.5")
    assert engine.ledger.remaining("tester") == before - Decimal("0.5")


def test_engine_refuses_on_spark_without_charging(engine) -> None:
    before = engine.ledger.remaining("tester")
    with pytest.raises(HushError) as refused:
        engine.answer("tester", "SELECT person_id FROM people")
    assert refused.value.sqlstate != "XX000"
    assert engine.ledger.remaining("tester") == before


def test_a_cancelled_query_is_57014(clinic) -> None:
    backend, _, _ = clinic
    control = QueryControl()
    control.cancel()
    with pytest.raises(HushError) as cancelled:
        backend.run("SELECT COUNT(*) FROM clinic.people", control)
    assert cancelled.value.sqlstate == "57014"


def test_a_slow_query_is_interrupted_at_the_statement_timeout(spark_dsn: str) -> None:  # noqa: F811
    from proxy.spark_backend import SparkBackend

    backend = SparkBackend(spark_dsn, statement_timeout_ms=1500)
    try:
        with pytest.raises(HushError) as timed_out:
            backend.run("SELECT SUM(s.v % 7) FROM GENERATE_SERIES(1, 100000000000) AS s(v)")
        assert timed_out.value.sqlstate == "57014"
        assert "timeout" in timed_out.value.message
        # The session still answers afterwards.
        assert backend.run("SELECT 1") == [(1,)]
    finally:
        backend.close()


def test_a_query_reading_an_unbound_setting_fails_closed(clinic) -> None:
    backend, _, policies = clinic
    rewritten = rewrite(analyse("SELECT ward, COUNT(*) FROM visits GROUP BY ward", policies, "tester"))
    assert rewritten.needs_salt
    with pytest.raises(HushError) as failed:
        backend.run(rewritten.sql)  # no salt given
    assert failed.value.sqlstate == "XX000"
    assert "salt" not in failed.value.message


# ---- where Spark SQL differs from PostgreSQL, pinned ------------------------------------------

def test_null_ordering_is_written_as_postgresql_sorts(clinic) -> None:
    backend, conn, _ = clinic
    sql = "SELECT t.v FROM (VALUES (1), (NULL), (0)) AS t(v) ORDER BY t.v"
    # Spark sorts NULL first ascending; the writer adds NULLS LAST, as PostgreSQL sorts.
    assert spark_rows(clinic, "SELECT v FROM VALUES (1), (NULL), (0) AS t(v) ORDER BY v")[0] == (None,)
    assert backend.run(sql) == conn.execute(sql).fetchall() == [(0,), (1,), (None,)]


def test_integer_division_differs_and_the_rewrite_divides_only_by_steps(clinic) -> None:
    backend, conn, policies = clinic
    # PostgreSQL truncates 7 / 2 to 3; Spark's / is exact (3.5): same text, different value.
    assert conn.execute("SELECT 7 / 2").fetchone() == (3,)
    assert backend.run("SELECT 7 / 2") == [(3.5,)]
    # So the rewrite never divides an integer column: integer sums are clamped, not divided.
    import sqlglot
    import sqlglot.expressions as exp

    for sql in ("SELECT SUM(age) FROM people", "SELECT SUM(minutes) FROM visits"):
        tree = sqlglot.parse_one(rewrite(analyse(sql, policies, "tester")).sql, read="postgres")
        assert not list(tree.find_all(exp.Div))


def test_decimal_overflow_is_an_error_not_a_zero(clinic) -> None:
    backend, _, _ = clinic
    # With ANSI mode a sum past DECIMAL(38) raises; without it Spark returns NULL, which the
    # rewrite's COALESCE would turn into a data-dependent 0.
    big = "CAST('9' || REPEAT('9', 37) AS DECIMAL(38,0))"
    with pytest.raises(HushError) as failed:
        backend.run(f"SELECT COALESCE(SUM(t.v), 0) FROM (SELECT {big} AS v UNION ALL "
                    f"SELECT {big}) AS t")
    assert failed.value.sqlstate == "XX000"


def test_decimal_division_by_the_step_is_exact_enough_for_the_unit_conversion(clinic) -> None:
    backend, conn, _ = clinic
    sql = ("SELECT FLOOR(t.v / 0.25 + 0.5) FROM (VALUES (CAST(12345678.12 AS DECIMAL(10,2))), "
           "(CAST(-0.13 AS DECIMAL(10,2))), (CAST(0.125 AS DECIMAL(10,3)))) AS t(v)")
    assert [tuple(map(int, row)) for row in backend.run(sql)] == \
        [tuple(map(int, row)) for row in conn.execute(sql).fetchall()]


def test_date_trunc_buckets_as_postgresql(clinic) -> None:
    backend, conn, _ = clinic
    sql = ("SELECT CAST(DATE_TRUNC('quarter', t.d) AS DATE), CAST(DATE_TRUNC('month', t.d) AS DATE) "
           "FROM (VALUES (CAST('2026-05-17' AS DATE)), (CAST('2026-12-31' AS DATE))) AS t(d)")
    assert backend.run(sql) == conn.execute(sql).fetchall()


def test_the_number_series_transform_lists_the_same_integers(clinic) -> None:
    from proxy.spark_backend import to_spark_sql

    sql = "SELECT s.v FROM GENERATE_SERIES(-2, 3) AS s(v) ORDER BY s.v"
    assert "range(-2, 3 + 1)" in to_spark_sql(sql).lower()
    backend, conn, _ = clinic
    assert backend.run(sql) == conn.execute(sql).fetchall()
