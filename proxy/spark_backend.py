"""Apache Spark as the backend, through Spark Connect (``sc://HOST:PORT``).

Rules of this module:
- The rewrite (``proxy.sql.rewrite``) stays one sqlglot tree, written for PostgreSQL. This module
  reads that text back (``read="postgres"``), applies the transforms of ``SPARK_TRANSFORMS`` (one
  row per place where the engines differ and sqlglot's Spark writer does not already agree), and
  writes it with ``dialect="spark"``. The privacy argument of the rewrite's docstring is kept
  because every transform produces the same values on every row (see each row's reason).
- Where sqlglot's writer already bridges a difference, tests pin it (``tests/test_spark.py``):
  NULL ordering (PostgreSQL sorts NULL last ascending, Spark first: the writer adds NULLS LAST),
  ``date_trunc`` (Spark's takes the unit first, as PostgreSQL's; the rewrite casts its timestamp
  to a date) and casts to text (STRING). The other differences are rows of ``SPARK_TRANSFORMS``:
  integer division (PostgreSQL's ``/`` on integers truncates toward zero, Spark's is exact:
  written ``DIV``), floors of decimal quotients, width_bucket, rounding per type, extract
  numbering, long date_trunc units, unsized NUMERIC casts, one-argument GREATEST/LEAST,
  correlated subqueries in ORDER BY, MATERIALIZED, generate_series and date + integer.
- Shapes that cannot be written with PostgreSQL's exact values are refused (0A000) before
  anything runs: number keys over floating-point columns (PostgreSQL converts a double to
  NUMERIC through 15 digits, Spark otherwise), floors and buckets over DECIMALs wider than 18
  digits (Spark's decimals drop scale past 38 digits), any other unsized NUMERIC cast.
- Session settings the rewrite reads with ``current_setting(name)`` (the noise of the bounds'
  noisy-max choice, drawn by the engine per query) become named parameters of Spark's
  parameterised SQL, bound per query: a setting the engine did not give fails the query (fail
  closed).
- Spark runs with ANSI mode on: an overflowing sum or a decimal that no longer fits raises an
  error instead of becoming NULL (which COALESCE would turn into a data-dependent 0).
- Statement timeouts and cancellation use Spark Connect's operation tags: each query runs under
  a tag of its own, interrupted by a timer or by the session's cancel request.
- Spark error text never leaves this module (it could quote a row), as in ``proxy.backend``.
  Spark has no read-only transactions: give the Connect server's user read access only.
- The rewrite's final ORDER BY of the cells' ordinals (``c.i0, c.i1, ...``, the leading
  output columns, never NULL) is not sent: Spark would sort a handful of rows through a
  range-partitioned exchange, sampled by a job of its own. ``run`` sorts the collected rows by
  those columns instead, ascending with NULL last as PostgreSQL would: the same rows in the
  same order.
- Per-individual answers of at most ``WIDE_CELLS`` cells are asked of the rewrite in its
  one-row-per-individual shape (``proxy.sql.rewrite``, module notes 11): the same rows as the
  joined shape, in one grouping per (individual, cell), one per individual and one aggregate,
  where the joined shape's windows, joins and scalar subqueries each run as stages of their
  own. The cell ordinal it computes per row reads as an integer column.
- PostgreSQL's planner settings (``proxy.backend.BACKEND_SETTINGS``: JIT off, a larger
  work_mem) are not carried over: they change speed only, never a value, and Spark plans its
  own code generation and spills under its executors' memory settings.
"""

from __future__ import annotations

import functools
import logging
import re
import threading
import uuid
import warnings
from collections.abc import Mapping
from decimal import Decimal
from typing import Any

import sqlglot
import sqlglot.expressions as exp

from proxy.backend import QueryControl
from proxy.errors import FEATURE_NOT_SUPPORTED, INTERNAL_ERROR, QUERY_CANCELED, HushError
from proxy.policy import Policies
from proxy.sql.rewrite import JOINED_ROWS_ALIAS, WIDE_CELL_COLUMN

log = logging.getLogger("hushql.spark")
# pyspark warns on import that it does not "fully support" the pandas installed; this module
# sends no pandas data (the demo loader sends plain columns), and the warning would be the
# first thing an operator reads on every start.
warnings.filterwarnings("ignore", message="PySpark does not yet fully support pandas",
                        category=FutureWarning)

SPARK_SCHEME = "sc://"

# Per-individual queries of up to this many cells take the one-row-per-individual shape. Its
# running sizes are sums over the cells before each one, so its text grows with the square of
# the cells: at 49 cells planning ran a 1 GB driver out of memory; 12 (months) measured faster.
WIDE_CELLS = 16

# Spark session settings the backend fixes for every query (see the module rules).
SESSION_CONFIG = {
    "spark.sql.ansi.enabled": "true",
    # Query text and tags are per session: keep the session's time zone fixed so that date
    # buckets never depend on the server's locale (common practice).
    "spark.sql.session.timeZone": "UTC",
}


def is_spark_dsn(dsn: str | None) -> bool:
    """Whether a backend DSN names a Spark Connect server rather than PostgreSQL."""
    return bool(dsn) and dsn.startswith(SPARK_SCHEME)  # type: ignore[union-attr]


def parameter_name(setting: str) -> str:
    """The Spark SQL parameter standing for a PostgreSQL session setting (dots are not allowed
    in parameter names): ``hushql.bound_noise_0`` -> ``hushql_bound_noise_0``."""
    return setting.replace(".", "_")


# ---- the transforms: PostgreSQL tree -> Spark tree ---------------------------------------------

class NotOnSpark(Exception):
    """A rewritten query holds a shape this module cannot write for Spark with PostgreSQL's
    exact values; the query is refused (0A000), never run approximately."""


# PostgreSQL type names (as ``postgres_type_name`` gives them) whose values Spark and
# PostgreSQL convert to NUMERIC and round alike: integers and decimals. Floating columns are not
# (PostgreSQL casts a double to NUMERIC through 15 significant digits, Spark through the double's
# shortest decimal string), so a number key over one is refused.
_EXACT_TYPES = ("numeric", "smallint", "integer", "bigint")
# The widest DECIMAL column whose floors and buckets Spark computes exactly (see narrow_exact):
# its digits, a literal's (under 10) and the quotient's extra scale stay within 38.
_MOST_DIGITS = 18
# The most digits of a DECIMAL that Spark keeps in a long (Decimal.MAX_LONG_DIGITS): sums of
# such decimals are added without BigDecimal objects. A SUM adds 10 digits to its input's.
_FAST_DIGITS = 18


def _is_cast_to_bare_decimal(node: exp.Expression) -> bool:
    """``CAST(x AS NUMERIC)`` without precision: PostgreSQL keeps every digit, Spark's DECIMAL
    means DECIMAL(10, 0) and would round."""
    return isinstance(node, exp.Cast) and node.to.this == exp.DataType.Type.DECIMAL \
        and not node.to.expressions


def _column_name(node: exp.Expression) -> str | None:
    return node.name.lower() if isinstance(node, exp.Column) else None


def _exact_floor_div(numerator: exp.Expression, denominator: exp.Expression) -> exp.Expression:
    """``floor(n / d)`` for d > 0: Spark rounds a decimal quotient to its result scale, so a
    quotient just below an integer could round up to it. The rounded quotient q is off by at
    most one; ``q*d > n`` and ``(q+1)*d <= n`` correct it. Exact while every decimal involved
    fits in 38 digits (``_Writer.narrow_exact``), when Spark's multiplications and comparisons
    are exact."""
    q = exp.Floor(this=exp.Div(this=exp.Paren(this=numerator.copy()),
                               expression=exp.Paren(this=denominator.copy())))
    n, d = exp.Paren(this=numerator.copy()), exp.Paren(this=denominator.copy())
    too_high = exp.If(this=exp.GT(this=exp.Mul(this=q.copy(), expression=d.copy()),
                                  expression=n.copy()), true=exp.Literal.number(1),
                      false=exp.Literal.number(0))
    too_low = exp.If(this=exp.LTE(this=exp.Mul(this=exp.Paren(this=exp.Add(
        this=q.copy(), expression=exp.Literal.number(1))), expression=d.copy()),
        expression=n.copy()), true=exp.Literal.number(1), false=exp.Literal.number(0))
    # floor() of the corrected integer: the same value, and marks it integral for later casts.
    return exp.Floor(this=exp.Paren(this=exp.Add(this=exp.Sub(this=q, expression=too_high),
                                                 expression=too_low)))


def _number(value: exp.Expression) -> Decimal:
    """A numeric literal (possibly negated) of the rewrite, as a Decimal."""
    if isinstance(value, exp.Neg):
        return -_number(value.this)
    if isinstance(value, exp.Paren):
        return _number(value.this)
    if isinstance(value, exp.Literal) and not value.is_string:
        return Decimal(value.this)
    raise NotOnSpark(f"a non-literal bucket bound ({value.sql()})")


def _literal(value: Decimal) -> exp.Expression:
    literal = exp.Literal.number(str(abs(value)))
    return exp.Neg(this=literal) if value < 0 else literal


class _Writer:
    """The transforms of one query, knowing the column types of the tables it reads."""

    def __init__(self, types: Mapping[str, str]) -> None:
        # The wide shape's cell ordinal (a CASE of integer literals) reads as an integer column.
        self.types = {**types, WIDE_CELL_COLUMN: "integer"}
        self.sorted_by = 0  # leading output columns the rows are sorted by after collecting

    def exact_type(self, node: exp.Expression) -> bool:
        name = _column_name(node)
        return name is not None and self.types.get(name, "").partition("(")[0] in _EXACT_TYPES

    def narrow_exact(self, node: exp.Expression) -> bool:
        """Whether every column in ``node`` is an integer or a DECIMAL of at most
        ``_MOST_DIGITS`` digits: then Spark's decimal arithmetic on it stays within 38 digits
        and loses no scale (past 38 it drops decimals, in divisions and in the widening of
        comparisons alike), so floors and buckets over it are exact."""
        for column in [node] if isinstance(node, exp.Column) else node.find_all(exp.Column):
            kind = self.types.get(column.name.lower(), "")
            base, _, size = kind.partition("(")
            if base in ("smallint", "integer", "bigint"):
                continue
            if base != "numeric" or not size or int(size.split(",")[0]) > _MOST_DIGITS:
                return False
        return True

    # -- rows: settings, series, CTEs ----------------------------------------------------------

    def settings_as_parameters(self, node: exp.Expression) -> exp.Expression:
        """``current_setting('x.y')`` -> the named parameter ``:x_y``, bound per query."""
        if isinstance(node, exp.Anonymous) and str(node.this).lower() == "current_setting":
            (name,) = node.expressions
            return exp.Placeholder(this=parameter_name(name.name))
        return node

    def number_series(self, node: exp.Expression) -> exp.Expression:
        """``generate_series(lo, hi) AS s(v)`` in FROM -> ``range(lo, hi + 1) AS s(v)``."""
        if isinstance(node, exp.Table) and isinstance(
                node.this, (exp.GenerateSeries, exp.ExplodingGenerateSeries)):
            series = node.this
            end = exp.Add(this=series.args["end"].copy(), expression=exp.Literal.number(1))
            node.set("this", exp.Anonymous(this="range", expressions=[
                series.args["start"].copy(), end]))
        return node

    def date_plus_days(self, node: exp.Expression) -> exp.Expression:
        """``date + i`` (PostgreSQL: the date i days later) -> ``date_add(date, CAST(i AS
        INT))``: Spark's date_add takes an INT, and range() gives BIGINT."""
        if isinstance(node, exp.Add) and isinstance(node.this, exp.Cast) \
                and node.this.to.this == exp.DataType.Type.DATE:
            return exp.Anonymous(this="date_add", expressions=[
                node.this.copy(), exp.cast(node.expression.copy(), "int")])
        return node

    def ordinals_sorted_here(self, node: exp.Expression) -> exp.Expression:
        """The outermost ``ORDER BY c.i0, c.i1, ...`` (ascending, no LIMIT), when those are the
        query's leading output columns -> no ORDER BY; ``sorted_by`` records how many leading
        columns ``run`` sorts the rows by."""
        if node.parent is not None or not isinstance(node, exp.Select) \
                or node.args.get("order") is None or node.args.get("limit") is not None \
                or node.args.get("offset") is not None:
            return node
        keys = node.args["order"].expressions
        leading = node.expressions[:len(keys)]
        if len(leading) == len(keys) and all(
                isinstance(k, exp.Ordered) and not k.args.get("desc")
                and isinstance(k.this, exp.Column) and k.this.table == "c"
                and re.fullmatch(r"i\d+", k.this.name) and p == k.this
                for k, p in zip(keys, leading)):
            node.set("order", None)
            self.sorted_by = len(keys)
        return node

    def plain_ctes(self, node: exp.Expression) -> exp.Expression:
        """``WITH h AS MATERIALIZED (...)`` -> ``WITH h AS (...)``: a planner hint only."""
        if isinstance(node, exp.CTE) and node.args.get("materialized") is not None:
            node.set("materialized", None)
        return node

    def scores_as_columns(self, node: exp.Expression) -> exp.Expression:
        """``SELECT x FROM g ORDER BY <expression with a subquery> ... LIMIT 1`` (the noisy max
        over the candidates: each score reads the histogram in a correlated subquery) -> the
        scores computed as columns of an inner SELECT and the outer one ordered by them. Spark
        accepts correlated subqueries in projections, not in ORDER BY; the rows and their
        order are the same."""
        order = node.args.get("order") if isinstance(node, exp.Select) else None
        if order is None or not any(o.find(exp.Subquery, exp.Select) for o in order.expressions):
            return node
        keys = order.expressions
        names = [p.alias_or_name for p in node.expressions]
        inner = exp.select(*[p.copy() for p in node.expressions],
                           *[exp.alias_(o.this.copy(), f"_o{i}") for i, o in enumerate(keys)])
        source = node.args.get("from_") or node.args.get("from")
        inner.set("from_" if "from_" in node.args else "from", source.copy())
        if node.args.get("where") is not None:
            inner.set("where", node.args["where"].copy())
        outer = exp.select(*[exp.column(n, table="_s") for n in names]).from_(
            exp.Subquery(this=inner, alias=exp.TableAlias(this=exp.to_identifier("_s"))))
        outer.set("order", exp.Order(expressions=[
            exp.Ordered(this=exp.column(f"_o{i}", table="_s"), desc=o.args.get("desc"),
                        nulls_first=o.args.get("nulls_first")) for i, o in enumerate(keys)]))
        if node.args.get("limit") is not None:
            outer.set("limit", node.args["limit"].copy())
        return outer

    def single_extremes(self, node: exp.Expression) -> exp.Expression:
        """``GREATEST(x)`` / ``LEAST(x)`` of one argument (PostgreSQL: x) -> ``x``: Spark wants
        two or more."""
        if isinstance(node, (exp.Greatest, exp.Least)) and not node.expressions:
            return exp.Paren(this=node.this.copy())
        return node

    # -- numbers -------------------------------------------------------------------------------

    def histogram_slots(self, node: exp.Expression) -> exp.Expression:
        """``width_bucket(x, ARRAY[t1, ..., tn])`` (sorted thresholds: how many are <= x) ->
        ``IF(x IS NULL, NULL, size(filter(array(t1, ..., tn), e -> e <= x)))``."""
        if isinstance(node, exp.WidthBucket) and node.args.get("threshold") is not None:
            value = node.this.this if _is_cast_to_bare_decimal(node.this) else node.this
            thresholds = node.args["threshold"]
            if isinstance(thresholds, exp.Cast):
                thresholds = thresholds.this
            if not isinstance(thresholds, exp.Array):
                raise NotOnSpark("width_bucket over a non-literal array")
            counted = sqlglot.parse_one(
                f"IF(x IS NULL, NULL, size(filter(array({', '.join(e.sql() for e in thresholds.expressions)}), "
                "e -> e <= x)))", read="spark")
            return counted.transform(
                lambda n: value.copy() if isinstance(n, exp.Column) and n.name == "x" else n)
        return node

    def exact_width_bucket(self, node: exp.Expression) -> exp.Expression:
        """``width_bucket(v, low, high, n)`` (PostgreSQL's exact NUMERIC buckets) -> the same
        buckets by exact decimal arithmetic (Spark's width_bucket computes in doubles)."""
        if not isinstance(node, exp.WidthBucket) or node.args.get("threshold") is not None:
            return node
        value = node.this.this if _is_cast_to_bare_decimal(node.this) else node.this
        if not self.narrow_exact(value):
            raise NotOnSpark(f"width_bucket over a column that is not an integer or a DECIMAL "
                             f"of at most {_MOST_DIGITS} digits")
        low, high = _number(node.args["min_value"]), _number(node.args["max_value"])
        count = _number(node.args["num_buckets"])
        ascending = low < high
        offset = exp.Sub(this=value.copy(), expression=_literal(low)) if ascending else \
            exp.Sub(this=_literal(low), expression=value.copy())
        inside = exp.Add(this=_exact_floor_div(exp.Mul(this=exp.Paren(this=offset),
                                                        expression=_literal(count)),
                                               _literal(abs(high - low))),
                         expression=exp.Literal.number(1))
        below = (exp.LT if ascending else exp.GT)(this=value.copy(), expression=_literal(low))
        above = (exp.GTE if ascending else exp.LTE)(this=value.copy(), expression=_literal(high))
        return exp.Case(ifs=[exp.If(this=below, true=exp.Literal.number(0)),
                             exp.If(this=above, true=_literal(count + 1))], default=inside)

    def integer_division(self, node: exp.Expression) -> exp.Expression:
        """PostgreSQL's ``/`` between integers truncates toward zero; Spark's ``/`` is exact.
        The rewrite divides a bare column only for ``floor(x / w) * w`` over an integer column
        and an integer width (``proxy.sql.domains.integer_division``): written ``x DIV w``,
        which truncates toward zero as PostgreSQL does. Any other division of a bare column is
        an exact floor (below)."""
        if isinstance(node, exp.Div) and _column_name(node.this) is not None:
            column_type = self.types.get(_column_name(node.this) or "", "")
            integer = column_type in ("smallint", "integer", "bigint")
            if integer and isinstance(node.expression, exp.Literal) and "." not in node.expression.this:
                return exp.IntDiv(this=node.this.copy(), expression=node.expression.copy())
        return node

    def exact_floors(self, node: exp.Expression) -> exp.Expression:
        """``floor(n / d)`` and ``floor(n / d + c)`` (d a positive literal: the bucket width or
        the column step) -> exact floors (``_exact_floor_div``) on decimals."""
        if not isinstance(node, exp.Floor):
            return node
        inner, shift = node.this, None
        if isinstance(inner, exp.Add) and isinstance(inner.this, exp.Div):
            inner, shift = inner.this, inner.expression
        if not isinstance(inner, exp.Div):
            return node
        numerator, denominator = inner.this, inner.expression
        if _is_cast_to_bare_decimal(numerator):
            numerator = numerator.this
        if not self.narrow_exact(numerator):
            raise NotOnSpark(f"floor(x / w) or an exact sum over a column that is not an "
                             f"integer or a DECIMAL of at most {_MOST_DIGITS} digits")
        width = _number(denominator)
        if width <= 0:
            raise NotOnSpark("floor(x / w) with w <= 0")
        if shift is not None:  # floor(n / d + c) = floor((n + c*d) / d)
            numerator = exp.Add(this=exp.Paren(this=numerator.copy()),
                                expression=_literal(_number(shift) * width))
        return _exact_floor_div(numerator, denominator)

    def rounding(self, node: exp.Expression) -> exp.Expression:
        """``round(x)``: PostgreSQL rounds NUMERIC halves away from zero (Spark's round, HALF_UP)
        and double precision halves to even (Spark's bround). The rewrite rounds per row
        ``round(clamp(c) / step)`` over one column c: its type picks the function."""
        if isinstance(node, exp.Round):
            columns = {c.name.lower() for c in node.find_all(exp.Column)}
            kinds = {self.types.get(c, "").partition("(")[0] for c in columns}
            if len(columns) != 1 or not kinds <= set(_EXACT_TYPES) | {"real", "double precision"}:
                raise NotOnSpark("round over an expression of unknown type")
            argument = node.this if isinstance(node, exp.Round) else node.expressions[0]
            function = "round" if kinds <= set(_EXACT_TYPES) else "bround"
            return exp.Anonymous(this=function, expressions=[argument.copy()])
        return node

    def _integral(self, node: exp.Expression) -> bool:
        """Whether the rewrite's expression is an integer: an aggregate (counts, and sums in
        step units), an integer division, a floor or round, an integral column, an integer
        literal, or + - * of those (AVG's midpoint sum ``2 * S - (lo + hi) * n``)."""
        if isinstance(node, exp.Paren):
            return self._integral(node.this)
        if isinstance(node, (exp.Add, exp.Sub, exp.Mul)):
            return self._integral(node.this) and self._integral(node.expression)
        if isinstance(node, exp.Neg):
            return self._integral(node.this)
        if isinstance(node, exp.Literal):
            return not node.is_string and node.this.lstrip("-").isdigit()
        return isinstance(node, (exp.AggFunc, exp.IntDiv, exp.Floor)) or \
            (isinstance(node, exp.Anonymous) and node.name.lower() in ("round", "bround", "floor")) \
            or _column_name(node) in self.integral_columns

    def integral_decimals(self, node: exp.Expression) -> exp.Expression:
        """``CAST(x AS NUMERIC)`` of an integral value (a count, a sum of integers, an integer
        division, a floor) -> ``CAST(x AS DECIMAL(38, 0))``, exact up to 38 digits (past them
        ANSI mode fails the query). Any other unsized NUMERIC cast left would round: refused."""
        if _is_cast_to_bare_decimal(node):
            operand = node.this
            if self._integral(operand):
                return exp.cast(operand.copy(), exp.DataType.build("DECIMAL(38, 0)"))
            if self.exact_type(operand):  # an exact column: its own type keeps every digit
                return operand.copy()
            raise NotOnSpark(f"a cast to NUMERIC of {operand.sql()[:40]}")
        return node

    def narrow_clamps(self, node: exp.Expression) -> exp.Expression:
        """``CASE WHEN d < lo THEN lo WHEN d > hi THEN hi ELSE d END`` over a DECIMAL(p, s)
        column d with number literals (a clamp) -> the same CASE cast to the narrowest DECIMAL
        holding d's digits and the literals', at least DECIMAL(_FAST_DIGITS - 10, ...). Spark
        types an integer literal as DECIMAL(10, 0) when it meets a decimal, so the CASE would be
        DECIMAL(11, 1) for a DECIMAL(7, 1) column and its SUM DECIMAL(21, 1), which Spark adds
        in BigDecimals; a SUM of at most _FAST_DIGITS digits it adds in longs. Every value of the
        CASE (d itself or a literal) fits the type, so the cast changes none."""
        if not isinstance(node, exp.Case) or node.args.get("this") is not None:
            return node
        column = node.args.get("default")
        kind = self.types.get(_column_name(column) or "", "") if column is not None else ""
        base, _, size = kind.partition("(")
        if base != "numeric" or not size:
            return node
        precision, _, scale_text = size.rstrip(")").partition(",")
        try:
            literals = [_number(branch.args["true"]) for branch in node.args["ifs"]]
        except NotOnSpark:
            return node
        scale = max([int(scale_text or 0)] + [-lit.as_tuple().exponent for lit in literals])
        whole = max([int(precision) - int(scale_text or 0)] +
                    [len(str(int(abs(lit)))) for lit in literals])
        digits = max(whole + scale, _FAST_DIGITS - 10)
        if digits > 38:
            return node
        return exp.cast(node.copy(), exp.DataType.build(f"DECIMAL({digits}, {scale})"))

    def integer_signs(self, node: exp.Expression) -> exp.Expression:
        """``sign(x)``: Spark's returns a double, which would turn the scaled partials it
        multiplies into doubles (inexact past 2^53) -> ``CAST(sign(x) AS INT)``."""
        if isinstance(node, exp.Sign):
            return exp.cast(exp.Sign(this=node.this.copy()), "int")
        return node

    # -- dates ---------------------------------------------------------------------------------

    def date_buckets(self, node: exp.Expression) -> exp.Expression:
        """``date_trunc`` units Spark lacks: decade (years divisible by 10), century and
        millennium (PostgreSQL's start at years 1, 101, ..., 1001, 2001, ...) -> make_date."""
        if isinstance(node, (exp.TimestampTrunc, exp.DateTrunc)):
            unit = node.text("unit").lower()
            if unit in _LONG_UNITS:
                size, first = _LONG_UNITS[unit]
                year = exp.Extract(this=exp.var("YEAR"), expression=node.this.copy())
                start = sqlglot.parse_one(f"((y - {first}) DIV {size}) * {size} + {first}",
                                          read="spark")
                start = start.transform(lambda n: year.copy() if isinstance(n, exp.Column) else n)
                return exp.Anonymous(this="make_date", expressions=[
                    exp.cast(start, "int"), exp.Literal.number(1), exp.Literal.number(1)])
        return node

    def date_fields(self, node: exp.Expression) -> exp.Expression:
        """``extract(field FROM d)`` with PostgreSQL's numbering (``_EXTRACT_FIELDS``)."""
        if isinstance(node, exp.Extract):
            field = node.name.lower()
            if field not in _EXTRACT_FIELDS:
                raise NotOnSpark(f"extract({field})")
            template = _EXTRACT_FIELDS[field]
            if template is None:
                return node
            built = sqlglot.parse_one(template, read="spark")
            return exp.Paren(this=built.transform(
                lambda n: node.expression.copy() if isinstance(n, exp.Column) and n.name == "d" else n))
        return node

    integral_columns = frozenset({"n_rows", "touched"} | {f"tot{j}" for j in range(100)})


# PostgreSQL date_trunc units Spark lacks: (years per bucket, first year of a bucket).
_LONG_UNITS = {"decade": (10, 0), "century": (100, 1), "millennium": (1000, 1)}

# PostgreSQL extract field -> Spark SQL over the date ``d`` (None: Spark's field means the same).
# PostgreSQL: dow 0 = Sunday .. 6, isodow 1 = Monday .. 7, week and isoyear ISO 8601, decade
# year / 10, century and millennium counted from year 1 (years >= 1: Spark dates start there).
_EXTRACT_FIELDS: dict[str, str | None] = {
    "year": None, "quarter": None, "month": None, "week": None, "day": None, "doy": None,
    "dow": "EXTRACT(DAYOFWEEK FROM d) - 1",
    "isodow": "EXTRACT(DAYOFWEEK_ISO FROM d)",
    "isoyear": "EXTRACT(YEAROFWEEK FROM d)",
    "decade": "EXTRACT(YEAR FROM d) DIV 10",
    "century": "(EXTRACT(YEAR FROM d) + 99) DIV 100",
    "millennium": "(EXTRACT(YEAR FROM d) + 999) DIV 1000",
}


# name -> why it keeps the rewrite's values; applied in this order, each over the whole tree.
SPARK_TRANSFORMS: dict[str, str] = {
    "settings_as_parameters": "Spark Connect has no per-session custom settings the SQL can "
        "read; the bound noise is bound as a parameter of the same query instead, still fresh "
        "per query, and a parameter the engine did not give fails the query",
    "number_series": "Spark has no generate_series table function; range(lo, hi + 1) lists the "
        "same integers lo..hi (the ordinals of a run of declared values)",
    "scores_as_columns": "Spark refuses correlated subqueries in ORDER BY; the same scores as "
        "columns of an inner SELECT order the same rows",
    "single_extremes": "GREATEST or LEAST of one value is that value; Spark wants two",
    "ordinals_sorted_here": "the cells come back sorted by their ordinals either way: by "
        "run, in Python, rather than by a sort stage on Spark",
    "plain_ctes": "MATERIALIZED is a PostgreSQL planner hint; the values do not change",
    "histogram_slots": "width_bucket over a sorted array (how many thresholds are <= x) does "
        "not exist in Spark; counting them is the same integer",
    "exact_width_bucket": "Spark's width_bucket computes in doubles; PostgreSQL's NUMERIC "
        "version is exact, and so is the decimal arithmetic written instead",
    "date_buckets": "date_trunc to decade, century, millennium is missing in Spark: the same "
        "first day, from the year",
    "date_fields": "extract fields numbered as PostgreSQL numbers them",
    "integer_division": "PostgreSQL's integer / truncates toward zero, as Spark's DIV does",
    "exact_floors": "floor of a decimal quotient: Spark's decimal division may round the "
        "quotient; the corrected floor is exact",
    "rounding": "round per row: halves away from zero for NUMERIC, to even for double "
        "precision, as PostgreSQL does",
    "integer_signs": "Spark's sign is a double; the scaled partials must stay exact integers",
    "integral_decimals": "an unsized NUMERIC is DECIMAL(10, 0) in Spark; the rewrite's integral "
        "values get DECIMAL(38, 0), other casts are refused",
    "date_plus_days": "date + integer is date_add in Spark, which takes an INT",
    "narrow_clamps": "a clamp of a decimal column between literals holds only the column's "
        "and the literals' digits; typed that narrowly, Spark sums it in longs, not BigDecimals",
}


def to_spark_sql(postgres_sql: str, types: Mapping[str, str] | None = None, *,
                 pretty: bool = False) -> str:
    """The rewrite's PostgreSQL query written for Spark SQL (pure). ``types`` maps the column
    names of the tables it reads (lower case) to PostgreSQL type names (``postgres_type_name``);
    ``pretty`` lays it out over lines (EXPLAIN), the same statement.

    Raises NotOnSpark when a part cannot be written with PostgreSQL's exact values."""
    return spark_query(postgres_sql, types, pretty=pretty)[0]


def spark_query(postgres_sql: str, types: Mapping[str, str] | None = None, *,
                pretty: bool = False) -> tuple[str, int]:
    """``to_spark_sql``'s text and how many leading output columns the collected rows must be
    sorted by (``ordinals_sorted_here``; 0: none)."""
    return _to_spark_sql(postgres_sql, tuple(sorted((types or {}).items())), pretty)


@functools.lru_cache(maxsize=1024)
def _to_spark_sql(postgres_sql: str, types: tuple[tuple[str, str], ...],
                  pretty: bool) -> tuple[str, int]:
    tree = sqlglot.parse_one(postgres_sql, read="postgres")
    writer = _Writer(dict(types))
    for name in SPARK_TRANSFORMS:
        tree = tree.transform(getattr(writer, name), copy=False)
    return tree.sql(dialect="spark", pretty=pretty), writer.sorted_by


def _sorted_rows(rows: list[tuple[Any, ...]], columns: int) -> list[tuple[Any, ...]]:
    """Rows ordered by their first ``columns`` values, ascending, NULL last (PostgreSQL's
    ORDER BY of ``ordinals_sorted_here``); stable."""
    if not columns:
        return rows
    return sorted(rows, key=lambda row: tuple((v is None, v) for v in row[:columns]))


def refuse_joins(postgres_sql: str) -> None:
    """HushError 0A000 for a rewritten query that reads joined tables (``rewrite._rows``)."""
    tree = sqlglot.parse_one(postgres_sql, read="postgres")
    if any(s.alias == JOINED_ROWS_ALIAS for s in tree.find_all(exp.Subquery)):
        raise HushError(FEATURE_NOT_SUPPORTED, "joins cannot be answered on the Spark backend yet",
                        hint="query one table at a time on this backend")


def source_tables(postgres_sql: str) -> list[str]:
    """The ``schema.table`` names a rewritten query reads."""
    tree = sqlglot.parse_one(postgres_sql, read="postgres")
    return sorted({f"{t.db}.{t.name}" for t in tree.find_all(exp.Table) if t.db})


# ---- types -----------------------------------------------------------------------------------

# Spark type name (simpleString, without parameters) -> the PostgreSQL type the engine expects.
# Only "numeric" changes the rewrite (exact sums); the others are named for operators.
SPARK_TO_POSTGRES_TYPES = {
    "decimal": "numeric",
    "tinyint": "smallint",
    "smallint": "smallint",
    "int": "integer",
    "bigint": "bigint",
    "float": "real",
    "double": "double precision",
    "string": "text",
    "boolean": "boolean",
    "date": "date",
    "timestamp": "timestamp with time zone",
    "timestamp_ntz": "timestamp without time zone",
}


def postgres_type_name(spark_type: str) -> str:
    """A Spark column type as the PostgreSQL name the engine reads (``decimal(10,2)`` ->
    ``numeric(10,2)``); unknown types keep their Spark name, so they are never exact."""
    base, _, parameters = spark_type.partition("(")
    name = SPARK_TO_POSTGRES_TYPES.get(base, spark_type)
    return f"{name}({parameters}" if parameters and name != spark_type else name


# ---- the backend -----------------------------------------------------------------------------

class _TagCanceller:
    """What QueryControl cancels for a Spark query: the operations under one tag."""

    def __init__(self, session: Any, tag: str) -> None:
        self._session = session
        self._tag = tag

    def cancel_safe(self, timeout: float | None = None) -> None:
        self._session.interruptTag(self._tag)


class SparkBackend:
    """Runs rewritten queries on a Spark Connect server: a ``proxy.backend.QueryBackend``."""

    # Spark runs each step of the joined per-individual shape as stages of its own, each
    # costing tenths of a second however few its rows; the wide shape needs a few (module
    # rules), up to WIDE_CELLS cells (past them its text grows too large: see there).
    wide_cells = WIDE_CELLS

    def __init__(self, dsn: str, *, statement_timeout_ms: int = 300_000) -> None:
        from pyspark.sql import SparkSession

        self.dsn = dsn
        self._timeout = statement_timeout_ms / 1000
        self._session = SparkSession.builder.remote(dsn).create()
        self._types: dict[str, dict[str, str]] = {}
        for key, value in SESSION_CONFIG.items():
            self._session.conf.set(key, value)

    def run(self, sql: str, control: QueryControl | None = None,
            settings: dict[str, str] | None = None, *,
            timeout_ms: int | None = None) -> list[tuple[Any, ...]]:
        """Run one rewritten (PostgreSQL) query on Spark and return all its rows as tuples.

        ``settings`` bind the settings the query reads (the bound noise); ``timeout_ms``
        (default: the backend's) interrupts it. Raises HushError 0A000 for a shape Spark cannot
        answer exactly as PostgreSQL would (nothing runs), 57014 when cancelled or timed out,
        XX000 on any other failure (no Spark text).
        """
        tag = f"hushql-{uuid.uuid4().hex}"
        timed_out = threading.Event()

        def expire() -> None:
            timed_out.set()
            self._session.interruptTag(tag)

        seconds = self._timeout if timeout_ms is None else max(1, timeout_ms) / 1000
        timer = threading.Timer(seconds, expire)
        try:
            text, sorted_by = self._spark_text(sql)
            arguments = {parameter_name(k): v for k, v in (settings or {}).items()}
            if control is not None and not control._attach(_TagCanceller(self._session, tag)):
                raise HushError(QUERY_CANCELED, "canceling statement due to user request")
            self._session.addTag(tag)  # thread-local: only this thread's operations
            timer.start()
            try:
                rows = self._session.sql(text, args=arguments or None).collect()
            finally:
                timer.cancel()
                self._session.removeTag(tag)
                if control is not None:
                    control._attach(None)
            return _sorted_rows([tuple(row) for row in rows], sorted_by)
        except HushError:
            raise
        except Exception as error:
            if control is not None and control.cancelled:
                raise HushError(QUERY_CANCELED, "canceling statement due to user request") from None
            if timed_out.is_set():
                log.warning("spark query timed out: %s", type(error).__name__)
                raise HushError(QUERY_CANCELED, "canceling statement due to statement timeout",
                                hint="the query took longer than the proxy allows") from None
            # Logged for the operator by class only; the text might quote a row value.
            log.error("spark query failed: %s", type(error).__name__)
            raise HushError(INTERNAL_ERROR, "the backend could not run the query",
                            hint="ask an administrator to check the table's policy and source") from None

    def column_types(self, relation: str) -> dict[str, str]:
        """Column name -> PostgreSQL type name of a Spark table (``db.table``)."""
        schema = self._session.table(relation).schema
        return {field.name: postgres_type_name(field.dataType.simpleString()) for field in schema}

    def unique_keys(self, relation: str) -> frozenset[frozenset[str]]:
        """None: Spark enforces no constraint, so no table's individuals are held by one
        (``proxy.sql.rewrite``, module notes 8)."""
        return frozenset()

    def check(self, sql: str) -> None:
        """Raise HushError 0A000 when a rewritten query cannot be written for Spark with
        PostgreSQL's exact values (the engine asks before charging). Joins are not written
        for Spark yet: its per-table type lookup names columns as the tables do, not as the
        joined rows do."""
        refuse_joins(sql)
        self._spark_text(sql)

    def sent_sql(self, sql: str) -> str:
        """The Spark SQL sent for a rewritten query, laid out over lines for EXPLAIN; its
        ``:hushql_...`` parameters are bound per query. HushError 0A000 as ``check``."""
        return self._spark_text(sql, pretty=True)[0]

    def _spark_text(self, sql: str, *, pretty: bool = False) -> tuple[str, int]:
        """The Spark text of a rewritten query and the leading columns to sort its rows by."""
        try:
            return spark_query(sql, self._types_of(sql), pretty=pretty)
        except NotOnSpark as error:
            raise HushError(FEATURE_NOT_SUPPORTED,
                            f"this query cannot be answered on the Spark backend: {error}",
                            hint="ask for the same cells with a date key, a category, an integer "
                                 "column, or a number column stored as DECIMAL(18) or narrower") from None

    def _types_of(self, sql: str) -> dict[str, str]:
        """The column types (lower-case names) of the tables a query reads, looked up once per
        table (a policy reload that changes a source makes a new backend)."""
        found: dict[str, str] = {}
        for relation in source_tables(sql):
            if relation not in self._types:
                self._types[relation] = {name.lower(): kind for name, kind
                                         in self.column_types(relation).items()}
            found.update(self._types[relation])
        return found

    def close(self) -> None:
        try:
            self._session.stop()
        except Exception:  # the server may already be gone; nothing left to release
            log.debug("spark session stop failed", exc_info=True)



# PostgreSQL type name (as postgres_type_name gives it) -> PostgreSQL's type category letter,
# so that serving checks each column's kind against Spark's type as it does for PostgreSQL.
_TYPE_CATEGORIES = {"numeric": "N", "smallint": "N", "integer": "N", "bigint": "N", "real": "N",
                    "double precision": "N", "text": "S", "boolean": "B", "date": "D",
                    "timestamp with time zone": "D", "timestamp without time zone": "D"}


def source_problems(policies: Policies, dsn: str) -> list[str]:
    """Every table, column and type of ``policies`` the Spark server cannot answer, one line
    each (as ``proxy.safe_config.backend_problems`` does for PostgreSQL). Raises when the
    server cannot be reached."""
    from proxy.safe_config import column_problems

    problems: list[str] = []
    backend = SparkBackend(dsn)
    try:
        for name, table in sorted(policies.tables.items()):
            label = f"tables/{name}.toml"
            try:
                found = backend.column_types(table.source)
            except Exception:  # the analysis error names the table, never a row
                problems.append(f"{label}: source: {table.source} is not a table the Spark "
                                "server's user can read")
                continue
            categories = {column: (_TYPE_CATEGORIES.get(kind.partition("(")[0], "X"), kind)
                          for column, kind in found.items()}
            problems += column_problems(label, table, categories, "Spark's")
    finally:
        backend.close()
    return problems
