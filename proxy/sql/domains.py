"""Key domains: the fixed list of values each GROUP BY key ranges over.

Rules of this module:
- An answer has one row per combination of key values whatever the data holds, so which cells
  exist never depends on the data: a key's values come from the column's declared domain (its
  values or range), narrowed by the WHERE literals on that column (``Narrowing``), and from the
  key expression as written (a date_trunc unit, an extract field, CASE labels, width_bucket or
  floor arguments). Nothing here reads data.
- A bucket key (every form but a plain column) counts only rows whose column lies inside its
  declared domain, the same rows a plain GROUP BY on the column counts (``proxy.sql.rewrite``
  guards the expression). So its values are the images of the declared values: exactly, or a
  superset where listing them exactly would cost more than it saves (an empty cell is only noise).
- Sizes are counted arithmetically wherever a domain can be large, so a policy with a huge range
  costs nothing until the cell limit refuses it.
- Date units and fields follow PostgreSQL 15 (date_trunc weeks start on Monday; a century starts
  in a year ending in 01; extract's week and isoyear are ISO 8601's; dow counts Sunday as 0).
"""

from __future__ import annotations

import datetime as dt
import math
from decimal import Decimal
from fractions import Fraction
from typing import Any, Callable, Iterable, Sequence

from proxy.answer import ColumnType
from proxy.policy import ColumnPolicy, date_range
from proxy.sql.plan import GroupKey, Narrowing
from proxy.sql.vocabulary import column_types

# date_trunc units accepted on a date column, and the bucket each one gives on a date: units
# below a day truncate a date's midnight to itself.
TRUNC_UNITS: dict[str, str] = {
    "microseconds": "day", "milliseconds": "day", "second": "day", "minute": "day",
    "hour": "day", "day": "day", "week": "week", "month": "month", "quarter": "quarter",
    "year": "year", "decade": "decade", "century": "century", "millennium": "millennium"}
_MONTHS_PER_BUCKET = {"month": 1, "quarter": 3, "year": 12, "decade": 120, "century": 1200,
                      "millennium": 12000}

# extract / date_part fields accepted on a date column, as functions of a date.
EXTRACT_FIELDS: dict[str, Callable[[dt.date], int]] = {
    "year": lambda d: d.year,
    "quarter": lambda d: (d.month - 1) // 3 + 1,
    "month": lambda d: d.month,
    "week": lambda d: d.isocalendar()[1],
    "day": lambda d: d.day,
    "dow": lambda d: d.isoweekday() % 7,
    "isodow": lambda d: d.isoweekday(),
    "doy": lambda d: d.timetuple().tm_yday,
    "isoyear": lambda d: d.isocalendar()[0],
    "decade": lambda d: d.year // 10,
    "century": lambda d: (d.year + 99) // 100,
    "millennium": lambda d: (d.year + 999) // 1000,
}
# Fields that never decrease as the date grows: their values over a span are all integers
# between the values at its ends. The others cycle through these full sets.
_MONOTONE_FIELDS = frozenset({"year", "isoyear", "decade", "century", "millennium"})
_CYCLES = {"quarter": range(1, 5), "month": range(1, 13), "week": range(1, 54),
           "day": range(1, 32), "dow": range(0, 7), "isodow": range(1, 8), "doy": range(1, 367)}
# Spans up to this many days are walked day by day; a longer one covers whole leap years (at
# most 8 years apart), so every cyclic value occurs in it.
_WALKED_DAYS = 4000
# Integer ranges up to this many values are walked value by value for width_bucket and floor.
_WALKED_INTEGERS = 10_000
# Key domains up to this many values are filtered by the WHERE literals on the key itself.
_WALKED_RESTRICTED = 100_000


class EmptyBucket(ValueError):
    """A bucket that PostgreSQL can compute but Python's dates cannot name (before year 1)."""


def key_values(column: ColumnPolicy, key: GroupKey) -> Sequence[Any]:
    """The values of ``key``, in answer order (declared order, ascending, or CASE order); a
    ``range`` for a plain integer column. Must hold: analysis built the key for this column."""
    if not _restricted(column, key):
        return _values_within(column, key)
    return [v for v in _values_within(column, key) if _allowed(v, key.among)]  # type: ignore[arg-type]


def _restricted(column: ColumnPolicy, key: GroupKey) -> bool:
    """Whether ``key.among`` is applied: only to domains small enough to walk (a larger one
    keeps all its values, a sound superset)."""
    return key.among is not None and _size_within(column, key) <= _WALKED_RESTRICTED


def _allowed(value: Any, among: Narrowing) -> bool:
    """Whether a key value meets the WHERE's literals on the key (NULL meets none of them)."""
    if value is None:
        return False
    if among.values is not None and not any(
            type(value) is type(v) and value == v or _numbers(value, v) and value == v
            for v in among.values):
        return False
    try:
        above = among.low is None or (value > among.low if among.low_open else value >= among.low)
        below = among.high is None or (value < among.high if among.high_open else value <= among.high)
    except TypeError:  # a bound of another type than the key's values: keep the value
        return True
    return above and below


def _numbers(a: Any, b: Any) -> bool:
    return all(isinstance(x, (int, Decimal, Fraction)) and not isinstance(x, bool) for x in (a, b))


def _values_within(column: ColumnPolicy, key: GroupKey) -> Sequence[Any]:
    """The key's values over its column's declared domain narrowed by ``within``."""
    form = key.form
    if form == "case":
        return list(key.labels)
    if form == "column":
        values = _column_values(column, key.within)
        return values if isinstance(values, range) else list(values)
    if column.kind == "date":
        days = _date_scope(column, key.within)
        if form == "date_trunc":
            unit = TRUNC_UNITS[key.unit]  # type: ignore[index]
            if isinstance(days, list):
                return sorted({bucket_start(d, unit) for d in days})
            return list(_date_buckets(days[0], days[1], unit)) if days else []
        return _extract_values(key.unit, days)  # type: ignore[arg-type]
    low, high = _number_span(column, key.within)
    if low > high:
        return []
    if column.kind == "integer" and high - low < _WALKED_INTEGERS:
        # Few enough integers to walk: the exact images (a wide bucket skips none, but a
        # narrow one over few integers would leave empty cells between them).
        values = key.within.values if key.within is not None and key.within.values is not None \
            else range(int(low), int(high) + 1)
        return sorted({bucket_of(column, key, v) for v in values if low <= v <= high})  # type: ignore[operator]
    first, last = bucket_of(column, key, low), bucket_of(column, key, high)
    if form == "width_bucket":
        return list(range(min(first, last), max(first, last) + 1))
    width = key.arguments[0]
    count = int((Fraction(last) - Fraction(first)) / Fraction(width)) + 1
    return [first + width * i for i in range(count)]


def key_size(column: ColumnPolicy, key: GroupKey) -> int:
    """len(key_values(...)), counted without listing the values where a domain can be large."""
    if _restricted(column, key):
        return len(key_values(column, key))
    return _size_within(column, key)


def _size_within(column: ColumnPolicy, key: GroupKey) -> int:
    if key.form == "case":
        return len(key.labels)
    if key.form == "column" and column.kind == "integer" and (
            key.within is None or key.within.values is None):
        low, high = _integer_span(column, key.within)
        return max(0, high - low + 1)
    if key.form in ("column", "date_trunc") and column.kind == "date":
        days = _date_scope(column, key.within)
        if isinstance(days, list) or not days:
            return len(_values_within(column, key))
        unit = "day" if key.form == "column" else TRUNC_UNITS[key.unit]  # type: ignore[index]
        return _date_bucket_count(days[0], days[1], unit)
    if key.form in ("width_bucket", "floor"):
        low, high = _number_span(column, key.within)
        if low > high:
            return 0
        if column.kind == "integer" and high - low < _WALKED_INTEGERS:
            return len(_values_within(column, key))
        first, last = (Fraction(bucket_of(column, key, v)) for v in (low, high))
        step = Fraction(1) if key.form == "width_bucket" else Fraction(key.arguments[0])
        return int(abs(last - first) / step) + 1
    return len(_values_within(column, key))


def cell_count(sizes: Sequence[int]) -> int:
    """Number of cells of a GROUP BY over keys with these domain sizes (1 with no keys)."""
    return math.prod(sizes)


def key_type(column: ColumnPolicy, key: GroupKey) -> ColumnType:
    """The PostgreSQL type of the key's values, as PostgreSQL types the expression written."""
    if key.form == "column":
        return column_types(column).sql  # type: ignore[return-value]
    if key.form == "date_trunc":
        return "date"  # PostgreSQL says timestamp; the proxy answers the date it stands for
    if key.form == "extract":
        return "numeric"
    if key.form == "width_bucket":
        return "integer"
    if key.form == "floor":
        return "double precision" if integer_division(column, key) else "numeric"
    labels = [label for label in key.labels if label is not None]
    if labels and all(isinstance(label, bool) for label in labels):
        return "boolean"
    if labels and all(isinstance(label, Decimal) for label in labels):
        return "integer" if all(label == label.to_integral_value() and "." not in str(label)
                                for label in labels) else "numeric"  # type: ignore[union-attr]
    return "text"


def integer_division(column: ColumnPolicy, key: GroupKey) -> bool:
    """Whether ``floor(column / width)`` divides integers (PostgreSQL truncates toward zero)."""
    width = key.arguments[0]
    return column.kind == "integer" and width == width.to_integral_value() and "." not in str(width)


def bucket_of(column: ColumnPolicy, key: GroupKey, value: Any) -> Any:
    """The bucket a declared value of the column falls in, as PostgreSQL computes it."""
    if key.form == "width_bucket":
        low, high, count = (Fraction(a) for a in key.arguments)
        return width_bucket(Fraction(value), low, high, int(count))
    width = key.arguments[0]
    quotient = Fraction(value) / Fraction(width)
    if integer_division(column, key):
        whole = math.trunc(quotient)
        return whole * int(width)
    return Decimal(math.floor(quotient)) * width


def width_bucket(value: Fraction, low: Fraction, high: Fraction, count: int) -> int:
    """PostgreSQL's width_bucket(value, low, high, count), exactly (low != high, count > 0)."""
    if low < high:
        if value < low:
            return 0
        if value >= high:
            return count + 1
        return math.floor((value - low) * count / (high - low)) + 1
    if value > low:
        return 0
    if value <= high:
        return count + 1
    return math.floor((low - value) * count / (low - high)) + 1


def bucket_start(day: dt.date, unit: str) -> dt.date:
    """The first day of the date_trunc bucket holding ``day`` (``unit`` as in TRUNC_UNITS' values)."""
    if unit == "day":
        return day
    if unit == "week":
        return day - dt.timedelta(days=day.weekday())
    if unit == "month":
        return day.replace(day=1)
    if unit == "quarter":
        return dt.date(day.year, 3 * ((day.month - 1) // 3) + 1, 1)
    year = {"year": day.year, "decade": day.year // 10 * 10,
            "century": (day.year - 1) // 100 * 100 + 1,
            "millennium": (day.year - 1) // 1000 * 1000 + 1}.get(unit)
    if year is None:
        raise ValueError(f"unknown bucket {unit!r}")
    if year < 1:
        raise EmptyBucket(f"the {unit} of {day} starts before year 1")
    return dt.date(year, 1, 1)


# ---- plain columns -----------------------------------------------------------------------------

def _column_values(column: ColumnPolicy, within: Narrowing | None) -> Iterable[Any]:
    allowed = within.values if within is not None else None
    if column.kind == "category":
        return [v for v in column.values or [] if allowed is None or v in allowed]
    if column.kind == "boolean":
        return [v for v in (False, True) if allowed is None or v in allowed]
    if column.kind == "integer":
        low, high = _integer_span(column, within)
        if allowed is not None:
            return sorted(v for v in allowed if low <= v <= high)  # type: ignore[operator]
        return range(low, high + 1)
    if column.kind == "date":
        days = _date_scope(column, within)
        if isinstance(days, list):
            return days
        return _date_buckets(days[0], days[1], "day") if days else []
    raise ValueError(f"a {column.kind} column has no domain")


def _integer_span(column: ColumnPolicy, within: Narrowing | None) -> tuple[int, int]:
    low, high = (int(v) for v in column.range)  # type: ignore[union-attr]
    if within is not None:
        low = max(low, within.low) if within.low is not None else low  # type: ignore[call-overload]
        high = min(high, within.high) if within.high is not None else high  # type: ignore[call-overload]
    return low, high


def _number_span(column: ColumnPolicy, within: Narrowing | None) -> tuple[Fraction, Fraction]:
    """The declared range of an integer or number column narrowed by WHERE (values ignored:
    the bucket functions are monotone, so the span's ends bound every bucket)."""
    low, high = (Fraction(v) for v in column.range)  # type: ignore[union-attr]
    if within is not None:
        if within.low is not None:
            low = max(low, Fraction(within.low))  # type: ignore[arg-type]
        if within.high is not None:
            high = min(high, Fraction(within.high))  # type: ignore[arg-type]
        if within.values is not None:
            inside = [Fraction(v) for v in within.values if low <= Fraction(v) <= high]  # type: ignore[arg-type]
            return (min(inside), max(inside)) if inside else (Fraction(1), Fraction(0))
    return low, high


# ---- dates -------------------------------------------------------------------------------------

def _date_scope(column: ColumnPolicy,
                within: Narrowing | None) -> list[dt.date] | tuple[dt.date, dt.date] | None:
    """The dates a key may see: a sorted list when WHERE names them, else a span (None: empty)."""
    start, end = date_range(column)
    if within is not None:
        start = max(start, within.low) if within.low is not None else start  # type: ignore[type-var]
        end = min(end, within.high) if within.high is not None else end  # type: ignore[type-var]
        if within.values is not None:
            return sorted(d for d in within.values if start <= d <= end)  # type: ignore[operator]
    return (start, end) if start <= end else None


def _date_bucket_count(start: dt.date, end: dt.date, unit: str) -> int:
    first, last = bucket_start(start, unit), bucket_start(end, unit)
    if unit in ("day", "week"):
        return (last - first).days // (1 if unit == "day" else 7) + 1
    months = (last.year * 12 + last.month) - (first.year * 12 + first.month)
    return months // _MONTHS_PER_BUCKET[unit] + 1


def _date_buckets(start: dt.date, end: dt.date, unit: str):
    current = bucket_start(start, unit)
    while current <= end:
        yield current
        try:
            current = _next_bucket(current, unit)
        except (OverflowError, ValueError):  # past 9999-12-31: no later bucket exists
            return


def _next_bucket(day: dt.date, unit: str) -> dt.date:
    if unit == "day":
        return day + dt.timedelta(days=1)
    if unit == "week":
        return day + dt.timedelta(days=7)
    index = day.year * 12 + (day.month - 1) + _MONTHS_PER_BUCKET[unit]
    return dt.date(index // 12, index % 12 + 1, 1)


def _extract_values(field: str, days: list[dt.date] | tuple[dt.date, dt.date] | None) -> list[int]:
    """The values of an extract field over the key's dates, ascending."""
    function = EXTRACT_FIELDS[field]
    if days is None:
        return []
    if isinstance(days, list):
        return sorted({function(d) for d in days})
    start, end = days
    if field in _MONOTONE_FIELDS:
        return list(range(function(start), function(end) + 1))
    if (end - start).days <= _WALKED_DAYS:
        return sorted({function(start + dt.timedelta(days=n)) for n in range((end - start).days + 1)})
    if field == "week" and not any(dt.date(year, 12, 28).isocalendar()[1] == 53
                                   for year in range(start.year, end.year + 1)):
        return list(range(1, 53))
    return list(_CYCLES[field])


# ---- description (EXPLAIN) ---------------------------------------------------------------------

def key_label(key: GroupKey) -> str:
    """The key as the analyst wrote it, in PostgreSQL's words."""
    name = key.column
    if key.form == "date_trunc":
        return f"date_trunc('{key.unit}', {name})"
    if key.form == "extract":
        return f"extract({key.unit} FROM {name})"
    if key.form == "width_bucket":
        return "width_bucket(" + ", ".join([name, *(str(a) for a in key.arguments)]) + ")"
    if key.form == "floor":
        return f"floor({name} / {key.arguments[0]}) * {key.arguments[0]}"
    if key.form == "case":
        return f"CASE over {name}"
    return name


def describe_key(column: ColumnPolicy, key: GroupKey) -> str:
    """How many cells a key has and which, and whether the WHERE narrowed them."""
    size = key_size(column, key)
    narrowed = ", narrowed by WHERE" if (key.within is not None and key.form != "case") \
        or _restricted(column, key) else ""
    if size == 0:
        return f"no values{narrowed}"
    values = key_values(column, key) if size <= 100_000 else None
    if values is None:
        return f"{size:,} values{narrowed}"
    shown = [_shown(v) for v in (values if size <= 5 else [values[0], values[-1]])]
    listed = ", ".join(shown) if size <= 5 else f"{shown[0]} .. {shown[1]}"
    return f"{size:,} value{'s' if size != 1 else ''}: {listed}{narrowed}"


def _shown(value: Any) -> str:
    return "NULL" if value is None else repr(value) if isinstance(value, str) else str(value)
