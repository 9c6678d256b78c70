"""Hypothesis-generated SQL against the analyser: nothing but a refusal with a SQLSTATE, or an
accepted plan with finite sensitivity and bounded cost.

The statements come from the accepted grammar of tests/test_analyse.py, from a grammar that
mixes accepted forms with refused ones (other
statements, joins, subqueries, functions, casts, long literals and lists), and from mutations
of accepted statements (characters dropped, repeated or replaced). Bounded for CI: a few
seconds. ``benchmarks/fuzz_analyse.py`` runs the same properties for longer.
"""

from __future__ import annotations

import re

import pytest
import sqlglot.expressions as exp
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from proxy.errors import HushError
from proxy.policy import Policies
from proxy.sql.analyse import analyse
from proxy.sql.limits import Limits
from proxy.sql.rewrite import rewrite
from tests.test_analyse import POLICIES
from tests.test_analyse import conditions as safe_conditions
from tests.test_limits import with_limits

SQLSTATE = re.compile(r"[0-9A-Z]{5}")
# The rebuilt WHERE may grow from the statement by the clamping CASE around each column inside
# arithmetic (about a dozen nodes), nothing else.
GROWTH = 16

columns = st.sampled_from(["occupants", "area", "household_id", "district", "tariff",
                           "has_garden", "connected_on", "nope", "h.occupants", "*"])
numbers = st.one_of(st.integers(-10**40, 10**40).map(str),
                    st.decimals(allow_nan=False, allow_infinity=False, places=8).map(str),
                    st.sampled_from(["1e29", "1e-31", "1.5e-30", "0.1", "NaN", "'5'"]))
texts = st.one_of(st.text(alphabet="ab%_\\' x", max_size=30).map(lambda t: "'" + t.replace("'", "''") + "'"),
                  st.integers(0, 1500).map(lambda n: "'" + "y" * n + "'"))
operands = st.deferred(lambda: st.one_of(
    columns, numbers, texts, st.just("NULL"), st.just("DATE '2024-01-01'"),
    st.builds("({} {} {})".format, operands, st.sampled_from(["+", "-", "*", "/", "%", "||", "^"]),
              operands),
    st.builds("{}({})".format, st.sampled_from(["lower", "upper", "length", "trim", "abs", "sqrt",
                                                "md5", "repeat", "now", "coalesce", "count"]),
              operands),
    st.builds("trim({}, {})".format, operands, texts),
    st.builds("CAST({} AS integer)".format, operands),
    st.builds("extract({} FROM {})".format, st.sampled_from(["month", "epoch", "day"]), operands)))
conditions = st.deferred(lambda: st.one_of(
    st.builds("{} {} {}".format, operands, st.sampled_from(["=", "<>", "<", ">=", "LIKE", "ILIKE",
                                                            "~", "IS DISTINCT FROM"]), operands),
    st.builds("{} IN ({})".format, operands,
              st.lists(numbers, min_size=0, max_size=600).map(", ".join)),
    st.builds("{} BETWEEN {} AND {}".format, operands, operands, operands),
    st.builds("{} IS NULL".format, operands),
    st.builds("EXISTS (SELECT 1 FROM {})".format, st.sampled_from(["households", "pg_class"])),
    st.builds("({} AND {})".format, conditions, conditions),
    st.builds("({} OR {})".format, conditions, conditions),
    st.builds("NOT {}".format, conditions)))
items = st.one_of(
    st.builds("{}({})".format, st.sampled_from(["COUNT", "SUM", "AVG", "MIN", "max", "stddev"]),
              st.one_of(columns, st.just("DISTINCT household_id"), operands)),
    columns, operands,
    st.builds("date_trunc('{}', connected_on)".format, st.sampled_from(["month", "hour", "year"])))
tables = st.sampled_from(["households", "readings", "salaries", "public.households",
                          "households h", "pg_catalog.pg_class", "households, readings",
                          "households JOIN readings USING (household_id)", "(SELECT 1) s"])
selects = st.builds(
    "SELECT {} FROM {}{}{}{}{}{}".format,
    st.lists(items, min_size=1, max_size=4).map(", ".join), tables,
    st.one_of(st.just(""), conditions.map(" WHERE {}".format)),
    st.one_of(st.just(""), st.lists(st.one_of(columns, st.just("1"), st.just(
        "date_trunc('month', connected_on)")), min_size=1, max_size=3).map(
        lambda keys: " GROUP BY " + ", ".join(keys))),
    st.one_of(st.just(""), conditions.map(" HAVING {}".format)),
    st.one_of(st.just(""), st.sampled_from([" ORDER BY 1", " ORDER BY 2 DESC", " ORDER BY count(*)"])),
    st.one_of(st.just(""), st.sampled_from([" LIMIT 3", " LIMIT -1", " OFFSET 2", " LIMIT ALL"])))
others = st.sampled_from(["", ";", "DELETE FROM households", "SELECT 1; SELECT 2",
                          "WITH a AS (SELECT 1) SELECT COUNT(*) FROM a", "VALUES (1)",
                          "SELECT COUNT(*) FROM households UNION SELECT 1", "COPY households TO STDOUT",
                          "SELECT COUNT(*) FROM households WHERE " + "(" * 300 + "TRUE" + ")" * 300])


@st.composite
def mutated(draw: st.DrawFn) -> str:
    """An accepted-looking statement with a few characters dropped, repeated or replaced."""
    text = draw(selects)
    for _ in range(draw(st.integers(1, 4))):
        if not text:
            break
        at = draw(st.integers(0, len(text) - 1))
        action = draw(st.sampled_from(["drop", "repeat", "replace"]))
        piece = draw(st.sampled_from(["(", ")", "'", ",", " ", "*", "$1", "--", "/*", "9" * 50]))
        text = (text[:at] + text[at + 1:] if action == "drop"
                else text[:at] + text[at] * draw(st.integers(2, 200)) + text[at:]
                if action == "repeat" else text[:at] + piece + text[at + 1:])
    return text


# Mostly accepted: safe conditions (tests/test_analyse.py's grammar) under accepted shapes.
_GROUPINGS = [("", ""), ("district, ", " GROUP BY district"),
              ("tariff, has_garden, ", " GROUP BY tariff, has_garden")]
accepted_like = st.builds(
    lambda grouping, condition: (f"SELECT {grouping[0]}COUNT(*), SUM(occupants), AVG(area) "
                                 f"FROM households WHERE {condition}{grouping[1]}"),
    st.sampled_from(_GROUPINGS), safe_conditions)
statements = st.one_of(accepted_like, selects, mutated(), others)


def check_statement(sql: str, policies: Policies = POLICIES,
                    bounds: Limits | None = None) -> None:
    """The property: a refusal with a SQLSTATE, message and hint, or a plan whose sensitivities
    are finite positive integers, whose cells are within the policy and whose rebuilt WHERE is
    bounded by the limits (``bounds``: those of ``policies`` unless given)."""
    limits = bounds or policies.limits
    try:
        plan = analyse(sql, policies, "planner")
    except HushError as error:
        assert SQLSTATE.fullmatch(error.sqlstate), (sql, error.sqlstate)
        assert error.message and error.hint, (sql, error.message)
        return
    rewritten = rewrite(plan)
    worst = rewritten.declared_sensitivities  # at the ceilings: what chosen bounds never exceed
    assert worst and all(isinstance(s, int) and 1 <= s < 10**12 for s in worst), sql
    assert 1 <= rewritten.cells <= policies.defaults.most_cells, sql
    assert len(sql.encode()) <= limits.statement_bytes, sql
    if plan.where is not None:
        nodes = sum(1 for _ in plan.where.walk())
        assert nodes <= GROWTH * limits.expression_nodes, (sql, nodes)
        for literal in plan.where.find_all(exp.Literal):
            assert len(literal.this) <= max(limits.text_literal_characters, 64), sql


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(statements)
def test_the_analyser_refuses_with_a_sqlstate_or_plans_with_bounded_cost(sql: str) -> None:
    check_statement(sql)


def test_the_property_fails_on_a_plan_beyond_the_limits() -> None:
    # The companion: the same check catches a statement accepted beyond the default limits.
    big = "SELECT COUNT(*) FROM households WHERE " + " OR ".join(
        f"occupants = {i}" for i in range(1200))
    raised = with_limits(statement_bytes=100_000, expression_nodes=100_000)
    check_statement(big, raised)  # within its own (raised) limits
    with pytest.raises(AssertionError):
        check_statement(big, raised, bounds=Limits())
