"""Select-list post-processing, FILTER and bounded values through the wire, as psycopg sees
them: result type OIDs as PostgreSQL's (pg_type.dat: int4 23, int8 20, numeric 1700, float8
701), text and binary results, and the accuracy of each column in the notice."""

from __future__ import annotations

from decimal import Decimal

import psycopg
import pytest

from tests.proxy_fixtures import RunningProxy
from tests.proxy_fixtures import demo_proxy  # noqa: F401  (fixture)

QUERY = ("SELECT district, round(AVG(litres), 2) AS mean, COUNT(*)::int AS n, "
         "SUM(litres) / 1000.0 AS cubic_metres, SUM(litres) / COUNT(*) AS per_reading, "
         "COUNT(*) FILTER (WHERE litres > 300) AS heavy FROM readings GROUP BY district")


@pytest.mark.parametrize("binary", [False, True])
def test_psycopg_reads_post_processed_columns(demo_proxy: RunningProxy, binary: bool) -> None:
    details: list[str] = []
    with psycopg.connect(demo_proxy.conninfo(), autocommit=True) as conn:
        conn.add_notice_handler(lambda d: details.append(d.message_detail or ""))
        cursor = conn.execute(QUERY, binary=binary)
        assert [(c.name, c.type_code) for c in cursor.description] == [
            ("district", 25), ("mean", 1700), ("n", 23), ("cubic_metres", 1700),
            ("per_reading", 1700), ("heavy", 20)]
        rows = cursor.fetchall()
    assert rows and all(isinstance(r[1], Decimal) and r[1] == round(r[1], 2) for r in rows
                        if r[1] is not None)
    assert all(isinstance(r[2], int) and isinstance(r[5], int) for r in rows)
    detail = " ".join(details)
    assert "mean: within ±" in detail and "cubic_metres: within ±" in detail
    assert "per_reading: no finite 95% bound (derived from noisy parts" in detail


def test_psycopg_houses_share_with_a_garden(demo_proxy: RunningProxy) -> None:
    with psycopg.connect(demo_proxy.conninfo(), autocommit=True) as conn:
        cursor = conn.execute("SELECT AVG(has_garden::int) AS share, "
                              "SUM(CASE WHEN occupants > 2 THEN 1 ELSE 0 END) AS larger "
                              "FROM households")
        assert [(c.name, c.type_code) for c in cursor.description] == [("share", 701),
                                                                       ("larger", 20)]
        [(share, larger)] = cursor.fetchall()
    assert share is None or 0 <= share <= 1
    assert isinstance(larger, int)


def test_pandas_reads_post_processed_columns(demo_proxy: RunningProxy) -> None:
    sqlalchemy = pytest.importorskip("sqlalchemy")
    pandas = pytest.importorskip("pandas")
    engine = sqlalchemy.create_engine(demo_proxy.url(scheme="postgresql+psycopg"))
    try:
        frame = pandas.read_sql(QUERY, engine)
    finally:
        engine.dispose()
    assert list(frame.columns) == ["district", "mean", "n", "cubic_metres", "per_reading", "heavy"]
    assert str(frame["n"].dtype) == "int64" and str(frame["heavy"].dtype) == "int64"
    assert len(frame) == 3


def test_psql_describes_and_answers_post_processed_columns(demo_proxy: RunningProxy) -> None:
    from tests.test_clients import psql, table_rows

    described = psql(demo_proxy, stdin=QUERY + " \\gdesc\n")  # Describe only: nothing charged
    assert table_rows(described.stdout) == [
        ["Column", "Type"], ["district", "text"], ["mean", "numeric"], ["n", "integer"],
        ["cubic_metres", "numeric"], ["per_reading", "numeric"], ["heavy", "bigint"]]
    done = psql(demo_proxy, "-c", QUERY)
    assert done.returncode == 0, done.stderr
    header, *rows = table_rows(done.stdout)
    assert header == ["district", "mean", "n", "cubic_metres", "per_reading", "heavy"]
    # The same question was asked by the tests above (same analyst, same epsilon): psql may get
    # the stored answer, with its own notice.
    assert len(rows) == 3 and ("NOTICE:  this answer spent epsilon" in done.stderr
                               or "NOTICE:  this answer was given before and is reused"
                               in done.stderr)
