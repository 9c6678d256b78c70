"""The rewrite on Apache Spark (through Spark Connect) computes what it does on PostgreSQL.

The clinic tables are loaded into PostgreSQL and copied, row for row, into Spark tables. Then
- every reference query's noise-free backend rows, with the contribution bounds forced to the
  same values (``tests.bounds_helpers``), are the same on Spark as on PostgreSQL: measures, the
  bounds the noisy max chose and the clipped-away totals; a few are also checked against
  aggregates Spark computes itself from plain GROUP BY queries;
- removing one individual's rows moves Spark's answers by no more than the sensitivity;
- the engine over Spark answers with noise and a charge in the PostgreSQL ledger, refuses what
  it refuses on PostgreSQL without running anything, cancels and times out;
- the places where Spark SQL differs from PostgreSQL are pinned;
- a real ``hushql serve --backend sc://`` process answers psql and psycopg the demo's
  questions with noise, a charge and a notice; ``hushql demo --no-load`` serves what was loaded.
"""

from __future__ import annotations

import dataclasses
import os
import shutil
import subprocess
import sys
import time
from decimal import Decimal
from pathlib import Path

import psycopg
import pytest

from proxy.backend import QueryControl
from proxy.errors import HushError
from proxy.policy import load_policies
from proxy.sql.analyse import analyse
from proxy.sql.rewrite import WIDE_CELL_COLUMN, Rewritten, rewrite
from tests.bounds_helpers import forced_settings, run_with_bounds
from proxy.demo import DEMO_DATABASE
from tests.policy_fixtures import load_clinic, write_policies
from tests.serve_processes import PASSWORDS, ROOT, read_books, serving
from tests.spark_server import spark_dsn  # noqa: F401  (the session's Spark server)

PEOPLE_COLUMNS = "person_id INT, ward STRING, age INT, weight DECIMAL(10,2), smoker BOOLEAN, admitted DATE"
VISITS_COLUMNS = "person_id INT, ward STRING, minutes INT, visited DATE, fee DECIMAL(10,3)"
# The clinic's number columns are DECIMAL on both engines: summed exactly, as the engine does.
EXACT = frozenset({"weight", "fee"})


@pytest.fixture(scope="module")
def clinic(spark_dsn: str, module_dsn: str, tmp_path_factory: pytest.TempPathFactory):  # noqa: F811
    """(Spark backend, PostgreSQL connection, policies) over the same clinic rows."""
    from proxy.spark_backend import SparkBackend

    load_clinic(module_dsn, people=600)
    policies = load_policies(write_policies(tmp_path_factory.mktemp("policies")))
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


def as_ints(rows) -> list[tuple[int, ...]]:
    return [tuple(int(v) for v in row) for row in rows]


def bound_values(rewritten: Rewritten, pick: str) -> tuple[int, ...]:
    """The bounds to force: the ceilings, or a chosen bound's third candidate (so that
    individuals are scaled down and the clipped totals are not 0)."""
    return tuple(b.candidates[len(b.candidates) // 3] if pick == "low" and b.candidates
                 else b.ceiling for b in rewritten.bounds)


def noise_free_both(clinic, sql: str, pick: str = "ceiling") -> tuple[list, list, Rewritten]:
    """The rewrite's noise-free rows for ``sql`` on Spark and on PostgreSQL, with the same
    bounds forced, as ints: each backend's own shape (Spark's one row per individual up to its
    ``wide_cells``, PostgreSQL's joined shape)."""
    backend, conn, policies = clinic
    plan = analyse(sql, policies, "tester")
    rewritten = rewrite(plan, EXACT)
    on_spark_shape = rewrite(plan, EXACT, wide_cells=backend.wide_cells)
    values = bound_values(rewritten, pick)
    on_spark = backend.run(on_spark_shape.sql, None,
                           forced_settings(on_spark_shape, values) or None)
    on_postgres = run_with_bounds(conn, rewritten, values)
    assert len(on_spark) == rewritten.cells
    return as_ints(on_spark), as_ints(on_postgres), rewritten


SAME_ON_BOTH = [
    # a row table: clamped counts and exact decimal sums, keys of every kind
    "SELECT COUNT(*) FROM people",
    "SELECT ward, COUNT(age), SUM(age), SUM(weight) AS w, AVG(weight) FROM people GROUP BY ward",
    "SELECT age, COUNT(*) FROM people WHERE smoker GROUP BY age",
    "SELECT smoker, COUNT(*) FROM people GROUP BY smoker",
    "SELECT ward, COUNT(*) FROM people WHERE age BETWEEN 20 AND 60 AND ward IN ('north', 'east') "
    "OR weight IS NULL GROUP BY ward",
    "SELECT COUNT(*) FROM people WHERE ward LIKE 'no%' AND NOT smoker",
    "SELECT date_trunc('quarter', admitted) AS q, date_trunc('decade', admitted) AS d, "
    "date_trunc('century', admitted) AS c, date_trunc('millennium', admitted) AS m, COUNT(*) "
    "FROM people GROUP BY 1, 2, 3, 4",
    "SELECT date_trunc('week', admitted), COUNT(*) FROM people GROUP BY 1",
    "SELECT date_trunc('hour', admitted), COUNT(*) FROM people WHERE admitted < '2026-01-10' GROUP BY 1",
    "SELECT extract(dow FROM admitted), extract(isodow FROM admitted), COUNT(*) FROM people GROUP BY 1, 2",
    "SELECT extract(week FROM admitted), extract(isoyear FROM admitted), COUNT(*) FROM people GROUP BY 1, 2",
    "SELECT extract(doy FROM admitted), COUNT(*) FROM people WHERE extract(dow FROM admitted) IN (0, 6) GROUP BY 1",
    "SELECT extract(decade FROM admitted), extract(century FROM admitted), "
    "extract(millennium FROM admitted), date_part('quarter', admitted), COUNT(*) FROM people GROUP BY 1, 2, 3, 4",
    "SELECT CASE WHEN age < 18 THEN 'child' WHEN age < 65 THEN 'adult' ELSE 'senior' END AS band, "
    "CASE ward WHEN 'north' THEN 'n' END AS w, COUNT(*) FROM people GROUP BY 1, 2",
    "SELECT width_bucket(age, 0, 100, 10), width_bucket(weight, -5, 120, 7), COUNT(*) FROM people GROUP BY 1, 2",
    "SELECT width_bucket(weight, 120, -5, 9), SUM(age) FROM people GROUP BY 1",
    "SELECT floor(age / 7) * 7, floor(weight / 2.5) * 2.5, COUNT(*) FROM people GROUP BY 1, 2",
    "SELECT COUNT(*) FROM people WHERE width_bucket(age, 0, 100, 10) > 3 AND floor(weight / 0.3) * 0.3 < 50",
    # a table with individuals: whole-individual bounds, several measures, keys
    "SELECT COUNT(*), SUM(minutes), COUNT(DISTINCT person_id) FROM visits",
    "SELECT ward, COUNT(*), SUM(minutes), COUNT(DISTINCT person_id), AVG(fee) FROM visits GROUP BY ward",
    "SELECT date_trunc('month', visited) AS m, ward, COUNT(*), AVG(minutes), SUM(fee) "
    "FROM visits WHERE minutes > 5 GROUP BY 1, 2",
    "SELECT visited, COUNT(*) FROM visits WHERE visited BETWEEN '2026-03-01' AND '2026-03-09' GROUP BY visited",
    "SELECT extract(dow FROM visited), floor(minutes / 10) * 10, SUM(fee) FROM visits GROUP BY 1, 2",
    # spreads (centred sums of squares) and percentile histograms (cumulative thinning)
    "SELECT ward, VARIANCE(age), STDDEV_POP(weight) FROM people GROUP BY ward",
    "SELECT ward, VAR_POP(minutes), STDDEV(fee) FROM visits GROUP BY ward",
    "SELECT ward, median(age) FROM people GROUP BY ward",
    "SELECT ward, percentile_disc(0.9) WITHIN GROUP (ORDER BY fee) FROM visits GROUP BY ward",
]

# Tables with individuals with a chosen bound forced below its ceiling (scaling individuals
# down); the engine test below runs them at the bounds the noisy max picks.
CASES = [(sql, "low" if "visits" in sql else "ceiling") for sql in SAME_ON_BOTH]


@pytest.mark.parametrize("sql, pick", CASES, ids=[f"{q[:60]}-{p}" for q, p in CASES])
def test_spark_answers_as_postgresql_does(clinic, sql: str, pick: str) -> None:
    on_spark, on_postgres, rewritten = noise_free_both(clinic, sql, pick)
    assert on_spark == on_postgres
    assert any(any(row) for row in on_spark)  # not a comparison of two empty answers
    if pick == "low" and "BETWEEN" not in sql:  # the bounds clipped something, reported alike
        clipped = [row[-len(rewritten.bounds):] for row in on_spark]
        assert any(any(c) for c in clipped)


def test_spark_runs_per_individual_cases_in_the_wide_shape(clinic) -> None:
    """The comparison above checks Spark's own shape (one row per individual) against
    PostgreSQL's joined one wherever the cells are few enough: most per-individual cases."""
    backend, _, policies = clinic
    wide = [sql for sql in SAME_ON_BOTH if WIDE_CELL_COLUMN in rewrite(
        analyse(sql, policies, "tester"), EXACT, wide_cells=backend.wide_cells).sql]
    assert all("visits" in sql for sql in wide) and len(wide) >= 4


def spark_rows(clinic, sql: str) -> list[tuple]:
    backend, _, _ = clinic
    return [tuple(row) for row in backend._session.sql(sql).collect()]


def test_counts_and_clamped_sums_match_spark_itself(clinic) -> None:
    # Spark's own plain aggregates, written by hand (a CASE clamp, a GROUP BY, zeros filled in
    # Python for the declared wards), against the rewrite run on Spark.
    on_spark, _, _ = noise_free_both(clinic, "SELECT ward, COUNT(*), SUM(age) FROM people GROUP BY ward")
    by_ward = {ward: (count, total) for ward, count, total in spark_rows(
        clinic, "SELECT ward, count(*), sum(CASE WHEN age > 100 THEN 100 WHEN age < 0 THEN 0 "
                "ELSE age END) FROM clinic.people GROUP BY ward")}
    want = [(i, *(int(v or 0) for v in by_ward.get(w, (0, 0))))
            for i, w in enumerate(["north", "south", "east"])]
    assert on_spark == want


def test_whole_individual_bounds_match_spark_itself(clinic) -> None:
    # One cell, bounds R (rows) and T (minutes) forced low: each person's count n and clamped
    # total tot are scaled by one factor min(1, R/n, T/tot), each rounded toward zero, written
    # by hand in Spark SQL; the clipped-away totals are what the scaling removed.
    on_spark, _, rewritten = noise_free_both(clinic, "SELECT COUNT(*), SUM(minutes) FROM visits", "low")
    rows_bound, minutes_bound = bound_values(rewritten, "low")
    assert rewritten.bounds[0].subject == "rows" and rows_bound < rewritten.bounds[0].ceiling
    (count, total, lost_rows, lost_minutes), = spark_rows(clinic, (
        f"SELECT sum(kept_n), sum(kept_tot), sum(n - kept_n), sum(tot - kept_tot) FROM ("
        f"SELECT n, tot, least(n, {rows_bound}, CASE WHEN tot > 0 THEN n * {minutes_bound} div tot END) AS kept_n, "
        f"least(tot, tot * {rows_bound} div n, CASE WHEN tot > 0 THEN {minutes_bound} END) AS kept_tot FROM ("
        "SELECT person_id, count(*) AS n, sum(CASE WHEN minutes > 60 THEN 60 WHEN minutes < 0 "
        "THEN 0 ELSE minutes END) AS tot FROM clinic.visits WHERE person_id IS NOT NULL "
        "GROUP BY person_id))"))
    assert on_spark[0][:4] == (count, total, rows_bound, minutes_bound)
    assert lost_rows > 0 and lost_minutes > 0  # the bounds were binding (the check could fail)
    # Each person's clipped amount is capped (rewrite notes, 7); these bounds leave it under
    # the cap, so the sums are the plain totals removed.
    assert on_spark[0][4:] == (lost_rows, lost_minutes)


def test_exact_decimal_sum_matches_spark_itself(clinic) -> None:
    on_spark, _, _ = noise_free_both(clinic, "SELECT SUM(weight) FROM people")
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
    values = bound_values(full_rewrite, "low")
    settings = forced_settings(full_rewrite, values)
    full = backend.run(full_rewrite.sql, None, settings)
    session.sql("CREATE DATABASE IF NOT EXISTS neighbour")
    for (person,) in heaviest:
        session.sql(f"SELECT * FROM clinic.visits WHERE person_id <> {int(person)}").write \
            .mode("overwrite").format("parquet").saveAsTable("neighbour.visits")
        table = plan.table.model_copy(update={"source": "neighbour.visits"})
        without_rewrite = rewrite(dataclasses.replace(plan, table=table))
        without = backend.run(without_rewrite.sql, None, forced_settings(without_rewrite, values))
        measures = len(plan.measures)
        moves = [sum(abs(int(a[1 + n]) - int(b[1 + n])) for a, b in zip(full, without))
                 for n in range(measures)]
        bounds = full_rewrite.sensitivities(values)
        assert all(moved <= bound for moved, bound in zip(moves, bounds)), (person, moves, bounds)
        assert any(moves), person  # the person was really removed (the check could fail)


# ---- the engine over Spark, ledger in PostgreSQL ----------------------------------------------

@pytest.fixture(scope="module")
def engine(clinic, module_dsn: str):
    from proxy.engine import Engine
    from proxy.ledger import Ledger

    backend, _, policies = clinic
    engine = Engine(policies, backend, Ledger(module_dsn, pool_size=2, schema="spark_ledger"))
    yield engine
    engine.ledger.close()


def test_engine_answers_from_spark_with_noise_and_a_charge(engine) -> None:
    before = engine.ledger.remaining("tester")
    answer = engine.answer("tester", "SELECT ward, COUNT(*), SUM(minutes) FROM visits GROUP BY ward",
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


def explained_sql(engine, sql: str) -> str:
    """The "backend sql" item of EXPLAIN, its continuation rows joined by newlines."""
    rows = [tuple(row) for row in engine.explain("tester", sql).rows]
    start = [item for item, _ in rows].index("backend sql")
    lines = [rows[start][1]]
    for item, value in rows[start + 1:]:
        if item:
            break
        lines.append(value)
    return "\n".join(lines)


def test_explain_shows_the_spark_sql_that_runs(engine, clinic) -> None:
    """EXPLAIN on Spark shows the Spark SQL sent, not the PostgreSQL rewrite: run as it reads
    (its parameters bound as the engine binds them), it gives the rows the backend gives, which
    the backend then sorts by the cells' ordinals (``ordinals_sorted_here``)."""
    backend, _, _ = clinic
    sql = "SELECT ward, floor(minutes / 10) * 10 AS m, COUNT(*), SUM(minutes) FROM visits GROUP BY 1, 2"
    shown = explained_sql(engine, sql)
    rewritten = engine.prepare("tester", sql).rewritten
    assert len(shown.splitlines()) >= 10  # laid out over lines
    # Spark's own spellings (SPARK_TRANSFORMS), never PostgreSQL's.
    assert ":hushql_bound_noise_0" in shown and "current_setting" not in shown.lower()
    assert " DIV " in shown and "current_setting" in rewritten.sql.lower()
    settings = forced_settings(rewritten, bound_values(rewritten, "low"))
    arguments = {name.replace(".", "_"): value for name, value in settings.items()}
    assert "ORDER BY C.I0" not in " ".join(shown.split()).upper()  # sorted by run, not Spark
    assert sorted(as_ints(backend._session.sql(shown, args=arguments).collect())) == \
        as_ints(backend.run(rewritten.sql, None, settings))


def test_a_cancelled_query_is_57014(clinic) -> None:
    backend, _, _ = clinic
    control = QueryControl()
    control.cancel()
    with pytest.raises(HushError) as cancelled:
        backend.run("SELECT COUNT(*) FROM clinic.people", control)
    assert cancelled.value.sqlstate == "57014"


def test_a_slow_query_is_interrupted_at_the_statement_timeout(clinic) -> None:
    backend, _, _ = clinic
    with pytest.raises(HushError) as timed_out:
        backend.run("SELECT SUM(s.v % 7) FROM GENERATE_SERIES(1, 100000000000) AS s(v)",
                    timeout_ms=1500)
    assert timed_out.value.sqlstate == "57014"
    assert "timeout" in timed_out.value.message
    # The session still answers afterwards.
    assert backend.run("SELECT 1") == [(1,)]


def test_a_query_reading_unbound_noise_fails_closed(clinic) -> None:
    backend, _, policies = clinic
    rewritten = rewrite(analyse("SELECT ward, COUNT(*) FROM visits GROUP BY ward", policies, "tester"))
    assert any(b.chosen for b in rewritten.bounds)
    with pytest.raises(HushError) as failed:
        backend.run(rewritten.sql)  # no bound noise given
    assert failed.value.sqlstate == "XX000"
    assert "noise" not in failed.value.message


# ---- where Spark SQL differs from PostgreSQL, pinned ------------------------------------------

def test_null_ordering_is_written_as_postgresql_sorts(clinic) -> None:
    backend, conn, _ = clinic
    sql = "SELECT t.v FROM (VALUES (1), (NULL), (0)) AS t(v) ORDER BY t.v"
    # Spark sorts NULL first ascending; the writer adds NULLS LAST, as PostgreSQL sorts.
    assert spark_rows(clinic, "SELECT v FROM VALUES (1), (NULL), (0) AS t(v) ORDER BY v")[0] == (None,)
    assert backend.run(sql) == conn.execute(sql).fetchall() == [(0,), (1,), (None,)]


def test_integer_division_truncates_toward_zero_on_both(clinic) -> None:
    backend, conn, _ = clinic
    # PostgreSQL's integer / truncates toward zero (-7 / 2 = -3); Spark's / is exact (-3.5)
    # and its DIV truncates toward zero, as the transforms write it.
    assert conn.execute("SELECT -7 / 2, 7 / 2, -7 / -2").fetchone() == (-3, 3, 3)
    assert spark_rows(clinic, "SELECT -7 / 2")[0][0] == Decimal("-3.5") or \
        spark_rows(clinic, "SELECT -7 / 2")[0][0] == -3.5
    assert spark_rows(clinic, "SELECT -7 div 2, 7 div 2, -7 div -2")[0] == (-3, 3, 3)
    # A floor key over an integer column is written with DIV, and buckets negative values as
    # PostgreSQL does (floor(-7 / 2) * 2 = -6 there, not -8).
    sql = "SELECT floor(t.v / 2) * 2 FROM (VALUES (-7), (-1), (0), (5)) AS t(v) ORDER BY 1"
    from proxy.spark_backend import to_spark_sql

    spark_sql = to_spark_sql(sql, {"v": "integer"})
    assert " DIV " in spark_sql.upper()
    assert as_ints(spark_rows(clinic, spark_sql)) == as_ints(conn.execute(sql).fetchall()) \
        == [(-6,), (0,), (0,), (4,)]


def test_floors_over_narrow_decimals_are_exact_and_wide_ones_refused(clinic) -> None:
    from proxy.spark_backend import NotOnSpark, to_spark_sql

    backend, conn, _ = clinic
    # Past 38 digits Spark drops decimals: DECIMAL(38, 18) / 3 rounds 0.999...9667 up to 1,
    # where PostgreSQL's NUMERIC gives floor 0. Columns that wide are refused for floors.
    plain = spark_rows(clinic, "SELECT floor(CAST('2.999999999999999999' AS DECIMAL(38, 18)) / 3)")
    assert int(plain[0][0]) == 1
    sql = "SELECT floor(t.v / 3) * 3 FROM t"
    with pytest.raises(NotOnSpark):
        to_spark_sql(sql, {"v": "numeric(38,18)"})
    # At most 18 digits, edge values bucket as in PostgreSQL.
    values = ["2.9999999999", "-0.0000000001", "3", "-3.0000000001", "0"]
    backend._session.sql("CREATE OR REPLACE TEMP VIEW t AS " + " UNION ALL ".join(
        f"SELECT CAST('{v}' AS DECIMAL(18, 10)) AS v" for v in values))
    on_spark = sorted(as_ints(spark_rows(clinic, to_spark_sql(sql, {"v": "numeric(18,10)"}))))
    on_postgres = sorted(as_ints(conn.execute(
        "SELECT floor(t.v / 3) * 3 FROM (VALUES " + ", ".join(f"({v}::numeric(18,10))" for v in values)
        + ") AS t(v)").fetchall()))
    assert on_spark == on_postgres == [(-6,), (-3,), (0,), (0,), (3,)]


def test_rounding_halves_as_postgresql_per_type(clinic) -> None:
    _, conn, _ = clinic
    # PostgreSQL rounds NUMERIC halves away from zero and double precision halves to even
    # (PostgreSQL docs, Mathematical Functions: round); Spark's round is HALF_UP on both, its
    # bround HALF_EVEN: the transform picks by the column's type.
    assert as_ints(conn.execute("SELECT round(2.5::numeric), round(2.5::float8), "
                                "round(-2.5::float8)").fetchall()) == [(3, 2, -2)]
    assert as_ints(spark_rows(clinic, "SELECT round(2.5BD), bround(CAST(2.5 AS DOUBLE)), "
                                      "bround(CAST(-2.5 AS DOUBLE)), round(CAST(2.5 AS DOUBLE))")) \
        == [(3, 2, -2, 3)]
    from proxy.spark_backend import to_spark_sql

    assert "BROUND(" in to_spark_sql("SELECT SUM(round(x / 0.25)) FROM t", {"x": "double precision"}).upper()
    assert "BROUND(" not in to_spark_sql("SELECT SUM(round(x / 0.25)) FROM t", {"x": "numeric(10,2)"}).upper()


def test_decimal_overflow_is_an_error_not_a_zero(clinic) -> None:
    backend, _, _ = clinic
    # With ANSI mode a sum past DECIMAL(38) raises; without it Spark returns NULL, which the
    # rewrite's COALESCE would turn into a data-dependent 0.
    big = "CAST('9' || REPEAT('9', 37) AS DECIMAL(38,0))"
    with pytest.raises(HushError) as failed:
        backend.run(f"SELECT COALESCE(SUM(t.v), 0) FROM (SELECT {big} AS v UNION ALL "
                    f"SELECT {big}) AS t")
    assert failed.value.sqlstate == "XX000"


def test_date_buckets_and_fields_as_postgresql(clinic) -> None:
    from proxy.spark_backend import to_spark_sql

    _, conn, _ = clinic
    days = ["2000-12-31", "2001-01-01", "2026-05-17", "2026-12-31", "2027-01-03", "2020-02-29"]
    fields = ["year", "quarter", "month", "week", "day", "dow", "isodow", "doy", "isoyear",
              "decade", "century", "millennium"]
    units = ["week", "month", "quarter", "year", "decade", "century", "millennium"]
    columns = [f"extract({f} FROM t.d)" for f in fields] + \
        [f"CAST(date_trunc('{u}', CAST(t.d AS TIMESTAMP)) AS DATE)" for u in units]
    values = ", ".join(f"(DATE '{d}')" for d in days)
    sql = f"SELECT {', '.join(columns)} FROM (VALUES {values}) AS t(d) ORDER BY t.d"
    on_spark = spark_rows(clinic, to_spark_sql(sql, {}))
    on_postgres = conn.execute(sql).fetchall()
    normal = lambda rows: [tuple(str(int(v)) if isinstance(v, (int, Decimal)) else str(v) for v in row)  # noqa: E731
                           for row in rows]
    assert normal(on_spark) == normal(on_postgres)


def test_clamps_of_decimals_are_narrowed_and_sum_to_postgresql_s_values(clinic) -> None:
    """narrow_clamps: a clamp of a DECIMAL(7,1) between integer literals is typed DECIMAL(8,1)
    (summed in longs by Spark) and every sum is still PostgreSQL's, halves and ends included."""
    from proxy.spark_backend import to_spark_sql

    clamp = "CASE WHEN t.x < 0 THEN 0 WHEN t.x > 2000 THEN 2000 ELSE t.x END"
    values = ", ".join(f"({v})" for v in ("CAST(-3.0 AS NUMERIC(7,1))", "2500.5", "1999.9",
                                            "0.1", "NULL", "123456.7", "0.0"))
    sql = f"SELECT SUM({clamp}), COUNT({clamp}), MIN({clamp}) FROM (VALUES {values}) AS t(x)"
    written = to_spark_sql(sql, {"x": "numeric(7,1)"})
    assert "AS DECIMAL(8, 1)" in written
    # More decimals in a literal widen the type (6 whole digits of the column, 3 decimals).
    assert "AS DECIMAL(9, 3)" in to_spark_sql(
        "SELECT SUM(CASE WHEN t.x < -0.125 THEN -0.125 WHEN t.x > 99999 THEN 99999 ELSE t.x END) "
        "FROM t", {"x": "numeric(7,1)"})
    _, conn, _ = clinic
    assert spark_rows(clinic, written) == [tuple(conn.execute(sql).fetchone())]


def test_the_number_series_transform_lists_the_same_integers(clinic) -> None:
    from proxy.spark_backend import to_spark_sql

    sql = "SELECT s.v FROM GENERATE_SERIES(-2, 3) AS s(v) ORDER BY s.v"
    assert "range(-2, 3 + 1)" in to_spark_sql(sql).lower()
    backend, conn, _ = clinic
    assert backend.run(sql) == conn.execute(sql).fetchall()


# ---- the demo's questions through `hushql serve --backend sc://` -------------------------------

# The demo's questions (README, proxy.demo's examples): (SQL, rows in the answer).
DEMO_QUESTIONS = [
    ("SELECT COUNT(*) FROM households", 1),
    ("SELECT SUM(litres) FROM readings", 1),
    ("SELECT district, AVG(occupants) FROM households GROUP BY district", 3),
    ("SELECT date_trunc('month', reading_date) AS month, SUM(litres) FROM readings "
     "GROUP BY 1 ORDER BY 1", 12),
]


@pytest.fixture(scope="module")
def spark_scenario(spark_dsn: str) -> str:  # noqa: F811
    """The demo scenario (a few households) loaded into the Spark server, as `hushql demo` does."""
    from proxy.spark_demo import load_scenario_into_spark

    load_scenario_into_spark(spark_dsn, households=40, progress=False)
    return spark_dsn


def _charge_ids(books) -> list[int]:
    return [charge[0] for charge in books.charges]


def run_cli(*arguments: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "proxy.cli", *arguments], cwd=ROOT, text=True,
                          capture_output=True, timeout=300)


def _wait_for_stored_answers(ledger_dsn: str, count: int, seconds: float = 30) -> None:
    """Until the ledger holds ``count`` stored answers (written off the answers' path)."""
    deadline = time.monotonic() + seconds
    while True:
        with psycopg.connect(ledger_dsn) as conn:
            found = conn.execute("SELECT count(*) FROM hushql.stored_answers").fetchone()
        if found is not None and found[0] >= count:
            return
        assert time.monotonic() < deadline, f"{found} stored answers after {seconds} s"
        time.sleep(0.05)


def test_serve_on_spark_answers_psql_with_noise_a_charge_and_a_notice(
        spark_scenario: str, module_dsn: str, tmp_path: Path) -> None:
    """The issue's acceptance check: a real psql, then psycopg for each of the demo's
    questions, through `hushql serve --backend sc://... --ledger postgresql://... --workers 2`
    (two processes, each with its own Spark Connect session, charging one ledger)."""
    with serving(spark_scenario, tmp_path / "serve.log", workers=2,
                 extra=("--ledger", module_dsn)) as served:
        # psql itself (the client analysts use): the answer on stdout, the charge as a NOTICE.
        done = subprocess.run(
            ["psql", "-X", "-h", "127.0.0.1", "-p", str(served.port), "-U", "planner",
             "-d", DEMO_DATABASE, "-c", "SELECT COUNT(*) FROM households"],
            env={**os.environ, "PGPASSWORD": PASSWORDS["planner"]}, text=True,
            capture_output=True, timeout=120)
        assert done.returncode == 0, done.stderr
        assert "(1 row)" in done.stdout
        assert "NOTICE:  this answer spent epsilon" in done.stderr
        with served.connect() as conn:
            conn.autocommit = True
            notices: list[str] = []
            conn.add_notice_handler(lambda diagnostic: notices.append(diagnostic.message_primary))
            # psql's question again: the stored answer, reused for nothing (a stored answer
            # lives in the ledger's PostgreSQL whatever the backend). Its note is written just
            # after the answer (proxy.answer_notes) and this connection may land on the other
            # worker, which finds it once written: wait for it.
            _wait_for_stored_answers(module_dsn, 1)
            before = read_books(module_dsn)
            conn.execute("SELECT COUNT(*) FROM households").fetchall()
            assert notices.pop().startswith("this answer was given before and is reused")
            assert _charge_ids(read_books(module_dsn)) == _charge_ids(before)
            conn.execute("SET hushql.fresh = on")  # from here on, each question pays
            for sql, cells in DEMO_QUESTIONS:
                before = read_books(module_dsn)
                rows = conn.execute(sql).fetchall()
                after = read_books(module_dsn)
                assert len(rows) == cells, sql
                # Counts and sums always answer; an average is NULL where the noisy count is
                # not positive (proxy.engine), which a district of few households can get.
                if "AVG" not in sql:
                    assert all(value is not None for row in rows for value in row), sql
                assert notices.pop().startswith("this answer spent epsilon"), sql
                [charge] = after.charges[len(before.charges):]  # one charge per answer
                assert charge[1] == "planner" and charge[3] > 0, sql
                assert after.consistent()
            # EXPLAIN through the wire: Spark SQL (backquoted names), nothing charged.
            before = read_books(module_dsn)
            explained = conn.execute("EXPLAIN SELECT district, SUM(litres) FROM readings "
                                     "GROUP BY district").fetchall()
            shown = "\n".join(value for _, value in explained)
            assert "`utility`.`meter_readings`" in shown and "current_setting" not in shown
            # A refused query: its SQLSTATE and hint, no charge.
            with pytest.raises(psycopg.errors.FeatureNotSupported) as refused:
                conn.execute("SELECT * FROM households")
            assert refused.value.diag.message_hint
            # (outcomes are recorded after release, off the answer path: compare charge rows)
            assert _charge_ids(read_books(module_dsn)) == _charge_ids(before)


def test_demo_no_load_on_spark_serves_the_tables_loaded_before(spark_scenario: str,
                                                             module_dsn: str) -> None:
    done = run_cli("demo", "--backend", spark_scenario, "--ledger", module_dsn, "--no-load",
                   "--no-serve")
    assert done.returncode == 0, done.stderr
    assert "Loaded" not in done.stdout  # nothing written again
    # The command it prints to serve later names the ledger too (a Spark backend needs one).
    assert f"demo --no-load --backend {spark_scenario} --ledger {module_dsn}" in done.stdout


def test_demo_no_load_on_spark_refuses_in_one_line_when_the_tables_are_missing(
        spark_scenario: str, module_dsn: str, tmp_path: Path) -> None:
    policies = tmp_path / "policies"
    shutil.copytree(ROOT / "policies", policies)
    households = policies / "tables" / "households.toml"
    households.write_text(households.read_text().replace('source = "utility.households"',
                                                         'source = "never_loaded.households"'))
    done = run_cli("demo", "--backend", spark_scenario, "--ledger", module_dsn, "--no-load",
                   "--no-serve", "--policies", str(policies))
    assert done.returncode == 1
    [line] = done.stderr.splitlines()
    assert line.startswith("hushql demo --no-load: the scenario is not loaded on ")
    assert "never_loaded.households" in line and "--no-serve" in line


# ---- refused on Spark (pure: no server needed) ------------------------------------------------

@pytest.mark.parametrize("sql", [
    "SELECT width_bucket(CAST(x AS NUMERIC), 0, 10, 5) FROM t",
    "SELECT floor(CAST(x AS NUMERIC) / 2.5) * 2.5 FROM t",
])
def test_number_keys_over_floating_columns_are_refused(sql: str) -> None:
    from proxy.spark_backend import NotOnSpark, to_spark_sql

    # PostgreSQL converts a double to NUMERIC through 15 significant digits, Spark through the
    # double's shortest string: bucket edges could differ, so nothing is run.
    with pytest.raises(NotOnSpark):
        to_spark_sql(sql, {"x": "double precision"})
    assert to_spark_sql(sql, {"x": "numeric(10,2)"})  # the same over a DECIMAL column is written


def test_an_unsized_numeric_cast_of_unknown_values_is_refused() -> None:
    from proxy.spark_backend import NotOnSpark, to_spark_sql

    # Spark's DECIMAL means DECIMAL(10, 0): it would round a value PostgreSQL keeps.
    with pytest.raises(NotOnSpark):
        to_spark_sql("SELECT CAST(a + b AS NUMERIC) FROM t", {"a": "numeric", "b": "numeric"})


def test_a_shape_spark_cannot_run_exactly_is_refused_by_the_check_the_engine_runs_first(
        clinic, engine) -> None:
    backend, _, _ = clinic
    # A DECIMAL(38, 18) column: floors over it are refused on Spark. Engine.prepare calls this
    # check before reserving any epsilon.
    backend._session.sql("SELECT CAST(age AS DECIMAL(38, 18)) AS weight, person_id, ward, age, "
                         "smoker, admitted FROM clinic.people").write.mode("overwrite") \
        .format("parquet").saveAsTable("clinic.wide")
    table = engine.policies.tables["people"]
    wide = table.model_copy(update={"source": "clinic.wide"})
    plan = analyse("SELECT floor(weight / 2.5) * 2.5, COUNT(*) FROM people GROUP BY 1",
                   engine.policies, "tester")
    sql = rewrite(dataclasses.replace(plan, table=wide), EXACT).sql
    with pytest.raises(HushError) as refused:
        backend.check(sql)
    assert refused.value.sqlstate == "0A000" and "DECIMAL" in (refused.value.hint or "")


def test_only_the_final_sort_of_the_cells_ordinals_is_left_to_run() -> None:
    from proxy.spark_backend import _sorted_rows, spark_query

    cells = ("SELECT c.i0, c.i1, COALESCE(a.m0, 0) AS m0 FROM (SELECT 1 AS i0, 2 AS i1) AS c "
             "LEFT JOIN (SELECT 1 AS i0, 2 AS i1, 3 AS m0) AS a ON a.i0 = c.i0 ORDER BY c.i0, c.i1")
    text, sorted_by = spark_query(cells)
    assert sorted_by == 2 and "ORDER BY" not in text.upper()
    # Any other sort is Spark's to do: descending, limited, not the leading columns, not c's.
    for kept in (cells.replace("ORDER BY c.i0, c.i1", "ORDER BY c.i0, c.i1 DESC"),
                 cells + " LIMIT 1", cells.replace("ORDER BY c.i0, c.i1", "ORDER BY c.i1"),
                 cells.replace("c.", "d.").replace("AS c ", "AS d ")):
        text, sorted_by = spark_query(kept)
        assert sorted_by == 0 and "ORDER BY" in text.upper(), kept
    # run's sort: ascending by the leading columns, NULL last as PostgreSQL sorts.
    assert _sorted_rows([(2, 0, "b"), (None, 1, "c"), (1, 5, "a"), (1, None, "d")], 2) == \
        [(1, 5, "a"), (1, None, "d"), (2, 0, "b"), (None, 1, "c")]
