"""pg_database shows one row, the proxy's own database: psql's \\l works and names no other."""

from __future__ import annotations

import psycopg
import pytest

from proxy.errors import HushError
from proxy.wire.catalog import Catalog
from proxy.wire.own_database import replace_pg_database
from tests.test_catalog import backend, catalog  # noqa: F401 - the fixtures

# Modelled on what psql 15 sends for \l (psql's describe.c, listAllDbs; written from memory and
# shortened). tests/test_demo_banner.py runs the real \l through psql when it is installed.
PSQL_LIST_DATABASES = """SELECT
  d.datname as "Name",
  pg_catalog.pg_get_userbyid(d.datdba) as "Owner",
  pg_catalog.pg_encoding_to_char(d.encoding) as "Encoding",
  d.datcollate as "Collate",
  d.datctype as "Ctype",
  pg_catalog.array_to_string(d.datacl, E'\\n') AS "Access privileges"
FROM pg_catalog.pg_database d
ORDER BY 1;"""


def test_psql_list_shows_only_the_backend_database(catalog: Catalog, backend: str) -> None:
    with psycopg.connect(backend) as conn:
        own = conn.execute("SELECT current_database()").fetchone()[0]
        assert conn.execute("SELECT count(*) FROM pg_database").fetchone()[0] > 2  # others exist
    for analyst in ("planner", "researcher", "auditor"):
        columns, rows = catalog.run(analyst, PSQL_LIST_DATABASES.rstrip(";"), [])
        assert [c[0] for c in columns][:3] == ["Name", "Owner", "Encoding"]
        assert [row[0] for row in rows] == [own], analyst


@pytest.mark.parametrize("query", [
    "SELECT datname FROM pg_database",
    "SELECT pg_database.datname FROM pg_catalog.pg_database",
    'SELECT datname FROM pg_catalog."pg_database" AS x WHERE true',
    "SELECT count(*) FROM pg_database, pg_namespace WHERE nspname = 'public'",
    "SELECT datname FROM pg_database WHERE datname <> current_database()",
    "SELECT (SELECT count(*) FROM pg_database) AS n",
])
def test_every_way_of_naming_pg_database_sees_one_row(catalog: Catalog, backend: str,
                                                      query: str) -> None:
    with psycopg.connect(backend) as conn:
        own = conn.execute("SELECT current_database()").fetchone()[0]
    _, rows = catalog.run("planner", query, [])
    values = {value for row in rows for value in row}
    assert values <= {own, 1, 0}, (query, rows)
    assert not any(isinstance(v, str) and v.startswith("hushql_mirror") for v in values)


def test_the_replacement_keeps_aliases_and_qualifiers() -> None:
    sub = "(S)"
    assert replace_pg_database("SELECT 1 FROM pg_database", sub) == \
        "SELECT 1 FROM (S) AS pg_database"
    assert replace_pg_database("SELECT d.x FROM pg_catalog.pg_database d ORDER BY 1", sub) == \
        "SELECT d.x FROM (S) d ORDER BY 1"
    assert replace_pg_database("SELECT pg_database.x FROM pg_database WHERE true", sub) == \
        "SELECT pg_database.x FROM (S) AS pg_database WHERE true"
    assert replace_pg_database("SELECT 1 FROM pg_database AS d, pg_class", sub) == \
        "SELECT 1 FROM (S) AS d, pg_class"


@pytest.mark.parametrize("query", [
    "SELECT pg_describe_object(1262, g::oid, 0) FROM generate_series(1, 20000) AS g",
    "SELECT pg_identify_object(1262, 5, 0)",
])
def test_functions_that_would_name_other_databases_are_refused(catalog: Catalog,
                                                               query: str) -> None:
    with pytest.raises(HushError) as caught:
        catalog.run("planner", query, [])
    assert caught.value.sqlstate == "42501"

