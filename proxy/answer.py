"""What the engine hands back to a front (the command line or the wire server).

An ``Answer`` is already safe to show: every aggregate in it is noisy, and the accuracy list says
how noisy. Fronts only format it; they never compute on it.
"""

from __future__ import annotations

import datetime as _dt
from dataclasses import dataclass, field
from decimal import Decimal
from fractions import Fraction
from typing import Literal, Union

# PostgreSQL type names the proxy may return; the wire front maps them to type OIDs.
ColumnType = Literal["text", "bigint", "integer", "numeric", "double precision", "date", "boolean",
                     "json"]

Value = Union[str, int, Decimal, float, _dt.date, bool, None]


@dataclass(frozen=True)
class OutputColumn:
    """One column of an answer: its name and PostgreSQL type."""

    name: str
    type: ColumnType


@dataclass(frozen=True)
class Accuracy:
    """How noisy one output column is.

    ``scale`` is the Laplace scale in the column's own units (None for AVG-like derived values);
    ``bound95`` the half-width t with P(|noise| <= t) >= 0.95 (for derived values, the widest
    half-width over the cells, or None when the bound is unbounded). ``note`` says how it was got.
    """

    column: str
    epsilon: Decimal
    sensitivity: Decimal | None
    scale: Fraction | None
    bound95: Decimal | None
    note: str = ""


@dataclass(frozen=True)
class Answer:
    """A noisy table plus what it cost."""

    columns: list[OutputColumn]
    rows: list[tuple[Value, ...]]
    epsilon: Decimal
    remaining: Decimal
    accuracy: list[Accuracy]
    tables: list[str] = field(default_factory=list)
    charge_id: int | None = None
