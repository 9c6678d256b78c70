"""The plan: what an accepted query asks for, independent of SQL text.

Analysis (``proxy.sql.analyse``) turns one SELECT into a ``Plan``; the rewrite
(``proxy.sql.rewrite``) turns a plan into backend SQL; the engine noises the plan's measures and
post-processing (``proxy.sql.postprocess``) applies HAVING, ORDER BY, LIMIT and OFFSET to the
noisy rows. A plan is immutable and holds no data, so it can be cached by statement text.

Vocabulary:
- a *measure* is one integer-valued quantity the backend computes per cell and the engine
  noises: a row count, a count of non-null values, a clamped sum in units of the column's step,
  a centred sum (``sum(2 x - lo - hi)`` in half steps, for AVG where the range sets the noise),
  or a count of distinct individuals. Measures are deduplicated: ``AVG(x)`` and ``SUM(x)`` in
  one query share the plain sum of ``x``, so epsilon is split among distinct measures only.
- an *output* is one column of the answer, built from measures by post-processing.
- a *cell* is one combination of group-key values from the declared domains.
"""

from __future__ import annotations

from dataclasses import dataclass
from decimal import Decimal
from typing import Literal

import sqlglot.expressions as exp

from proxy.policy import TablePolicy

MeasureKind = Literal["count_rows", "count_values", "sum", "midpoint_sum", "count_individuals"]
OutputKind = Literal["key", "count", "sum", "avg"]


@dataclass(frozen=True)
class Measure:
    """One noisy integer per cell. ``column`` is None for ``count_rows`` and ``count_individuals``."""

    kind: MeasureKind
    column: str | None = None


KeyForm = Literal["column", "date_trunc", "extract", "case", "width_bucket", "floor"]
Label = str | Decimal | bool | None


@dataclass(frozen=True)
class Narrowing:
    """What the WHERE literals say about one column: only values in [low, high] (inclusive, in
    the column's own type; None is unbounded) and, when ``values`` is set, only those values
    can reach a cell. Decided from the query text alone, so the cells never depend on the data."""

    low: object = None
    high: object = None
    values: frozenset[object] | None = None
    low_open: bool = False  # the bounds exclude themselves (a strict < or >)
    high_open: bool = False


@dataclass(frozen=True)
class GroupKey:
    """A GROUP BY key: a total function of one column whose values are a finite list known from
    the policy and the query text (``proxy.sql.domains`` lists them).

    - ``column``: the column itself (category, integer, boolean, or date by day);
    - ``date_trunc``: ``unit`` is the truncation unit of a date column;
    - ``extract``: ``unit`` is the field of a date column (extract and date_part);
    - ``case``: ``branches`` are the checked WHEN conditions over the column, ``labels`` the
      distinct results in order of first appearance (None: NULL), ``choices`` the label index of
      each branch and then of ELSE;
    - ``width_bucket``: ``arguments`` are (low, high, count);
    - ``floor``: ``floor(column / width) * width``, ``arguments`` is (width,).
    ``within`` narrows the column's declared domain by the WHERE literals on the column, and
    ``among`` narrows the key's own values by the WHERE literals on the key expression itself
    (``extract(dow FROM d) IN (0, 6)``); both are set once the whole query is analysed (keys are
    compared without them while the query is read).
    """

    column: str
    form: KeyForm = "column"
    unit: str | None = None
    arguments: tuple[Decimal, ...] = ()
    branches: tuple[exp.Expression, ...] = ()
    labels: tuple[Label, ...] = ()
    choices: tuple[int, ...] = ()
    within: Narrowing | None = None
    among: Narrowing | None = None


@dataclass(frozen=True)
class Output:
    """One answer column.

    ``key`` indexes ``Plan.keys`` for kind "key"; ``measures`` indexes ``Plan.measures`` for
    aggregates: count -> (count,), sum -> (sum,), avg -> (sum or midpoint_sum, count_values).
    Hidden outputs (``visible`` False) exist only because HAVING or ORDER BY names an aggregate
    not selected.
    """

    name: str
    kind: OutputKind
    key: int | None = None
    measures: tuple[int, ...] = ()
    column: str | None = None
    visible: bool = True


@dataclass(frozen=True)
class OrderItem:
    """Sort the noisy rows by output ``output``."""

    output: int
    descending: bool = False
    nulls_first: bool | None = None


@dataclass(frozen=True)
class Plan:
    """An accepted aggregate query over one policy table.

    ``where`` is a validated sqlglot condition over the table's exposed columns (unqualified
    ``exp.Column`` nodes named as in the policy) or None. ``having`` is a condition in which each
    aggregate has been replaced by ``exp.Column(this=exp.to_identifier(output_ref(i)))``, evaluated
    on noisy values by post-processing.
    """

    table: TablePolicy
    measures: tuple[Measure, ...]
    outputs: tuple[Output, ...]
    keys: tuple[GroupKey, ...] = ()
    where: exp.Expression | None = None
    having: exp.Expression | None = None
    order_by: tuple[OrderItem, ...] = ()
    limit: int | None = None
    offset: int | None = None

    @property
    def visible_outputs(self) -> list[Output]:
        return [o for o in self.outputs if o.visible]


def output_ref(index: int) -> str:
    """The placeholder column name standing for output ``index`` inside ``Plan.having``."""
    return f"__hushql_output_{index}"
