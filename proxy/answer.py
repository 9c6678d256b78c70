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
    """One column of an answer: its name and PostgreSQL type; ``noisy`` when it holds an
    aggregate (it then has an accuracy entry of the same name), False for group keys."""

    name: str
    type: ColumnType
    noisy: bool = False


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
    # When the answer was first paid for, if it is a stored answer given again (it then cost
    # nothing now; ``epsilon`` is what it cost then).
    reused_from: _dt.datetime | None = None

    @property
    def cost(self) -> Decimal:
        """Epsilon this answer spent now: 0 for a stored answer given again."""
        return Decimal(0) if self.reused_from is not None else self.epsilon


MARGIN_SUFFIX = "_margin95"
"""Appended to an aggregate column's name to name the column of its 95% margin."""


def margin_columns(columns: list[OutputColumn]) -> list[OutputColumn]:
    """The answer's columns followed by one ``<name>_margin95`` column (double precision) per
    noisy column: what the session shows when the analyst asks for accuracy columns, so that
    clients that drop notices (pandas, JDBC result sets) still carry the accuracy."""
    return list(columns) + [OutputColumn(c.name + MARGIN_SUFFIX, "double precision")
                            for c in columns if c.noisy]


def with_margins(answer: Answer) -> tuple[list[OutputColumn], list[tuple[Value, ...]]]:
    """``margin_columns`` and the rows with each noisy column's 95% half-width appended (the
    same in every row: for derived values it is the widest over the cells; NULL where no finite
    bound exists). Post-processing of released figures only."""
    bounds = {a.column: a.bound95 for a in answer.accuracy}
    extra = [bounds.get(c.name) for c in answer.columns if c.noisy]
    tail = tuple(None if b is None else float(b) for b in extra)
    return margin_columns(answer.columns), [tuple(row) + tail for row in answer.rows]
