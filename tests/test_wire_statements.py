"""Splitting query strings, recognising session commands, binding parameters as nodes."""

from __future__ import annotations

import datetime as dt
from decimal import Decimal

import pytest
from sqlglot import exp

from proxy.errors import HushError
from proxy.wire import statements as st
from proxy.wire import types
from proxy.wire.states import TxEvent


def _texts(sql: str) -> list[str]:
    return [s.text for s in st.split(sql) if isinstance(s, st.QueryStatement)]


def test_semicolons_inside_quotes_and_comments_do_not_split() -> None:
    sql = ("SELECT 'a;b', \"x;y\", $$c;d$$, $tag$e;$$;f$tag$, E'g\\';h' FROM t -- i;j\n; "
           "/* k; /* nested; */ l; */ SELECT 2;;")
    assert _texts(sql) == ["SELECT 'a;b', \"x;y\", $$c;d$$, $tag$e;$$;f$tag$, E'g\\';h' FROM t",
                           "SELECT 2"]


def test_empty_strings_hold_no_statements() -> None:
    assert st.split("") == () and st.split(" ;; -- nothing\n") == ()
    assert isinstance(st.single("  "), st.EmptyStatement)


@pytest.mark.parametrize("sql", ["SELECT 'open", 'SELECT "open', "SELECT $$open",
                                 "SELECT /* open"])
def test_unterminated_quotes_are_syntax_errors(sql: str) -> None:
    with pytest.raises(HushError) as caught:
        st.split(sql)
    assert caught.value.sqlstate == "42601"


def test_a_parameter_is_not_a_dollar_quote() -> None:
    [q] = st.split("SELECT $1, a$b FROM t WHERE c = $2")
    assert isinstance(q, st.QueryStatement) and st.parameter_count(q.tree) == 2


@pytest.mark.parametrize("sql, expected", [
    ("SET hushql.epsilon = 0.25", st.SetStatement("hushql.epsilon", "0.25")),
    ("set hushql.epsilon to '0.5'", st.SetStatement("hushql.epsilon", "0.5")),
    ("SET LOCAL statement_timeout = '5s'", st.SetStatement("statement_timeout", "5s", True)),
    ("SET SESSION DateStyle TO ISO, DMY", st.SetStatement("datestyle", "iso, dmy")),
    ("SET search_path = \"$user\", public", st.SetStatement("search_path", '"$user", public')),
    ("SET extra_float_digits = -3", st.SetStatement("extra_float_digits", "-3")),
    ("SET TIME ZONE 'Europe/Berlin'", st.SetStatement("timezone", "Europe/Berlin")),
    ("SET TIME ZONE LOCAL", st.SetStatement("timezone", None)),
    ("SET application_name = DEFAULT", st.SetStatement("application_name", None)),
    ("SET NAMES 'UTF8'", st.SetStatement("client_encoding", "UTF8")),
    ("SET SESSION CHARACTERISTICS AS TRANSACTION READ ONLY", st.NoopStatement("SET")),
    ("SET TRANSACTION ISOLATION LEVEL SERIALIZABLE", st.NoopStatement("SET")),
    ("SHOW ALL", st.ShowStatement("all")),
    ('SHOW "DateStyle"', st.ShowStatement("datestyle")),
    ("show transaction isolation level", st.ShowStatement("transaction_isolation")),
    ("SHOW hushql.remaining", st.ShowStatement("hushql.remaining")),
    ("RESET ALL", st.ResetStatement(None)),
    ("RESET hushql.epsilon", st.ResetStatement("hushql.epsilon")),
    ("BEGIN", st.TransactionStatement(TxEvent.BEGIN, "BEGIN")),
    ("START TRANSACTION ISOLATION LEVEL REPEATABLE READ, READ ONLY",
     st.TransactionStatement(TxEvent.BEGIN, "BEGIN")),
    ("BEGIN WORK", st.TransactionStatement(TxEvent.BEGIN, "BEGIN")),
    ("END", st.TransactionStatement(TxEvent.COMMIT, "COMMIT")),
    ("COMMIT AND CHAIN", st.TransactionStatement(TxEvent.COMMIT, "COMMIT", chain=True)),
    ("ABORT", st.TransactionStatement(TxEvent.ROLLBACK, "ROLLBACK")),
    ("ROLLBACK TO SAVEPOINT sp", st.TransactionStatement(TxEvent.ROLLBACK_TO, "ROLLBACK", "sp")),
    ("SAVEPOINT sp", st.TransactionStatement(TxEvent.SAVEPOINT, "SAVEPOINT", "sp")),
    ("RELEASE sp", st.TransactionStatement(TxEvent.RELEASE, "RELEASE", "sp")),
    ("DISCARD ALL", st.DiscardStatement(True, "DISCARD ALL")),
    ("DISCARD TEMPORARY", st.DiscardStatement(False, "DISCARD TEMP")),
    ("DEALLOCATE PREPARE \"Q1\"", st.DeallocateStatement("Q1")),
    ("DEALLOCATE ALL", st.DeallocateStatement(None)),
])
def test_session_commands(sql: str, expected: st.Statement) -> None:
    assert st.split(sql) == (expected,)


@pytest.mark.parametrize("sql, code", [
    ("SET hushql.epsilon", "42601"),
    ("SET x = ", "42601"),
    ("SET x = $1", "42601"),
    ("BEGIN SOMETHING", "42601"),
    ("COMMIT PREPARED 'x'", "0A000"),
    ("EXPLAIN ANALYZE SELECT count(*) FROM t", "0A000"),
    ("EXPLAIN (ANALYZE true) SELECT count(*) FROM t", "0A000"),
    ("DISCARD", "42601"),
])
def test_malformed_session_commands(sql: str, code: str) -> None:
    with pytest.raises(HushError) as caught:
        st.split(sql)
    assert caught.value.sqlstate == code


def test_explain_keeps_the_query_and_its_parameters() -> None:
    [e] = st.split("EXPLAIN (FORMAT TEXT, ANALYZE false) SELECT count(*) FROM t WHERE a = $1")
    assert isinstance(e, st.ExplainStatement)
    assert e.query.text == "SELECT count(*) FROM t WHERE a = $1"
    assert st.parameter_count(st.statement_tree(e)) == 1


def test_a_query_sqlglot_cannot_parse_carries_its_error() -> None:
    [q] = st.split("SELECT FROM WHERE")
    assert isinstance(q, st.QueryStatement) and q.tree is None and q.error.sqlstate == "42601"


def test_parse_accepts_one_statement_only() -> None:
    with pytest.raises(HushError, match="multiple commands"):
        st.single("SELECT 1; SELECT 2")


def test_parameter_types_from_client_casts_and_limits() -> None:
    [q] = st.split("SELECT a FROM t WHERE b = $1 AND c > $2::int AND d < $3 LIMIT $4")
    assert st.infer_parameter_types(q.tree, (0, 0, types.FLOAT8), 5) == (
        types.TEXT, types.INT4, types.FLOAT8, types.INT8, types.TEXT)


def test_bind_makes_literal_nodes_never_sql_text() -> None:
    [q] = st.split("SELECT a FROM t WHERE b = $1 AND c > $2::int AND d = $3 AND e = $1")
    hostile = "x' OR 1=1 --"
    bound = st.bind(q.tree, [hostile, -5, dt.date(2026, 3, 1)], (types.TEXT, types.INT4,
                                                                   types.DATE))
    literals = [n for n in bound.find_all(exp.Literal) if n.is_string]
    assert [n.this for n in literals if n.this == hostile] == [hostile, hostile]
    assert not list(bound.find_all(exp.Parameter))
    assert not any(isinstance(c.this, exp.Neg) for c in bound.find_all(exp.Cast))  # cast gone
    assert bound.find(exp.Neg) is not None
    assert "CAST('2026-03-01' AS DATE)" in bound.sql(dialect="postgres")
    assert st.parameter_count(q.tree) == 3  # the shared tree is untouched


def test_bind_refuses_a_parameter_without_a_value() -> None:
    [q] = st.split("SELECT a FROM t WHERE b = $2")
    with pytest.raises(HushError) as caught:
        st.bind(q.tree, ["x"], (types.TEXT,))
    assert caught.value.sqlstate == "42P02"


def test_stand_in_values_fit_their_context() -> None:
    [q] = st.split("SELECT a FROM t WHERE b LIKE $1 AND c = $2 AND d = $3 LIMIT $4")
    assert st.stand_in_values(q.tree, (types.TEXT, types.TEXT, types.NUMERIC, types.INT8)) == [
        "%", None, Decimal(1), 1]
