"""Group keys as written: which expressions may name a GROUP BY key, and what the WHERE says
about each key's column.

Rules of this module:
- A key is a total function of one column, whose values form a finite list known before the
  query runs (``proxy.sql.domains``). The grouping answered is the grouping written: a plain
  date column groups by day, date_trunc and extract group by what they name, and nothing is
  ever coarsened; a key with too many cells is refused (by analysis) with a hint instead.
- Accepted forms (table ``KEY_FORMS``), each over a column of the kinds listed:
    column                          category, integer, boolean, date (one cell per day)
    date_trunc('<unit>', d)         date; units in ``domains.TRUNC_UNITS``
    extract(<field> FROM d),
    date_part('<field>', d)         date; fields in ``domains.EXTRACT_FIELDS``
    CASE WHEN <cond> THEN <literal> ... [ELSE <literal>] END, and CASE x WHEN <literal> ...
                                    any kind; conditions are WHERE conditions over that one
                                    column (checked by ``proxy.sql.filters``, so they cannot fail)
    width_bucket(x, low, high, n)   integer, number; numeric literals, low <> high, 0 < n
    floor(x / w) * w                integer, number; w a positive numeric literal
- Every bucket counts only rows whose column lies in its declared domain, and is computed only
  on those rows, so it cannot fail: date_trunc never meets a date past the timestamp range,
  width_bucket never meets NaN or an infinity, floor(x / w) never overflows.
- ``narrowings`` reads the WHERE's top-level AND: a conjunct comparing a column with literals
  (=, <, <=, >, >=, BETWEEN, IN, a boolean column or its negation) bounds the values a row
  passing the WHERE can hold, so the cells outside that bound are empty in every database and
  are left out. Anything else narrows nothing. Text is narrowed only by = and IN (its order
  depends on the collation; equality under a deterministic collation does not).
- ``restrictions`` does the same for a conjunct comparing a bucket with literals
  (``extract(dow FROM d) IN (0, 6)``): a row passing it has a key value meeting it (a bucket in
  WHERE is the key's own guarded expression, or extract, whose rows outside the declared range
  are not counted by the key), so the key's other values are empty cells and are left out.
"""

from __future__ import annotations

import datetime as dt
import math
from decimal import Decimal
from fractions import Fraction
import sqlglot.expressions as exp

from proxy.errors import DATATYPE_MISMATCH, UNDEFINED_FUNCTION, HushError, refused
from proxy.policy import ColumnPolicy, TablePolicy, date_range
from proxy.sql.domains import EXTRACT_FIELDS, TRUNC_UNITS, integer_division, key_type
from proxy.sql.filters import (BucketReader, ColumnResolver, Typed, chain_operands, check_filter,
                               date_node, iso_date, literal, number_node, only_args, unparen)
from proxy.sql.plan import GroupKey, Label, Narrowing
from proxy.sql.vocabulary import SQL_FAMILY, column_node, value_node

BUCKET_HINT = ("GROUP BY accepts columns with a declared domain, date_trunc('<unit>', d), "
               "extract(<field> FROM d), CASE WHEN <condition on one column> THEN <literal> ... END, "
               "width_bucket(x, low, high, n) and floor(x / w) * w")
# WHEN branches one CASE key may have: each is tested on every row, so this bounds its work.
MOST_CASE_BRANCHES = 64
_COMPARISONS = (exp.EQ, exp.LT, exp.LTE, exp.GT, exp.GTE)
_MIRRORED = {exp.EQ: exp.EQ, exp.LT: exp.GT, exp.LTE: exp.GTE, exp.GT: exp.LT, exp.GTE: exp.LTE}


def is_key_expression(node: exp.Expression) -> bool:
    """Whether ``node`` has the outer form of a key (it may still be refused when read)."""
    return isinstance(node, (exp.Column, exp.TimestampTrunc, exp.DateTrunc, exp.Extract, exp.Case,
                             exp.WidthBucket)) or _floor_parts(node) is not None


def read_key(node: exp.Expression, resolve: ColumnResolver) -> tuple[GroupKey | None, str, str]:
    """(the key ``node`` names or None when its column has no domain, its column, its default
    output name). Raises HushError for a key expression of a refused form."""
    if isinstance(node, exp.Column):
        name, column = resolve(node)
        has_domain = column.kind in ("category", "integer", "boolean", "date")
        return (GroupKey(name) if has_domain else None), name, name
    if isinstance(node, (exp.TimestampTrunc, exp.DateTrunc)):
        return _date_trunc(node, resolve)
    if isinstance(node, exp.Extract):
        return _extract(node, resolve)
    if isinstance(node, exp.Case):
        return _case(node, resolve)
    if isinstance(node, exp.WidthBucket):
        return _width_bucket(node, resolve)
    parts = _floor_parts(node)
    if parts is not None:
        return _floor(*parts, resolve)
    raise refused("this expression is not a group key", BUCKET_HINT)


def _date_column(node: exp.Expression, resolve: ColumnResolver, function: str) -> str:
    target = unparen(node)
    if not isinstance(target, exp.Column):
        raise refused(f"{function} accepts a date column", f"write {function}(..., <date column>)")
    name, column = resolve(target)
    if column.kind != "date":
        raise HushError(UNDEFINED_FUNCTION, f"{function}() takes a date column; {name} is not a date",
                        f"write {function} over a date column")
    return name


def _unit_name(unit: exp.Expression | None) -> str:
    if isinstance(unit, exp.Literal) and unit.is_string:
        return unit.this.lower()
    return unit.name.lower() if isinstance(unit, exp.Var) else ""


def _date_trunc(node: exp.Expression, resolve: ColumnResolver) -> tuple[GroupKey, str, str]:
    only_args(node, ("this", "unit", "input_type_preserved"), "date_trunc()",
              "write date_trunc('month', <date column>)")
    unit = _unit_name(node.args.get("unit"))
    if unit not in TRUNC_UNITS:
        raise refused(f"date_trunc unit {unit or '?'!r} is not accepted",
                      "date_trunc takes one of " + ", ".join(TRUNC_UNITS))
    name = _date_column(node.this, resolve, "date_trunc")
    return GroupKey(name, "date_trunc", unit=unit), name, "date_trunc"


def _extract(node: exp.Extract, resolve: ColumnResolver) -> tuple[GroupKey, str, str]:
    only_args(node, ("this", "expression"), "extract()", "write extract(month FROM <date column>)")
    field = _unit_name(node.this)
    if field not in EXTRACT_FIELDS:
        raise refused(f"extract field {field or '?'!r} is not accepted in GROUP BY",
                      "extract takes one of " + ", ".join(EXTRACT_FIELDS) + " from a date")
    name = _date_column(node.expression, resolve, "extract")
    return GroupKey(name, "extract", unit=field), name, "extract"


def _numeric_argument(node: exp.Expression, function: str, hint: str) -> Decimal:
    checked = literal(unparen(node))
    if checked is None or checked.type != "number":
        raise refused(f"{function} takes numeric literals as its bounds and sizes", hint)
    text = checked.node.this if isinstance(checked.node, exp.Literal) else checked.node.this.this
    value = Decimal(text)
    return -value if isinstance(checked.node, exp.Neg) else value


def _summable_column(node: exp.Expression, resolve: ColumnResolver, function: str,
                     hint: str) -> tuple[str, ColumnPolicy]:
    target = unparen(node)
    if not isinstance(target, exp.Column):
        raise refused(f"{function} accepts a column as its first argument", hint)
    name, column = resolve(target)
    if column.kind not in ("integer", "number"):
        raise HushError(UNDEFINED_FUNCTION, f"{function} takes an integer or number column; "
                        f"{name} is not one", hint)
    return name, column


def _width_bucket(node: exp.WidthBucket, resolve: ColumnResolver) -> tuple[GroupKey, str, str]:
    hint = "write width_bucket(<number column>, <low>, <high>, <count>) with numeric literals"
    only_args(node, ("this", "min_value", "max_value", "num_buckets"), "width_bucket()", hint)
    if any(node.args.get(a) is None for a in ("min_value", "max_value", "num_buckets")):
        raise refused("width_bucket takes four arguments", hint)
    name, _ = _summable_column(node.this, resolve, "width_bucket", hint)
    low, high, count = (_numeric_argument(node.args[a], "width_bucket", hint)
                        for a in ("min_value", "max_value", "num_buckets"))
    if low == high:
        raise refused("width_bucket's lower bound equals its upper bound (PostgreSQL would fail)", hint)
    if count != count.to_integral_value() or count < 1:
        raise refused("width_bucket's count must be a positive integer (PostgreSQL would fail)", hint)
    return GroupKey(name, "width_bucket", arguments=(low, high, count)), name, "width_bucket"


def _floor_parts(node: exp.Expression) -> tuple[exp.Expression, exp.Expression, exp.Expression] | None:
    """(column, divisor, multiplier) of floor(x / w) * w written either way round, else None."""
    node = unparen(node)
    if not isinstance(node, exp.Mul):
        return None
    for floor, factor in ((unparen(node.this), node.expression), (unparen(node.expression), node.this)):
        if isinstance(floor, exp.Floor) and not floor.args.get("decimals"):
            ratio = unparen(floor.this)
            if isinstance(ratio, exp.Div):
                return ratio.this, ratio.expression, factor
    return None


def _floor(target: exp.Expression, divisor: exp.Expression, factor: exp.Expression,
           resolve: ColumnResolver) -> tuple[GroupKey, str, str]:
    hint = "write floor(<number column> / w) * w with the same positive numeric literal w twice"
    name, _ = _summable_column(target, resolve, "floor(x / w) * w", hint)
    width = _numeric_argument(divisor, "floor(x / w) * w", hint)
    again = _numeric_argument(factor, "floor(x / w) * w", hint)
    if width <= 0 or width != again or str(width) != str(again):
        raise refused("floor(x / w) * w needs the same positive literal w in both places", hint)
    return GroupKey(name, "floor", arguments=(width,)), name, "?column?"


def _case(node: exp.Case, resolve: ColumnResolver) -> tuple[GroupKey, str, str]:
    hint = ("write CASE WHEN <condition on one column> THEN <literal> ... [ELSE <literal>] END, "
            "e.g. CASE WHEN occupants <= 2 THEN 'small' ELSE 'large' END")
    only_args(node, ("this", "ifs", "default"), "CASE", hint)
    columns: set[str] = set()

    def one_column(ref: exp.Column) -> tuple[str, ColumnPolicy]:
        name, column = resolve(ref)
        columns.add(name)
        if len(columns) > 1:
            raise refused("a CASE group key may read one column only", hint)
        return name, column

    subject = node.args.get("this")
    if len(node.args.get("ifs") or []) > MOST_CASE_BRANCHES:
        raise refused(f"a CASE group key may have at most {MOST_CASE_BRANCHES} WHEN branches "
                      "(each is evaluated on every row)", "use width_bucket or floor(x / w) * w "
                      "for many equal ranges, or fewer branches")
    branches: list[exp.Expression] = []
    results: list[exp.Expression | None] = []
    for branch in node.args.get("ifs") or []:
        only_args(branch, ("this", "true"), "CASE WHEN", hint)
        condition = branch.this if subject is None else exp.EQ(this=subject.copy(), expression=branch.this.copy())
        branches.append(check_filter(condition, one_column))
        results.append(branch.args.get("true"))
    results.append(node.args.get("default"))
    if not columns:
        raise refused("a CASE group key must read a column", hint)
    labels: list[Label] = []
    choices: list[int] = []
    for result in results:
        label = _label(result, hint)
        try:
            choices.append(_index(labels, label))
        except ValueError:
            labels.append(label)
            choices.append(len(labels) - 1)
    kinds = {type(label) for label in labels if label is not None}
    if len(kinds) > 1:
        raise HushError(DATATYPE_MISMATCH, "CASE types do not match: its results mix text, "
                        "numbers or booleans", hint)
    (name,) = columns
    return GroupKey(name, "case", branches=tuple(branches), labels=tuple(labels),
                    choices=tuple(choices)), name, "case"


def _index(labels: list[Label], label: Label) -> int:
    """Position of ``label`` (1 and TRUE are distinct labels, though Python says 1 == True)."""
    for i, other in enumerate(labels):
        if type(other) is type(label) and other == label:
            return i
    raise ValueError(label)


def _label(result: exp.Expression | None, hint: str) -> Label:
    if result is None:
        return None
    checked = literal(unparen(result))
    if checked is None:
        raise refused("CASE results in a group key must be literals", hint)
    if checked.type in ("string",):
        return checked.string
    if checked.type == "null":
        return None
    if checked.type == "boolean":
        return bool(checked.node.this)
    if checked.type == "number":
        node = checked.node
        value = Decimal(node.this.this if isinstance(node, exp.Neg) else node.this)
        return -value if isinstance(node, exp.Neg) else value
    raise refused("CASE results in a group key must be text, numbers or booleans", hint)


# ---- narrowing by the WHERE --------------------------------------------------------------------

def narrowings(condition: exp.Expression | None, table: TablePolicy) -> dict[str, Narrowing]:
    """What the WHERE's top-level conjuncts say about each column (see the module rules).

    ``condition`` is a WHERE already checked and rebuilt by ``proxy.sql.filters``.
    """
    found: dict[str, Narrowing] = {}
    for conjunct in _conjuncts(condition):
        read = _narrowing(conjunct, table)
        if read is not None:
            name, narrowing = read
            found[name] = _both(found[name], narrowing) if name in found else narrowing
    return found


def _conjuncts(condition: exp.Expression | None) -> list[exp.Expression]:
    if condition is None:
        return []
    pending, found = [condition], []
    while pending:
        node = unparen(pending.pop())
        if isinstance(node, exp.And):
            pending += chain_operands(node)
        else:
            found.append(node)
    return found


def _both(a: Narrowing, b: Narrowing) -> Narrowing:
    low = b.low if a.low is None else a.low if b.low is None else max(a.low, b.low)  # type: ignore[type-var]
    high = b.high if a.high is None else a.high if b.high is None else min(a.high, b.high)  # type: ignore[type-var]
    values = b.values if a.values is None else a.values if b.values is None else a.values & b.values
    return Narrowing(low, high, values)


def _column_of(node: exp.Expression, table: TablePolicy) -> tuple[str, ColumnPolicy] | None:
    node = unparen(node)
    if isinstance(node, exp.Column) and node.name in table.columns:
        return node.name, table.columns[node.name]
    return None


def _narrowing(node: exp.Expression, table: TablePolicy) -> tuple[str, Narrowing] | None:
    target = _column_of(node, table)
    if target is not None and target[1].kind == "boolean":
        return target[0], Narrowing(values=frozenset({True}))
    if isinstance(node, exp.Not):
        inner = _column_of(node.this, table)
        if inner is not None and inner[1].kind == "boolean":
            return inner[0], Narrowing(values=frozenset({False}))
        return None
    if isinstance(node, _COMPARISONS):
        kind = type(node)
        side = _column_of(node.this, table)
        other = node.expression
        if side is None:
            side, other, kind = _column_of(node.expression, table), node.this, _MIRRORED[kind]
        if side is None:
            return None
        value = _value(other, side[1])
        if value is None:
            return None
        return side[0], _compare(kind, value, side[1])
    if isinstance(node, exp.Between) and not node.args.get("symmetric"):
        side = _column_of(node.this, table)
        if side is None:
            return None
        low, high = _value(node.args["low"], side[1]), _value(node.args["high"], side[1])
        if low is None or high is None:
            return None
        return side[0], _both(_compare(exp.GTE, low, side[1]), _compare(exp.LTE, high, side[1]))
    if isinstance(node, exp.In) and not node.args.get("query"):
        side = _column_of(node.this, table)
        if side is None:
            return None
        values = [_value(item, side[1]) for item in node.expressions]
        if any(v is None for v in values):
            return None
        return side[0], _equal_to(values, side[1])
    return None


def _value(node: exp.Expression, column: ColumnPolicy) -> object | None:
    """A literal read in the column's terms (Fraction for numbers, date, str, bool), else None."""
    checked: Typed | None = literal(unparen(node))
    if checked is None or checked.type == "null":
        return None
    if column.kind in ("integer", "number") and checked.type == "number":
        built = checked.node
        text = built.this.this if isinstance(built, exp.Neg) else built.this
        return -Fraction(Decimal(text)) if isinstance(built, exp.Neg) else Fraction(Decimal(text))
    if column.kind == "date":
        if checked.type == "string":
            return iso_date(checked.string or "")
        if checked.type == "date":
            return dt.date.fromisoformat(checked.node.this.this)
    if column.kind == "category" and checked.type == "string":
        return checked.string
    if column.kind == "boolean" and checked.type == "boolean":
        return bool(checked.node.this)
    return None


def _compare(kind: type, value: object, column: ColumnPolicy) -> Narrowing:
    """The narrowing of ``column <kind> value``."""
    if kind is exp.EQ:
        return _equal_to([value], column)
    if column.kind in ("category", "boolean"):
        return Narrowing()  # text order depends on the collation: narrow by equality only
    if column.kind == "integer":
        number = value  # a Fraction
        bound = {exp.LT: math.ceil(number) - 1, exp.LTE: math.floor(number),  # type: ignore[arg-type]
                 exp.GT: math.floor(number) + 1, exp.GTE: math.ceil(number)}[kind]  # type: ignore[arg-type]
    elif column.kind == "date":
        day: dt.date = value  # type: ignore[assignment]
        try:
            bound = {exp.LT: lambda: day - dt.timedelta(days=1), exp.LTE: lambda: day,
                     exp.GT: lambda: day + dt.timedelta(days=1), exp.GTE: lambda: day}[kind]()
        except OverflowError:  # before 0001-01-01 or after 9999-12-31: no date qualifies
            return Narrowing(low=dt.date.max, high=dt.date.min)
    else:
        bound = value  # number columns: strict bounds kept inclusive (a superset is sound)
    if kind in (exp.LT, exp.LTE):
        return Narrowing(high=bound)
    return Narrowing(low=bound)


def _equal_to(values: list[object], column: ColumnPolicy) -> Narrowing:
    if column.kind == "integer":
        return Narrowing(values=frozenset(int(v) for v in values  # type: ignore[arg-type, call-overload]
                                          if v.denominator == 1))  # type: ignore[attr-defined]
    if column.kind == "number":
        return Narrowing(low=min(values), high=max(values))  # type: ignore[type-var]
    return Narrowing(values=frozenset(values))


# ---- the per-row expression --------------------------------------------------------------------

def key_expression(key: GroupKey, column: ColumnPolicy, *, ordinals: bool) -> exp.Expression:
    """The bucket of one row, as backend SQL: ``CASE WHEN <column in its declared domain> THEN
    <bucket> END``, so that rows outside the domain (NULL, NaN, out of range) give NULL and no
    bucket function ever sees a value it could fail on. With ``ordinals`` a CASE key gives the
    index of its label (matched to the label list's ordinals), else the label itself.

    Must hold: ``key.form`` is not "column".
    """
    value = column_node(key.column)
    if key.form == "date_trunc":
        stamp = exp.cast(value, "timestamp", copy=False)  # without time zone: no DST midnights
        bucket: exp.Expression = exp.cast(exp.Anonymous(this="date_trunc", expressions=[
            exp.Literal.string(key.unit), stamp]), "date", copy=False)
    elif key.form == "extract":
        bucket = exp.Extract(this=exp.var(key.unit.upper()), expression=value)  # type: ignore[union-attr]
    elif key.form == "width_bucket":
        low, high, count = key.arguments
        bucket = exp.Anonymous(this="width_bucket", expressions=[
            exp.cast(value, "numeric", copy=False), number_node(low), number_node(high),
            number_node(count)])
    elif key.form == "floor":
        width = key.arguments[0]
        numerator = value if integer_division(column, key) else exp.cast(value, "numeric", copy=False)
        bucket = exp.Mul(this=exp.Anonymous(this="floor", expressions=[
            exp.Div(this=numerator, expression=number_node(width), typed=True)]),
            expression=number_node(width))
    elif key.form == "case":
        results = [number_node(choice) if ordinals else value_node(key.labels[choice])
                   for choice in key.choices]
        bucket = exp.Case(ifs=[exp.If(this=branch.copy(), true=result)
                               for branch, result in zip(key.branches, results)],
                          default=results[-1])
    else:
        raise ValueError(f"a {key.form} key is the column itself")
    return exp.Case(ifs=[exp.If(this=inside_domain(key.column, column), true=bucket)])


def inside_domain(name: str, column: ColumnPolicy) -> exp.Expression:
    """True exactly for values in the column's declared domain (NULL and NaN are outside)."""
    if column.kind == "category":
        return exp.In(this=column_node(name), expressions=[exp.Literal.string(v) for v in column.values or []])
    if column.kind == "boolean":
        return exp.Not(this=exp.Is(this=column_node(name), expression=exp.Null()))
    if column.kind == "date":
        start, end = date_range(column)
        return exp.Between(this=column_node(name), low=date_node(start.isoformat()),
                           high=date_node(end.isoformat()))
    return exp.Between(this=column_node(name), low=number_node(column.low), high=number_node(column.high))


# ---- buckets in WHERE --------------------------------------------------------------------------

_WHERE_FORMS = (exp.TimestampTrunc, exp.DateTrunc, exp.WidthBucket, exp.Case)
_FAMILY = SQL_FAMILY


def bucket_reader(table: TablePolicy, resolve: ColumnResolver) -> BucketReader:
    """A reader of bucket expressions inside a WHERE (see ``filters.check_filter``): the guarded
    bucket, typed, for date_trunc, CASE, width_bucket and floor(x / w) * w; None otherwise
    (extract stays with the filter checker, which accepts it on any date)."""
    def read(node: exp.Expression) -> Typed | None:
        if not isinstance(node, _WHERE_FORMS) and _floor_parts(node) is None:
            return None
        key, name, _ = read_key(node, resolve)
        assert key is not None  # only column keys can lack a domain
        column = table.columns[name]
        built = key_expression(key, column, ordinals=False)
        family = _FAMILY[key_type(column, key)]
        if family == "number":
            # |bucket| is at most the count + 1, or the column's bound plus one width.
            largest = (key.arguments[2] + 1 if key.form == "width_bucket" else
                       max(abs(Decimal(column.low)), abs(Decimal(column.high))) + key.arguments[0]
                       if key.form == "floor" else
                       max((abs(label) for label in key.labels if isinstance(label, Decimal)),
                           default=Decimal(0)))
            digits = max(1, largest.adjusted() + 1) if largest else 1
            # Met by another non-literal number, a bucket compares and computes as NUMERIC:
            # floor over integers is double precision, which a NUMERIC operand would overflow.
            return Typed(built, family, digits=digits,
                         as_numeric=lambda: exp.cast(built.copy(), "numeric", copy=False),
                         as_bounded=lambda: exp.cast(built.copy(), "numeric", copy=False))
        return Typed(built, family)
    return read


# ---- restrictions of bucket keys by the WHERE ----------------------------------------------------

def restrictions(where: exp.Expression | None, resolve: ColumnResolver) -> dict[GroupKey, Narrowing]:
    """The WHERE literals on each bucket expression of its top-level AND, by the key (without
    ``within``) the expression names. ``where`` is the analyst's WHERE, already accepted by
    ``filters.check_filter`` (so every conjunct is a valid condition)."""
    found: dict[GroupKey, Narrowing] = {}
    for conjunct in _conjuncts(where):
        read = _restriction(conjunct, resolve)
        if read is not None:
            key, narrowing = read
            found[key] = _both_open(found[key], narrowing) if key in found else narrowing
    return found


def _restriction(node: exp.Expression, resolve: ColumnResolver) -> tuple[GroupKey, Narrowing] | None:
    if isinstance(node, _COMPARISONS):
        kind, side, other = type(node), unparen(node.this), node.expression
        if not _is_bucket(side):
            kind, side, other = _MIRRORED[kind], unparen(node.expression), node.this
        key = _bucket_key(side, resolve)
        value = _bucket_value(other, key)
        if key is None or value is None:
            return None
        if isinstance(value, str) and kind is not exp.EQ:
            return None  # text order depends on the collation
        return key, {exp.EQ: Narrowing(values=frozenset({value})),
                     exp.LT: Narrowing(high=value, high_open=True), exp.LTE: Narrowing(high=value),
                     exp.GT: Narrowing(low=value, low_open=True), exp.GTE: Narrowing(low=value)}[kind]
    if isinstance(node, exp.Between) and not node.args.get("symmetric"):
        key = _bucket_key(unparen(node.this), resolve)
        low, high = (_bucket_value(node.args[a], key) for a in ("low", "high"))
        if key is None or low is None or high is None or isinstance(low, str) or isinstance(high, str):
            return None
        return key, Narrowing(low=low, high=high)
    if isinstance(node, exp.In) and not node.args.get("query"):
        key = _bucket_key(unparen(node.this), resolve)
        values = [_bucket_value(item, key) for item in node.expressions]
        if key is None or any(v is None for v in values):
            return None
        return key, Narrowing(values=frozenset(values))
    return None


def _is_bucket(node: exp.Expression) -> bool:
    return is_key_expression(node) and not isinstance(node, exp.Column)


def _bucket_key(node: exp.Expression, resolve: ColumnResolver) -> GroupKey | None:
    if not _is_bucket(node):
        return None
    try:
        key, _, _ = read_key(node, resolve)
    except HushError:  # accepted in WHERE but not a key (extract(epoch ...)): restricts nothing
        return None
    return key


def _bucket_value(node: exp.Expression, key: GroupKey | None) -> object | None:
    """A literal in the terms of the key's values (Fraction, date, str, bool), else None."""
    checked = literal(unparen(node))
    if key is None or checked is None or checked.type == "null":
        return None
    if checked.type == "number":
        built = checked.node
        text = built.this.this if isinstance(built, exp.Neg) else built.this
        return -Fraction(Decimal(text)) if isinstance(built, exp.Neg) else Fraction(Decimal(text))
    if key.form == "date_trunc":
        if checked.type == "date":
            return dt.date.fromisoformat(checked.node.this.this)
        return iso_date(checked.string or "") if checked.type == "string" else None
    if checked.type == "string" and key.form == "case":
        return checked.string
    if checked.type == "boolean" and key.form == "case":
        return bool(checked.node.this)
    return None


def _both_open(a: Narrowing, b: Narrowing) -> Narrowing:
    """Both restrictions at once, keeping which bounds are strict."""
    low, low_open = a.low, a.low_open
    if b.low is not None and (low is None or b.low > low or (b.low == low and b.low_open)):  # type: ignore[operator]
        low, low_open = b.low, b.low_open
    high, high_open = a.high, a.high_open
    if b.high is not None and (high is None or b.high < high or (b.high == high and b.high_open)):  # type: ignore[operator]
        high, high_open = b.high, b.high_open
    values = b.values if a.values is None else a.values if b.values is None else a.values & b.values
    return Narrowing(low, high, values, low_open, high_open)
