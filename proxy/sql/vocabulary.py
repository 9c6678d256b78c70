"""The expression vocabulary: one table of the SQL expression nodes hushql knows, and one map
from a column's kind to its types.

Why one table: WHERE (rebuilt for the backend), HAVING and the select list (evaluated in the
proxy on noisy rows) accept overlapping sets of nodes. Written as separate walkers they drifted
apart in typing and evaluation; here each node class has one entry saying

- ``check``: the rule of ``proxy.sql.filters.ExpressionChecker`` that types the node and
  rebuilds it from fresh nodes (for WHERE: the backend condition, every operand safe on every
  row value; for HAVING and the select list: a tree over output placeholders);
- ``clauses``: where it is accepted (``WHERE``, ``SELECT``, ``HAVING``, ``BUCKET``; FILTER
  conditions of aggregates are WHERE conditions). Buckets are read by ``proxy.sql.keys``;
- ``operands`` and ``evaluate``: for nodes evaluated in the proxy, the node's operands in order
  and a builder of ``row -> value`` from their compiled evaluators (``proxy.sql.postprocess``).

Evaluation on noisy rows follows PostgreSQL's rules (documentation, "Mathematical Functions and
Operators", "Type Conversion"), with Python values standing for PostgreSQL types: ``int`` for
integer and bigint, ``Decimal`` for numeric, ``float`` for double precision. SQL's three-valued
logic holds (None is NULL). Nothing here raises on a value: where PostgreSQL raises (division
by zero, 22012; integer or numeric(p, s) overflow, 22003) the proxy answers NULL instead, since
a noisy value near zero is not the analyst's error and an exception would end the answer.
Decimal arithmetic runs in a context with traps off (NaN compares false, overflow gives
Infinity).
"""

from __future__ import annotations

import datetime as dt
import decimal
import math
import operator
from dataclasses import dataclass, replace
from decimal import ROUND_HALF_EVEN, ROUND_HALF_UP, Decimal
from fractions import Fraction
from typing import Any, Callable, Sequence

import sqlglot.expressions as exp

from proxy.policy import ColumnPolicy

# ---------------------------------------------------------------------------------------------
# Column kinds and their types.

@dataclass(frozen=True)
class KindTypes:
    """The types of one policy column: ``family`` is the analysis type (text, number, date,
    boolean) the checkers unify on; ``sql`` is the PostgreSQL type the data-free mirror declares,
    parameters infer and casts name; ``python`` is the value type answers carry."""

    family: str
    sql: str
    python: type
    categories: frozenset[str]  # pg_type.typcategory codes the backend column may have


_INT4 = (-(2 ** 31), 2 ** 31 - 1)
_INT8 = (-(2 ** 63), 2 ** 63 - 1)
# Categories: strings or enums for categories, numbers for integers and numbers, dates and
# times for dates (PostgreSQL documentation, "pg_type": typcategory codes S, E, N, D, B).
_INTEGER = KindTypes("number", "integer", int, frozenset("N"))
_KIND_TYPES = {
    "category": KindTypes("text", "text", str, frozenset("SE")),
    "integer": _INTEGER,  # bigint when its declared range needs 64 bits (column_types)
    "number": KindTypes("number", "numeric", Decimal, frozenset("N")),
    "date": KindTypes("date", "date", dt.date, frozenset("D")),
    "boolean": KindTypes("boolean", "boolean", bool, frozenset("B")),
}
# The analysis type of each kind (integer and number are both numbers), and the PostgreSQL type
# categories a column of the kind may sit on (serve and check refuse others).
KIND_FAMILY = {kind: types.family for kind, types in _KIND_TYPES.items()}
KIND_CATEGORIES = {kind: types.categories for kind, types in _KIND_TYPES.items()}


def column_types(column: ColumnPolicy) -> KindTypes:
    """The one answer to "what type is this column": an integer column is integer when its
    declared range fits 32 bits, else bigint (as the mirror declares it)."""
    if column.kind != "integer":
        return _KIND_TYPES[column.kind]
    low, high = column.range or (0, 0)
    fits = _INT4[0] <= int(low) and int(high) <= _INT4[1]
    return _INTEGER if fits else replace(_INTEGER, sql="bigint")


def sum_type(column: ColumnPolicy) -> str:
    """PostgreSQL's type of SUM over the column: sum(integer) is bigint, sum(bigint) and
    sum(numeric) are numeric (documentation, "Aggregate Functions")."""
    return "bigint" if column_types(column).sql == "integer" else "numeric"


# The analysis type of each PostgreSQL type an output or key can have.
SQL_FAMILY = {"text": "text", "integer": "number", "bigint": "number", "numeric": "number",
              "double precision": "number", "date": "date", "boolean": "boolean"}


# ---------------------------------------------------------------------------------------------
# Builders of fresh nodes for the backend: columns, constants and clamps, the same everywhere.

def column_node(name: str, table: str | None = None) -> exp.Column:
    """A policy column (quoted, so named exactly as in the policy), optionally qualified."""
    return exp.Column(this=exp.to_identifier(name, quoted=True),
                      table=exp.to_identifier(table) if table else None)


def number_node(value: Decimal | int | str) -> exp.Expression:
    """A fresh numeric constant written without exponent (negative as unary minus)."""
    number = value if isinstance(value, Decimal) else Decimal(str(value))
    node: exp.Expression = exp.Literal.number(format(abs(number), "f"))
    return exp.Neg(this=node) if number < 0 else node


def date_node(text: str) -> exp.Expression:
    """CAST('YYYY-MM-DD' AS DATE) as a fresh node (built directly: exp.cast parses its type)."""
    return exp.Cast(this=exp.Literal.string(text), to=exp.DataType(this=exp.DataType.Type.DATE))


def value_node(value: object) -> exp.Expression:
    """A fresh constant for a Python value: NULL, a boolean, a number, a date or text."""
    if value is None:
        return exp.Null()
    if isinstance(value, bool):
        return exp.Boolean(this=value)
    if isinstance(value, (int, Decimal)):
        return number_node(value)
    if isinstance(value, dt.date):
        return date_node(value.isoformat())
    return exp.Literal.string(str(value))


def clamp_node(value: exp.Expression, low: exp.Expression, high: exp.Expression, *,
               bound: Callable[[exp.Expression], exp.Expression] = lambda node: node,
               inside: exp.Expression | None = None) -> exp.Expression:
    """``CASE WHEN value < low THEN bound(low) WHEN value > high THEN bound(high) ELSE inside
    END`` (``inside`` defaults to the value): NULL stays NULL, unlike LEAST/GREATEST, and NaN
    sorts above every number in PostgreSQL, so it clamps to high."""
    return exp.Case(ifs=[exp.If(this=exp.LT(this=value.copy(), expression=low.copy()),
                                true=bound(low.copy())),
                         exp.If(this=exp.GT(this=value.copy(), expression=high.copy()),
                                true=bound(high.copy()))],
                    default=(inside if inside is not None else value).copy())


# ---------------------------------------------------------------------------------------------
# Numeric types of expressions evaluated in the proxy (the select list).

NUMBER_TYPES = ("integer", "bigint", "numeric", "double precision")  # in promotion order
# Cast targets accepted in the select list: the sqlglot type -> the PostgreSQL type name.
CAST_TYPES = {
    exp.DataType.Type.INT: "integer",
    exp.DataType.Type.BIGINT: "bigint",
    exp.DataType.Type.DECIMAL: "numeric",
    exp.DataType.Type.DOUBLE: "double precision",
}


def promoted(types: Sequence[str]) -> str:
    """The type PostgreSQL gives an operator or coalesce over these number types: the latest in
    integer < bigint < numeric < double precision (its implicit casts go that way)."""
    return max(types, key=NUMBER_TYPES.index)


def literal_type(value: Decimal) -> str:
    """The type PostgreSQL gives a numeric literal as written: integer when it has no point and
    fits 32 bits, bigint when it fits 64, else numeric (documentation, "Numeric Constants")."""
    if value.as_tuple().exponent == 0:  # digits only: 1e2 and 5.0 are numeric
        number = int(value)
        if _INT4[0] <= number <= _INT4[1]:
            return "integer"
        if _INT8[0] <= number <= _INT8[1]:
            return "bigint"
    return "numeric"


# ---------------------------------------------------------------------------------------------
# Values on noisy rows.

Row = Sequence[Any]
Evaluator = Callable[[Row], Any]
Builder = Callable[[exp.Expression, list[Evaluator]], Evaluator]

# Traps off: InvalidOperation gives NaN (and false comparisons), overflow gives Infinity.
LENIENT = decimal.Context(prec=60, traps=[], Emax=decimal.MAX_EMAX, Emin=decimal.MIN_EMIN)


def is_number(value: Any) -> bool:
    return isinstance(value, (int, float, Decimal, Fraction)) and not isinstance(value, bool)


def as_decimal(value: Any) -> Any:
    """Numbers as Decimal (exactly for int and float); other values unchanged."""
    if isinstance(value, bool) or not is_number(value):
        return value
    if isinstance(value, Fraction):
        return Decimal(value.numerator) / Decimal(value.denominator)
    return value if isinstance(value, Decimal) else Decimal(value)


def _pair(a: Any, b: Any) -> tuple[Any, Any]:
    """Two values made comparable: numbers as Decimal, a date next to a date-time as one."""
    if is_number(a) and is_number(b):
        return as_decimal(a), as_decimal(b)
    if isinstance(a, dt.datetime) != isinstance(b, dt.datetime) and isinstance(a, dt.date) \
            and isinstance(b, dt.date):
        return as_datetime(a), as_datetime(b)
    return a, b


def as_datetime(value: dt.date) -> dt.datetime:
    if isinstance(value, dt.datetime):
        return value.replace(tzinfo=None) if value.tzinfo else value
    return dt.datetime(value.year, value.month, value.day)


def compare(test: Callable[[Any, Any], bool], a: Any, b: Any) -> bool | None:
    if a is None or b is None:
        return None
    a, b = _pair(a, b)
    return bool(test(a, b))


def _same_kind(a: Any, b: Any) -> tuple[Any, Any]:
    """Operands of arithmetic in PostgreSQL's promotion: both int stay int, any float makes both
    float (numeric op double precision is double precision), else both Decimal."""
    if isinstance(a, int) and isinstance(b, int):
        return a, b
    if isinstance(a, float) or isinstance(b, float):
        return float(a), float(b)
    return as_decimal(a), as_decimal(b)


def arithmetic(combine: Callable[[Any, Any], Any], a: Any, b: Any) -> Any:
    if a is None or b is None or not is_number(a) or not is_number(b):
        return None
    a, b = _same_kind(a, b)
    try:
        return combine(a, b)
    except (OverflowError, ArithmeticError):
        return None


def divide(a: Any, b: Any) -> Any:
    """a / b as PostgreSQL divides: integers truncate toward zero; a zero divisor gives NULL
    (PostgreSQL raises 22012; see the module notes)."""
    if a is None or b is None or not is_number(a) or not is_number(b):
        return None
    a, b = _same_kind(a, b)
    if b == 0 or (isinstance(b, Decimal) and b.is_nan()):
        return None
    if isinstance(a, int):
        quotient = abs(a) // abs(b)
        return quotient if (a < 0) == (b < 0) else -quotient
    try:
        return a / b
    except (OverflowError, ArithmeticError):
        return None


def negate(value: Any) -> Any:
    return -value if is_number(value) else None


def round_value(value: Any, places: Any = None) -> Any:
    """round(x) and round(x, n): numeric rounds half away from zero; without n, integers and
    double precision are rounded as double precision, half to even (C's rint: PostgreSQL picks
    round(double precision) for integers); with n the value is rounded as numeric."""
    if value is None or not is_number(value) or (places is not None and not isinstance(places, int)):
        return None
    if places is None and not isinstance(value, Decimal):  # round(double precision)
        number = float(value)
        return float(round(number)) if math.isfinite(number) else number
    number = as_decimal(value)
    if not number.is_finite():
        return number
    return number.quantize(Decimal(1).scaleb(-(places or 0)), rounding=ROUND_HALF_UP)


def cast_value(value: Any, target: str, precision: int | None = None, scale: int | None = None) -> Any:
    """CAST to a number type as PostgreSQL casts: to integers, numeric rounds half away from
    zero and double precision half to even; numeric(p, s) rounds to s places half away from
    zero. Out of the type's range (22003 in PostgreSQL) the answer is NULL."""
    if value is None or not is_number(value):
        return None
    if target == "double precision":
        return float(as_decimal(value))
    if target == "numeric":
        number = as_decimal(value)
        if scale is not None and number.is_finite():
            number = number.quantize(Decimal(1).scaleb(-scale), rounding=ROUND_HALF_UP)
            if precision is not None and number != 0 and number.adjusted() >= precision - scale:
                return None
        return number
    if isinstance(value, int):
        whole = value
    else:
        number = as_decimal(value)
        if not number.is_finite():
            return None
        rounding = ROUND_HALF_EVEN if isinstance(value, float) else ROUND_HALF_UP
        whole = int(number.to_integral_value(rounding=rounding))
    low, high = _INT4 if target == "integer" else _INT8
    return whole if low <= whole <= high else None


def fits(value: Any, sql_type: str) -> Any:
    """An evaluated value in its output type: integers outside the type's range are NULL."""
    if isinstance(value, int) and not isinstance(value, bool) and sql_type in ("integer", "bigint"):
        low, high = _INT4 if sql_type == "integer" else _INT8
        return value if low <= value <= high else None
    return value


def not_(value: bool | None) -> bool | None:
    return None if value is None else not value


def all_of(values: list[bool | None]) -> bool | None:
    if any(v is False for v in values):
        return False
    return None if any(v is None for v in values) else True


def any_of(values: list[bool | None]) -> bool | None:
    if any(v is True for v in values):
        return True
    return None if any(v is None for v in values) else False


def member(value: Any, candidates: list[Any]) -> bool | None:
    """x IN (a, b, ...): TRUE on a match, else NULL if x or any candidate is NULL, else FALSE."""
    if value is None:
        return None
    return any_of([compare(operator.eq, value, c) for c in candidates])


def distinct(a: Any, b: Any) -> bool:
    """a IS DISTINCT FROM b: never NULL."""
    if a is None or b is None:
        return (a is None) != (b is None)
    return compare(operator.ne, a, b) is True


def constant(node: exp.Expression) -> Any:
    """The value of a literal the checkers built (number, text, date, boolean, NULL)."""
    if isinstance(node, exp.Null):
        return None
    if isinstance(node, exp.Boolean):
        return bool(node.this)
    if isinstance(node, exp.Neg):
        return negate(constant(node.this))
    if isinstance(node, exp.Literal):
        if node.is_string:
            return node.this
        text = node.this
        return int(text) if literal_type(Decimal(text)) != "numeric" else Decimal(text)
    if isinstance(node, exp.Cast) and isinstance(node.this, exp.Literal) \
            and node.to.this == exp.DataType.Type.DATE:
        return dt.date.fromisoformat(node.this.this)
    raise ValueError(f"post-processing holds an expression it does not evaluate: {node.key}")


# Builders: (node, operand evaluators) -> row evaluator. -------------------------------------

def _binary(test: Callable[[Any, Any], Any], combine: Callable[..., Any]) -> Builder:
    def build(node: exp.Expression, parts: list[Evaluator]) -> Evaluator:
        left, right = parts
        return lambda row: combine(test, left(row), right(row))
    return build


def _unary(function: Callable[[Any], Any]) -> Builder:
    def build(node: exp.Expression, parts: list[Evaluator]) -> Evaluator:
        inner = parts[0]
        return lambda row: function(inner(row))
    return build


def _connective(node: exp.Expression, parts: list[Evaluator]) -> Evaluator:
    join = all_of if isinstance(node, exp.And) else any_of
    return lambda row: join([part(row) for part in parts])


def _between(node: exp.Expression, parts: list[Evaluator]) -> Evaluator:
    this, low, high = parts
    symmetric = bool(node.args.get("symmetric"))

    def evaluate(row: Row) -> bool | None:
        value, a, b = this(row), low(row), high(row)
        inside = all_of([compare(operator.ge, value, a), compare(operator.le, value, b)])
        if symmetric:
            inside = any_of([inside, all_of([compare(operator.ge, value, b),
                                             compare(operator.le, value, a)])])
        return inside
    return evaluate


def _in(node: exp.Expression, parts: list[Evaluator]) -> Evaluator:
    this, *values = parts
    return lambda row: member(this(row), [v(row) for v in values])


def _is(node: exp.Expression, parts: list[Evaluator]) -> Evaluator:
    inner = parts[0]
    target = node.expression
    negate_ = bool(node.args.get("negate"))
    if isinstance(target, exp.Null):
        return lambda row: (inner(row) is None) != negate_
    wanted = bool(target.this)  # IS TRUE is FALSE (not NULL) on NULL

    def evaluate(row: Row) -> bool:
        value = inner(row)
        return (value is not None and bool(value) == wanted) != negate_
    return evaluate


def _round(node: exp.Expression, parts: list[Evaluator]) -> Evaluator:
    inner, *places = parts
    if not places:
        return lambda row: round_value(inner(row))
    return lambda row: round_value(inner(row), places[0](row))


def _cast(node: exp.Expression, parts: list[Evaluator]) -> Evaluator:
    inner = parts[0]
    to: exp.DataType = node.args["to"]
    target = CAST_TYPES[to.this]
    sizes = [int(e.this.this) if isinstance(e, exp.DataTypeParam) else int(e.this)
             for e in to.expressions]
    precision = sizes[0] if sizes else None
    scale = sizes[1] if len(sizes) > 1 else (0 if sizes else None)
    return lambda row: cast_value(inner(row), target, precision, scale)


def _coalesce(node: exp.Expression, parts: list[Evaluator]) -> Evaluator:
    def evaluate(row: Row) -> Any:
        for part in parts:
            value = part(row)
            if value is not None:
                return value
        return None
    return evaluate


def _divide(node: exp.Expression, parts: list[Evaluator]) -> Evaluator:
    left, right = parts
    return lambda row: divide(left(row), right(row))


def _distinct(node: exp.Expression, parts: list[Evaluator]) -> Evaluator:
    left, right = parts
    differs = isinstance(node, exp.NullSafeNEQ)
    return lambda row: distinct(left(row), right(row)) == differs


# ---------------------------------------------------------------------------------------------
# The table.

WHERE, SELECT, HAVING, BUCKET = "WHERE", "the select list", "HAVING", "bucket"
_CONDITIONS = frozenset({WHERE, HAVING})
_NUMBERS = frozenset({WHERE, HAVING, SELECT})


@dataclass(frozen=True)
class Rule:
    """One node class: the checker rule typing and rebuilding it, the clauses accepting it, and
    (when evaluated in the proxy) its operands' argument names and its evaluator builder."""

    check: str
    clauses: frozenset[str]
    operands: tuple[str, ...] = ()
    evaluate: Builder | None = None
    result: str = ""  # its type rule, in words (the checker implements it)


def _rule(check: str, clauses: frozenset[str], result: str, operands: tuple[str, ...] = (),
          evaluate: Builder | None = None) -> Rule:
    return Rule(check, clauses, operands, evaluate, result)


_COMPARISON = "boolean; operands unified (untyped text literals take the other side's type)"
_ARITHMETIC = ("number: promoted integer < bigint < numeric < double precision; in WHERE every "
               "operand NUMERIC and clamped to its column's declared range, digits bounded")

_PAIR = ("this", "expression")
_COMPARED = {exp.EQ: operator.eq, exp.NEQ: operator.ne, exp.LT: operator.lt, exp.LTE: operator.le,
             exp.GT: operator.gt, exp.GTE: operator.ge}
_COMBINED = {exp.Add: operator.add, exp.Sub: operator.sub, exp.Mul: operator.mul}

VOCABULARY: dict[type, Rule] = {
    exp.Paren: _rule("paren", _NUMBERS, "its operand's", ("this",), _unary(lambda v: v)),
    exp.And: _rule("connective", _CONDITIONS, "boolean of booleans", ("chain",), _connective),
    exp.Or: _rule("connective", _CONDITIONS, "boolean of booleans", ("chain",), _connective),
    exp.Not: _rule("not_", _CONDITIONS, "boolean of a boolean", ("this",), _unary(not_)),
    exp.Column: _rule("column", frozenset({WHERE}), "its column's kind (KIND_FAMILY)"),
    **{kind: _rule("comparison", _CONDITIONS, _COMPARISON, _PAIR, _binary(test, compare))
       for kind, test in _COMPARED.items()},
    exp.NullSafeEQ: _rule("comparison", _CONDITIONS, _COMPARISON, _PAIR, _distinct),
    exp.NullSafeNEQ: _rule("comparison", _CONDITIONS, _COMPARISON, _PAIR, _distinct),
    exp.Between: _rule("between", _CONDITIONS, _COMPARISON, ("this", "low", "high"), _between),
    exp.In: _rule("in_", _CONDITIONS, _COMPARISON + "; a list of literals",
                  ("this", "expressions"), _in),
    exp.Like: _rule("like", frozenset({WHERE}), "boolean of text and a literal pattern"),
    exp.ILike: _rule("like", frozenset({WHERE}), "boolean of text and a literal pattern"),
    exp.Is: _rule("is_", _CONDITIONS, "boolean", ("this",), _is),
    **{kind: _rule("arithmetic", _NUMBERS, _ARITHMETIC, _PAIR, _binary(combine, arithmetic))
       for kind, combine in _COMBINED.items()},
    exp.Div: _rule("arithmetic", frozenset({SELECT}),
                   "number: promoted; integer / integer truncates; a zero divisor gives NULL",
                   _PAIR, _divide),
    exp.Neg: _rule("negative", _NUMBERS, "its operand's number type", ("this",), _unary(negate)),
    exp.Lower: _rule("case_function", frozenset({WHERE}), "text of text"),
    exp.Upper: _rule("case_function", frozenset({WHERE}), "text of text"),
    exp.Length: _rule("length", frozenset({WHERE}), "integer of text"),
    exp.Trim: _rule("trim", frozenset({WHERE}), "text of text"),
    exp.Coalesce: _rule("coalesce", _NUMBERS, "its operands' common type",
                        ("this", "expressions"), _coalesce),
    exp.Extract: _rule("extract", frozenset({WHERE, BUCKET}), "numeric of a date"),
    exp.Round: _rule("round", frozenset({SELECT}),
                     "numeric (double precision for round of a double without places)",
                     ("this", "decimals"), _round),
    exp.Cast: _rule("cast", frozenset({SELECT}), "the named number type", ("this",), _cast),
    exp.DateTrunc: _rule("bucket", frozenset({BUCKET}), "date (read by proxy.sql.keys)"),
    exp.TimestampTrunc: _rule("bucket", frozenset({BUCKET}), "date (read by proxy.sql.keys)"),
    exp.Case: _rule("bucket", frozenset({BUCKET}), "its labels' type (proxy.sql.keys)"),
    exp.WidthBucket: _rule("bucket", frozenset({BUCKET}), "integer (proxy.sql.keys)"),
    exp.Floor: _rule("bucket", frozenset({BUCKET}), "floor(x / w) * w (proxy.sql.keys)"),
}


def chain_operands(node: exp.Connector) -> list[exp.Expression]:
    """Operands of a chain of one connective (a AND b AND c), left to right, without recursion.

    Parentheses are kept: sqlglot's own ``flatten`` removes them, and its generator does not
    put them back, which would turn (a OR b) AND c into a OR b AND c.
    """
    kind, parts, stack = type(node), [], [node]
    while stack:
        current = stack.pop()
        if type(current) is kind:
            stack.append(current.expression)
            stack.append(current.this)
        else:
            parts.append(current)
    return parts


def rule(node: exp.Expression, clause: str) -> Rule | None:
    """The node's rule when ``clause`` accepts it, else None."""
    found = VOCABULARY.get(type(node))
    return found if found is not None and clause in found.clauses else None


def operands(node: exp.Expression, names: tuple[str, ...]) -> list[exp.Expression]:
    """A node's operands in the order its rule names them (lists expanded, absent ones left out)."""
    found: list[exp.Expression] = []
    for name in names:
        if name == "chain":
            found += chain_operands(node)  # type: ignore[arg-type]
            continue
        value = node.args.get(name)
        if isinstance(value, list):
            found += value
        elif isinstance(value, exp.Expression):
            found.append(value)
    return found
