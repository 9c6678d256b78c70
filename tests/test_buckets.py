"""Group keys as written, checked against PostgreSQL itself.

Two kinds of checks:
- domains: the values ``proxy.sql.domains`` lists for a key equal the distinct values
  PostgreSQL computes for that expression over every value of the declared range (walked with
  generate_series), so no row can fall outside the cells and no cell is invented;
- answers: the rewrite's noise-free rows equal PostgreSQL's exact GROUP BY of the expression as
  the analyst wrote it, over the rows inside the declared domain (the rows a plain GROUP BY on
  the column counts), with every declared cell present and empty cells reading 0.
"""

from __future__ import annotations

import datetime as dt
import itertools
from decimal import Decimal

import psycopg
import pytest

from proxy.policy import ColumnPolicy, load_policies
from proxy.sql.analyse import analyse
from proxy.sql.domains import EXTRACT_FIELDS, TRUNC_UNITS, key_size, key_values
from proxy.sql.plan import GroupKey
from proxy.sql.rewrite import rewrite
from tests.bounds_helpers import run_with_bounds
from tests.policy_fixtures import load_clinic, write_policies

# ---- domains ---------------------------------------------------------------------------------

# Short spans across year ends, leap days and ISO years of 53 weeks (2020, 2026), one whole
# declared year, and spans long enough (over 4000 days) to be counted rather than walked.
SPANS = [("2026-01-01", "2026-12-31"), ("2026-12-27", "2027-01-05"), ("2024-02-27", "2024-03-02"),
         ("2020-12-25", "2021-01-10"), ("2026-03-02", "2026-03-08"), ("2019-06-01", "2031-06-30"),
         ("2096-01-02", "2109-01-01"), ("1999-12-31", "2001-01-01")]


@pytest.fixture(scope="module")
def conn(module_dsn: str):
    with psycopg.connect(module_dsn, autocommit=True) as connection:
        yield connection


def _dates(start: str, end: str) -> str:
    return f"generate_series(DATE '{start}', DATE '{end}', INTERVAL '1 day') AS s(t)"


@pytest.mark.parametrize("start, end", SPANS)
def test_date_domains_equal_postgresql_over_every_day(conn, start: str, end: str) -> None:
    column = ColumnPolicy(kind="date", range=[start, end])
    for unit in TRUNC_UNITS:
        want = [r[0] for r in conn.execute(
            f"SELECT DISTINCT date_trunc('{unit}', t)::date FROM {_dates(start, end)} ORDER BY 1")]
        key = GroupKey("d", "date_trunc", unit=unit)
        assert list(key_values(column, key)) == want, unit
        assert key_size(column, key) == len(want), unit
    for field in EXTRACT_FIELDS:
        want = [r[0] for r in conn.execute(
            f"SELECT DISTINCT extract({field} FROM t::date) FROM {_dates(start, end)} ORDER BY 1")]
        key = GroupKey("d", "extract", unit=field)
        assert list(key_values(column, key)) == want, field
        assert key_size(column, key) == len(want), field


NUMBER_KEYS = [
    ("integer", [1, 8], None, "width_bucket", (1, 9, 4)),
    ("integer", [-20, 35], None, "width_bucket", (0, 30, 7)),
    ("integer", [-20, 35], None, "width_bucket", (30, 0, 7)),
    ("integer", [1, 8], None, "width_bucket", (0, 100, 1000)),
    ("integer", [-20, 35], None, "floor", (7,)),
    ("integer", [-20, 35], None, "floor", (Decimal("2.5"),)),
    ("integer", [1, 8], None, "floor", (Decimal("0.5"),)),
    ("number", [-5, 120], Decimal("0.5"), "width_bucket", (0, 100, 4)),
    ("number", [-5, 120], Decimal("0.5"), "width_bucket", (Decimal("-2.5"), Decimal("7.25"), 3)),
    ("number", [-5, 120], Decimal("0.5"), "floor", (Decimal("12.5"),)),
    ("number", [0, 2000], Decimal("0.1"), "floor", (100,)),
]


@pytest.mark.parametrize("kind, bounds, step, form, arguments", NUMBER_KEYS)
def test_number_bucket_domains_hold_every_value_postgresql_computes(
        conn, kind, bounds, step, form, arguments) -> None:
    column = ColumnPolicy(kind=kind, range=bounds, step=step)
    key = GroupKey("x", form, arguments=tuple(Decimal(a) for a in arguments))
    low, high = bounds
    if kind == "integer":
        series, value = f"generate_series({low}, {high}) AS s(x)", "x"
    else:  # every multiple of the step, and a value between each two
        series, value = f"generate_series({low}::numeric, {high}, {step / 4}) AS s(x)", "x"
    if form == "width_bucket":
        a, b, n = arguments
        expression = f"width_bucket({value}, {a}, {b}, {n})"
    else:
        (w,) = arguments
        expression = f"floor({value} / {w}) * {w}"
    want = [r[0] for r in conn.execute(f"SELECT DISTINCT {expression} FROM {series} ORDER BY 1")]
    got = list(key_values(column, key))
    assert key_size(column, key) == len(got) == len(set(got))
    if kind == "integer":
        assert got == want  # walked value by value: exactly PostgreSQL's values
    else:  # the span between the end buckets: every value PostgreSQL computes, in order
        assert set(want) <= set(got) and (got[0], got[-1]) == (want[0], want[-1])


# ---- answers ---------------------------------------------------------------------------------

@pytest.fixture(scope="module")
def clinic(module_dsn: str, tmp_path_factory: pytest.TempPathFactory):
    load_clinic(module_dsn)
    policies = load_policies(write_policies(tmp_path_factory.mktemp("policies"),
                                            most_rows=3, bounds="declared"))
    with psycopg.connect(module_dsn, autocommit=True) as connection:
        yield connection, policies


def answer_of(clinic, sql: str) -> dict[tuple, tuple[int, ...]]:
    """The rewrite's noise-free answer: {key values of a cell: its measures}, every cell."""
    connection, policies = clinic
    plan = analyse(sql, policies, "tester")
    rewritten = rewrite(plan)
    rows = run_with_bounds(connection, rewritten)
    cells: list[tuple] = [()]
    for key in plan.keys:
        cells = [c + (v,) for c in cells for v in key_values(plan.table.columns[key.column], key)]
    assert len(rows) == rewritten.cells == len(cells)
    width = len(plan.keys)
    ordinals = itertools.product(*[range(len(key_values(plan.table.columns[k.column], k)))
                                   for k in plan.keys])
    assert [tuple(r[:width]) for r in rows] == list(ordinals)  # one row per cell, in domain order
    measures = len(plan.measures)
    return {cell: tuple(int(v) for v in row[width:width + measures])
            for cell, row in zip(cells, rows)}


def exact(clinic, keys: str | tuple[str, ...], measures: str, where: str) -> dict[tuple, tuple[int, ...]]:
    """PostgreSQL's own GROUP BY of the expressions as written, over rows meeting ``where``."""
    connection, _ = clinic
    keys = (keys,) if isinstance(keys, str) else keys
    width = len(keys)
    rows = connection.execute(f"SELECT {', '.join(keys)}, {measures} FROM clinic.people WHERE {where} "
                              f"GROUP BY {', '.join(str(i + 1) for i in range(width))}").fetchall()
    return {tuple(r[:width]): tuple(int(v) for v in r[width:]) for r in rows}


AGE = "age BETWEEN 0 AND 100"
ADMITTED = "admitted BETWEEN '2026-01-01' AND '2026-12-31'"
WEIGHT = "weight BETWEEN -5 AND 120"
SIZE = "CASE WHEN age <= 30 THEN 'young' WHEN age <= 60 THEN 'middle' ELSE 'old' END"
CLAMPED_AGE = "CASE WHEN age > 100 THEN 100 WHEN age < 0 THEN 0 ELSE age END"

# (hushql query, PostgreSQL key expressions, measures, the rows the key counts [and the WHERE])
REFERENCES = [
    ("SELECT admitted, COUNT(*) FROM people GROUP BY admitted", "admitted", "count(*)", ADMITTED),
    ("SELECT admitted, COUNT(*) FROM people WHERE admitted BETWEEN '2026-03-02' AND '2026-03-08' "
     "GROUP BY 1", "admitted", "count(*)",
     f"{ADMITTED} AND admitted BETWEEN '2026-03-02' AND '2026-03-08'"),
    ("SELECT date_trunc('week', admitted) AS w, COUNT(*) FROM people GROUP BY w",
     "date_trunc('week', admitted)::date", "count(*)", ADMITTED),
    ("SELECT date_trunc('month', admitted), COUNT(*), SUM(age) FROM people GROUP BY 1",
     "date_trunc('month', admitted)::date", f"count(*), sum({CLAMPED_AGE})", ADMITTED),
    ("SELECT extract(dow FROM admitted), COUNT(*) FROM people GROUP BY 1",
     "extract(dow FROM admitted)", "count(*)", ADMITTED),
    ("SELECT date_part('isodow', admitted), COUNT(*) FROM people WHERE smoker GROUP BY 1",
     "date_part('isodow', admitted)", "count(*)", f"{ADMITTED} AND smoker"),
    ("SELECT extract(week FROM admitted), COUNT(*) FROM people GROUP BY 1",
     "extract(week FROM admitted)", "count(*)", ADMITTED),
    ("SELECT COUNT(*) FROM people WHERE extract(dow FROM admitted) IN (0, 6) "
     "GROUP BY extract(month FROM admitted)", "extract(month FROM admitted)", "count(*)",
     f"{ADMITTED} AND extract(dow FROM admitted) IN (0, 6)"),
    (f"SELECT {SIZE} AS size, COUNT(*) FROM people GROUP BY size", SIZE, "count(*)", AGE),
    ("SELECT CASE WHEN age < 18 THEN 'minor' END, COUNT(*) FROM people GROUP BY 1",
     "CASE WHEN age < 18 THEN 'minor' END", "count(*)", AGE),
    ("SELECT CASE ward WHEN 'north' THEN 1 WHEN 'east' THEN 1 ELSE 2 END, COUNT(*) FROM people "
     "GROUP BY 1", "CASE ward WHEN 'north' THEN 1 WHEN 'east' THEN 1 ELSE 2 END", "count(*)",
     "ward IN ('north', 'south', 'east')"),
    ("SELECT width_bucket(weight, 0, 100, 4), COUNT(*) FROM people GROUP BY 1",
     "width_bucket(weight, 0, 100, 4)", "count(*)", WEIGHT),
    ("SELECT width_bucket(age, 10, 90, 8), COUNT(*) FROM people WHERE age >= 40 GROUP BY 1",
     "width_bucket(age, 10, 90, 8)", "count(*)", f"{AGE} AND age >= 40"),
    ("SELECT floor(age / 10) * 10, COUNT(*) FROM people GROUP BY 1", "floor(age / 10) * 10",
     "count(*)", AGE),
    ("SELECT floor(weight / 12.5) * 12.5 AS band, COUNT(*) FROM people GROUP BY band",
     "floor(weight / 12.5) * 12.5", "count(*)", WEIGHT),
    ("SELECT extract(dow FROM admitted), COUNT(*) FROM people WHERE extract(dow FROM admitted) "
     "IN (0, 6) GROUP BY 1", "extract(dow FROM admitted)", "count(*)",
     f"{ADMITTED} AND extract(dow FROM admitted) IN (0, 6)"),
    # buckets in WHERE count the rows inside the column's declared domain, as keys do
    ("SELECT ward, COUNT(*) FROM people WHERE date_trunc('month', admitted) = '2026-03-01' "
     "GROUP BY ward", "ward", "count(*)",
     f"ward IN ('north', 'south', 'east') AND {ADMITTED} AND date_trunc('month', admitted) = '2026-03-01'"),
    ("SELECT smoker, COUNT(*) FROM people WHERE width_bucket(weight, 0, 100, 4) = 2 "
     "AND floor(age / 10) * 10 IN (30, 50) GROUP BY smoker", "smoker", "count(*)",
     f"smoker IS NOT NULL AND {WEIGHT} AND {AGE} AND width_bucket(weight, 0, 100, 4) = 2 "
     "AND floor(age / 10) * 10 IN (30, 50)"),
    ("SELECT ward, COUNT(*) FROM people WHERE CASE WHEN age < 18 THEN 'minor' END = 'minor' "
     "GROUP BY ward", "ward", "count(*)",
     f"ward IN ('north', 'south', 'east') AND {AGE} AND age < 18"),
    (f"SELECT {SIZE}, extract(quarter FROM admitted), COUNT(*) FROM people GROUP BY 1, 2",
     (SIZE, "extract(quarter FROM admitted)"), "count(*)", f"{AGE} AND {ADMITTED}"),
]


@pytest.mark.parametrize("query, keys, measures, where", REFERENCES,
                         ids=[r[0][7:67] for r in REFERENCES])
def test_bucket_answers_equal_postgresql_grouping_as_written(clinic, query, keys, measures, where):
    got = answer_of(clinic, query)
    want = exact(clinic, keys, measures, where)
    assert set(want) <= set(got), "every group PostgreSQL finds is a declared cell"
    zero = (0,) * len(next(iter(got.values())))
    assert got == {cell: want.get(cell, zero) for cell in got}
    assert any(v != zero for v in got.values())  # the data reaches these cells


def test_a_one_week_where_gives_seven_daily_cells(clinic) -> None:
    got = answer_of(clinic, "SELECT admitted, COUNT(*) FROM people "
                            "WHERE admitted >= '2026-03-02' AND admitted < '2026-03-09' GROUP BY 1")
    assert sorted(got) == [(dt.date(2026, 3, d),) for d in range(2, 9)]


def test_buckets_on_a_table_of_individuals_run_and_stay_below_the_exact_counts(clinic) -> None:
    connection, _ = clinic
    got = answer_of(clinic, "SELECT extract(month FROM visited) AS m, COUNT(*) FROM visits GROUP BY m")
    assert sorted(got) == [(m,) for m in range(1, 13)]
    exact_counts = dict(connection.execute(
        "SELECT extract(month FROM visited), count(*) FROM clinic.visits "
        "WHERE visited BETWEEN '2026-01-01' AND '2026-12-31' GROUP BY 1").fetchall())
    assert all(0 < got[(m,)][0] <= exact_counts[m] for m in range(1, 13))


@pytest.fixture
def engine(clinic, module_dsn: str, request):
    from proxy.backend import Backend
    from proxy.engine import Engine
    from proxy.ledger import Ledger

    _, policies = clinic
    made = Engine(policies, Backend(module_dsn, pool_size=1),
                  Ledger(module_dsn, schema="buckets_" + request.node.name[5:30].lower()))
    yield made
    made.close()


def test_explain_shows_each_key_and_its_cells(engine) -> None:
    explained = dict(engine.explain(
        "tester", "SELECT admitted, width_bucket(weight, 0, 100, 4), COUNT(*) FROM people "
                  "WHERE admitted BETWEEN '2026-03-02' AND '2026-03-08' GROUP BY 1, 2").rows)
    assert explained["cells"] == "42"
    assert explained["key admitted"] == "7 values: 2026-03-02 .. 2026-03-08, narrowed by WHERE"
    assert explained["key width_bucket(weight, 0, 100, 4)"] == "6 values: 0 .. 5"


def test_answers_carry_each_key_as_written(engine) -> None:
    """Through the engine: a date groups by day (365 rows, not 12 months), and each bucket's
    values and PostgreSQL type reach the answer."""
    daily = engine.answer("tester", "SELECT admitted, COUNT(*) FROM people GROUP BY admitted",
                          epsilon=Decimal(1))
    assert [row[0] for row in daily.rows] == [dt.date(2026, 1, 1) + dt.timedelta(days=n)
                                              for n in range(365)]
    assert daily.columns[0].type == "date"
    for sql, values, type_ in [
            (f"SELECT {SIZE} AS size, COUNT(*) FROM people GROUP BY size", ["young", "middle", "old"], "text"),
            ("SELECT extract(quarter FROM admitted) AS q, COUNT(*) FROM people GROUP BY q", [1, 2, 3, 4],
             "numeric"),
            ("SELECT width_bucket(age, 0, 100, 2) AS w, COUNT(*) FROM people GROUP BY w", [1, 2, 3],
             "integer"),
            ("SELECT floor(age / 50) * 50 AS f, COUNT(*) FROM people GROUP BY f", [0, 50, 100],
             "double precision"),
            ("SELECT date_trunc('year', admitted) AS y, COUNT(*) FROM people GROUP BY y",
             [dt.date(2026, 1, 1)], "date")]:
        answer = engine.answer("tester", sql, epsilon=Decimal(1))
        assert [row[0] for row in answer.rows] == values, sql
        assert answer.columns[0].type == type_, sql
