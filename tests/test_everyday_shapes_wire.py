"""The everyday shapes answered through the three clients analysts use most (psql, psycopg,
pandas through SQLAlchemy), on the demo: spreads, percentiles, FILTER, a bounded value, a
same-population join and a public read. Each client gets the answer's columns with PostgreSQL's
names and, for the noisy shapes, the cost-and-accuracy notice (psql prints it on stderr)."""

from __future__ import annotations

import psycopg
import pytest

from tests.proxy_fixtures import RunningProxy
from tests.proxy_fixtures import demo_proxy  # noqa: F401  (fixture)

# (query, expected column names, rows, whether it is noisy and charged; a public read's notice
# says it spent epsilon 0)
SHAPES = [
    ("SELECT district, VARIANCE(litres) AS spread, STDDEV_POP(litres) AS sd FROM readings "
     "GROUP BY district", ["district", "spread", "sd"], 3, True),
    ("SELECT district, percentile_cont(0.5) WITHIN GROUP (ORDER BY occupants) AS middle "
     "FROM households GROUP BY district", ["district", "middle"], 3, True),
    ("SELECT COUNT(*) FILTER (WHERE has_garden) AS gardens, AVG(has_garden::int) AS share "
     "FROM households", ["gardens", "share"], 1, True),
    ("SELECT h.tariff, AVG(r.litres) AS mean FROM readings r JOIN households h "
     "ON h.household_id = r.household_id GROUP BY h.tariff", ["tariff", "mean"], 3, True),
    ("SELECT tariff FROM tariffs ORDER BY tariff", ["tariff"], 3, False),
]


@pytest.mark.parametrize("sql, names, count, noisy", SHAPES, ids=[s[1][-1] for s in SHAPES])
def test_psycopg(demo_proxy: RunningProxy, sql: str, names: list[str], count: int,
                 noisy: bool) -> None:
    notices: list[str] = []
    with psycopg.connect(demo_proxy.conninfo(), autocommit=True) as conn:
        conn.add_notice_handler(lambda d: notices.append(d.message_primary or ""))
        conn.execute("SET hushql.fresh = on")
        cursor = conn.execute(sql)
        assert [c.name for c in cursor.description] == names
        assert len(cursor.fetchall()) == count
    [notice] = notices
    assert notice.startswith("this answer spent epsilon")
    assert notice.startswith("this answer spent epsilon 0 ") != noisy  # a public read is free


@pytest.mark.parametrize("sql, names, count, noisy", SHAPES, ids=[s[1][-1] for s in SHAPES])
def test_psql(demo_proxy: RunningProxy, sql: str, names: list[str], count: int,
              noisy: bool) -> None:
    from tests.test_clients import psql, table_rows

    done = psql(demo_proxy, "-c", "SET hushql.fresh = on", "-c", sql)
    assert done.returncode == 0, done.stderr
    header, *rows = table_rows(done.stdout)[-(count + 1):]
    assert header == names and len(rows) == count
    assert "NOTICE:  this answer spent epsilon" in done.stderr
    assert ("NOTICE:  this answer spent epsilon 0 " in done.stderr) != noisy


@pytest.mark.parametrize("sql, names, count, noisy", SHAPES, ids=[s[1][-1] for s in SHAPES])
def test_pandas(demo_proxy: RunningProxy, sql: str, names: list[str], count: int,
                noisy: bool) -> None:
    sqlalchemy = pytest.importorskip("sqlalchemy")
    pandas = pytest.importorskip("pandas")
    engine = sqlalchemy.create_engine(demo_proxy.url(scheme="postgresql+psycopg"))
    try:
        frame = pandas.read_sql(sql, engine)
    finally:
        engine.dispose()
    assert list(frame.columns) == names and len(frame) == count
