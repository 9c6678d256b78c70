"""Post-processing: HAVING, ORDER BY, OFFSET and LIMIT applied in the proxy to noisy rows.

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
- ORDER BY is a stable sort: equal rows keep the domain order, as does a query with no ORDER BY.
  Defaults as PostgreSQL's: NULLS LAST ascending, NULLS FIRST descending. Text sorts by code
  point (PostgreSQL's "C" collation), not by the backend's collation.
- then OFFSET, then LIMIT.
"""

from __future__ import annotations

import datetime as dt
import decimal
import operator
from decimal import Decimal
from fractions import Fraction
from typing import Any, Callable, Sequence

import sqlglot.expressions as exp

from proxy.sql.filters import chain_operands
from proxy.sql.plan import Plan, output_ref

Row = Sequence[Any]
_Evaluator = Callable[[Row], Any]

# Traps off: InvalidOperation gives NaN (and false comparisons), overflow gives Infinity.
_LENIENT = decimal.Context(prec=60, traps=[], Emax=decimal.MAX_EMAX, Emin=decimal.MIN_EMIN)


def postprocess(plan: Plan, rows: list[list]) -> list[tuple]:
    """The answer rows of ``plan`` from its noisy cell rows: HAVING, ORDER BY, OFFSET, LIMIT, and
    hidden outputs dropped. Pure; raises ValueError when a row does not hold one value per output."""
    width = len(plan.outputs)
    for row in rows:
        if len(row) != width:
            raise ValueError(f"a row holds {len(row)} values; the plan has {width} outputs")
    with decimal.localcontext(_LENIENT):
        kept = list(rows)
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
    return _decimal(value)


# ---------------------------------------------------------------------------------------------
# HAVING, compiled once per plan into nested closures over a row.

def compile_condition(node: exp.Expression, width: int) -> _Evaluator:
    """A function row -> True/False/None evaluating a Plan.having condition on one row.

    ``width`` is the number of outputs; a placeholder outside it is a bug and raises ValueError.
    Only the forms analysis produces are known; anything else raises ValueError.
    """
    refs = {output_ref(i): i for i in range(width)}
    return _Compiler(refs).compile(node)


class _Compiler:
    def __init__(self, refs: dict[str, int]) -> None:
        self._refs = refs

    def compile(self, node: exp.Expression) -> _Evaluator:
        if isinstance(node, exp.Paren):
            return self.compile(node.this)
        if isinstance(node, exp.Column):
            index = self._refs.get(node.name)
            if index is None:
                raise ValueError(f"HAVING names {node.name!r}, which is no output of the plan")
            return operator.itemgetter(index)
        if isinstance(node, (exp.And, exp.Or)):
            parts = [self.compile(p) for p in chain_operands(node)]
            return _all_of(parts) if isinstance(node, exp.And) else _any_of(parts)
        if isinstance(node, exp.Not):
            inner = self.compile(node.this)
            return lambda row: _not(inner(row))
        if type(node) in _COMPARISONS:
            compare = _COMPARISONS[type(node)]
            left, right = self.compile(node.this), self.compile(node.expression)
            return lambda row: _compare(compare, left(row), right(row))
        if isinstance(node, exp.Between):
            this, low, high = (self.compile(node.args[k]) for k in ("this", "low", "high"))
            return lambda row: _and([_compare(operator.ge, this(row), low(row)),
                                     _compare(operator.le, this(row), high(row))])
        if isinstance(node, exp.In):
            this = self.compile(node.this)
            values = [self.compile(v) for v in node.expressions]
            return lambda row: _in(this(row), [v(row) for v in values])
        if isinstance(node, exp.Is):
            inner = self.compile(node.this)
            target = node.expression
            negate = bool(node.args.get("negate"))
            if isinstance(target, exp.Null):
                return lambda row: (inner(row) is None) != negate
            wanted = bool(target.this)  # IS TRUE is FALSE (not NULL) on NULL
            return lambda row: (inner(row) is not None and bool(inner(row)) == wanted) != negate
        if type(node) in _ARITHMETIC:
            combine = _ARITHMETIC[type(node)]
            left, right = self.compile(node.this), self.compile(node.expression)
            return lambda row: _arithmetic(combine, left(row), right(row))
        if isinstance(node, exp.Neg):
            inner = self.compile(node.this)
            return lambda row: _negate(inner(row))
        constant = _constant(node)
        return lambda row: constant


def _constant(node: exp.Expression) -> Any:
    if isinstance(node, exp.Null):
        return None
    if isinstance(node, exp.Boolean):
        return bool(node.this)
    if isinstance(node, exp.Literal):
        if node.is_string:
            return node.this
        text = node.this
        return int(text) if text.isdigit() else Decimal(text)
    if isinstance(node, exp.Cast) and isinstance(node.this, exp.Literal) \
            and node.to.this == exp.DataType.Type.DATE:
        return dt.date.fromisoformat(node.this.this)
    raise ValueError(f"HAVING holds an expression post-processing does not evaluate: {node.key}")


_COMPARISONS: dict[type, Callable[[Any, Any], bool]] = {
    exp.EQ: operator.eq, exp.NEQ: operator.ne, exp.LT: operator.lt, exp.LTE: operator.le,
    exp.GT: operator.gt, exp.GTE: operator.ge,
}
_ARITHMETIC: dict[type, Callable[[Any, Any], Any]] = {
    exp.Add: operator.add, exp.Sub: operator.sub, exp.Mul: operator.mul,
}


def _is_number(value: Any) -> bool:
    return isinstance(value, (int, float, Decimal, Fraction)) and not isinstance(value, bool)


def _decimal(value: Any) -> Any:
    """Numbers as Decimal (exactly for int and float); other values unchanged."""
    if isinstance(value, bool) or not _is_number(value):
        return value
    if isinstance(value, Fraction):
        return Decimal(value.numerator) / Decimal(value.denominator)
    return value if isinstance(value, Decimal) else Decimal(value)


def _pair(a: Any, b: Any) -> tuple[Any, Any]:
    """Two values made comparable: numbers as Decimal, a date next to a date-time as one."""
    if _is_number(a) and _is_number(b):
        return _decimal(a), _decimal(b)
    if isinstance(a, dt.datetime) != isinstance(b, dt.datetime) and isinstance(a, dt.date) \
            and isinstance(b, dt.date):
        return _as_datetime(a), _as_datetime(b)
    return a, b


def _as_datetime(value: dt.date) -> dt.datetime:
    if isinstance(value, dt.datetime):
        return value.replace(tzinfo=None) if value.tzinfo else value
    return dt.datetime(value.year, value.month, value.day)


def _compare(compare: Callable[[Any, Any], bool], a: Any, b: Any) -> bool | None:
    if a is None or b is None:
        return None
    a, b = _pair(a, b)
    return bool(compare(a, b))


def _arithmetic(combine: Callable[[Any, Any], Any], a: Any, b: Any) -> Any:
    if a is None or b is None:
        return None
    return combine(_decimal(a), _decimal(b))


def _negate(value: Any) -> Any:
    return None if value is None else -_decimal(value)


def _not(value: bool | None) -> bool | None:
    return None if value is None else not value


def _and(values: list[bool | None]) -> bool | None:
    if any(v is False for v in values):
        return False
    return None if any(v is None for v in values) else True


def _or(values: list[bool | None]) -> bool | None:
    if any(v is True for v in values):
        return True
    return None if any(v is None for v in values) else False


def _all_of(parts: list[_Evaluator]) -> _Evaluator:
    return lambda row: _and([part(row) for part in parts])


def _any_of(parts: list[_Evaluator]) -> _Evaluator:
    return lambda row: _or([part(row) for part in parts])


def _in(value: Any, candidates: list[Any]) -> bool | None:
    """x IN (a, b, ...): TRUE on a match, else NULL if x or any candidate is NULL, else FALSE."""
    if value is None:
        return None
    results = [_compare(operator.eq, value, c) for c in candidates]
    return _or(results)
