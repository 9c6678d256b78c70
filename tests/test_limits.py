"""Limits on one statement's work (proxy.sql.limits), the smallest epsilon, and their policy keys.

No database: analysis is pure, and the wire session runs on the fake engine.
"""

from __future__ import annotations

import asyncio
import textwrap
from decimal import Decimal
from pathlib import Path

import pytest

from proxy.engine import parse_epsilon
from proxy.errors import HushError
from proxy.policy import Policies, PolicyError, load_policies
from proxy.sql.analyse import analyse
from proxy.sql.limits import Limits, check_statement_text
from proxy.wire import codec, statements
from proxy.wire.session import Session
from tests.policy_fixtures import write_policies
from tests.test_analyse import POLICIES
from tests.test_wire_fakes import ANALYST, FakeEngine

BASE = "SELECT COUNT(*) FROM households WHERE "


def refusal(sql: str, policies: Policies = POLICIES) -> HushError:
    with pytest.raises(HushError) as caught:
        analyse(sql, policies, "planner")
    return caught.value


def with_limits(**values: int) -> Policies:
    limits = Limits(**values)
    return Policies(access=POLICIES.access.model_copy(update={"limits": limits}),
                    tables=POLICIES.tables)


# Each statement just over one default limit, its SQLSTATE, and the limit its hint names.
OVER_THE_LIMIT = [
    (BASE + "district = '" + "a" * 17_000 + "'", "54000", "statement_bytes = 16384"),
    (BASE + " OR ".join(f"occupants = {i}" for i in range(300)), "54001", "expression_nodes = 1000"),
    (BASE + "NOT " * 70 + "has_garden", "54001", "nesting_depth = 64"),
    (BASE + "district = '" + "a" * 1001 + "'", "54000", "text_literal_characters = 1000"),
    (BASE + "district LIKE '" + "%a" * 101 + "'", "54000", "pattern_characters = 200"),
    (BASE + "trim(district, '" + "x" * 201 + "') = 'a'", "54000", "pattern_characters = 200"),
    (BASE + "area > 1." + "1" * 30, "54000", "numeric_digits = 30"),
    (BASE + "area > 1.5e-30", "54000", "numeric_scale = 30"),
    (BASE + "occupants IN (" + ", ".join(map(str, range(501))) + ")", "54023", "in_list_items = 500"),
    # The timing probe: a named row, then long literals multiplied many times over.
    (BASE + "household_id = 17 AND has_garden AND occupants * " + " * ".join(
        ["1234567890.12345678901234567"] * 5) + " > 1", "54000", "arithmetic_digits = 100"),
]


@pytest.mark.parametrize("sql, sqlstate, named", OVER_THE_LIMIT,
                         ids=[named for _, _, named in OVER_THE_LIMIT])
def test_each_limit_refuses_with_its_sqlstate_and_names_itself(sql: str, sqlstate: str,
                                                                named: str) -> None:
    error = refusal(sql)
    assert error.sqlstate == sqlstate
    assert named in (error.hint or "") and "[limits]" in (error.hint or "")


@pytest.mark.parametrize("sql, sqlstate, named", OVER_THE_LIMIT,
                         ids=[named for _, _, named in OVER_THE_LIMIT])
def test_raising_the_limit_lets_the_same_statement_through(sql: str, sqlstate: str,
                                                            named: str) -> None:
    key = named.split(" = ")[0]
    generous = {"statement_bytes": 100_000, "expression_nodes": 10_000, "nesting_depth": 200,
                "text_literal_characters": 100_000, "arithmetic_digits": 1000}
    plan = analyse(sql, with_limits(**{**generous, key: generous.get(key, 1000)}), "planner")
    assert plan.where is not None


def test_ordinary_queries_are_far_inside_the_defaults() -> None:
    for sql in [BASE + "district IN ('Northbank', 'Old Mill') AND occupants * 2 + 1 > 4.5",
                BASE + "lower(trim(district)) LIKE 'north%' AND area BETWEEN 0.5 AND 120.25",
                BASE + " AND ".join(f"occupants <> {i}" for i in range(100))]:
        assert analyse(sql, POLICIES, "planner").where is not None


def test_arithmetic_scale_counts_after_the_point() -> None:
    # area's step 0.5 gives it one place; 0.25 has two: a product keeps three.
    limits_at = lambda n: with_limits(arithmetic_digits=n)  # noqa: E731
    sql = BASE + "area * 0.25 > 1"  # digits before: 3 + 1, after: 1 + 2
    assert analyse(sql, limits_at(7), "planner").where is not None
    assert refusal(sql, limits_at(6)).sqlstate == "54000"


def test_statement_text_is_measured_in_utf8_bytes() -> None:
    limits = Limits(statement_bytes=10)
    check_statement_text("é" * 5, limits)  # 10 bytes
    with pytest.raises(HushError) as caught:
        check_statement_text("é" * 5 + "a", limits)
    assert caught.value.sqlstate == "54000"


def test_a_statement_nested_beyond_the_parser_is_refused_as_too_deep() -> None:
    error = refusal(BASE + "(" * 200 + "has_garden" + ")" * 200)
    assert error.sqlstate == "54001" and "nesting_depth" in (error.hint or "")


def test_the_wire_refuses_an_oversized_statement_before_parsing(monkeypatch) -> None:
    def no_parsing(*args: object) -> None:
        raise AssertionError("parsed")

    monkeypatch.setattr(statements, "split", no_parsing)
    monkeypatch.setattr(statements, "single", no_parsing)
    session = Session(FakeEngine(), ANALYST)
    big = "SELECT COUNT(*) FROM households WHERE district = '" + "x" * 20_000 + "'"
    for message in (codec.Query(big), codec.Parse("", big, ())):
        out, _ = asyncio.run(session.handle(message))
        errors = [m for m in out if isinstance(m, codec.ErrorResponse)]
        assert [e.get("C") for e in errors] == ["54000"]


# ---- access.toml ---------------------------------------------------------------------------

def _access_with(folder: Path, extra: str) -> Path:
    root = write_policies(folder)
    access = root / "access.toml"
    access.write_text(access.read_text() + textwrap.dedent(extra))
    return root


def test_limits_are_read_from_access_toml(tmp_path: Path) -> None:
    root = _access_with(tmp_path, """
        [limits]
        statement_bytes = 2048
        in_list_items = 20
        query_timeout_ms = 1500
        """)
    limits = load_policies(root).limits
    assert (limits.statement_bytes, limits.in_list_items, limits.query_timeout_ms) == (2048, 20, 1500)
    assert limits.expression_nodes == Limits().expression_nodes  # unlisted keys keep defaults


def test_bad_limits_are_reported_as_file_key_problem(tmp_path: Path) -> None:
    root = _access_with(tmp_path, """
        [limits]
        statement_bytes = 0
        in_list_items = 2.5
        tea_breaks = 3
        """)
    with pytest.raises(PolicyError) as caught:
        load_policies(root)
    problems = "\n".join(caught.value.problems)
    assert "access.toml: limits.statement_bytes: must be a whole number from 1 to" in problems
    assert "access.toml: limits.in_list_items:" in problems
    assert "access.toml: limits.tea_breaks: unknown key" in problems


# ---- epsilon -------------------------------------------------------------------------------

def test_an_epsilon_below_the_smallest_per_query_is_refused() -> None:
    assert parse_epsilon("0.001", Decimal(1), Decimal("0.001")) == Decimal("0.001")
    with pytest.raises(HushError) as caught:
        parse_epsilon("0.000000000001", Decimal(1), Decimal("0.001"))
    assert caught.value.sqlstate == "22023"
    assert "at least 0.001" in (caught.value.hint or "")


def test_smallest_epsilon_is_read_and_checked_in_access_toml(tmp_path: Path) -> None:
    root = write_policies(tmp_path / "a")
    assert load_policies(root).defaults.smallest_epsilon_per_query == Decimal("0.001")
    access = root / "access.toml"
    access.write_text(access.read_text().replace(
        "[defaults]", "[defaults]\nsmallest_epsilon_per_query = 2.0"))
    with pytest.raises(PolicyError) as caught:
        load_policies(root)
    assert any(p.startswith("access.toml: defaults.smallest_epsilon_per_query: 2.0 is above")
               for p in caught.value.problems)


@pytest.mark.parametrize("text", ["١", "0.١", "٠.5", "0.５", "１e-1", "0.1" + "0" * 70])
def test_epsilon_takes_ascii_digits_only(text: str) -> None:
    with pytest.raises(HushError) as caught:
        parse_epsilon(text, Decimal(1))
    assert caught.value.sqlstate == "22023"


def test_set_epsilon_below_the_smallest_is_refused_by_the_session() -> None:
    session = Session(FakeEngine(), ANALYST)
    out, _ = asyncio.run(session.handle(codec.Query("SET hushql.epsilon = 0.000000000001")))
    assert [m.get("C") for m in out if isinstance(m, codec.ErrorResponse)] == ["22023"]
    out, _ = asyncio.run(session.handle(codec.Query("SET hushql.epsilon = '١'")))
    assert [m.get("C") for m in out if isinstance(m, codec.ErrorResponse)] == ["22023"]
    out, _ = asyncio.run(session.handle(codec.Query("SET hushql.epsilon = 0.01")))
    assert not [m for m in out if isinstance(m, codec.ErrorResponse)]


# ---- the plan cache ------------------------------------------------------------------------

def test_the_plan_cache_is_bounded_in_memory_not_only_in_entries() -> None:
    from types import SimpleNamespace

    from proxy.engine import Engine, _plan_bytes

    def engine(cache_bytes: int) -> Engine:
        return Engine(POLICIES, SimpleNamespace(column_types=lambda source: {},  # type: ignore[arg-type]
                                                unique_keys=lambda source: frozenset(),
                                                check=lambda sql: None, wide_cells=0),
                      SimpleNamespace(sync_budgets=lambda policies, source=None: []),  # type: ignore[arg-type]
                      plan_cache_bytes=cache_bytes)

    big = [BASE + " OR ".join(f"occupants * {k}.5 + {i} > {k}" for k in range(40))
           for i in range(10, 18)]
    one = _plan_bytes(engine(10**9).prepare("planner", big[0]))
    assert one > 100_000  # the largest plans are heavy: this is why the bound exists
    small, roomy = engine(3 * one), engine(10**9)
    for sql in big:
        small.prepare("planner", sql)
        roomy.prepare("planner", sql)
    assert len(small._cache) == 3 and small._cache_weight <= 3 * one
    assert len(roomy._cache) == 8  # the companion: without the byte bound all stay
