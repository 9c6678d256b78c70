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

    ``low_by`` and ``high_by`` (column units, None when no bound can have clipped anyone): how
    much further below (above) the value the plain SQL answer may lie because contribution
    bounds scaled some individuals down; a noisy figure, at 95%. The stated range is
    ``[value - bound95 - high_by, value + bound95 + low_by]``; both hold together in at least
    90% of answers (union bound).
    """

    column: str
    epsilon: Decimal
    sensitivity: Decimal | None
    scale: Fraction | None
    bound95: Decimal | None
    note: str = ""
    low_by: Decimal | None = None
    high_by: Decimal | None = None

    @property
    def clipping_text(self) -> str:
        """How far clipping may have moved the value, for notices ('' when it cannot have)."""
        if self.low_by is None or (self.low_by == 0 and not self.high_by):
            return ""
        if self.high_by:
            return (f"; contribution bounds scaled some individuals down: the plain SQL answer "
                    f"may lie up to {self.high_by} further below or {self.low_by} further above "
                    f"(95%)")
        return (f"; contribution bounds scaled some individuals down: the plain SQL answer may "
                f"be up to {self.low_by} higher still (95%)")


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
    notes: list[str] = field(default_factory=list)  # facts about the answer, true of any data
