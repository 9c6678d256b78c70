"""Plan -> backend SQL, and the sensitivity of each measure of the plan.

Everything here is a pure function of the plan and its table policy; the SQL is built as a
sqlglot tree and written once for PostgreSQL. Policy and analyst text (sources, columns,
filters) only ever enter as tree nodes; fixed fragments of this module's own, holding nothing
but its aliases and integers, are parsed into trees with sqlglot.

The backend query returns exactly one row per declared cell, in domain order: the key ordinals
``i0, i1, ...``, one column per measure ``m0, m1, ...`` (0 for empty cells), and for tables with
individuals each bound's value ``b0, b1, ...`` then each bound's clipped-away total (the same on
every row). It never returns rows of the table, never sorts, limits or filters on aggregates
(the one ORDER BY ... LIMIT 1 ranks the bounds' noisy scores: that is the mechanism itself).

Row tables (each row is one individual)
---------------------------------------
Every summed value is clamped to its declared range on the column's own type, then counted in
units of the column's step: per row (``round(clamp(x, lo, hi) / step)``) for inexact types, or
once per cell (``floor(SUM(clamp(x, lo, hi)) / step + 0.5)``) for numeric columns, whose sums are
exact (see ``_in_column_units``). The clamp is ``CASE WHEN x < lo THEN lo WHEN x > hi THEN hi
ELSE x END`` so that NULL stays NULL and adds nothing to a SUM (LEAST/GREATEST ignore NULL
arguments, so ``GREATEST(NULL, lo)`` would count every NULL as ``lo``); NaN sorts above every
number in PostgreSQL and clamps to ``hi``. Rows whose keys fall
outside the declared domains are aggregated into groups that are then dropped by joining the
finished aggregate to the domain list. Adding or removing one row changes one cell by at most 1
for a count and by at most ``M = max(|lo|, |hi|) / step`` for a sum, so the L1 sensitivity of the
whole histogram is 1 (count) or M (sum), whatever the number of cells.

Averages: a centred sum, and the epsilon split
-----------------------------------------------
AVG(x) is post-processing of two noisy measures of a cell, a sum and ``n``, the count of x's
values. Where the sum's noise comes from the declared range (row tables and declared bounds;
``centres_averages``) the sum is centred on the range's middle ``c = (lo + hi) / 2``: the
measure is ``sum(2 x - lo - hi)`` in half steps (an integer, exact: with x clamped to
[lo, hi] in steps, ``2 x - lo - hi`` lies in [lo - hi, hi - lo]), and the engine reports
``c + (noisy centred sum / 2) / noisy n``, which is the plain average when there is no noise.

Sensitivity. Row tables: one row moves the centred sum by at most ``hi - lo`` half steps, i.e.
``(hi - lo) / 2`` in the column's units, against ``max(|lo|, |hi|)`` for the plain sum (half
of it for a range starting at 0). For numeric columns summed exactly per cell, the cell's sum
S in steps is ``floor(total / step + 0.5)``: adding one row of clamped value y in [lo, hi]
moves S by an integer in [lo, hi] (monotone, commutes with integer shifts), so ``2 S - (lo +
hi) n`` moves by at most ``hi - lo``. Individuals: a partial ``p = 2 S - (lo + hi) n`` of one
(individual, cell) has ``|p| <= (hi - lo) n <= (hi - lo) r`` (r its rows there); the factor w
includes the rows bound R, so its kept L1 total (4b) is at most ``w (hi - lo) n_rows <= R (hi
- lo)``: the centred sum's sensitivity is ``R * (hi - lo)`` half steps, with no bound of its
own (``Rewritten.measure_widths``).

Where bounds are chosen per query the sum is not centred: a chosen bound follows the
individuals' own totals, and centring makes those larger wherever the values sit in the low
part of the range. Measured on the demo (3,000 households x 365 daily readings, litres in
[0, 2000]): households' totals of litres have median 103,384 and 90th percentile 192,351 L;
of litres - 1000, 261,616 and 316,085 L, and |average - c| is 686 L against an average of 314
L, so centring would make AVG's error about 1.8 times larger there. When the query also asks
SUM(x), AVG reuses the plain sum SUM needs: one measure fewer leaves each measure more epsilon
(SUM(x) keeps its epsilon / 2 rather than / 3), and the average's error is comparable.

The split. With noise of scale Delta / epsilon (variance about 2 Delta^2 / epsilon^2), the
average's error is about ``(Z_s - (a - c) Z_n) / n``, of variance proportional to ``Delta_s^2 /
e_s^2 + (a - c)^2 Delta_n^2 / e_n^2``; for ``e_s + e_n`` fixed, Lagrange gives the optimum
``e_s : e_n = Delta_s^(2/3) : (|a - c| Delta_n)^(2/3)``. The average a is what the query asks,
so the split uses what holds for any data: ``|a - c| <= h``, with h = (hi - lo) / 2 centred, and
max(|lo|, |hi|) (with c = 0) plain; the error's largest variance over a is then minimised by
``e_s : e_n = Delta_s^(2/3) : (h Delta_n)^(2/3)``. In each case ``Delta_s = h Delta_n`` (row
tables: h and 1; individuals: R h and R, or at the ceilings most_rows * max(|lo|, |hi|) and
most_rows), so the minimax split is even: the engine's equal share per measure is it.

Tables with individuals (``[individual]`` with ``most_rows``)
-------------------------------------------------------------
Neighbouring databases differ by all the rows of one individual (in every table of its
population). An individual may own many rows in many cells, so its influence is bounded over
the whole answer at once (Amin, Kulesza, Munoz Medina & Vassilvitskii 2019, "Bounding User
Contributions"), never cell by cell. The backend query:

1. ``q``: aggregates per (individual, cell) inside the declared domains: ``r`` rows, and per
   measure its partial in measure units (a row count, a count of values, the clamped sum in
   step units, or 1 for COUNT(DISTINCT individual)). Rows whose individual is NULL belong to no
   identifiable individual and are not counted (no bound could be enforced on their owner).
2. ``t``: per individual, its totals over all cells: ``n_rows``, the cells it touches, and per
   summed column the L1 total of its partials ``tot_j = sum |partial|``.
3. ``b``: the bounds, one per subject (``rows`` when the plan counts anything, and one per
   summed column), each either declared (its ceiling: ``most_rows`` rows, or
   ``most_rows * max(|lo|, |hi|)`` step units) or chosen per query (below).
4. ``w``: one factor per individual, ``w = min(1, B_j / total_j over its bounds j)``, scales all
   its partials, each rounded toward zero: ``trunc(p * w) = sign(p) * min(|p|, floor(|p| B_j /
   total_j), ...)``, computed with integer division (the floor of a minimum is the minimum of
   the floors), so it is exact. AVG's sum and count shrink by the same factor.
5. sums per cell, joined to the list of declared cells (empty cells read 0); per bound the
   clipped-away total (see 7).

Sensitivity, given the bounds. Take neighbours D and D' = D minus individual u. Every other
individual's partials, totals and factor are computed from its own rows only, so they are equal
in D and D'; the answers differ exactly by u's scaled partials. For a count measure, u's scaled
partials add up over all cells to at most ``sum floor(c * R / n_rows) <= R`` (its counts add up
to at most n_rows); for a sum, to at most ``sum |p| * T / tot <= T`` in L1. COUNT(DISTINCT
individual) counts u once in each cell it touches when it touches at most R cells, else
nowhere: at most ``min(R, cells)``. So the L1 sensitivity of the whole answer is R for counts,
T for sums and min(R, cells) for distinct individuals, whatever the number of cells; each is at
least 1 (a noise scale must be positive; any upper bound is sound). Row tables are the case
without a factor: one row moves one cell by at most 1 or M.

Choosing a bound privately (the same scan). The candidates are a geometric grid below the
ceiling (``ceiling * (4/5)^k``, at least 1). For candidate k, ``above_k`` is the number of
individuals whose total exceeds it; all ``above_k`` come from one histogram of the totals over
the candidates (width_bucket, one pass over ``t``). The chosen candidate maximises
``score_k + z_k`` with ``score_k = -|above_k - A|`` (ties to the smallest k), where the target A
(individuals left above, from the number of cells and the measures' epsilon) and the noise z_k
come from the engine in a setting. This is "report noisy max" with exact discrete Laplace noise
of scale ``2 * Delta / epsilon_b``, where ``Delta = 1`` bounds how far one individual moves any
score (it changes each above_k by at most 1; A does not depend on the data), and the engine may
add a public, data-independent preference ``-c_k`` to z_k. It is epsilon_b-DP:

  Proof. Fix the noise of every candidate but i. Candidate i wins iff ``z_i >= t(D)``, where the
  integer threshold t(D) is set by the other noisy scores and by score_i (ties broken by a fixed
  order, so the winning set of z_i is an upper set of integers). Moving from D to D' changes
  each score by at most Delta, so ``t(D') <= t(D) + 2 Delta``. For discrete Laplace noise with
  ``P(z) ~ a^|z|``, ``a = exp(-epsilon_b / (2 Delta))``, every tail satisfies
  ``P(z >= m + 1) >= a * P(z >= m)`` (for m >= 0 with equality; for m < 0 because
  ``(1 - a) P(z >= m + 1) >= C a >= C a^(|m| + 1) = a P(z = m)``, C the normalising constant).
  Hence ``P(i | D') >= P(z_i >= t(D) + 2 Delta) >= a^(2 Delta) P(i | D) = exp(-epsilon_b)
  P(i | D)``; integrating over the other candidates' noise and swapping D, D' gives the claim.

Why not sample the exponential mechanism directly: its probabilities need the scores, which
the proxy only has after the scan, and then the scaling with the chosen bound would need a
second scan. Report noisy max with noise drawn before the query (exact integer sampling, see
``proxy.noise``) lets the backend make the choice inside the one query, with integer arithmetic.

6. Composition. A query with chosen bounds spends: epsilon_b per chosen bound on its choice,
   epsilon_c per bound on its clipped-away figure, and epsilon_m per measure on the measures
   (noise scaled to the sensitivities at the chosen bounds, which are released and public).
   By basic adaptive sequential composition the query is (sum of these)-DP; the engine's split
   makes that sum the query's epsilon.

7. How far clipping may have lowered an answer. Per bound j, ``clipped_j`` sums over
   individuals their clipped-away amount (rows, or the L1 of the sum's partials, lost to the
   factor and the rounding), each capped at ``cap_j = max(terms) + 1``
   (``loss_terms``): ``ceiling_j - B_j`` (w set by bound j: at most the ceiling less the bound),
   ``ceiling_j - per_row * R`` for a sum bound when the rows bound R set w (each row adds at most
   per_row), and ``ceiling_j`` for any other binding bound; ``ROUNDING_LOSS = 1`` covers the
   rounding, which loses under one unit per individual in all (4b), whatever the cells. Removing u moves ``clipped_j`` by at most ``cap_j``, its
   sensitivity. The caps rely on the data owner's ceiling (most_rows): an individual breaking it
   is still bounded in the answer, but its clipped-away amount may then be understated.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from decimal import Decimal
from fractions import Fraction
from typing import Sequence

import sqlglot
import sqlglot.expressions as exp

from proxy.policy import ColumnPolicy, TablePolicy
from proxy.sql.domains import cell_count, key_size, key_values
from proxy.sql.filters import date_node
from proxy.sql.keys import key_expression
from proxy.sql.plan import GroupKey, Measure, Plan

# Backend session settings holding, per chosen bound j, the comma-separated integer noise of
# each candidate's score (drawn exactly by the engine before the query runs).
BOUND_NOISE_SETTING = "hushql.bound_noise_{}"

# Candidates for a chosen bound: the ceiling times (4/5)^k, k = 0..MOST_CANDIDATES-1 (at least 1).
_CANDIDATE_RATIO = Fraction(4, 5)
MOST_CANDIDATES = 40


@dataclass(frozen=True)
class Bound:
    """One contribution bound of a query over a table with individuals, in measure units.

    ``subject`` is "rows" (an individual's rows over all cells) or a summed column (the L1 total
    of its clamped values over all cells, in step units). ``candidates`` (ascending) are the
    values a private quantile chooses among; empty when the ceiling is declared as the bound.
    ``loss_cap`` is each individual's cap in the clipped-away figure: its sensitivity is
    ``loss_cap(value)``.
    """

    subject: str
    ceiling: int
    per_row: int  # most one row adds to the subject's total (1 for rows): ceiling = most_rows * per_row
    candidates: tuple[int, ...]

    @property
    def chosen(self) -> bool:
        return bool(self.candidates)


# One individual moves each candidate's score -|above_k - A| by at most this.
SCORE_SENSITIVITY = 1

# What rounding may take from one individual on top of its factor, in measure units: the
# rounding is cumulative over its cells (module notes, 4), so it loses under one unit in all.
ROUNDING_LOSS = 1

# A term of a loss cap: constant - coefficient * (value of bound ``index``), or the constant.
LossTerm = tuple[int, int, "int | None"]


def loss_terms(bounds: tuple[Bound, ...], j: int) -> list[LossTerm]:
    """The cap on one individual's clipped-away amount for bound j is the largest of these
    terms plus 1 (module notes, 7)."""
    own = bounds[j]
    terms: list[LossTerm] = [(own.ceiling, 1, j)]
    for k, other in enumerate(bounds):
        if k == j:
            continue
        if other.subject == "rows" and own.subject != "rows":
            terms.append((own.ceiling, own.per_row, k))  # per_row * (most_rows - R)
        else:
            terms.append((own.ceiling, 0, None))
    return terms


def loss_cap(bounds: tuple[Bound, ...], j: int, values: tuple[int, ...]) -> int:
    """The sensitivity of bound j's clipped-away total, given the bounds' values."""
    return max(c - a * (values[k] if k is not None else 0)
               for c, a, k in loss_terms(bounds, j)) + ROUNDING_LOSS


@dataclass(frozen=True)
class Rewritten:
    """The backend SQL of a plan and what the engine needs to noise its result.

    The backend returns one row per cell: key ordinals, then one column per measure, then (for
    tables with individuals) for each bound its value and its clipped-away total. Sensitivities
    depend on the bounds' values: ``sensitivities(values)``.
    """

    sql: str
    cells: int
    bounds: tuple[Bound, ...]
    measure_bounds: tuple[int, ...]  # per measure, index into bounds (-1 on row tables)
    row_sensitivities: tuple[int, ...]  # per measure, on row tables
    measure_kinds: tuple[str, ...] = ()
    # Per measure, how many measure units one unit of its bound allows: the range's width (in
    # steps) for a centred sum under the rows bound, else 1.
    measure_widths: tuple[int, ...] = ()

    def sensitivities(self, values: tuple[int, ...] = ()) -> tuple[int, ...]:
        """The L1 sensitivity of each measure given the bounds' values (module notes, 3)."""
        if not self.bounds:
            return self.row_sensitivities
        return tuple(max(1, min(values[b], self.cells) if kind == "count_individuals"
                         else values[b] * width)
                     for b, kind, width in zip(self.measure_bounds, self.measure_kinds,
                                               self.measure_widths))

    @property
    def declared_sensitivities(self) -> tuple[int, ...]:
        """Sensitivities at the ceilings (what a chosen bound can never exceed)."""
        return self.sensitivities(tuple(b.ceiling for b in self.bounds))


def rewrite(plan: Plan, exact_columns: frozenset[str] = frozenset()) -> Rewritten:
    """Build the backend query and sensitivities of an analysed plan. Pure.

    ``exact_columns`` names number columns whose backend type is exact (numeric): their clamped
    values are summed exactly and turned into step units once per cell (row tables) or once per
    (individual, cell) partial, instead of per row.
    """
    policy = plan.table
    cells = cell_count([key_size(_key_column(policy, k), k) for k in plan.keys])
    kinds = tuple(m.kind for m in plan.measures)
    if cells == 0:  # the WHERE leaves some key no value: no cell, nothing to read or to noise
        return Rewritten(sql=_no_cells(plan).sql(dialect="postgres"), cells=0, bounds=(),
                         measure_bounds=tuple(-1 for _ in plan.measures),
                         row_sensitivities=tuple(1 for _ in plan.measures), measure_kinds=kinds)
    if policy.individual is None:
        tree = _row_table_query(plan, exact_columns)
        return Rewritten(sql=tree.sql(dialect="postgres"), cells=cells, bounds=(),
                         measure_bounds=tuple(-1 for _ in plan.measures),
                         row_sensitivities=tuple(_unit_sensitivity(policy, m) for m in plan.measures),
                         measure_kinds=kinds)
    bounds, measure_bounds = _bounds(plan, cells)
    tree = _individual_table_query(plan, bounds, measure_bounds, exact_columns)
    widths = tuple(centred_width(policy.columns[m.column]) if m.kind == "midpoint_sum" else 1  # type: ignore[index]
                   for m in plan.measures)
    return Rewritten(sql=tree.sql(dialect="postgres"), cells=cells, bounds=bounds,
                     measure_bounds=measure_bounds, row_sensitivities=(), measure_kinds=kinds,
                     measure_widths=widths)


def centres_averages(policy: TablePolicy) -> bool:
    """Whether AVG(x) is computed from a centred sum (module notes, "Averages"): yes when the
    sums' sensitivities come from the declared ranges (row tables, declared bounds), no when
    bounds are chosen per query from the data's own totals."""
    individual = policy.individual
    return individual is None or individual.bounds != "chosen" or individual.most_rows <= 1


def centred_width(column: ColumnPolicy) -> int:
    """The most one value moves a centred sum, in its units (half steps): ``hi - lo`` in steps,
    at least 1."""
    low, high = _unit_range(column)
    return max(1, high - low)


def _no_cells(plan: Plan) -> exp.Select:
    """A query of the answer's shape (ordinals, then measures) returning no row."""
    columns = [f"i{j}" for j in range(len(plan.keys))] + [f"m{n}" for n in range(len(plan.measures))]
    return exp.Select().select(*[exp.alias_(_num(0), name, copy=False) for name in columns],
                               copy=False).where(exp.false(), copy=False)


def _bounds(plan: Plan, cells: int) -> tuple[tuple[Bound, ...], tuple[int, ...]]:
    """The bounds a plan needs (rows for any count, one per summed column) and, per measure,
    which bound limits it."""
    policy = plan.table
    assert policy.individual is not None
    most_rows = policy.individual.most_rows
    subjects: list[str] = []
    for m in plan.measures:
        subject = m.column if m.kind == "sum" else "rows"
        if subject not in subjects:
            subjects.append(subject)  # type: ignore[arg-type]
    choose = policy.individual.bounds == "chosen" and most_rows > 1
    bounds = []
    for subject in subjects:
        if subject == "rows":
            ceiling = most_rows
        else:
            low, high = _unit_range(policy.columns[subject])
            ceiling = most_rows * max(1, abs(low), abs(high))
        bounds.append(Bound(subject=subject, ceiling=ceiling, per_row=ceiling // most_rows,
                            candidates=_candidates(ceiling) if choose else ()))
    measure_bounds = tuple(subjects.index(m.column if m.kind == "sum" else "rows")  # type: ignore[arg-type]
                           for m in plan.measures)
    return tuple(bounds), measure_bounds


def _candidates(ceiling: int) -> tuple[int, ...]:
    """A geometric grid below the ceiling: floor(ceiling * (4/5)^k), at least 1, ascending."""
    found = {max(1, int(ceiling * _CANDIDATE_RATIO ** k)) for k in range(MOST_CANDIDATES)}
    return tuple(sorted(found))


def _unit_sensitivity(policy: TablePolicy, measure: Measure) -> int:
    """Largest change of a row table's measure (L1 over cells) from one row, at least 1: a sum
    over a column declared as [0, 0] cannot move, but noise needs a positive scale."""
    if measure.kind == "count_individuals":
        raise ValueError("COUNT(DISTINCT individual) needs an [individual] section")
    if measure.kind in ("count_rows", "count_values"):
        return 1
    if measure.kind == "midpoint_sum":
        return centred_width(policy.columns[measure.column])  # type: ignore[index]
    low, high = _unit_range(policy.columns[measure.column])  # type: ignore[index]
    return max(1, max(abs(low), abs(high)))


def _unit_range(column: ColumnPolicy) -> tuple[int, int]:
    """The declared range of a summable column in integer units of its step."""
    unit = column.unit
    low, high = (Decimal(v) / unit for v in column.range)  # type: ignore[union-attr]
    if low != low.to_integral_value() or high != high.to_integral_value():
        raise ValueError("range bounds must be multiples of the step")
    return int(low), int(high)


# ---- building blocks -------------------------------------------------------------------------

def _ident(name: str) -> exp.Identifier:
    return exp.to_identifier(name, quoted=True)


def _col(name: str, table: str | None = None) -> exp.Column:
    return exp.Column(this=_ident(name), table=exp.to_identifier(table) if table else None)


def _num(value: int) -> exp.Expression:
    literal = exp.Literal.number(abs(value))
    return exp.Neg(this=literal) if value < 0 else literal


def _literal(value: object) -> exp.Expression:
    if isinstance(value, bool):
        return exp.Boolean(this=value)
    if isinstance(value, int):
        return _num(value)
    if isinstance(value, dt.date):
        return date_node(value.isoformat())  # built directly: exp.cast parses its type name
    if isinstance(value, Decimal):
        return _decimal(value)
    return exp.Literal.string(str(value))


def _clamp(value: exp.Expression, low: int, high: int) -> exp.Expression:
    return _clamp_between(value, _num(low), _num(high))


def _clamp_between(value: exp.Expression, low: exp.Expression, high: exp.Expression) -> exp.Expression:
    """``value`` clamped to [low, high] on its own type, NULL kept as NULL (see the module notes)."""
    return exp.Case(ifs=[exp.If(this=exp.LT(this=value, expression=low), true=low.copy()),
                         exp.If(this=exp.GT(this=value.copy(), expression=high), true=high.copy())],
                    default=value.copy())


def _key_column(policy: TablePolicy, key: GroupKey) -> ColumnPolicy:
    return policy.columns[key.column]


def _key_expression(policy: TablePolicy, key: GroupKey) -> exp.Expression:
    """The per-row value a key groups by: the column, or its guarded bucket (NULL outside the
    declared domain, matching no cell); a CASE key gives its label's ordinal (``keys``)."""
    if key.form == "column":
        return _col(key.column)
    return key_expression(key, policy.columns[key.column], ordinals=True)


def _in_column_units(column: ColumnPolicy, name: str, exact: frozenset[str]) -> bool:
    """Whether sums of this number column are kept in its own units until the cell is done.

    For an exact backend type (numeric) the clamped values add up exactly, so the conversion to
    step units, ``floor(total / step + 0.5)``, runs once per cell instead of a division per row.
    It keeps the sensitivity: floor(x + 0.5) is monotone and commutes with integer shifts, so
    totals differing by at most an integer number D of steps convert to integers at most D apart.
    Inexact types (double precision) are rounded to steps per row, so their sums are integers.
    """
    return column.kind == "number" and name in exact


def _row_value(policy: TablePolicy, measure: Measure, exact: frozenset[str]) -> exp.Expression:
    """What one row contributes to a sum: clamped on the column's own type first (so nothing
    after it can overflow), then, unless summed in column units, rounded to step units."""
    column = policy.columns[measure.column]  # type: ignore[index]
    low, high = _unit_range(column)
    if column.kind == "integer":
        return _clamp(_col(measure.column), low, high)  # type: ignore[arg-type]
    clamped = _clamp_between(_col(measure.column), _decimal(column.low),  # type: ignore[arg-type]
                             _decimal(column.high))
    if _in_column_units(column, measure.column, exact):  # type: ignore[arg-type]
        return clamped
    # round() by name: sqlglot's Round node would add a per-row cast to double precision;
    # typed=True keeps PostgreSQL's own division (no cast).
    return exp.Anonymous(this="round", expressions=[
        exp.Div(this=clamped, expression=_decimal(column.unit), typed=True)])


def _decimal(value: object) -> exp.Expression:
    number = Decimal(str(value))
    literal = exp.Literal.number(str(abs(number)))
    return exp.Neg(this=literal) if number < 0 else literal


def _to_units(total: exp.Expression, column: ColumnPolicy) -> exp.Expression:
    """floor(total / step + 0.5): a finished sum in column units as an integer of steps."""
    ratio = exp.Div(this=total, expression=_decimal(column.unit), typed=True)
    return exp.Anonymous(this="floor", expressions=[exp.Add(this=ratio, expression=_decimal("0.5"))])


def _aggregate(policy: TablePolicy, measure: Measure, exact: frozenset[str],
               finish: bool = True) -> exp.Expression:
    """The row-level aggregate computing ``measure`` over one group of rows; with ``finish``
    False a sum kept in column units is left unconverted (per-individual partials)."""
    if measure.kind == "count_rows":
        return exp.Count(this=exp.Star())
    if measure.kind == "count_values":
        return exp.Count(this=_col(measure.column))  # type: ignore[arg-type]
    if measure.kind == "sum":
        total: exp.Expression = exp.Sum(this=_row_value(policy, measure, exact))
        column = policy.columns[measure.column]  # type: ignore[index]
        if finish and _in_column_units(column, measure.column, exact):  # type: ignore[arg-type]
            total = _to_units(total, column)
        return total
    if measure.kind == "midpoint_sum":
        # 2 S - (lo + hi) n in half steps: S the finished clamped sum in steps, n the values.
        low, high = _unit_range(policy.columns[measure.column])  # type: ignore[index]
        doubled = exp.Mul(this=_num(2), expression=exp.paren(
            _aggregate(policy, Measure("sum", measure.column), exact), copy=False))
        middle = exp.Mul(this=_num(low + high), expression=exp.Count(this=_col(measure.column)))  # type: ignore[arg-type]
        return exp.Sub(this=doubled, expression=middle)
    raise AssertionError(measure.kind)


def _domain_source(policy: TablePolicy, key: GroupKey, index: int) -> exp.Expression:
    """A FROM item ``d<index>(i, v)`` listing a key's values with ordinals (a CASE key's values
    are its label ordinals); must hold: the key has at least one value."""
    column = _key_column(policy, key)
    alias = exp.TableAlias(this=exp.to_identifier(f"d{index}"),
                           columns=[exp.to_identifier("i"), exp.to_identifier("v")])
    values = key_values(column, key)
    first = values[0]
    if len(values) > 1 and isinstance(first, (int, dt.date)) and not isinstance(first, bool) \
            and _consecutive(values):
        # Consecutive integers or days: v = first + i over generate_series(0, n - 1), rather
        # than a VALUES list of every value (date + integer is a date in PostgreSQL).
        series = exp.Anonymous(this="generate_series", expressions=[_num(0), _num(len(values) - 1)])
        inner = exp.Select().select(
            exp.column("i"), exp.alias_(exp.Add(this=_literal(first), expression=exp.column("i")),
                                         "v", copy=False), copy=False).from_(
            exp.Table(this=series, alias=exp.TableAlias(this=exp.to_identifier("s"),
                                                          columns=[exp.to_identifier("i")])), copy=False)
        return exp.Subquery(this=inner, alias=alias)
    rows = [exp.Tuple(expressions=[_num(i), _num(i) if key.form == "case" else _literal(v)])
            for i, v in enumerate(values)]
    return exp.Values(expressions=rows, alias=alias)


def _consecutive(values: Sequence[object]) -> bool:
    """Whether the values step by exactly one (integer or day) from first to last."""
    if isinstance(values, range):
        return values.step == 1
    step = 1 if isinstance(values[0], int) else dt.timedelta(days=1)
    return all(b - a == step for a, b in zip(values, values[1:]))  # type: ignore[operator]


def _key_matches(key: GroupKey, policy: TablePolicy, grouped: exp.Expression,
                 domain_value: exp.Expression) -> exp.Expression:
    """Join condition between a grouped key and a domain value; categories compare as text."""
    if key.form == "column" and _key_column(policy, key).kind == "category":
        grouped = exp.cast(grouped, "text", copy=False)
    return exp.EQ(this=grouped, expression=domain_value)


def _source(policy: TablePolicy) -> exp.Table:
    table = exp.to_table(policy.source, dialect="postgres")
    for part in ("this", "db", "catalog"):
        node = table.args.get(part)
        if isinstance(node, exp.Identifier):
            node.set("quoted", True)
    return table


def _filtered(plan: Plan, select: exp.Select) -> exp.Select:
    select = select.from_(_source(plan.table), copy=False)
    if plan.where is not None:
        select = select.where(plan.where.copy(), copy=False)
    return select


def _cells_frame(plan: Plan) -> exp.Select:
    """SELECT i0, v0, i1, v1, ... over every declared cell (a cross join of the domains)."""
    projections: list[exp.Expression] = []
    for j in range(len(plan.keys)):
        projections += [exp.alias_(exp.column("i", f"d{j}"), f"i{j}", copy=False),
                        exp.alias_(exp.column("v", f"d{j}"), f"v{j}", copy=False)]
    select = exp.Select().select(*projections, copy=False)
    for j, key in enumerate(plan.keys):
        source = _domain_source(plan.table, key, j)
        select = select.from_(source, copy=False) if j == 0 else select.join(source, join_type="cross", copy=False)
    return select


def _finish(plan: Plan, aggregate: exp.Select, by_ordinal: bool) -> exp.Select:
    """Left-join the finished aggregate ``a`` to all cells ``c``; empty cells read 0.

    ``by_ordinal``: ``a`` carries key ordinals i0.. to match; otherwise key values k0.., matched
    to the declared values (values outside the domains match no cell and drop out).
    Rows come back in domain order, one per cell.
    """
    policy = plan.table
    outer = exp.Select().select(*[exp.column(f"i{j}", "c") for j in range(len(plan.keys))],
                       *[exp.alias_(exp.Coalesce(this=exp.column(f"m{n}", "a"),
                                                 expressions=[_num(0)]), f"m{n}", copy=False)
                         for n in range(len(plan.measures))], copy=False)
    outer = outer.from_(exp.Subquery(this=_cells_frame(plan),
                                     alias=exp.TableAlias(this=exp.to_identifier("c"))), copy=False)
    conditions = [
        exp.EQ(this=exp.column(f"i{j}", "a"), expression=exp.column(f"i{j}", "c")) if by_ordinal
        else _key_matches(key, policy, exp.column(f"k{j}", "a"), exp.column(f"v{j}", "c"))
        for j, key in enumerate(plan.keys)]
    outer = outer.join(exp.Subquery(this=aggregate, alias=exp.TableAlias(this=exp.to_identifier("a"))),
                       on=exp.and_(*conditions, copy=False), join_type="left", copy=False)
    return outer.order_by(*[exp.column(f"i{j}", "c") for j in range(len(plan.keys))], copy=False)


def _in_domains(plan: Plan, grouped: exp.Select, alias: str) -> exp.Select:
    """The rows of ``grouped`` (key columns k0..) whose keys lie in the declared domains, with
    their ordinals i0.. added; rows outside the domains drop out of the inner joins."""
    select = exp.Select().select(*[exp.column(p.alias_or_name, alias) for p in grouped.expressions], copy=False).from_(
        exp.Subquery(this=grouped, alias=exp.TableAlias(this=exp.to_identifier(alias))), copy=False)
    for j, key in enumerate(plan.keys):
        source = _domain_source(plan.table, key, j)
        select = select.join(source, on=_key_matches(key, plan.table, exp.column(f"k{j}", alias),
                                                     exp.column("v", f"d{j}")), join_type="inner", copy=False)
        select = select.select(exp.alias_(exp.column("i", f"d{j}"), f"i{j}", copy=False), copy=False)
    return select


def _row_table_query(plan: Plan, exact: frozenset[str]) -> exp.Select:
    policy = plan.table
    measures = [exp.alias_(exp.Coalesce(this=_aggregate(policy, m, exact), expressions=[_num(0)]),
                           f"m{n}", copy=False)
                for n, m in enumerate(plan.measures)]
    if not plan.keys:
        return _filtered(plan, exp.Select().select(*measures, copy=False))
    keys = [exp.alias_(_key_expression(policy, k), f"k{j}", copy=False) for j, k in enumerate(plan.keys)]
    grouped = _filtered(plan, exp.Select().select(*keys, *measures, copy=False)).group_by(
        *[_num(j + 1) for j in range(len(keys))], copy=False)
    return _finish(plan, grouped, by_ordinal=False)


def _select(text: str) -> exp.Select:
    """A fixed fragment of this module's own SQL (aliases and integers only, never policy or
    analyst text), parsed once into a tree to be combined with built parts."""
    tree = sqlglot.parse_one(text, dialect="postgres")
    assert isinstance(tree, exp.Select)
    return tree


def _expression(text: str) -> exp.Expression:
    """An expression fragment of this module's own (aliases and integers only)."""
    return sqlglot.parse_one(text, dialect="postgres")


def _partial(policy: TablePolicy, measure: Measure, exact: frozenset[str]) -> exp.Expression:
    """One measure's partial over the rows of one (individual, cell), as an exact number in
    measure units: COUNT for counts, the clamped sum in step units for sums, 1 for distinct
    individuals."""
    if measure.kind == "count_individuals":
        return _num(1)
    if measure.kind in ("sum", "midpoint_sum"):
        return exp.cast(_aggregate(policy, measure, exact, finish=True), "numeric", copy=False)
    return _aggregate(policy, measure, exact)


def _scaled(value: str, bounds: tuple[Bound, ...]) -> str:
    """SQL for floor(value * w), value >= 0: w = min(1, B_j / total_j) over the plan's bounds,
    as integer divisions (floor of a minimum is the minimum of the floors), exact."""
    terms = [value]
    for j, bound in enumerate(bounds):
        total = "n_rows" if bound.subject == "rows" else f"tot{j}"
        terms.append(f"div({value} * b.b{j}, NULLIF(t.{total}, 0))")
    return f"LEAST({', '.join(terms)})"


def _kept(value: str, running: str | None, bounds: tuple[Bound, ...]) -> str:
    """SQL for one partial's kept share, value >= 0 (module notes, 4): ``f(running) -
    f(running - value)`` with f = floor(x * w) and ``running`` the individual's running total
    up to and including this cell; just ``f(value)`` when each individual has one cell. Where
    w = 1 (every total within its bound) that difference is ``value`` itself, so the divisions
    run only for the individuals a bound scales down."""
    if running is None:
        return _scaled(value, bounds)
    within = " AND ".join(f"t.{'n_rows' if bound.subject == 'rows' else f'tot{j}'} <= b.b{j}"
                          for j, bound in enumerate(bounds))
    return (f"CASE WHEN {within} THEN {value} ELSE {_scaled(running, bounds)} - "
            f"{_scaled(f'({running} - {value})', bounds)} END")


def _individual_table_query(plan: Plan, bounds: tuple[Bound, ...], measure_bounds: tuple[int, ...],
                            exact: frozenset[str]) -> exp.Select:
    """The per-individual rewrite (module notes): partials per (individual, cell) in the
    domains, totals per individual, the bounds (declared, or chosen by noisy max over the
    candidates), one factor per individual scaling all its partials, sums per cell, and per
    bound the clipped-away total, each individual capped."""
    policy = plan.table
    assert policy.individual is not None
    who = exp.alias_(_col(policy.individual.column), "who", copy=False)
    keys = [exp.alias_(_key_expression(policy, k), f"k{j}", copy=False) for j, k in enumerate(plan.keys)]
    partials = [exp.alias_(exp.Count(this=exp.Star()), "r", copy=False)] + [
        exp.alias_(_partial(policy, m, exact), f"m{n}", copy=False)
        for n, m in enumerate(plan.measures)]
    per_individual = _filtered(plan, exp.Select().select(who, *keys, *partials, copy=False)).where(
        exp.Not(this=exp.Is(this=_col(policy.individual.column), expression=exp.Null())),
        copy=False).group_by(*[_num(j + 1) for j in range(len(keys) + 1)], copy=False)
    q = _in_domains(plan, per_individual, "p") if plan.keys else per_individual
    sum_bounds = [(j, measure_bounds.index(j)) for j, b in enumerate(bounds) if b.subject != "rows"]
    totals = ["who", "SUM(r) AS n_rows", "COUNT(*) AS touched"] + [
        f"SUM(ABS(m{n})) AS tot{j}" for j, n in sum_bounds]
    t = _select(f"SELECT {', '.join(totals)} FROM q GROUP BY who")
    b = _select("SELECT " + ", ".join(
        f"({_choice_sql(j, bound)}) AS b{j}" if bound.chosen else f"{bound.ceiling} AS b{j}"
        for j, bound in enumerate(bounds)))
    rows_bound = next((j for j, bound in enumerate(bounds) if bound.subject == "rows"), None)
    ordinals = [f"q.i{j}" for j in range(len(plan.keys))]
    # Per scaled partial: its size (>= 0) and, with keys, its individual's running total in
    # cell order (module notes, 4); the running totals come from a window over q.
    signed = ("sum", "midpoint_sum")
    sizes = {"r": "q.r"} | {f"m{n}": f"ABS(q.m{n})" if measure.kind in signed else f"q.m{n}"
                            for n, measure in enumerate(plan.measures)
                            if measure.kind != "count_individuals"}
    window = (f"OVER (PARTITION BY q.who ORDER BY {', '.join(ordinals)} "
              "ROWS BETWEEN UNBOUNDED PRECEDING AND CURRENT ROW)")
    running = {name: f"q.run_{name}" if plan.keys else None for name in sizes}
    scaled = [f"{_kept('q.r', running['r'], bounds)} AS r_kept"]
    for n, measure in enumerate(plan.measures):
        if measure.kind == "count_individuals":
            scaled.append(f"CASE WHEN t.touched <= b.b{rows_bound} THEN 1 ELSE 0 END AS m{n}")
        elif measure.kind in signed:
            scaled.append(f"SIGN(q.m{n}) * ({_kept(sizes[f'm{n}'], running[f'm{n}'], bounds)})"
                          f" AS m{n}")
        else:
            scaled.append(f"{_kept(sizes[f'm{n}'], running[f'm{n}'], bounds)} AS m{n}")
    source = "q"
    if plan.keys:
        columns = ["q.who", "q.r"] + ordinals + [f"q.m{n}" for n in range(len(plan.measures))]
        source = (f"(SELECT {', '.join(columns)}, "
                  + ", ".join(f"SUM({size}) {window} AS run_{name}" for name, size in sizes.items())
                  + " FROM q) AS q")
    w = _select(f"SELECT {', '.join(['q.who', 'q.r'] + ordinals + [f'q.m{n}' + f' AS raw{n}' for n in range(len(plan.measures))] + scaled)} "
                f"FROM {source} JOIN t ON t.who = q.who CROSS JOIN b")
    losses = []
    for j, bound in enumerate(bounds):
        if bound.subject == "rows":
            losses.append(f"SUM(r - r_kept) AS lost{j}")
        else:
            n = measure_bounds.index(j)
            losses.append(f"SUM(ABS(raw{n}) - ABS(m{n})) AS lost{j}")
    lost = _select(f"SELECT {', '.join(losses)} FROM w GROUP BY who")
    caps = ", ".join(
        f"COALESCE(SUM(LEAST(lost{j}, GREATEST({_loss_terms_sql(loss_terms(bounds, j))})"
        f" + {ROUNDING_LOSS})), 0) AS clipped{j}"
        for j, bound in enumerate(bounds))
    clipped = _select(f"SELECT {caps} FROM lost")
    measures = [f"COALESCE(SUM(w.m{n}), 0) AS m{n}" for n in range(len(plan.measures))]
    tail = [f"b.b{j}" for j in range(len(bounds))] + [f"clip.clipped{j}" for j in range(len(bounds))]
    if plan.keys:
        summed = _select(f"SELECT {', '.join([f'w.i{j} AS i{j}' for j in range(len(plan.keys))] + measures)} "
                         f"FROM w GROUP BY {', '.join(f'w.i{j}' for j in range(len(plan.keys)))}")
        outer = _finish(plan, summed, by_ordinal=True)
        outer = outer.join(exp.to_table("b"), join_type="cross", copy=False).join(
            exp.to_table("clipped", alias="clip"), join_type="cross", copy=False)
        outer = outer.select(*[_expression(x) for x in tail], copy=False)
    else:
        outer = _select(f"SELECT {', '.join([f'a.m{n}' for n in range(len(plan.measures))] + tail)} "
                        f"FROM (SELECT {', '.join(measures)} FROM w) AS a CROSS JOIN b "
                        f"CROSS JOIN clipped AS clip")
    histograms = [(f"h{j}", _select(
        f"SELECT width_bucket({'n_rows' if bound.subject == 'rows' else f'tot{j}'}::numeric, "
        f"ARRAY[{', '.join(str(c + 1) for c in bound.candidates)}]::numeric[]) AS slot, "
        f"COUNT(*) AS n FROM t GROUP BY 1")) for j, bound in enumerate(bounds) if bound.chosen]
    # MATERIALIZED: each histogram is read once per candidate by the choice; inlined, it would
    # be recomputed each time. The other parts are read more than once, so they are anyway.
    for name, part in [("q", q), ("t", t), *histograms, ("b", b), ("w", w), ("lost", lost),
                       ("clipped", clipped)]:
        outer = outer.with_(name, as_=part, materialized=True if name.startswith("h") else None,
                            copy=False)
    return outer


def _loss_terms_sql(terms: list[LossTerm]) -> str:
    return ", ".join(f"{c} - {a} * (SELECT b{k} FROM b)" if k is not None else str(c)
                     for c, a, k in terms)


def _choice_sql(j: int, bound: Bound) -> str:
    """The noisy-max choice of bound j among its candidates (module notes, 2): the candidate
    with the highest ``noise_k - |above_k - A|``, ties to the smallest. ``above_k`` (the
    individuals whose total exceeds candidate k) comes from the histogram ``h<j>`` of the totals
    over the candidates, counted in one pass with width_bucket: an individual's slot is the
    number of candidates below its total. The engine passes ``A,noise_1,...,noise_G`` in a
    setting."""
    grid = ", ".join(f"({k}, {c})" for k, c in enumerate(bound.candidates, start=1))
    setting = f"current_setting('{BOUND_NOISE_SETTING.format(j)}')"
    return (
        f"SELECT g.tau FROM (VALUES {grid}) AS g(k, tau) "
        f"ORDER BY CAST(split_part({setting}, ',', g.k + 1) AS bigint) "
        f"- ABS(COALESCE((SELECT SUM(h.n) FROM h{j} AS h WHERE h.slot >= g.k), 0) "
        f"- CAST(split_part({setting}, ',', 1) AS bigint)) DESC, g.k LIMIT 1")
