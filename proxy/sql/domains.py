"""Declared group domains: the fixed list of values each GROUP BY key ranges over.

An answer has one row per combination of these values whatever the data holds, so which cells
exist never depends on the data. Pure functions over policies.
"""

from __future__ import annotations

import datetime as dt
import math
from typing import Any, Sequence

from proxy.policy import ColumnPolicy, date_range


def domain_values(column: ColumnPolicy, bucket: str | None = None) -> list[Any]:
    """The declared values of a column that has a domain, in declared (or natural) order.

    Must hold: ``column.has_domain`` (or a date column with ``bucket`` given).
    """
    if column.kind == "category":
        return list(column.values or [])
    if column.kind == "integer":
        low, high = column.range  # type: ignore[misc]
        return list(range(int(low), int(high) + 1))
    if column.kind == "boolean":
        return [False, True]
    if column.kind == "date":
        unit = bucket or column.bucket
        if unit is None:
            raise ValueError("a date column needs a bucket to have a domain")
        start, end = date_range(column)
        return list(_date_buckets(start, end, unit))
    raise ValueError(f"a {column.kind} column has no domain")


def domain_size(column: ColumnPolicy, bucket: str | None = None) -> int:
    """len(domain_values(...)), counted without building the list for ranges (so a policy
    with a huge range costs nothing until the cell limit refuses it)."""
    if column.kind == "integer":
        low, high = column.range  # type: ignore[misc]
        return int(high) - int(low) + 1
    if column.kind == "date":
        unit = bucket or column.bucket
        if unit is None:
            raise ValueError("a date column needs a bucket to have a domain")
        start, end = date_range(column)
        first, last = bucket_start(start, unit), bucket_start(end, unit)
        if unit in ("day", "week"):
            return (last - first).days // (1 if unit == "day" else 7) + 1
        months = (last.year * 12 + last.month) - (first.year * 12 + first.month)
        return months // {"month": 1, "quarter": 3, "year": 12}[unit] + 1
    return len(domain_values(column, bucket))


def cell_count(sizes: Sequence[int]) -> int:
    """Number of cells of a GROUP BY over keys with these domain sizes (1 with no keys)."""
    return math.prod(sizes)


def bucket_start(day: dt.date, unit: str) -> dt.date:
    """The first day of the bucket holding ``day`` (weeks start on Monday, as date_trunc)."""
    if unit == "day":
        return day
    if unit == "week":
        return day - dt.timedelta(days=day.weekday())
    if unit == "month":
        return day.replace(day=1)
    if unit == "quarter":
        return dt.date(day.year, 3 * ((day.month - 1) // 3) + 1, 1)
    if unit == "year":
        return dt.date(day.year, 1, 1)
    raise ValueError(f"unknown bucket {unit!r}")


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
    months = {"month": 1, "quarter": 3, "year": 12}[unit]
    index = day.year * 12 + (day.month - 1) + months
    return dt.date(index // 12, index % 12 + 1, 1)
