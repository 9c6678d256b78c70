"""Post-processing: select-list expressions, HAVING, ORDER BY, OFFSET and LIMIT applied in the
proxy to noisy rows.

Why here and not in the database: filtering or sorting on true aggregates inside PostgreSQL
would make which rows come back depend on exact values. On noisy values they are
post-processing, which costs no privacy.

Rules:
- rows arrive one per cell, in the domain order the rewrite produced, each holding the values of
  all ``plan.outputs`` (hidden ones included); the answer holds the visible outputs only.
- HAVING follows SQL's three-valued logic (None is NULL; a row is kept only when the condition
  is TRUE). Numbers of mixed Python types (int, Decimal, float, Fraction) are compared and
  combined as Decimal in a context that never raises (NaN compares false, overflow gives
  infinity), so post-processing cannot fail on a value.
- select-list expressions (arithmetic, round, casts and coalesce over aggregates and keys) are
  computed here, on the noisy values, by ``proxy.sql.vocabulary``'s evaluators, never by the
  backend (which returns measures only). Where PostgreSQL would raise, the value is NULL: a
  division by a noisy zero (22012) and a cast or integer result out of its type's range
  (22003); an error would end the whole answer over a value the noise made.
- accuracy is carried through (``carried_accuracy``): an expression ``a * X + c`` of one noisy
  output X (through + - * / by constants, casts and round) is within ``|a| * bound95(X)`` plus
  what its roundings can move (half a unit of each rounding's last place; integer division by
  a constant truncates by less than 1) whenever X is within its bound; so the stated 95% bound
  holds exactly when X's does, and the clipping margins scale (and swap sign) with a. Anything
  else (a ratio of two noisy values such as SUM(x) / COUNT(*), a product of two, coalesce, a key
  times a noisy value) states no bound of its own: it says it is derived and names its noisy
  parts' 95% bounds (each holds in 95% of answers; a ratio's error also grows as its divisor
  nears zero, which no fixed bound captures honestly).
- ORDER BY is a stable sort: equal rows keep the domain order, as does a query with no ORDER BY.
  Defaults as PostgreSQL's: NULLS LAST ascending, NULLS FIRST descending. Text sorts by code
  point (PostgreSQL's "C" collation), not by the backend's collation.
- then OFFSET, then LIMIT.
"""

from __future__ import annotations

import datetime as dt
import decimal
from decimal import Decimal
from fractions import Fraction
from typing import Any, Sequence

import sqlglot.expressions as exp

from proxy.answer import Accuracy
from proxy.sql.plan import Plan, output_ref
from proxy.sql.vocabulary import (CAST_TYPES, LENIENT, VOCABULARY, Evaluator, as_decimal, constant,
                                  fits, operands)

Row = Sequence[Any]


def postprocess(plan: Plan, rows: list[list]) -> list[tuple]:
    """The answer rows of ``plan`` from its noisy cell rows: select-list expressions computed,
    HAVING, ORDER BY, OFFSET, LIMIT, and hidden outputs dropped. Pure; raises ValueError when a
    row does not hold one value per output."""
    width = len(plan.outputs)
    for row in rows:
        if len(row) != width:
            raise ValueError(f"a row holds {len(row)} values; the plan has {width} outputs")
    with decimal.localcontext(LENIENT):
        expressions = [(i, compile_condition(o.expression, width), o.type)
                       for i, o in enumerate(plan.outputs) if o.expression is not None]
        kept = [_computed(expressions, row) for row in rows] if expressions else list(rows)
        if plan.having is not None:
            predicate = compile_condition(plan.having, width)
            kept = [row for row in kept if predicate(row) is True]
        for item in reversed(plan.order_by):
            kept = _sorted_by(kept, item.output, item.descending,
                              item.descending if item.nulls_first is None else item.nulls_first)
    if plan.offset:
        kept = kept[plan.offset:]
    if plan.limit is not None:
        kept = kept[:plan.limit]
    visible = [i for i, output in enumerate(plan.outputs) if output.visible]
    return [tuple(row[i] for i in visible) for row in kept]


def _computed(expressions: list[tuple[int, Evaluator, str | None]], row: list) -> list:
    """The row with each expression output (index, evaluator, type) evaluated from the outputs
    it names (which are never expressions themselves), in its output type."""
    row = list(row)
    for index, evaluate, sql_type in expressions:
        row[index] = fits(evaluate(row), sql_type or "")
    return row


def _sorted_by(rows: list, index: int, descending: bool, nulls_first: bool) -> list:
    """Stable sort on one output; applied from the last ORDER BY item to the first."""
    nulls = [row for row in rows if row[index] is None]
    values = [row for row in rows if row[index] is not None]
    values.sort(key=lambda row: _sort_key(row[index]), reverse=descending)  # reverse keeps stability
    return nulls + values if nulls_first else values + nulls


def _sort_key(value: Any) -> Any:
    if isinstance(value, bool) or not isinstance(value, (int, float, Decimal, Fraction)):
        if isinstance(value, dt.datetime):
            return value.replace(tzinfo=None) if value.tzinfo else value
        return value
    return as_decimal(value)


# ---------------------------------------------------------------------------------------------
# Expressions over outputs, compiled into nested closures over a row by the vocabulary's
# evaluators (proxy.sql.vocabulary).

def compile_condition(node: exp.Expression, width: int) -> Evaluator:
    """A function row -> value evaluating a Plan.having condition (True/False/None) or a
    select-list expression on one row.

    ``width`` is the number of outputs; a placeholder outside it is a bug and raises ValueError.
    Only the forms analysis produces are known; anything else raises ValueError.
    """
    refs = {output_ref(i): i for i in range(width)}
    return _compile(node, refs)


def _compile(node: exp.Expression, refs: dict[str, int]) -> Evaluator:
    if isinstance(node, exp.Column):
        index = refs.get(node.name)
        if index is None:
            raise ValueError(f"post-processing names {node.name!r}, which is no output of the plan")
        return lambda row: row[index]
    rule = VOCABULARY.get(type(node))
    if rule is not None and rule.evaluate is not None and not _is_constant(node):
        parts = [_compile(part, refs) for part in operands(node, rule.operands)]
        return rule.evaluate(node, parts)
    value = constant(node)
    return lambda row: value


def _is_constant(node: exp.Expression) -> bool:
    """A negative number literal (unary minus) and a date literal (a cast of text) are one
    constant each."""
    return isinstance(node, (exp.Neg, exp.Cast)) and isinstance(node.this, exp.Literal)


# ---------------------------------------------------------------------------------------------
# Accuracy carried through select-list expressions.

# (output index of the one noisy part or None for a constant, slope, most rounding moves it,
#  exact value when constant)
_Linear = tuple["int | None", Decimal, Decimal, "Decimal | None"]


def carried_accuracy(plan: Plan, index: int, parts: dict[int, Accuracy]) -> Accuracy | None:
    """The accuracy of expression output ``index`` from its parts' (``parts``: output index ->
    Accuracy of aggregates), or None when it holds no noisy value (keys only)."""
    output = plan.outputs[index]
    assert output.expression is not None
    named = [_ref_index(n) for n in output.expression.find_all(exp.Column)]
    noisy = sorted({i for i in named if i in parts})
    if not noisy:
        return None
    linear = _linear(output.expression, plan, parts)
    if linear is not None and linear[0] is not None:
        part = parts[linear[0]]
        slope, rounding = abs(linear[1]), linear[2]
        low_by, high_by = part.low_by, part.high_by
        if linear[1] < 0:
            low_by, high_by = high_by, low_by
        return Accuracy(
            column=output.name, epsilon=part.epsilon,
            sensitivity=None if part.sensitivity is None else part.sensitivity * slope,
            scale=None if part.scale is None else part.scale * Fraction(slope),
            bound95=None if part.bound95 is None else part.bound95 * slope + rounding,
            note=f"{part.note}, times {_plain(linear[1])}" + (
                f", rounded (at most {_plain(rounding)})" if rounding else ""),
            low_by=None if low_by is None else low_by * slope,
            high_by=None if high_by is None else high_by * slope)
    shown = "; ".join(f"{parts[i].column} within ±{parts[i].bound95}" for i in noisy)
    return Accuracy(column=output.name, epsilon=sum((parts[i].epsilon for i in noisy), Decimal(0)),
                    sensitivity=None, scale=None, bound95=None,
                    note=f"derived from noisy parts: {shown}")


def _ref_index(node: exp.Column) -> int:
    return int(node.name.rsplit("_", 1)[1])


def _plain(value: Decimal) -> str:
    return format(value.normalize(), "f")


def _linear(node: exp.Expression, plan: Plan, parts: dict[int, Accuracy]) -> _Linear | None:
    """The expression as ``slope * part + c`` of one noisy part (or a constant), and how far
    rounding inside it may move it; None when it is not of that form (two noisy parts, a key
    times a part, a noisy divisor, coalesce)."""
    if isinstance(node, exp.Column):
        i = _ref_index(node)
        return (i, Decimal(1), Decimal(0), None) if i in parts else None
    if isinstance(node, exp.Paren):
        return _linear(node.this, plan, parts)
    if isinstance(node, exp.Neg) or isinstance(node, exp.Literal):
        if isinstance(node, exp.Literal) or isinstance(node.this, exp.Literal):
            return (None, Decimal(0), Decimal(0), as_decimal(constant(node)))
        inner = _linear(node.this, plan, parts)
        if inner is None:
            return None
        return (inner[0], -inner[1], inner[2], None if inner[3] is None else -inner[3])
    if isinstance(node, (exp.Cast, exp.Round)):
        inner = _linear(node.this, plan, parts)
        if inner is None:
            return None
        return (inner[0], inner[1], inner[2] + _rounding(node), None)
    if isinstance(node, (exp.Add, exp.Sub, exp.Mul, exp.Div)):
        left, right = _linear(node.this, plan, parts), _linear(node.expression, plan, parts)
        if left is None or right is None:
            return None
        if isinstance(node, (exp.Add, exp.Sub)):
            sign = 1 if isinstance(node, exp.Add) else -1
            if left[0] is not None and right[0] is not None and left[0] != right[0]:
                return None
            which = left[0] if left[0] is not None else right[0]
            value = None if left[3] is None or right[3] is None else left[3] + sign * right[3]
            return (which, left[1] + sign * right[1], left[2] + right[2], value)
        if isinstance(node, exp.Mul):
            if left[0] is not None and right[0] is not None:
                return None
            noisy, factor = (left, right) if right[0] is None else (right, left)
            if factor[3] is None:
                return None
            return (noisy[0], noisy[1] * factor[3], noisy[2] * abs(factor[3]),
                    None if noisy[3] is None else noisy[3] * factor[3])
        if right[0] is not None or not right[3]:
            return None
        truncates = _integer_typed(node.this) and _integer_typed(node.expression)
        return (left[0], left[1] / right[3], left[2] / abs(right[3]) + (1 if truncates else 0),
                None if left[3] is None else left[3] / right[3])
    return None


def _rounding(node: exp.Expression) -> Decimal:
    """How far a cast or round may move a value: half a unit of its last place kept."""
    if isinstance(node, exp.Round):
        places = node.args.get("decimals")
        return Decimal("0.5").scaleb(-int(constant(places))) if places is not None else Decimal("0.5")
    if isinstance(node.this, exp.Column) or _integer_typed(node.this):
        return Decimal(0)  # an output in its own type; an integer keeps its value in any cast
    target = node.args["to"]
    kind = CAST_TYPES.get(target.this)
    if kind in ("integer", "bigint"):
        return Decimal("0.5")
    if kind == "numeric" and len(target.expressions) == 2:
        return Decimal("0.5").scaleb(-int(constant(target.expressions[1].this)))
    if kind == "numeric" and len(target.expressions) == 1:
        return Decimal("0.5")
    return Decimal(0)


def _integer_typed(node: exp.Expression) -> bool:
    """Whether an operand is of an integer type (its division truncates)."""
    node = node.this if isinstance(node, exp.Paren) else node
    if isinstance(node, exp.Cast) and isinstance(node.this, exp.Column):  # an output placeholder
        return CAST_TYPES.get(node.args["to"].this) in ("integer", "bigint")
    if isinstance(node, exp.Cast):
        return CAST_TYPES.get(node.args["to"].this) in ("integer", "bigint")
    if isinstance(node, exp.Literal):
        return not node.is_string and isinstance(constant(node), int)
    return isinstance(node, (exp.Add, exp.Sub, exp.Mul, exp.Div, exp.Neg)) and all(
        _integer_typed(part) for part in (node.this, node.args.get("expression") or node.this))


def written_expression(plan: Plan, node: exp.Expression) -> str:
    """An expression over outputs as SQL naming them (for EXPLAIN): each placeholder, and the
    cast of it to its own type, written as the output's name."""
    def named(current: exp.Expression) -> exp.Expression:
        inner = current.this if isinstance(current, exp.Cast) else current
        if isinstance(inner, exp.Column) and inner.name.startswith(output_ref(0)[:-1]):
            return exp.column(plan.outputs[_ref_index(inner)].name, quoted=True)
        return current
    return node.transform(named).sql(dialect="postgres")
