"""Limits on the work one statement may ask for, decided before anything runs.

Why: how long an answer takes can depend on the data. A condition such as
``household_id = X AND has_garden AND <heavy>`` makes PostgreSQL evaluate ``<heavy>`` on one row
only when that row passes the cheap tests, so if ``<heavy>`` may cost anything, the answer's
time tells whether one named row matched. The proxy therefore bounds what any one row can cost
(the argument is in ``proxy.sql.filters``), with these limits, all checked before the query
runs and none of them reading data:

- ``statement_bytes``: the statement's UTF-8 text, checked before it is parsed at all
  (``check_statement_text``; the wire front and analysis both call it);
- on the tree right after parsing (``check_tree``): ``expression_nodes`` (every node of the
  statement), ``nesting_depth``, ``text_literal_characters``, ``numeric_digits`` and
  ``numeric_scale`` of numeric literals (significant digits, digits after the point),
  ``pattern_characters`` of LIKE/ILIKE patterns and of trim's set of characters, and
  ``in_list_items``;
- ``arithmetic_digits``: the digits (before and after the point) any arithmetic result in
  WHERE may have, checked by ``proxy.sql.filters`` as it rebuilds the condition;
- ``query_timeout_ms``: the proxy's own limit on a query's time in the backend (the analyst's
  ``statement_timeout`` is not used; see ``proxy.engine``).

Each has a safe default and can be changed in access.toml under ``[limits]``. Refusals carry a
SQLSTATE of class 54 (54000 program_limit_exceeded, 54001 statement_too_complex, 54023
too_many_arguments; PostgreSQL Appendix A) and a hint naming the limit and its value.
"""

from __future__ import annotations

from decimal import Decimal, InvalidOperation
from typing import Annotated

import sqlglot.expressions as exp
from pydantic import BaseModel, ConfigDict, Strict

from proxy.errors import (PROGRAM_LIMIT_EXCEEDED, STATEMENT_TOO_COMPLEX, TOO_MANY_ARGUMENTS,
                          HushError)

_Whole = Annotated[int, Strict()]

# Largest values an administrator may configure: beyond them a limit no longer bounds anything
# useful (PostgreSQL's statement_timeout is an int of milliseconds, from memory of its docs).
_CEILINGS = {"statement_bytes": 16 * 1024 * 1024, "expression_nodes": 1_000_000,
             "nesting_depth": 500, "text_literal_characters": 1_000_000,
             "pattern_characters": 100_000, "numeric_digits": 1000, "numeric_scale": 1000,
             "arithmetic_digits": 10_000, "in_list_items": 1_000_000,
             "query_timeout_ms": 2**31 - 1}


class Limits(BaseModel):
    """access.toml ``[limits]``: every bound on one statement's work, with safe defaults."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    statement_bytes: _Whole = 16_384
    expression_nodes: _Whole = 1_000
    nesting_depth: _Whole = 64
    text_literal_characters: _Whole = 1_000
    pattern_characters: _Whole = 200
    numeric_digits: _Whole = 30
    numeric_scale: _Whole = 30
    arithmetic_digits: _Whole = 100
    in_list_items: _Whole = 500
    query_timeout_ms: _Whole = 60_000

    def problems(self) -> list[tuple[str, str]]:
        """Meaning checks: (key relative to [limits], problem) for each value out of range."""
        found = []
        for key, ceiling in _CEILINGS.items():
            value = getattr(self, key)
            if not 1 <= value <= ceiling:
                found.append((key, f"must be a whole number from 1 to {ceiling}"))
        return found


DEFAULT_LIMITS = Limits()
_CHAINS = (exp.And, exp.Or, exp.Add, exp.Sub, exp.Mul)


def hint(limits: Limits, key: str, advice: str) -> str:
    """A refusal's hint: what to do, and which limit (with its value) was met."""
    return f"{advice}; the limit is {key} = {getattr(limits, key)} (access.toml [limits])"


def check_statement_text(text: str, limits: Limits) -> None:
    """Refuse (54000) a statement longer than ``statement_bytes`` in UTF-8, before parsing."""
    most = limits.statement_bytes
    if len(text) > most or len(text.encode("utf-8", "surrogatepass")) > most:
        raise HushError(PROGRAM_LIMIT_EXCEEDED, f"the statement is longer than {most} bytes",
                        hint(limits, "statement_bytes", "send a shorter statement"))


def check_tree(tree: exp.Expression, limits: Limits) -> None:
    """Refuse a parsed statement whose size, nesting, literals, patterns or lists exceed
    ``limits`` (54000, 54001 or 54023); pure, walks the tree once without recursion."""
    nodes = 0
    stack: list[tuple[exp.Expression, int]] = [(tree, 1)]
    while stack:
        node, depth = stack.pop()
        nodes += 1
        if nodes > limits.expression_nodes:
            raise HushError(STATEMENT_TOO_COMPLEX, "the statement has too many parts",
                            hint(limits, "expression_nodes", "write a shorter condition"))
        if depth > limits.nesting_depth:
            raise HushError(STATEMENT_TOO_COMPLEX, "the statement is nested too deeply",
                            hint(limits, "nesting_depth", "write a flatter statement"))
        _check_node(node, limits)
        # A chain of one operator (a AND b AND c, x + y + z) is one level, however long.
        stack.extend((child, depth if type(child) is type(node) and isinstance(node, _CHAINS)
                      else depth + 1) for child in node.iter_expressions())


def _check_node(node: exp.Expression, limits: Limits) -> None:
    if isinstance(node, exp.Literal):
        if node.is_string:
            if len(node.this) > limits.text_literal_characters:
                raise HushError(PROGRAM_LIMIT_EXCEEDED, "a text literal is too long",
                                hint(limits, "text_literal_characters", "use shorter text"))
        else:
            _check_number(node.this, limits)
    elif isinstance(node, (exp.Like, exp.ILike)):
        _check_pattern(node.expression, limits, "LIKE and ILIKE patterns")
    elif isinstance(node, exp.Trim):
        _check_pattern(node.args.get("expression"), limits, "trim's set of characters")
    elif isinstance(node, exp.In):
        if len(node.expressions) > limits.in_list_items:
            raise HushError(TOO_MANY_ARGUMENTS, "the IN list has too many values",
                            hint(limits, "in_list_items", "use fewer values, or a range"))


def _check_pattern(node: exp.Expression | None, limits: Limits, what: str) -> None:
    while isinstance(node, exp.Paren):
        node = node.this
    if isinstance(node, exp.Literal) and node.is_string \
            and len(node.this) > limits.pattern_characters:
        raise HushError(PROGRAM_LIMIT_EXCEEDED, f"{what} may not be this long",
                        hint(limits, "pattern_characters", "use a shorter pattern"))


def _check_number(text: str, limits: Limits) -> None:
    """Significant digits and digits after the point of a numeric literal, as written."""
    try:
        value = Decimal(text)
    except InvalidOperation:
        return  # not a number: analysis reports it
    if not value.is_finite():
        return
    sign, digits, exponent = value.as_tuple()
    assert isinstance(exponent, int)
    if len(digits) > limits.numeric_digits:
        raise HushError(PROGRAM_LIMIT_EXCEEDED, "a numeric literal has too many digits",
                        hint(limits, "numeric_digits", "round the number"))
    if -exponent > limits.numeric_scale:
        raise HushError(PROGRAM_LIMIT_EXCEEDED,
                        "a numeric literal has too many digits after the decimal point",
                        hint(limits, "numeric_scale", "round the number"))
