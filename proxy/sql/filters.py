"""Safe WHERE conditions: checked and rewritten so that no row value can make the backend raise.

``ExpressionChecker`` walks one clause by the rules of ``proxy.sql.vocabulary`` (which node is
accepted where, and its type rule): WHERE and FILTER conditions, rebuilt for the backend under
the rules below, and HAVING and select-list expressions, rebuilt over output placeholders and
evaluated on noisy rows in the proxy (``proxy.sql.postprocess``), where no row is read.

Why: an error raised while PostgreSQL evaluates a row is a side channel. "Division by zero" for
one filter and not for another tells the analyst that some row holds a zero, outside every
privacy bound. So a condition is accepted only when every operator and function in it is total
on every value its operands can hold, and it is rebuilt (never passed through) from fresh nodes:

- columns: listed columns only, rebuilt unqualified and quoted (``exp.Column`` named as in the
  policy);
- literals: numbers within +-1e30 (so coercion to real or double precision cannot overflow or
  underflow), text without NUL, dates written 'YYYY-MM-DD' or DATE 'YYYY-MM-DD', TRUE/FALSE/NULL;
  each literal's type is checked against the column it meets, so PostgreSQL never reports a
  type error (42804 here instead, before anything runs);
- comparisons = <> < <= > >= and IS [NOT] DISTINCT FROM, BETWEEN, IN (literal list), LIKE/ILIKE
  with a literal pattern, IS [NOT] NULL/TRUE/FALSE, AND/OR/NOT;
- functions that cannot raise on any value of their argument types: lower, upper, length,
  trim/btrim/ltrim/rtrim, coalesce, and extract/date_part of a date with a unit that is valid
  for dates (year quarter month week day dow isodow doy isoyear: checked on PostgreSQL 15 for
  the first and last dates it can store, and infinity).

Arithmetic (+, -, * and unary minus). Integer arithmetic overflows at 2^31 or 2^63 and double
precision overflows at 1.8e308, both raising errors; NUMERIC has no overflow short of 131072
digits before the point and rounds scale instead of failing (checked on PostgreSQL 15). So every
operand is evaluated as NUMERIC, and a column used inside arithmetic stands for its value
clamped to the policy's declared range, written as
``CASE WHEN c < lo THEN lo WHEN c > hi THEN hi ELSE CAST(c AS NUMERIC) END`` (a CASE keeps NULL
as NULL, unlike LEAST/GREATEST; NaN sorts above every number and so clamps to hi). With every
operand bounded, each arithmetic result has a bound on its number of digits before the point
and after it (a product keeps the sum of its factors' scales, a sum the larger one; a column
counts with its step's scale, its value rounded to it), and a condition whose bound exceeds the
``arithmetic_digits`` limit is refused; ordinary arithmetic is far below it. This is the one
place where a filter sees clamped values: the same values SUM and AVG see.

Bounded work per row. Whether a row's condition is evaluated at all can depend on the data
(``household_id = X AND has_garden AND <heavy>`` evaluates ``<heavy>`` on the one row that
passes the first two tests), so the time one row's condition can take is a side channel unless
it is bounded by a small constant, the same for every row. It is, by these steps, given the
limits of ``proxy.sql.limits`` (checked on the text and tree before analysis) and the rules
above:

1. The rebuilt condition has at most ``expression_nodes`` nodes (plus the fixed clamping CASE
   per column inside arithmetic), and PostgreSQL evaluates each node at most once per row: no
   operator here loops or recurses over its operands (no subqueries, no set-returning or
   aggregate functions, no recursion).
2. Each node's own work is bounded by the size of its operands: comparisons, AND/OR/NOT, IS,
   BETWEEN and extract are constant-time on fixed-size values; + - * on NUMERIC take time
   at most quadratic in the operands' digits, which are at most ``arithmetic_digits``; an IN
   list compares with at most ``in_list_items`` literals; lower, upper, length and trim are
   linear in their text, and trim's set of characters and LIKE/ILIKE patterns have at most
   ``pattern_characters`` characters (PostgreSQL's LIKE matcher gives up a failed % branch
   instead of backtracking, so it is about pattern times text, from memory of like_match.c);
   text literals have at most ``text_literal_characters``.
3. Nothing can grow a value from row to row: there is no concatenation, repeat, lpad or
   casting of text, and arithmetic results are bounded by (2).

So one row costs at most nodes x (largest operand work), a constant fixed by the statement
before anything runs: with the defaults, well under a millisecond on current hardware
(benchmarks/bench_timing.py measures what remains). The text of a row's own values also
counts (lower(district) is linear in the stored text); that length is the data owner's, not the
analyst's, and the same whichever condition is asked. A table that needs more than this can
declare a steady answer time (``[timing]``, see ``proxy.engine``).

The data owner's contract, assumed here: a column's kind matches its backend type (a number
kind backed by text would fail the cast), and text columns use a deterministic collation
(LIKE raises under a nondeterministic one).

Comparisons mixing two non-literal numeric operands compare as NUMERIC too (a NUMERIC column
compared with a double precision one would otherwise be cast to double precision, which
overflows above 1.8e308).

Buckets (date_trunc, CASE over one column, width_bucket, floor(x / w) * w) are read by
``proxy.sql.keys`` when the caller passes its reader: each is computed only for rows whose
column lies in its declared domain (NULL otherwise), so that it cannot fail either.

Refused (each as a HushError with a hint): division and modulo (a zero divisor), exponent and
roots (overflow, negative operands), casts (bad text), regular expressions and SIMILAR TO
(invalid patterns fail per row), LIKE ... ESCAPE and patterns ending in an unpaired backslash
(PostgreSQL raises on those only when a row is evaluated), date_trunc without the bucket reader
(it converts to timestamp, which fails for dates after 294276 AD), date arithmetic, subqueries,
window functions, parameters, and anything not listed above.

tests/test_analyse.py runs random accepted conditions on PostgreSQL over rows holding NULL, NaN,
infinities, the extreme integers, 130000-digit numerics and the first and last storable dates,
and expects no error.
"""

from __future__ import annotations

import datetime as dt
import re
from dataclasses import dataclass, field
from decimal import Decimal, InvalidOperation
from typing import Callable, Iterable, Sequence

import sqlglot.expressions as exp

from proxy.errors import (DATATYPE_MISMATCH, GROUPING_ERROR, PROGRAM_LIMIT_EXCEEDED, SYNTAX_ERROR,
                          UNDEFINED_FUNCTION, HushError, refused)
from proxy.policy import ColumnPolicy
from proxy.sql.limits import DEFAULT_LIMITS, Limits, hint
from proxy.sql.vocabulary import (CAST_TYPES, HAVING, KIND_FAMILY, SELECT, WHERE, chain_operands,
                                  clamp_node, column_node, date_node, literal_type, number_node,
                                  promoted, rule)

# Analysis types of expressions. "string" is an untyped quoted literal (PostgreSQL's unknown),
# which takes the type of what it meets; "null" is the NULL literal.
_TYPE_WORDS = {"text": "text", "number": "a number", "date": "a date", "boolean": "a boolean",
               "string": "a quoted text literal", "null": "NULL"}
_TYPE_HINTS = {
    "text": "compare category columns with text literals in single quotes, e.g. district = 'Old Mill'",
    "number": "compare integer and number columns with numeric literals, e.g. litres > 12.5",
    "date": "compare date columns with dates written 'YYYY-MM-DD', e.g. reading_date >= '2026-03-01'",
    "boolean": "compare boolean columns with TRUE or FALSE, or use the column itself as a condition",
}

LARGEST_LITERAL = Decimal("1e30")
SMALLEST_LITERAL = Decimal("1e-30")

DATE_UNITS = frozenset({"year", "quarter", "month", "week", "day", "dow", "isodow", "doy",
                        "isoyear"})
_ISO_DATE = re.compile(r"\d{4}-\d{2}-\d{2}")
_TRAILING_BACKSLASHES = re.compile(r"\\+$")
_WORD = re.compile(r"[A-Za-z_][A-Za-z0-9_$]*")
_WRITTEN = "hushql_written"  # the meta key mark_written_names sets

CAST_HINT = "compare columns with literals of their own type; dates as 'YYYY-MM-DD'"
WHERE_HINT = ("WHERE accepts listed columns, literals, = <> < <= > >=, BETWEEN, IN (literal list), "
              "LIKE/ILIKE 'pattern', IS [NOT] NULL, AND/OR/NOT, + - * on numbers, and the functions "
              "lower, upper, length, trim, coalesce and extract(<unit> FROM <date column>)")
FUNCTION_HINT = ("accepted functions: lower, upper, length, trim (btrim, ltrim, rtrim), coalesce, "
                 "extract(year|quarter|month|week|day|dow|isodow|doy|isoyear FROM <date>); "
                 "aggregates: COUNT(*), COUNT(col), SUM(col), AVG(col)")

ColumnResolver = Callable[[exp.Column], "tuple[str, ColumnPolicy]"]
BucketReader = Callable[[exp.Expression], "Typed | None"]
_NUMERIC = exp.DataType.Type.DECIMAL  # NUMERIC in PostgreSQL


@dataclass
class Typed:
    """A checked expression: its rebuilt node, analysis type, and how to use it in arithmetic.

    ``literal`` marks constants; ``string`` holds the text of an untyped quoted literal (checked
    against whatever it meets); ``digits`` bounds the digits before the point of a numeric value
    once clamped (None: not numeric) and ``scale`` the digits after it. ``as_numeric`` and
    ``as_bounded`` give the node cast to NUMERIC, respectively cast and clamped to declared
    ranges, for the contexts that need them; ``sql`` is the PostgreSQL type of a number in the
    select list (integer, bigint, numeric, double precision).
    """

    node: exp.Expression
    type: str
    literal: bool = False
    string: str | None = None
    digits: int | None = None
    scale: int = 0
    as_numeric: Callable[[], exp.Expression] | None = field(default=None, repr=False)
    as_bounded: Callable[[], exp.Expression] | None = field(default=None, repr=False)
    sql: str | None = None  # the PostgreSQL type, where the select list needs it

    def numeric(self) -> exp.Expression:
        return self.as_numeric() if self.as_numeric else self.node

    def bounded(self) -> exp.Expression:
        return self.as_bounded() if self.as_bounded else _cast_numeric(self.node)


def check_filter(condition: exp.Expression, resolve: ColumnResolver,
                 bucket: BucketReader | None = None,
                 limits: Limits = DEFAULT_LIMITS) -> exp.Expression:
    """Check a WHERE condition and return a rebuilt, safe copy; raise HushError when refused.

    ``resolve`` maps a column reference to (policy name, ColumnPolicy) or raises 42703/42P01.
    ``bucket``, when given, reads bucket expressions (``proxy.sql.keys``): it returns the
    checked, guarded bucket, or None for a node that is not one. ``limits.arithmetic_digits``
    bounds arithmetic results. The input tree is never modified.
    """
    return ExpressionChecker(resolve, bucket, limits).condition(condition, "WHERE")


# ---------------------------------------------------------------------------------------------
# Helpers shared with analysis (HAVING uses the same literal and type rules).

def unparen(node: exp.Expression) -> exp.Expression:
    """The expression inside any number of redundant parentheses."""
    while isinstance(node, exp.Paren):
        node = node.this
    return node


def only_args(node: exp.Expression, allowed: Iterable[str], what: str, hint: str) -> None:
    """Fail closed on syntax this module does not model: refuse when any other argument is set."""
    for key, value in node.args.items():
        if value not in (None, False, []) and key not in allowed:
            raise refused(f"{what} is not accepted in this form ({key})", hint)


def iso_date(text: str) -> dt.date | None:
    """The date written 'YYYY-MM-DD', or None when ``text`` is anything else."""
    if not _ISO_DATE.fullmatch(text):
        return None
    try:
        return dt.date.fromisoformat(text)
    except ValueError:
        return None


def literal(node: exp.Expression) -> Typed | None:
    """A checked, freshly built constant (number, text, date, boolean, NULL), or None if ``node``
    is not a constant. Raises HushError for constants outside the accepted forms."""
    if isinstance(node, exp.Literal):
        if node.is_string:
            text = node.this
            if "\x00" in text:
                raise HushError(SYNTAX_ERROR, "text literals may not contain NUL characters",
                                "remove the NUL character")
            return Typed(exp.Literal.string(text), "string", literal=True, string=text)
        return _number_literal(node.this, negative=False)
    if isinstance(node, exp.Neg) and isinstance(unparen(node.this), exp.Literal) \
            and not unparen(node.this).is_string:
        return _number_literal(unparen(node.this).this, negative=True)
    if isinstance(node, exp.Null):
        return Typed(exp.Null(), "null", literal=True, digits=0)
    if isinstance(node, exp.Boolean):
        return Typed(exp.Boolean(this=bool(node.this)), "boolean", literal=True)
    if isinstance(node, exp.Cast) and isinstance(node.this, exp.Literal) and node.this.is_string \
            and node.to.this == exp.DataType.Type.DATE and not node.to.expressions:
        text = node.this.this
        if iso_date(text) is None:
            raise HushError(DATATYPE_MISMATCH, f"invalid date literal {text!r}",
                            "write dates as 'YYYY-MM-DD' or DATE 'YYYY-MM-DD'")
        return Typed(date_node(text), "date", literal=True)
    return None


def unify(items: Sequence[Typed], what: str) -> str:
    """The common type of operands that meet (compared, listed, coalesced); raise 42804 if none.

    Untyped quoted literals take the others' type: fine for text, checked as 'YYYY-MM-DD' for
    dates, refused for numbers and booleans (PostgreSQL would coerce '5' but reject 'five').
    """
    family: str | None = None
    for item in items:
        if item.type in ("null", "string"):
            continue
        if family is None:
            family = item.type
        elif item.type != family:
            raise _mismatch(family, item.type, what)
    if family is None:
        return "string" if any(i.type == "string" for i in items) else "null"
    for item in items:
        if item.type != "string" or family == "text":
            continue
        if family == "date":
            if iso_date(item.string or "") is None:
                raise HushError(DATATYPE_MISMATCH, f"invalid date literal {item.string!r} in {what}",
                                _TYPE_HINTS["date"])
        else:
            raise _mismatch(family, "string", what)
    return family


def _mismatch(first: str, second: str, what: str) -> HushError:
    return HushError(DATATYPE_MISMATCH,
                     f"{what}: {_TYPE_WORDS[first]} cannot be compared with {_TYPE_WORDS[second]}",
                     _TYPE_HINTS.get(first, WHERE_HINT))


def refuse_expression(node: exp.Expression, clause: str, hint: str) -> HushError:
    """The refusal for an expression ``clause`` does not accept, as specific as the node allows."""
    if isinstance(node, (exp.Subquery, exp.Select, exp.Exists, exp.SetOperation)) or (
            isinstance(node, exp.In) and node.args.get("query") is not None):
        return refused(f"subqueries are not accepted (in {clause})",
                       "write one SELECT over one table; combine answers in your client")
    if isinstance(node, exp.Window):
        return refused("window functions are not accepted",
                       "use GROUP BY with COUNT, SUM or AVG; order and rank the answer in your client")
    if isinstance(node, exp.AggFunc):
        return HushError(GROUPING_ERROR, f"aggregate functions are not allowed in {clause}",
                         "aggregates belong in the select list, HAVING or ORDER BY")
    if isinstance(node, (exp.Div, exp.IntDiv, exp.Mod)):
        return refused("division and modulo are not accepted: they fail when some row holds a zero",
                       "compare instead: write x > 2 * y rather than x / y > 2; " + hint
                       if clause == "WHERE" else hint)
    if isinstance(node, (exp.Pow, exp.Sqrt, exp.Cbrt, exp.Ln, exp.Log, exp.Exp)):
        return refused("exponents, roots and logarithms are not accepted: they fail on some row values",
                       hint)
    if isinstance(node, (exp.Cast, exp.TryCast)):
        return refused(f"casts are not accepted in {clause}: a cast can fail on one row's value",
                       CAST_HINT if clause == "WHERE" else hint)
    if isinstance(node, (exp.Placeholder, exp.Parameter)):
        return refused("parameters are not accepted", "write literal values into the statement")
    if isinstance(node, exp.Star) or (isinstance(node, exp.Column) and isinstance(node.this, exp.Star)):
        return refused("* is accepted only inside COUNT(*)",
                       "name the aggregates you want: SELECT COUNT(*), SUM(col) ...")
    if isinstance(node, (exp.RegexpLike, exp.RegexpILike, exp.SimilarTo)):
        return refused("regular expressions and SIMILAR TO are not accepted: an invalid pattern fails",
                       "use LIKE or ILIKE with % and _")
    if isinstance(node, exp.Escape):
        return refused("LIKE ... ESCAPE is not accepted", "use LIKE without ESCAPE; \\ escapes % and _")
    if isinstance(node, (exp.TimestampTrunc, exp.DateTrunc)) and clause == "WHERE":
        return refused("date_trunc is not accepted in WHERE: it fails for dates beyond the timestamp range",
                       "compare the date column with dates, e.g. reading_date >= '2026-03-01', "
                       "or use extract(month FROM reading_date)")
    if isinstance(node, (exp.Case, exp.If)):
        return refused(f"CASE is not accepted in {clause}", hint)
    if isinstance(node, exp.Func) and not isinstance(node, exp.Binary):
        # Functions are accepted in WHERE only; elsewhere the clause's own hint says what is.
        return HushError(UNDEFINED_FUNCTION, f"{written_call(node)} is not accepted in {clause}",
                         FUNCTION_HINT if clause == "WHERE" else hint)
    return refused(f"the expression {_snippet(node)} is not accepted in {clause}", hint)


def mark_written_names(tree: exp.Expression, text: str) -> exp.Expression:
    """Note on each function call of a tree just parsed from ``text`` its name as written, so
    that refusals quote it (sqlglot normalises: now() becomes CurrentTimestamp). Returns the tree.

    Only ``meta`` changes; trees copied from it keep the notes.
    """
    for node in tree.walk():
        if isinstance(node, exp.Func) and "start" in node.meta and "end" in node.meta:
            written = text[node.meta["start"]:node.meta["end"] + 1]
            if _WORD.fullmatch(written):
                node.meta[_WRITTEN] = written
    return tree


def written_name(node: exp.Func) -> str:
    """A function's name as the analyst wrote it (lower case, as PostgreSQL shows names): the
    parse-time note, else the name PostgreSQL's own spelling gives."""
    if _WRITTEN in node.meta:
        return str(node.meta[_WRITTEN]).lower()
    if isinstance(node, exp.Anonymous):
        return node.name.lower()
    try:
        return node.sql(dialect="postgres").split("(", 1)[0].strip().lower() or node.sql_name().lower()
    except Exception:  # the generator may not know every node
        return node.sql_name().lower()


def written_call(node: exp.Func) -> str:
    """How a refusal names a call: "function now()" when written with parentheses, the bare
    keyword ("current_date") for SQL's parameterless forms."""
    name = written_name(node)
    if _WRITTEN in node.meta or isinstance(node, exp.Anonymous) or any(
            value not in (None, False, []) for value in node.args.values()):
        return f"function {name}()"
    return name


def written_sql(node: exp.Expression) -> str:
    """``node`` as PostgreSQL text, with calls that sqlglot renamed (now() is rendered
    CURRENT_TIMESTAMP, date_part() EXTRACT) under the names written. Raises what the
    generator raises for a node it does not know."""
    def restore(current: exp.Expression) -> exp.Expression:
        written = current.meta.get(_WRITTEN) if isinstance(current, exp.Func) else None
        if written is None or _rendered_name(current) == written.lower():
            return current
        arguments: list[exp.Expression] = []
        for value in current.args.values():
            arguments += [v for v in (value if isinstance(value, list) else [value])
                          if isinstance(v, exp.Expression)]
        return exp.Anonymous(this=written, expressions=arguments)

    return node.transform(restore).sql(dialect="postgres")


def _rendered_name(node: exp.Func) -> str:
    return node.sql(dialect="postgres").split("(", 1)[0].strip().lower()


def _snippet(node: exp.Expression) -> str:
    try:
        text = written_sql(node)
    except Exception:  # the generator may not know every node; the message need not quote it
        return f"of kind {node.key}"
    return f'"{text[:57]}..."' if len(text) > 60 else f'"{text}"'


def _digits(value: Decimal | int) -> int:
    """Digits before the decimal point of |value| (at least 1)."""
    value = Decimal(value)
    return 1 if value == 0 else max(1, value.adjusted() + 1)


def _number_literal(text: str, negative: bool) -> Typed:
    try:
        value = Decimal(text)
    except InvalidOperation:
        raise HushError(SYNTAX_ERROR, f"invalid number {text!r}", "write numbers like 12 or 12.5")
    if not value.is_finite() or abs(value) > LARGEST_LITERAL or (
            value != 0 and abs(value) < SMALLEST_LITERAL):
        raise refused(f"the number {text[:40]} is outside the accepted literal range",
                      "numeric literals must lie between -1e30 and 1e30 and be 0 or at least "
                      "1e-30 in size")
    node: exp.Expression = exp.Literal.number(text)
    if negative:
        node = exp.Neg(this=node)
    return Typed(node, "number", literal=True, digits=_digits(value), scale=_scale(value))


def _scale(value: Decimal | int) -> int:
    """Digits after the point of a number as written (PostgreSQL keeps them: 1.50 has 2)."""
    exponent = Decimal(value).as_tuple().exponent
    assert isinstance(exponent, int)
    return max(0, -exponent)


def _column_scale(column: ColumnPolicy) -> int:
    """Digits after the point a column's values keep in WHERE arithmetic: its step's, or 0."""
    return _scale(column.step) if column.kind == "number" and column.step is not None else 0


def _cast_numeric(node: exp.Expression) -> exp.Expression:
    return exp.Cast(this=node, to=exp.DataType(this=_NUMERIC))


def _clamped(name: str, column: ColumnPolicy) -> exp.Expression:
    """CASE WHEN c < lo THEN lo WHEN c > hi THEN hi ELSE round(c, places) END, every branch
    NUMERIC, ``places`` the column's scale (so a stored value's own scale cannot make one row's
    arithmetic costly).

    The tests compare the column in its own type with the bound (coerced once, at planning).
    """
    rounded = exp.Round(this=_cast_numeric(column_node(name)),
                        decimals=exp.Literal.number(_column_scale(column)))
    return clamp_node(column_node(name), number_node(column.low), number_node(column.high),
                      bound=_cast_numeric, inside=rounded)


# ---------------------------------------------------------------------------------------------

Reader = Callable[[exp.Expression], "Typed | None"]


def _no_columns(node: exp.Column) -> tuple[str, ColumnPolicy]:
    raise AssertionError("columns are read by the clause's own reader outside WHERE")


class ExpressionChecker:
    """One recursive pass over an expression of one clause, typing it and building the checked
    copy as it goes, by the rules of ``proxy.sql.vocabulary``.

    WHERE (and FILTER) conditions go to the backend: columns through ``resolve``, buckets
    through ``bucket``. HAVING and the select list are evaluated in the proxy: ``reader`` turns
    aggregates and columns into typed output placeholders first, and ``fallback`` reads what the
    clause's vocabulary does not know (group keys written as expressions); ``hint`` is the
    clause's own.
    """

    def __init__(self, resolve: ColumnResolver = _no_columns, bucket: BucketReader | None = None,
                 limits: Limits = DEFAULT_LIMITS, clause: str = WHERE, hint: str = WHERE_HINT,
                 reader: Reader | None = None, fallback: Reader | None = None) -> None:
        self._resolve = resolve
        self._bucket = bucket
        self._limits = limits
        self._clause = clause
        self._hint = hint
        self._reader = reader
        self._fallback = fallback

    def condition(self, node: exp.Expression, what: str) -> exp.Expression:
        """The checked copy of a condition (``what`` names it in the refusal of a non-condition)."""
        checked = self.check(node)
        if checked.type not in ("boolean", "null"):
            raise HushError(DATATYPE_MISMATCH,
                            f"argument of {what} must be a condition, not {_TYPE_WORDS[checked.type]}",
                            self._hint)
        return checked.node

    def check(self, node: exp.Expression) -> Typed:
        constant = literal(node)
        if constant is not None:
            if constant.type == "number" and self._clause == SELECT:
                constant.sql = literal_type(number_value(constant.node))
            return constant
        for reader in (self._bucket, self._reader):
            found = reader(node) if reader is not None else None
            if found is not None:
                return found
        found_rule = rule(node, self._clause)
        if found_rule is None:
            found = self._fallback(node) if self._fallback is not None else None
            if found is not None:
                return found
            raise refuse_expression(node, self._clause, self._hint)
        return _CHECKS[found_rule.check](self, node)

    # structure -------------------------------------------------------------------------------
    def _paren(self, node: exp.Paren) -> Typed:
        inner = self.check(node.this)
        return Typed(exp.Paren(this=inner.node), inner.type, literal=inner.literal,
                     string=inner.string, digits=inner.digits, scale=inner.scale, sql=inner.sql,
                     as_numeric=lambda: exp.Paren(this=inner.numeric()),
                     as_bounded=lambda: exp.Paren(this=inner.bounded()))

    def _connective(self, node: exp.Connector) -> Typed:
        # Long AND/OR chains are left-deep trees: walk them flat rather than recursing per link.
        kind = type(node)
        parts = [self._condition(part, kind.__name__.upper()) for part in chain_operands(node)]
        built = parts[0]
        for part in parts[1:]:
            built = kind(this=built, expression=part)
        return Typed(built, "boolean")

    def _not(self, node: exp.Not) -> Typed:
        return Typed(exp.Not(this=self._condition(node.this, "NOT")), "boolean")

    def _condition(self, node: exp.Expression, what: str) -> exp.Expression:
        return self.condition(node, what)

    # leaves ----------------------------------------------------------------------------------
    def _column(self, node: exp.Column) -> Typed:
        if isinstance(node.this, exp.Star):
            raise refuse_expression(node, self._clause, self._hint)
        name, column = self._resolve(node)
        kind = KIND_FAMILY[column.kind]
        if kind != "number":
            return Typed(column_node(name), kind)
        digits = max(_digits(column.low), _digits(column.high))
        return Typed(column_node(name), "number", digits=digits, scale=_column_scale(column),
                     as_numeric=lambda: _cast_numeric(column_node(name)),
                     as_bounded=lambda: _clamped(name, column))

    # comparisons -----------------------------------------------------------------------------
    def _comparison(self, node: exp.Binary) -> Typed:
        left, right = self.check(node.this), self.check(node.expression)
        what = f"comparison {_snippet(node)}"
        family = unify([left, right], what)
        a, b = self._operands([left, right], family)
        return Typed(type(node)(this=a, expression=b), "boolean")

    def _between(self, node: exp.Between) -> Typed:
        only_args(node, ("this", "low", "high", "symmetric"), "BETWEEN", self._hint)
        items = [self.check(node.this), self.check(node.args["low"]), self.check(node.args["high"])]
        family = unify(items, f"BETWEEN {_snippet(node)}")
        this, low, high = self._operands(items, family)
        return Typed(exp.Between(this=this, low=low, high=high,
                                 symmetric=node.args.get("symmetric") or None), "boolean")

    def _in(self, node: exp.In) -> Typed:
        if node.args.get("query") is not None:
            raise refuse_expression(node, self._clause, self._hint)
        only_args(node, ("this", "expressions"), "IN", "write x IN (literal, literal, ...)")
        if not node.expressions:
            raise HushError(SYNTAX_ERROR, "IN needs at least one value", "write x IN ('a', 'b')")
        this = self.check(node.this)
        values = []
        for item in node.expressions:
            constant = literal(item)
            if constant is None:
                raise refused(f"IN accepts a list of literals, not {_snippet(item)}",
                              "write x IN ('a', 'b') or x IN (1, 2)")
            values.append(constant)
        family = unify([this, *values], f"IN {_snippet(node)}")
        nodes = [this.node, *(v.node for v in values)] if self._clause == WHERE else \
            self._operands([this, *values], family)
        return Typed(exp.In(this=nodes[0], expressions=nodes[1:]), "boolean")

    def _like(self, node: exp.Like | exp.ILike) -> Typed:
        only_args(node, ("this", "expression", "negate"), "LIKE", self._hint)
        this = self.check(node.this)
        if this.type not in ("text", "string", "null"):
            raise HushError(DATATYPE_MISMATCH,
                            f"LIKE and ILIKE take text, not {_TYPE_WORDS[this.type]}",
                            "use LIKE on category columns, e.g. district LIKE 'North%'")
        pattern = unparen(node.expression)
        if not (isinstance(pattern, exp.Literal) and pattern.is_string):
            raise refused("LIKE and ILIKE accept only a literal pattern",
                          "write the pattern in single quotes, e.g. district LIKE 'North%'")
        text = pattern.this
        trailing = _TRAILING_BACKSLASHES.search(text)
        if trailing and len(trailing.group()) % 2 == 1:
            raise refused("a LIKE pattern may not end with an unpaired backslash "
                          "(PostgreSQL would fail on the first row it tests)",
                          "double the backslash to match one: LIKE 'a\\\\'")
        checked = literal(pattern)
        assert checked is not None
        kwargs = {"negate": True} if node.args.get("negate") else {}
        return Typed(type(node)(this=this.node, expression=checked.node, **kwargs), "boolean")

    def _is(self, node: exp.Is) -> Typed:
        only_args(node, ("this", "expression", "negate"), "IS", self._hint)
        this = self.check(node.this)
        target = node.expression
        if isinstance(target, exp.Null):
            right: exp.Expression = exp.Null()
        elif isinstance(target, exp.Boolean):
            if this.type not in ("boolean", "null"):
                raise HushError(DATATYPE_MISMATCH,
                                f"IS TRUE/FALSE takes a condition, not {_TYPE_WORDS[this.type]}",
                                _TYPE_HINTS["boolean"])
            right = exp.Boolean(this=bool(target.this))
        else:
            raise refused(f"IS {_snippet(target)} is not accepted",
                          "use IS [NOT] NULL, IS [NOT] TRUE or IS [NOT] FALSE")
        kwargs = {"negate": True} if node.args.get("negate") else {}
        return Typed(exp.Is(this=this.node, expression=right, **kwargs), "boolean")

    # arithmetic ------------------------------------------------------------------------------
    def _arithmetic(self, node: exp.Binary) -> Typed:
        left, right = self.check(node.this), self.check(node.expression)
        for side in (left, right):
            if side.type == "date":
                raise refused("date arithmetic is not accepted (it fails past the last storable date)",
                              "compare dates with dates, e.g. reading_date >= '2026-03-01'"
                              if self._clause == WHERE else self._hint)
            if side.type not in ("number", "null"):
                raise HushError(DATATYPE_MISMATCH,
                                f"{_OPERATORS[self._clause]} take numbers, not {_TYPE_WORDS[side.type]}",
                                "arithmetic is accepted on integer and number columns and numeric "
                                "literals; compare dates with dates instead"
                                if self._clause == WHERE else self._hint)
        sql = promoted([side.sql or "integer" for side in (left, right)]) \
            if self._clause == SELECT else None
        if self._clause != WHERE:  # evaluated in the proxy: no backend to protect
            built = type(node)(this=left.node, expression=right.node)
            return Typed(built, "number", sql=sql, as_numeric=lambda: built,
                         as_bounded=lambda: built)
        a, b = left.digits or 0, right.digits or 0
        # PostgreSQL's NUMERIC keeps every digit: a product has the sum of its factors' scales,
        # a sum the larger one (documentation, "Arbitrary Precision Numbers"; checked on 15).
        if isinstance(node, exp.Mul):
            digits, scale = a + b, left.scale + right.scale
        else:
            digits, scale = max(a, b) + 1, max(left.scale, right.scale)
        if digits + scale > self._limits.arithmetic_digits:
            raise HushError(PROGRAM_LIMIT_EXCEEDED,
                            "the arithmetic in WHERE could need too many digits",
                            hint(self._limits, "arithmetic_digits",
                                 "use fewer or shorter factors, or round the literals"))
        built = type(node)(this=left.bounded(), expression=right.bounded())
        return Typed(built, "number", digits=digits, scale=scale, as_bounded=lambda: built)

    def _round(self, node: exp.Round) -> Typed:
        """round(x) and round(x, n), n an integer literal: numeric, or double precision for
        round(x) of integers and double precision (PostgreSQL's round(double precision))."""
        only_args(node, ("this", "decimals"), "round()", self._hint)
        inner = self.check(node.this)
        if inner.type not in ("number", "null"):
            raise HushError(UNDEFINED_FUNCTION,
                            f"function round() takes a number, not {_TYPE_WORDS[inner.type]}", self._hint)
        places = node.args.get("decimals")
        if places is None:
            sql = "numeric" if inner.sql == "numeric" else "double precision"
            return Typed(exp.Round(this=inner.node), "number", sql=sql)
        checked = literal(places)
        if checked is None or checked.type != "number" or not _is_integer(checked.node):
            raise refused("round(x, n) takes an integer literal n", self._hint)
        return Typed(exp.Round(this=inner.node, decimals=checked.node), "number", sql="numeric")

    def _cast(self, node: exp.Cast) -> Typed:
        """A cast of a number to integer, bigint, numeric[(p[, s])] or double precision."""
        only_args(node, ("this", "to"), "a cast", self._hint)
        target = node.to
        if target.this not in CAST_TYPES or (target.expressions and target.this != exp.DataType.Type.DECIMAL):
            raise refused(f"casts to {_snippet(target)} are not accepted in {self._clause}",
                          self._hint)
        sizes = [literal(e.this if isinstance(e, exp.DataTypeParam) else e) for e in target.expressions]
        if len(sizes) > 2 or any(z is None or not _is_integer(z.node) for z in sizes) or (
                sizes and not 1 <= int(number_value(sizes[0].node)) <= 1000) or (  # type: ignore[union-attr]
                len(sizes) == 2 and not 0 <= int(number_value(sizes[1].node)) <= int(number_value(sizes[0].node))):  # type: ignore[union-attr]
            raise HushError(SYNTAX_ERROR, "NUMERIC precision must lie in 1..1000 and its scale in "
                            "0..precision", "write numeric(5, 2)")
        inner = self.check(node.this)
        if inner.type not in ("number", "null"):
            raise refused(f"casts are accepted on numbers, not {_TYPE_WORDS[inner.type]}", self._hint)
        to = exp.DataType(this=target.this, expressions=[exp.DataTypeParam(this=z.node)  # type: ignore[union-attr]
                                                         for z in sizes])
        return Typed(exp.Cast(this=inner.node, to=to), "number", sql=CAST_TYPES[target.this])

    def _negative(self, node: exp.Neg) -> Typed:
        inner = self.check(node.this)
        if inner.type not in ("number", "null"):
            raise HushError(DATATYPE_MISMATCH, f"unary minus takes a number, not {_TYPE_WORDS[inner.type]}",
                            self._hint)
        built = exp.Neg(this=inner.bounded())
        return Typed(built, "number", digits=inner.digits, scale=inner.scale,
                     as_bounded=lambda: built, as_numeric=lambda: built, sql=inner.sql)

    # functions -------------------------------------------------------------------------------
    def _text_argument(self, node: exp.Expression, function: str) -> Typed:
        argument = self.check(node)
        if argument.type not in ("text", "string", "null"):
            raise HushError(UNDEFINED_FUNCTION,
                            f"function {function}() takes text, not {_TYPE_WORDS[argument.type]}",
                            FUNCTION_HINT)
        return argument

    def _case_function(self, node: exp.Lower | exp.Upper) -> Typed:
        name = "lower" if isinstance(node, exp.Lower) else "upper"
        only_args(node, ("this",), f"{name}()", FUNCTION_HINT)
        return Typed(type(node)(this=self._text_argument(node.this, name).node), "text")

    def _length(self, node: exp.Length) -> Typed:
        only_args(node, ("this",), "length()", FUNCTION_HINT)
        built = exp.Length(this=self._text_argument(node.this, "length").node)
        return Typed(built, "number", digits=10)  # at most 1 GB of characters

    def _trim(self, node: exp.Trim) -> Typed:
        only_args(node, ("this", "expression", "position"), "trim()", FUNCTION_HINT)
        kwargs: dict = {"this": self._text_argument(node.this, "trim").node}
        if node.args.get("expression") is not None:
            kwargs["expression"] = self._text_argument(node.args["expression"], "trim").node
        if node.args.get("position"):
            kwargs["position"] = node.args["position"]
        return Typed(exp.Trim(**kwargs), "text")

    def _coalesce(self, node: exp.Coalesce) -> Typed:
        only_args(node, ("this", "expressions"), "coalesce()",
                  FUNCTION_HINT if self._clause == WHERE else self._hint)
        items = [self.check(node.this), *(self.check(e) for e in node.expressions)]
        family = unify(items, f"coalesce {_snippet(node)}")
        nodes = self._operands(items, family)
        built = exp.Coalesce(this=nodes[0], expressions=nodes[1:])
        if family in ("null", "string"):
            return Typed(built, "text")  # PostgreSQL resolves coalesce of untyped literals to text
        if family != "number":
            return Typed(built, family)
        digits = max(i.digits or 0 for i in items)
        sql = promoted([i.sql or "integer" for i in items if i.type == "number"]) \
            if self._clause == SELECT else None
        if sql is not None and any(i.sql != sql for i in items):
            # Evaluated in the proxy: whichever operand is taken, it is of the common type.
            built = exp.Cast(this=built, to=exp.DataType(this=_SQL_TYPE_NODES[sql]))
        return Typed(built, "number", digits=digits, scale=max(i.scale for i in items), sql=sql,
                     as_numeric=lambda: exp.Coalesce(
                         this=items[0].node if items[0].literal else items[0].numeric(),
                         expressions=[i.node if i.literal else i.numeric() for i in items[1:]]),
                     as_bounded=lambda: exp.Coalesce(this=items[0].bounded(),
                                                     expressions=[i.bounded() for i in items[1:]]))

    def _extract(self, node: exp.Extract) -> Typed:
        only_args(node, ("this", "expression"), "extract()", FUNCTION_HINT)
        unit = node.this
        name = unit.this if isinstance(unit, exp.Literal) and unit.is_string else (
            unit.name if isinstance(unit, exp.Var) else None)
        if name is None or name.lower() not in DATE_UNITS:
            raise refused(f"extract unit {_snippet(unit)} is not accepted",
                          "extract takes one of " + ", ".join(sorted(DATE_UNITS)) + " from a date")
        source = self.check(node.expression)
        if source.type != "date" and not (source.type == "string" and iso_date(source.string or "")):
            raise HushError(UNDEFINED_FUNCTION,
                            f"extract() takes a date, not {_TYPE_WORDS[source.type]}",
                            "write extract(month FROM <date column>)")
        source_node = source.node if source.type == "date" else date_node(source.string or "")
        built = exp.Extract(this=exp.var(name.upper()), expression=source_node)
        return Typed(built, "number", digits=8, as_bounded=lambda: built)  # NUMERIC, |year| < 1e7

    # -----------------------------------------------------------------------------------------
    def _operands(self, items: Sequence[Typed], family: str) -> list[exp.Expression]:
        """Nodes for operands that meet; numbers compare as NUMERIC unless all but one are
        literals. Evaluated in the proxy, quoted text meeting a date is made a date."""
        if self._clause != WHERE:
            return [date_node(i.string or "") if family == "date" and i.type == "string" else i.node
                    for i in items]
        if family == "number" and sum(1 for i in items if not i.literal) >= 2:
            return [i.node if i.literal else i.numeric() for i in items]
        return [i.node for i in items]


_CHECKS: dict[str, Callable[[ExpressionChecker, exp.Expression], Typed]] = {
    "paren": ExpressionChecker._paren,
    "connective": ExpressionChecker._connective,
    "not_": ExpressionChecker._not,
    "column": ExpressionChecker._column,
    "comparison": ExpressionChecker._comparison,
    "between": ExpressionChecker._between,
    "in_": ExpressionChecker._in,
    "like": ExpressionChecker._like,
    "is_": ExpressionChecker._is,
    "arithmetic": ExpressionChecker._arithmetic,
    "negative": ExpressionChecker._negative,
    "case_function": ExpressionChecker._case_function,
    "length": ExpressionChecker._length,
    "trim": ExpressionChecker._trim,
    "coalesce": ExpressionChecker._coalesce,
    "extract": ExpressionChecker._extract,
    "round": ExpressionChecker._round,
    "cast": ExpressionChecker._cast,
}
_SQL_TYPE_NODES = {name: kind for kind, name in CAST_TYPES.items()}
_OPERATORS = {WHERE: "+, - and *", HAVING: "+, - and *", SELECT: "+, -, * and /"}


def number_value(node: exp.Expression) -> Decimal:
    """The value of a checked number literal (negative ones are unary minus)."""
    return -number_value(node.this) if isinstance(node, exp.Neg) else Decimal(node.this)


def _is_integer(node: exp.Expression) -> bool:
    return literal_type(number_value(node)) in ("integer", "bigint")
