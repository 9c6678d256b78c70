"""The plan: what an accepted query asks for, independent of SQL text.

Analysis (``proxy.sql.analyse``) turns one SELECT into a ``Plan``; the rewrite
(``proxy.sql.rewrite``) turns a plan into backend SQL; the engine noises the plan's measures and
post-processing (``proxy.sql.postprocess``) applies HAVING, ORDER BY, LIMIT and OFFSET to the
noisy rows. A plan is immutable and holds no data, so it can be cached by statement text.

Vocabulary:
- a *measure* is one integer-valued quantity the backend computes per cell and the engine
  noises: a row count, a count of non-null values, a clamped sum in units of the column's step,
  a sum centred on the range's midpoint (``midpoint_sum``: ``sum(2 x - lo - hi)`` in half
  steps, for AVG where the range sets the noise), or a count of distinct individuals; for
  VARIANCE and STDDEV, the sum and the sum of squares of the clamped values in step units less
  the range's centre (``centred_sum``, ``centred_squares``: see ``proxy.sql.rewrite``). Measures
  are deduplicated: ``AVG(x)`` and ``SUM(x)`` in one query share the plain sum of ``x``, so
  epsilon is split among distinct measures only.
- an *output* is one column of the answer, built from measures by post-processing.
- a *cell* is one combination of group-key values from the declared domains.
- a *join* (``Plan.joins``, read by ``proxy.sql.joins``): when a query reads several tables,
  ``Plan.table`` is the one table they make (its columns named as in the plan, its individual
  the shared one), and ``joins`` says which policy tables make it and how.
"""

from __future__ import annotations

from dataclasses import dataclass
from decimal import Decimal
from typing import Literal

import sqlglot.expressions as exp

from proxy.policy import TablePolicy

JoinKind = Literal["from", "inner", "semi"]
MeasureKind = Literal["count_rows", "count_values", "sum", "midpoint_sum", "count_individuals",
                      "centred_sum", "centred_squares"]
OutputKind = Literal["key", "count", "sum", "avg", "var_samp", "var_pop", "stddev_samp",
                     "stddev_pop", "percentile_cont", "percentile_disc", "expression"]
SPREAD_KINDS = ("var_samp", "var_pop", "stddev_samp", "stddev_pop")
PERCENTILE_KINDS = ("percentile_cont", "percentile_disc")


@dataclass(frozen=True)
class Measure:
    """One noisy integer per cell. ``column`` is None for ``count_rows`` and ``count_individuals``.

    ``value``, when set, is the checked per-row SQL counted or summed instead of the column (a
    bounded value: a boolean cast to integer, a CASE of integer literals); ``where`` is a
    FILTER's checked condition: only rows where it holds count. A measure with either names
    in ``column`` a derived column of ``Plan.table`` (its policy gives the value's range and
    step; a filtered measure's is its column's, under a name of its own, so that it gets
    contribution bounds of its own). ``count_rows`` and ``count_individuals`` take ``where``
    without a column (an individual counts in a cell when one of its rows there passes it).
    """

    kind: MeasureKind
    column: str | None = None
    value: exp.Expression | None = None
    where: exp.Expression | None = None


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
    aggregates: count -> (count,), sum -> (sum,), avg -> (sum or midpoint_sum, count_values), the variances and
    standard deviations -> (count_values, centred_sum, centred_squares), a percentile ->
    (count_values,) over the plan's ranked cells (``Plan.ranked``); ``fraction`` is a
    percentile's p. Hidden outputs (``visible`` False) exist only because HAVING, ORDER BY or a
    select-list expression names an aggregate or key not selected as such.

    Kind "expression" is post-processing in the select list: ``expression`` is a tree over
    placeholders of other outputs (``output_ref``, never of another expression), evaluated on
    the noisy row by ``proxy.sql.postprocess``, and ``type`` its PostgreSQL type.
    """

    name: str
    kind: OutputKind
    key: int | None = None
    measures: tuple[int, ...] = ()
    column: str | None = None
    visible: bool = True
    fraction: Decimal | None = None
    expression: exp.Expression | None = None
    type: str | None = None


@dataclass(frozen=True)
class Join:
    """One policy table a query reads, in FROM order (the first is ``from``).

    ``columns`` maps each plan column it provides to its own column (none for ``semi``, which
    only filters). ``column`` is its own column equal to column ``to[1]`` of ``Plan.joins[to[0]]``
    (None for ``from``). ``where`` is a semi-join's checked condition over its own columns
    (unqualified, as ``Plan.where``)."""

    table: TablePolicy
    kind: JoinKind
    columns: tuple[tuple[str, str], ...] = ()
    column: str | None = None
    to: tuple[int, str] | None = None
    where: exp.Expression | None = None


@dataclass(frozen=True)
class OrderItem:
    """Sort the noisy rows by output ``output``."""

    output: int
    descending: bool = False
    nulls_first: bool | None = None


@dataclass(frozen=True)
class Plan:
    """An accepted aggregate query over one policy table (with the derived columns its measures
    name added, see ``Measure.value``).

    ``where`` is a validated sqlglot condition over the table's exposed columns (unqualified
    ``exp.Column`` nodes named as in the policy) or None. ``having`` is a condition in which each
    aggregate has been replaced by ``exp.Column(this=exp.to_identifier(output_ref(i)))``, evaluated
    on noisy values by post-processing. ``joins`` is empty for a query of one table; otherwise
    it lists every table read (``Join``) and ``table`` is the table they make together.

    ``ranked`` is set for percentile plans only: the bucket key (``floor(x / step) * step``) of
    the percentile column, added after ``keys`` as the innermost key of the backend query, so
    that its only measure, ``count_values``, is a histogram per cell; the engine selects each
    percentile from it by the exponential mechanism (``proxy.selection``) instead of noising it.
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
    ranked: GroupKey | None = None
    joins: tuple[Join, ...] = ()

    @property
    def tables(self) -> tuple[TablePolicy, ...]:
        """Every policy table the query reads (charged, except public ones)."""
        return tuple(j.table for j in self.joins) if self.joins else (self.table,)

    @property
    def visible_outputs(self) -> list[Output]:
        return [o for o in self.outputs if o.visible]


def output_ref(index: int) -> str:
    """The placeholder column name standing for output ``index`` inside ``Plan.having``."""
    return f"__hushql_output_{index}"
