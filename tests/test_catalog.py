"""The catalog mirror: data-free, per grant set, run as an unprivileged role, guarded.

These tests talk to the Catalog directly (and through the session's routing); the clients'
view of the same mirror is in test_clients.py.
"""

from __future__ import annotations

import asyncio
import secrets
from decimal import Decimal
from collections.abc import Iterator

import psycopg
import pytest
import sqlglot
from psycopg import sql
from psycopg.conninfo import conninfo_to_dict, make_conninfo

from proxy.demo import load_scenario
from proxy.errors import HushError
from proxy.policy import load_policies
from proxy.wire import catalog as catalog_module
from proxy.wire import catalog_guard, codec
from proxy.wire.catalog import ROLE, Catalog, build_catalog
from proxy.wire.catalog_guard import check_catalog_text, claims_text, is_catalog_tree
from proxy.wire.ledger_relations import names_ledger_schema
from proxy.wire.session import Session
from tests.conftest import with_database
from tests.proxy_fixtures import DEMO_POLICIES, UNLISTED_COLUMN, add_unlisted_column

HOUSEHOLDS = 40
PUBLIC_TABLES = ("SELECT c.relname FROM pg_catalog.pg_class c JOIN pg_catalog.pg_namespace n "
                 "ON n.oid = c.relnamespace WHERE n.nspname = 'public' ORDER BY 1")
POLICY_TABLES = ("households", "readings")


@pytest.fixture(scope="module")
def backend(module_dsn: str) -> str:
    """The demo loaded and analysed, plus a backend column no policy lists."""
    load_scenario(module_dsn, households=HOUSEHOLDS, progress=False)
    add_unlisted_column(module_dsn)
    return module_dsn


@pytest.fixture(scope="module")
def catalog(backend: str) -> Iterator[Catalog]:
    built = build_catalog(load_policies(DEMO_POLICIES), backend)
    assert built.unavailable is None, built.unavailable
    try:
        yield built
    finally:
        built.drop_mirrors()


def rows(catalog: Catalog, analyst: str, query: str, params: list | None = None) -> list:
    return catalog.run(analyst, query, params or [])[1]


def refusal(catalog: Catalog, query: str, analyst: str = "planner") -> str:
    with pytest.raises(HushError) as caught:
        catalog.run(analyst, query, [])
    return caught.value.sqlstate


# ---------------------------------------------------------------- the mirror holds no data

def test_mirror_holds_no_rows_and_no_statistics(catalog: Catalog, backend: str) -> None:
    with psycopg.connect(backend) as conn:  # the real tables: analysed, with rows
        real = dict(conn.execute(
            "SELECT relname, reltuples FROM pg_class WHERE relnamespace = 'utility'::regnamespace "
            "AND relkind = 'r'").fetchall())
    assert real["households"] == HOUSEHOLDS and real["meter_readings"] > 0
    got = rows(catalog, "planner", "SELECT c.relname, c.reltuples, c.relpages FROM "
               "pg_catalog.pg_class c WHERE c.relnamespace = 'public'::regnamespace ORDER BY 1")
    assert [r[0] for r in got] == ["households", "readings", "tariffs"]
    assert all(tuples <= 0 and pages == 0 for _, tuples, pages in got)
    # Even a count that skipped the routing (which sends it to the engine) finds nothing.
    assert rows(catalog, "planner", "SELECT count(*) FROM households") == [(0,)]
    assert not catalog.is_catalog_query(sqlglot.parse_one("SELECT count(*) FROM households",
                                                          read="postgres"))
    for stats in ("SELECT * FROM pg_catalog.pg_stats", "SELECT * FROM pg_statistic",
                  "SELECT n_live_tup FROM pg_stat_user_tables",
                  "SELECT * FROM pg_catalog.pg_statio_all_tables"):
        assert refusal(catalog, stats) == "42501"


def test_mirror_has_only_the_exposed_columns_typed_by_kind(catalog: Catalog,
                                                            backend: str) -> None:
    with psycopg.connect(backend) as conn:
        real = [r[0] for r in conn.execute(
            "SELECT column_name FROM information_schema.columns WHERE table_schema = 'utility' "
            "AND table_name = 'households'").fetchall()]
    assert UNLISTED_COLUMN in real
    query = ("SELECT column_name, data_type FROM information_schema.columns "
             "WHERE table_name = $1 ORDER BY ordinal_position")
    assert rows(catalog, "planner", query, ["households"]) == [
        ("household_id", "integer"), ("district", "text"), ("occupants", "integer"),
        ("tariff", "text"), ("has_garden", "boolean")]
    assert rows(catalog, "planner", query, ["readings"]) == [
        ("household_id", "integer"), ("district", "text"), ("reading_date", "date"),
        ("litres", "numeric")]
    described = rows(catalog, "planner", "SELECT pg_catalog.col_description("
                     "'households'::regclass, 3)")
    # The description, then kind, range and unit (the demo policies/tables/households.toml).
    assert described == [("People living in the household; integer from 1 to 8 (sums count "
                          "values outside as the nearest end), measured in people",)]


def test_each_account_sees_only_its_granted_tables(catalog: Catalog) -> None:
    assert rows(catalog, "planner", PUBLIC_TABLES) == [("households",), ("readings",), ("tariffs",)]
    assert rows(catalog, "researcher", PUBLIC_TABLES) == [("households",)]
    assert rows(catalog, "auditor", PUBLIC_TABLES) == []  # an administrator: no tables
    listed = rows(catalog, "researcher", "SELECT table_name FROM information_schema.tables "
                  "WHERE table_schema = 'public'")
    assert listed == [("households",)]
    assert len({catalog.mirrors[a] for a in ("planner", "researcher", "auditor")}) == 3
    with pytest.raises(HushError) as caught:
        catalog.run("stranger", "SELECT 1", [])
    assert caught.value.sqlstate == "42501"


def test_my_tables_lists_the_accounts_own_policy(catalog: Catalog) -> None:
    """hushql.my_tables: one row per granted column, from the policy (the demo's
    policies/tables/*.toml), with the budget left the session passes in; ordinary SQL over it."""
    policies = load_policies(DEMO_POLICIES)
    query = ("SELECT table_name, column_name, kind, low, high, step, allowed_values, measured_in, "
             "aggregates, group_by, identifies_individual, remaining_budget "
             "FROM hushql.my_tables ORDER BY table_name, column_name")
    found = catalog.run("researcher", query, [], Decimal("0.75"))[1]
    households = policies.tables["households"].columns
    assert [r[1] for r in found] == sorted(households)  # researcher: households only
    by_column = {r[1]: r for r in found}
    assert by_column["occupants"] == ("households", "occupants", "integer", "1", "8", None, None,
                                      "people", "COUNT, SUM, AVG", True, False, Decimal("0.75"))
    assert by_column["district"][6] == ", ".join(households["district"].values or [])
    assert by_column["household_id"][10] is True  # the individual's column
    planner = catalog.run("planner", "SELECT m.column_name, m.step FROM hushql.my_tables AS m "
                          "WHERE m.table_name = $1 AND kind = 'number'", ["readings"])[1]
    assert planner == [("litres", Decimal("0.1"))]
    assert rows(catalog, "auditor", "SELECT count(*) FROM hushql.my_tables") == [(0,)]
    # Described without running, and without a budget figure.
    assert [c[0] for c in catalog.describe("planner", "SELECT * FROM hushql.my_tables")][:3] == [
        "table_name", "column_name", "kind"]
    # Only the qualified name is replaced: an unqualified my_tables is the query's own CTE.
    assert rows(catalog, "planner", "WITH my_tables AS (SELECT 1 AS n) SELECT n FROM "
                "my_tables") == [(1,)]
    tree = sqlglot.parse_one("SELECT * FROM hushql.my_tables", read="postgres")
    assert is_catalog_tree(tree, POLICY_TABLES)
    assert not names_ledger_schema(tree, "") and names_ledger_schema(
        sqlglot.parse_one("SELECT * FROM hushql.my_tables JOIN hushql.budgets ON true"), "")
    assert not names_ledger_schema(None, 'SELECT * FROM "hushql".my_tables')
    assert names_ledger_schema(None, "SELECT * FROM hushql.charges")


def test_mirrors_are_reused_and_rebuilt_when_tampered(catalog: Catalog, backend: str) -> None:
    mirror = catalog.mirrors["researcher"]
    mirror_dsn = with_database(backend, mirror)
    with psycopg.connect(mirror_dsn, autocommit=True) as conn:
        conn.execute("SET default_transaction_read_only = off")
        conn.execute("INSERT INTO public.households (occupants) VALUES (3)")
    again = build_catalog(load_policies(DEMO_POLICIES), backend)
    try:
        assert again.mirrors == catalog.mirrors  # same policies, same mirror names
        assert rows(again, "researcher", "SELECT count(*) FROM households") == [(0,)]
    finally:
        again.close()


# ---------------------------------------------------------------- the role

def test_queries_run_as_an_unprivileged_role(catalog: Catalog, backend: str) -> None:
    # Straight through the catalog's transaction: what clients ask is personalised (below).
    with catalog._transaction("planner", "SELECT 1") as conn:
        assert conn.execute("SELECT current_user, current_setting('is_superuser'), "
                            "current_setting('transaction_read_only')").fetchone() \
            == (ROLE, "off", "on")
    with psycopg.connect(backend) as conn:
        flags = conn.execute(
            "SELECT rolsuper, rolcanlogin, rolcreatedb, rolcreaterole, rolreplication, "
            "rolbypassrls, (SELECT count(*) FROM pg_auth_members m WHERE m.member = r.oid) "
            "FROM pg_roles r WHERE rolname = %s", (ROLE,)).fetchone()
    assert flags == (False, False, False, False, False, False, 0)


def test_a_drifted_role_is_repaired_at_start(catalog: Catalog, backend: str) -> None:
    role = sql.Identifier(ROLE)
    with psycopg.connect(backend, autocommit=True) as conn:
        conn.execute(sql.SQL("ALTER ROLE {} INHERIT CREATEDB").format(role))
        conn.execute(sql.SQL("GRANT pg_read_all_stats TO {}").format(role))
        try:
            build_catalog(load_policies(DEMO_POLICIES), backend).close()
            assert conn.execute(
                "SELECT rolinherit, rolcreatedb, (SELECT count(*) FROM pg_auth_members m "
                "WHERE m.member = r.oid) FROM pg_roles r WHERE rolname = %s",
                (ROLE,)).fetchone() == (False, False, 0)
        finally:
            conn.execute(sql.SQL("REVOKE pg_read_all_stats FROM {}").format(role))
            conn.execute(sql.SQL("ALTER ROLE {} NOINHERIT NOCREATEDB").format(role))


@pytest.mark.parametrize("query", [
    "SELECT pg_read_file('PG_VERSION')",
    "SELECT pg_catalog.pg_ls_dir('.')",
    "SELECT pg_read_binary_file('postmaster.pid')",
    "SELECT query FROM pg_stat_activity WHERE query <> '' AND pid <> pg_backend_pid()",
])
def test_the_role_alone_refuses_what_the_checks_refuse(catalog: Catalog, backend: str,
                                                       query: str) -> None:
    """Defence in depth: with the text checks bypassed, the role still may not read files
    or other sessions' statements."""
    with psycopg.connect(with_database(backend, catalog.mirrors["planner"])) as conn:
        conn.execute(sql.SQL("SET LOCAL ROLE {}").format(sql.Identifier(ROLE)))
        try:
            found = conn.execute(query).fetchall()
        except psycopg.errors.InsufficientPrivilege:
            return
        assert all(r[0] == "<insufficient privilege>" for r in found)


# ---------------------------------------------------------------- the checks

REFUSED = [
    "SELECT pg_database_size('postgres')",
    "SELECT pg_catalog.pg_database_size(current_database())",
    "SELECT pg_relation_size('pg_class')",
    "SELECT pg_total_relation_size(c.oid) FROM pg_class c",
    "SELECT pg_table_size('pg_class'), pg_indexes_size('pg_class')",
    "SELECT pg_size_pretty(1)",
    "SELECT * FROM pg_stat_activity",
    "SELECT * FROM pg_catalog.pg_stat_database",
    "SELECT pg_stat_get_live_tuples(1259)",
    "SELECT * FROM pg_locks",
    "SELECT rolpassword FROM pg_authid",
    "SELECT pg_read_file('PG_VERSION')",
    "SELECT * FROM pg_ls_dir('.')",
    'SELECT "pg_read_file"(\'PG_VERSION\')',
    "SELECT lo_import('/etc/hostname')",
    "SELECT dblink('dbname=postgres', 'SELECT 1')",
    "SELECT pg_sleep(5)",
    "SELECT /* a comment */ pg_sleep_for('5 seconds')",
    "SELECT txid_current()",
    "SELECT pg_current_xact_id()",
    "SELECT age(relfrozenxid) FROM pg_class",
    "SELECT xmin, relname FROM pg_class",
    "SELECT pg_current_wal_lsn()",
    "SELECT * FROM pg_replication_slots",
    "SELECT pg_terminate_backend(1)",
    "SELECT inet_server_addr()",
    "SELECT current_setting('data_directory')",
    "SELECT current_setting('config_file')",
    "SELECT set_config('role', 'postgres', false)",
    "SELECT set_config('session_authorization', 'postgres', false)",
    "SELECT set_config('search_path' || '', 'x', false)",
    "SELECT set_config(E'\\x72ole', 'postgres', false)",
    "SELECT set_config(U&'\\0072ole', 'postgres', false)",
    "SELECT query_to_xml('SELECT pg_read_file(''x'')', true, false, '')",
    "SELECT public.anything()",
    "SELECT other.pg_catalog.version()",
    # A string PostgreSQL ends at the backslash (standard_conforming_strings is on): the call
    # between the two strings is real and must be seen.
    "SELECT 'a\\', pg_sleep(1), '\\'",
    "SELECT $$quoted$$, pg_sleep(1)",
    # An operator spelled OPERATOR(...) ends in ")" yet its operand is a real call.
    "SELECT 1 OPERATOR(pg_catalog.+) txid_current()",
    # A column definition list after AS is not a CTE body.
    "SELECT * FROM dblink('dbname=postgres', 'SELECT 1') AS (n int)",
    "SELECT * FROM pg_class c, lo_get(1) AS (data bytea)",
    "SELECT DISTINCT ON (relname) txid_current() FROM pg_class",
    "SELECT (1) lo_import('/etc/hostname')",
    "SELECT * FROM (SELECT 1) set_config('role', 'postgres', false)",  # misread as an alias
]


def test_server_wide_relations_are_answered_in_part(catalog: Catalog) -> None:
    """pg_settings keeps only the readable settings the proxy does not tell itself (JDBC's key
    queries read max_index_keys); pg_tablespace only the two built-in tablespaces."""
    names = {r[0] for r in rows(catalog, "planner", "SELECT name FROM pg_settings")}
    assert "max_index_keys" in names and "search_path" in names
    assert not names & {"data_directory", "config_file", "hba_file", "port", "server_version",
                        "listen_addresses", "shared_buffers"}
    assert rows(catalog, "planner", "SELECT setting FROM pg_catalog.pg_settings s WHERE "
                "s.name = 'data_directory'") == []
    spaces = rows(catalog, "planner", "SELECT pg_catalog.pg_tablespace.spcname FROM "
                  "pg_catalog.pg_tablespace ORDER BY 1")
    assert spaces == [("pg_default",), ("pg_global",)]
    # current_setting with its name as a parameter: checked against the value it runs with.
    assert rows(catalog, "planner", "SELECT current_setting($1::varchar)",
                ["default_table_access_method"]) == [("heap",)]
    with pytest.raises(HushError) as caught:
        catalog.run("planner", "SELECT current_setting($1::varchar)", ["data_directory"])
    assert caught.value.sqlstate == "42501"
    with pytest.raises(HushError):
        catalog.run("planner", "SELECT current_setting($1)", [])  # no value: refused


@pytest.mark.parametrize("query", REFUSED)
def test_dangerous_functions_and_relations_are_refused(catalog: Catalog, query: str) -> None:
    with pytest.raises(HushError) as caught:
        catalog.run("planner", query, [])
    assert caught.value.sqlstate == "42501", caught.value.message
    assert caught.value.hint


@pytest.mark.parametrize("query", [
    "SELECT 1; SELECT 2",
    "DELETE FROM pg_class",
    "COPY pg_class TO STDOUT",
    "TABLE pg_locks",
    'SELECT * FROM U&"\\0070g_stat_activity"',  # would hide the name from the checks
])
def test_only_one_select_at_a_time(query: str) -> None:
    with pytest.raises(HushError) as caught:
        check_catalog_text(query)
    assert caught.value.sqlstate == "0A000"


def test_writes_fail_in_the_mirror(catalog: Catalog) -> None:
    for query in ("SELECT 1 INTO TEMP TABLE copied",
                  "WITH gone AS (DELETE FROM households RETURNING 1) SELECT count(*) FROM gone"):
        with pytest.raises(HushError):
            catalog.run("planner", query, [])
    assert rows(catalog, "planner", "SELECT 1") == [(1,)]  # the pooled connection is clean


def test_what_clients_send_passes() -> None:
    """Shapes seen from psql, JDBC and SQLAlchemy (see test_clients.py for the real thing)."""
    for query in [
        "SELECT pg_catalog.version()",
        "select current_schema()",
        "SELECT c.oid, n.nspname, c.relname FROM pg_catalog.pg_class c LEFT JOIN "
        "pg_catalog.pg_namespace n ON n.oid = c.relnamespace WHERE c.relname "
        "OPERATOR(pg_catalog.~) '^(households)$' COLLATE pg_catalog.default AND "
        "pg_catalog.pg_table_is_visible(c.oid) ORDER BY 2, 3",
        "SELECT (SELECT pg_catalog.pg_get_expr(d.adbin, d.adrelid) AS pg_get_expr_1 FROM "
        "pg_catalog.pg_attrdef d) AS x",
        "SELECT * FROM pg_catalog.generate_series(1, 3) AS s(n)",
        "WITH RECURSIVE t(n) AS (SELECT 1 UNION ALL SELECT n + 1 FROM t WHERE n < 3) "
        "SELECT n FROM t",
        "SELECT CAST(x AS varchar(10)) FROM (VALUES ('a')) AS v(x)",
        # what psql's \gdesc sends to name the types
        "SELECT name AS \"Column\", pg_catalog.format_type(tp, tpm) AS \"Type\" FROM "
        "(VALUES ('district', 25, -1)) s(name, tp, tpm)",
        "SELECT * FROM unnest(ARRAY[1]) WITH ORDINALITY u(v, n), generate_series(1, 2) g(n)",
        "SELECT current_setting('server_version_num'), set_config('search_path', 'public', "
        "true)",
        "SELECT (information_schema._pg_expandarray(ARRAY[1, 2])).n",
    ]:
        check_catalog_text(query)


def test_routing_sends_policy_tables_to_the_engine(catalog: Catalog) -> None:
    def routed(query: str) -> bool:
        return is_catalog_tree(sqlglot.parse_one(query, read="postgres"), POLICY_TABLES)

    assert routed("SELECT 1")
    assert routed("SELECT relname FROM pg_catalog.pg_class WHERE relname = 'households'")
    assert routed("SELECT table_name FROM information_schema.tables")
    assert routed("WITH t AS (SELECT 1 AS n) SELECT n FROM t")
    assert not routed("SELECT * FROM households LIMIT 0")
    assert not routed("SELECT * FROM public.households")
    assert not routed("SELECT * FROM pg_catalog.households")  # a policy name, whatever schema
    assert not routed("SELECT * FROM pg_class, readings")
    assert not routed("WITH h AS (SELECT * FROM households) SELECT * FROM pg_class, h")
    assert not routed("SELECT * FROM utility.meter_readings")  # not the catalog: the engine
    assert not routed("SELECT * FROM elsewhere")
    assert not routed("DELETE FROM pg_class")
    # Text sqlglot cannot parse is claimed only when it names the catalog and no policy table.
    assert claims_text("SELECT t.typname FROM pg_catalog.pg_type t WHERE t.oid = any($1::oid[])",
                       POLICY_TABLES)
    assert not claims_text("SELECT x FROM households WHERE any($1::int[])", POLICY_TABLES)
    assert not claims_text("SELECT 1 +", POLICY_TABLES)


def test_session_routes_catalog_queries_to_the_mirror(catalog: Catalog) -> None:
    class NoEngine:  # the session must not ask the engine anything here but the text limits
        limits = catalog.policies.limits

    session = Session(NoEngine(), "researcher", catalog=catalog)
    out = asyncio.run(session.simple_query(PUBLIC_TABLES))
    assert not [m for m in out if isinstance(m, codec.ErrorResponse)]
    assert [m for m in out if isinstance(m, (bytes, bytearray))] == [
        codec.encode_data_row([b"households"])]
    out = asyncio.run(session.simple_query("SELECT pg_database_size('postgres')"))
    assert [m for m in out if isinstance(m, codec.ErrorResponse)]


def test_slow_and_large_catalog_answers_are_cut_off(catalog: Catalog) -> None:
    strict = Catalog(catalog.policies, admin_dsn=catalog.admin_dsn, mirrors=catalog.mirrors,
                     timeout_ms=200, max_rows=10)
    try:
        with pytest.raises(HushError) as caught:
            strict.run("planner", "SELECT count(*) FROM generate_series(1, 1000000000)", [])
        assert caught.value.sqlstate == "57014"
        assert len(rows(strict, "planner", "SELECT * FROM generate_series(1, 10)")) == 10
        with pytest.raises(HushError) as caught:
            strict.run("planner", "SELECT * FROM generate_series(1, 11)", [])
        assert caught.value.sqlstate == "54000"
    finally:
        strict.close()


def test_catalog_types_psycopg_cannot_send_travel_as_text(catalog: Catalog) -> None:
    columns, found = catalog.run("planner", "SELECT c.relkind, c.oid::regclass AS name, "
                                 "c.relacl, c.relnatts, c.relhasindex FROM pg_catalog.pg_class c "
                                 "WHERE c.relname = 'households'", [])
    assert columns == [("relkind", "text"), ("name", "text"), ("relacl", "text"),
                       ("relnatts", 21), ("relhasindex", 16)]
    kind, name, acl, natts, indexed = found[0]
    assert (kind, name, natts, indexed) == ("r", "households", 5, False)
    assert acl.startswith("{") and ROLE in acl  # PostgreSQL's own text of an aclitem[]


def test_a_backend_role_without_privileges_gets_an_unavailable_catalog(backend: str) -> None:
    role = f"hushql_test_plain_{secrets.token_hex(4)}"
    password = secrets.token_hex(12)
    with psycopg.connect(backend, autocommit=True) as conn:
        conn.execute(sql.SQL("CREATE ROLE {} LOGIN PASSWORD {}").format(
            sql.Identifier(role), sql.Literal(password)))
    try:
        params = conninfo_to_dict(backend)
        params.update(user=role, password=password)
        built = build_catalog(load_policies(DEMO_POLICIES), make_conninfo(**params))
        assert built.unavailable is not None and built.mirrors == {}
        with pytest.raises(HushError) as caught:
            built.run("planner", "SELECT 1", [])
        assert caught.value.sqlstate == "0A000" and "administrator" in caught.value.hint
    finally:
        with psycopg.connect(backend, autocommit=True) as conn:
            conn.execute(sql.SQL("DROP ROLE IF EXISTS {}").format(sql.Identifier(role)))


def test_unavailable_catalog_refuses_with_a_hint() -> None:
    unavailable = Catalog(load_policies(DEMO_POLICIES), unavailable="Ask the administrator.")
    with pytest.raises(HushError) as caught:
        unavailable.run("planner", "SELECT 1", [])
    assert caught.value.sqlstate == "0A000" and caught.value.hint == "Ask the administrator."


def test_parameters_are_bound_and_typed_by_the_mirror(catalog: Catalog) -> None:
    query = ("SELECT attname FROM pg_catalog.pg_attribute WHERE attrelid = $1::regclass "
             "AND attnum > $2 ORDER BY attnum")
    assert catalog.parameter_types("planner", query) == [2205, 21]  # regclass, int2
    assert rows(catalog, "planner", query, ["households", 3]) == [("tariff",), ("has_garden",)]
    assert catalog.parameter_types("planner", "SELECT 1") == []
    assert catalog.describe("planner", query) == [("attname", 19)]


def test_layout_types_follow_policy_kinds() -> None:
    layout = catalog_module.mirror_layout(load_policies(DEMO_POLICIES), ["readings"])
    assert [(c.name, c.type) for c in layout[0].columns] == [
        ("household_id", "integer"), ("district", "text"), ("reading_date", "date"),
        ("litres", "numeric")]


# ---------------------------------------------------------------- bounded, and nothing needless

def test_catalog_answers_are_bounded_in_bytes(catalog: Catalog) -> None:
    # No function that makes large text at all: a recursive CTE doubling a string with ||,
    # up to 8 MiB in one value.
    with pytest.raises(HushError) as caught:
        catalog.run("planner", "WITH RECURSIVE r(s, n) AS (SELECT 'xy'::text, 1 UNION ALL "
                    "SELECT s || s, n + 1 FROM r WHERE n < 23) SELECT s FROM r", [])
    assert caught.value.sqlstate == "54000" and str(catalog.max_bytes) in caught.value.message
    strict = Catalog(catalog.policies, admin_dsn=catalog.admin_dsn, mirrors=catalog.mirrors,
                     max_bytes=1000)
    try:
        # The shape that built a 78 MB value, smaller: one row of an aggregated series.
        with pytest.raises(HushError) as caught:
            strict.run("planner", "SELECT array_agg(g) FROM generate_series(1, 1000) g", [])
        assert caught.value.sqlstate == "54000"
        # Many small rows add up the same way.
        assert len(rows(strict, "planner", "SELECT g FROM generate_series(1, 100) g")) == 100
        with pytest.raises(HushError) as caught:
            strict.run("planner", "SELECT g FROM generate_series(1, 1000) g", [])
        assert caught.value.sqlstate == "54000"
    finally:
        strict.close()


def test_bounded_answers_keep_their_columns_and_order(catalog: Catalog, backend: str) -> None:
    query = ("SELECT c.relname, c.relname AS again, c.relkind FROM pg_catalog.pg_class c "
             "WHERE c.relname LIKE 'pg_%' ORDER BY c.relname DESC LIMIT 7 -- a trailing comment")
    columns, got = catalog.run("planner", query, [])
    assert [name for name, _ in columns] == ["relname", "again", "relkind"]
    with psycopg.connect(with_database(backend, catalog.mirrors["planner"])) as conn:
        assert got == conn.execute(query).fetchall()


def test_the_catalog_tells_the_proxy_and_the_analyst_not_the_backend(catalog: Catalog) -> None:
    columns, got = catalog.run("planner", "SELECT version(), pg_catalog.version() AS v, "
                               "current_user, session_user, current_role, user, "
                               "current_setting('server_version'), "
                               "current_setting('is_superuser', true)", [])
    assert [name for name, _ in columns] == ["version", "v", "current_user", "session_user",
                                             "current_role", "user", "current_setting",
                                             "current_setting"]
    assert got == [(catalog_guard.VERSION_STRING, catalog_guard.VERSION_STRING, "planner",
                    "planner", "planner", "planner", "15.0 (hushql)", "off")]
    assert "hushql" in catalog_guard.VERSION_STRING
    assert catalog_guard.VERSION_STRING.startswith("PostgreSQL 15.0 ")  # what drivers parse
    assert rows(catalog, "researcher", "SELECT * FROM version()") == [
        (catalog_guard.VERSION_STRING,)]
    assert rows(catalog, "researcher", "SELECT rolname FROM pg_catalog.pg_roles "
                "WHERE rolname = current_user") == []  # the analyst is no backend role


@pytest.mark.parametrize("text, expected", [
    ("SELECT 1 AS user", "SELECT 1 AS user"),  # a column label, not the keyword
    ("SELECT t.user FROM t", "SELECT t.user FROM t"),
    ('SELECT "current_user"()', """SELECT (SELECT 'o''neil'::name AS "current_user")"""),
    ("SELECT current_setting('search_path')", "SELECT current_setting('search_path')"),
    ("SELECT lower(version())",
     "SELECT lower((SELECT 'V'::text AS \"version\"))"),
])
def test_personalise_replaces_only_identity_questions(text: str, expected: str,
                                                      monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(catalog_guard, "VERSION_STRING", "V")
    assert catalog_guard.personalise(text, "o'neil") == expected
