"""EXPLAIN for people: the backend SQL over several rows, and (FORMAT JSON) as one JSON
document with the same items; every other EXPLAIN option is refused, never ignored."""

from __future__ import annotations

from typing import Iterator

import psycopg
import pytest
import sqlglot

from proxy.errors import HushError
from proxy.wire import statements
from tests.proxy_fixtures import RunningProxy
from tests.proxy_fixtures import demo_proxy  # noqa: F401  (fixture)

QUERY = ("SELECT district, SUM(litres) FROM readings WHERE reading_date >= '2026-07-01' "
         "GROUP BY district")


@pytest.fixture(scope="module")
def conn(demo_proxy: RunningProxy) -> Iterator[psycopg.Connection]:
    with psycopg.connect(demo_proxy.conninfo(), autocommit=True) as connection:
        yield connection


def text_rows(conn: psycopg.Connection, query: str) -> list[tuple[str, str]]:
    return [tuple(row) for row in conn.execute(f"EXPLAIN {query}").fetchall()]


def backend_sql(rows: list[tuple[str, str]]) -> list[str]:
    """The value lines of the "backend sql" item and its continuation rows (item "")."""
    start = [item for item, _ in rows].index("backend sql")
    lines = [rows[start][1]]
    for item, value in rows[start + 1:]:
        if item:
            break
        lines.append(value)
    return lines


def test_backend_sql_is_pretty_printed_one_line_per_row(conn: psycopg.Connection,
                                                       demo_proxy: RunningProxy) -> None:
    rows = text_rows(conn, QUERY)
    lines = backend_sql(rows)
    assert len(lines) >= 10 and max(len(line) for line in lines) < 200
    # The same statement the engine runs, only laid out: equal once parsed.
    prepared = demo_proxy.engine.prepare("planner", QUERY)
    assert sqlglot.parse_one("\n".join(lines), read="postgres") == \
        sqlglot.parse_one(prepared.rewritten.sql, read="postgres")


def test_format_json_is_one_document_with_the_same_items(conn: psycopg.Connection) -> None:
    cursor = conn.execute(f"EXPLAIN (FORMAT JSON) {QUERY}")
    assert [column.name for column in cursor.description] == ["QUERY PLAN"]
    assert cursor.description[0].type_code == 114  # json (pg_type.dat)
    [[document]] = cursor.fetchall()  # psycopg decodes json into Python objects
    assert isinstance(document, dict)
    rows = text_rows(conn, QUERY)
    named = [(item, value) for item, value in rows if item]
    assert list(document) == [item for item, _ in named]
    for item, value in named:
        if item == "backend sql":
            assert document[item] == "\n".join(backend_sql(rows))
        else:
            assert document[item] == value, item
    again = conn.execute(f"EXPLAIN (FORMAT TEXT) {QUERY}").fetchall()
    assert [tuple(r) for r in again] == rows


@pytest.mark.parametrize("options, refused", [
    ("(FORMAT XML)", "format xml"),
    ("(FORMAT YAML)", "format yaml"),
    ("(COSTS OFF)", "option COSTS"),
    ("(FORMAT JSON, BUFFERS)", "option BUFFERS"),
    ("VERBOSE", "option VERBOSE"),
    ("(ANALYZE)", "ANALYZE"),
])
def test_other_explain_options_are_refused_by_name(options: str, refused: str) -> None:
    with pytest.raises(HushError) as caught:
        statements.split(f"EXPLAIN {options} SELECT count(*) FROM t")
    assert caught.value.sqlstate == "0A000" and refused in caught.value.message
    assert "FORMAT JSON" in (caught.value.hint or "") or "ANALYZE" in refused


@pytest.mark.parametrize("options, form", [("", "text"), ("(FORMAT TEXT)", "text"),
                                           ("(format json)", "json"),
                                           ("(ANALYZE off, FORMAT JSON)", "json")])
def test_accepted_explain_forms(options: str, form: str) -> None:
    [explain] = statements.split(f"EXPLAIN {options} SELECT count(*) FROM t")
    assert isinstance(explain, statements.ExplainStatement) and explain.format == form


def test_explain_shows_an_average_centred_and_its_epsilon_split(conn: psycopg.Connection) -> None:
    rows = dict(text_rows(conn, "SELECT district, AVG(occupants) FROM households GROUP BY district"))
    epsilon = float(rows["epsilon"])
    # occupants in [1, 8], households declared (one row each): centred on 4.5, one household
    # moves the centred sum by at most 3.5 (half the range's width), not 8.
    assert rows["measure sum(occupants - 4.5)"].startswith("sensitivity 3.5, ")
    average = rows["average avg"]
    assert average.startswith("centred: 4.5 + noisy sum(occupants - 4.5) / noisy count(occupants)")
    assert "one value moves that sum by at most 3.5, the plain sum by 8" in average
    half = f"{epsilon / 2:.6g}"
    assert f"epsilon {half} for the sum and {half} for the count" in average
    # Beside SUM of the same column, AVG reuses the plain sum, and EXPLAIN says so.
    rows = dict(text_rows(conn, "SELECT SUM(occupants), AVG(occupants) FROM households"))
    assert "not centred: it shares the plain sum SUM(occupants) needs" in rows["average avg"]
    # Bounds chosen per query (readings): not centred, and EXPLAIN says why.
    rows = dict(text_rows(conn, "SELECT AVG(litres) FROM readings"))
    assert "measure sum(litres)" in rows
    assert "not centred: the bounds are chosen" in rows["average avg"]
