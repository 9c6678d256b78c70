"""Refusals name what the analyst wrote, and their hints never offer the refused construct.

Two sweeps over the analyser:
- every refusable expression, as written by an analyst, put in every clause that can hold an
  expression: the message names the construct, the hint does not offer it, and outside WHERE
  the hint is the clause's own (WHERE's lists of functions and literals do not apply there);
- every refused statement of tests/test_analyse.py: a hint never lists the function, aggregate
  or cast that its message refuses.
"""

from __future__ import annotations

import re

import pytest

from proxy.errors import HushError
from proxy.sql.analyse import analyse
from proxy.sql.filters import CAST_HINT, FUNCTION_HINT, WHERE_HINT
from tests.test_analyse import POLICIES, REFUSALS

WHERE_ONLY_HINTS = (WHERE_HINT, FUNCTION_HINT, CAST_HINT)

# Each clause that holds expressions, with a template placing one there (IS NULL takes any type,
# so only the fragment itself can be refused).
CLAUSES = {
    "the select list": "SELECT {}, COUNT(*) FROM readings",
    "WHERE": "SELECT COUNT(*) FROM readings WHERE ({}) IS NULL",
    "GROUP BY": "SELECT COUNT(*) FROM readings GROUP BY {}",
    "HAVING": "SELECT COUNT(*) FROM readings HAVING ({}) IS NULL",
    "ORDER BY": "SELECT COUNT(*) FROM readings ORDER BY {}",
}

# (fragment as an analyst writes it, words naming it, clauses where it is accepted). The message
# of a refusal contains one of the words or the fragment itself; its hint contains none of them.
FRAGMENTS: list[tuple[str, tuple[str, ...], frozenset[str]]] = [
    ("now()", ("now",), frozenset()),
    ("now() - interval '30 days'", ("now",), frozenset()),
    ("NOW()", ("now",), frozenset()),
    ("transaction_timestamp()", ("transaction_timestamp",), frozenset()),
    ("current_date", ("current_date",), frozenset()),
    ("current_timestamp", ("current_timestamp",), frozenset()),
    ("random()", ("random",), frozenset()),
    ("extract(month FROM reading_date)", ("extract",), frozenset({"WHERE", "GROUP BY"})),
    ("lower(district)", ("lower",), frozenset({"WHERE"})),
    ("upper(district)", ("upper",), frozenset({"WHERE"})),
    ("length(district)", ("length",), frozenset({"WHERE"})),
    ("trim(district)", ("trim",), frozenset({"WHERE"})),
    ("coalesce(litres, 0)", ("coalesce",), frozenset({"WHERE"})),
    ("substr(district, 1, 2)", ("substr",), frozenset()),
    ("md5(district)", ("md5",), frozenset()),
    ("abs(litres)", ("abs",), frozenset()),
    ("round(litres)", ("round",), frozenset()),
    ("to_char(reading_date, 'YYYY')", ("to_char",), frozenset()),
    ("CAST(litres AS int)", ("cast",), frozenset()),
    ("litres::int", ("cast",), frozenset()),
    ("litres / 2", ("division",), frozenset()),
    ("litres % 2", ("modulo",), frozenset()),
    ("power(litres, 2)", ("exponent", "power"), frozenset()),
    ("sqrt(litres)", ("root", "sqrt"), frozenset()),
    ("district ~ 'N'", ("regular expression",), frozenset()),
    ("CASE WHEN litres > 1 THEN 1 END", ("case",), frozenset({"WHERE", "GROUP BY"})),
    ("row_number() OVER ()", ("window",), frozenset()),
    ("(SELECT 1)", ("subquer",), frozenset()),
]


# Fragments accepted in a clause evaluated on noisy rows when their columns are group keys (and
# aggregates): there, over an ungrouped column, they are refused as PostgreSQL refuses them.
OVER_GROUPED: dict[str, frozenset[str]] = {
    "coalesce(litres, 0)": frozenset({"the select list", "HAVING"}),
    "round(litres)": frozenset({"the select list"}),
    "CAST(litres AS int)": frozenset({"the select list"}),
    "litres::int": frozenset({"the select list"}),
    "litres / 2": frozenset({"the select list"}),
}


def _refusal_or_none(sql: str) -> HushError | None:
    try:
        analyse(sql, POLICIES, "planner")
    except HushError as error:
        return error
    return None


@pytest.mark.parametrize("clause", CLAUSES)
@pytest.mark.parametrize("fragment, words, accepted_in", FRAGMENTS,
                         ids=[f[0] for f in FRAGMENTS])
def test_refusals_name_the_construct_and_hints_do_not_offer_it(
        fragment: str, words: tuple[str, ...], accepted_in: frozenset[str], clause: str) -> None:
    error = _refusal_or_none(CLAUSES[clause].format(fragment))
    if clause in accepted_in:
        assert error is None, (fragment, clause, error and error.message)
        return
    assert error is not None, (fragment, clause)
    message, hint = error.message.lower(), (error.hint or "").lower()
    assert hint, (fragment, clause)
    if ("GROUP BY" in accepted_in or clause in OVER_GROUPED.get(fragment, ())) \
            and "must appear in the group by clause" in message:
        return  # a group key used without grouping by it: refused as PostgreSQL refuses it
    # Named by kind ("casts are not accepted") or quoted as written.
    assert any(word in message for word in words) or fragment.lower() in message, \
        (fragment, clause, error.message)
    assert not any(word in hint for word in words), (fragment, clause, error.hint)
    if clause != "WHERE":
        assert not any(where_hint.lower() in hint for where_hint in WHERE_ONLY_HINTS), \
            (fragment, clause, error.hint)


def test_a_renamed_call_is_refused_under_its_written_name() -> None:
    error = _refusal_or_none("SELECT COUNT(*) FROM readings WHERE reading_date > now() - "
                             "interval '30 days'")
    assert error is not None and "now()" in error.message
    assert "current_timestamp" not in error.message.lower()
    error = _refusal_or_none("SELECT COUNT(*) FROM readings ORDER BY now() - interval '30 days'")
    assert error is not None and "now()" in error.message.lower()


# What a message refuses by name: a function or aggregate call, or a cast.
_REFUSED_CALL = re.compile(r"(?:function|aggregate) ([a-z_][a-z0-9_]*)\(\) (?:is|takes)")
_REFUSED_CAST = re.compile(r"\bcasts are not accepted\b")


@pytest.mark.parametrize("sql, sqlstate", REFUSALS,
                         ids=[f"{i}:{s[:40]}" for i, (s, _) in enumerate(REFUSALS)])
def test_no_hint_in_the_refusal_corpus_offers_what_its_message_refuses(sql: str,
                                                                       sqlstate: str) -> None:
    error = _refusal_or_none(sql)
    assert error is not None
    message, hint = error.message.lower(), (error.hint or "").lower()
    for name in _REFUSED_CALL.findall(message):
        if " takes " in message and name in hint:
            continue  # "function lower() takes text": lower is accepted, on other arguments
        assert not re.search(rf"\b{re.escape(name)}\b", hint), (sql, error.message, error.hint)
    if _REFUSED_CAST.search(message):
        assert "cast" not in hint, (sql, error.hint)
    for clause in ("the select list", "group by", "having", "order by"):
        if message.endswith(f"in {clause}"):
            assert not any(h.lower() in hint for h in WHERE_ONLY_HINTS), (sql, error.hint)
