"""Plan -> backend SQL, and the sensitivity of each measure of the plan.

Everything here is a pure function of the plan and its table policy; the SQL is built as a
sqlglot tree, never by pasting strings, and written once for PostgreSQL.

The backend query returns exactly one row per declared cell, in domain order: the key ordinals
``i0, i1, ...`` and then one column per measure ``m0, m1, ...`` (0 for empty cells). It never
returns rows of the table, never sorts, limits or filters on aggregates.

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

Tables with individuals (``[individual]`` with ``groups_cap = g``, ``rows_cap = r``)
---------------------------------------------------------------------------------------
One individual may own many rows, in many cells. The rewrite
1. aggregates per (individual, cell): partial count, partial clamped sum, partial value count;
2. keeps only cells inside the declared domains, then keeps at most ``g`` of each individual's
   cells, chosen at random in the database (``ROW_NUMBER() OVER (PARTITION BY individual
   ORDER BY md5(individual, cell, salt))`` with a fresh random salt per query); the choice
   depends only on that individual's own cells and on randomness independent of the data;
3. clamps each partial count to ``[0, r]`` and each partial sum to
   ``[r * min(lo, 0), r * max(hi, 0)]`` (in step units, or in column units for numeric columns,
   whose partial sums stay in column units until the cell is done; the interval holds 0 so a
   partial sum is never pushed away from zero);
4. sums the capped partials over individuals (then, for numeric columns, converts the cell's
   total to step units once).
Rows whose individual column is NULL belong to no identifiable individual, so no cap could be
enforced on the person they belong to; they are not counted. (Kept as one group, they would
also break step 2: md5 of a NULL is NULL, so their choice of cells would follow the executor's
row order, which depends on everyone else's rows.)
Argument: neighbouring databases differ by all rows of one individual. Every other individual's
capped partials are identical in both (their rows and their own random choice are unchanged), so
the answers differ only by that individual's at most ``g`` kept partials, each bounded as in 3.
Hence the L1 sensitivity is ``g * r`` for a count, ``g * r * M`` for a sum and ``g`` for
COUNT(DISTINCT individual). With ``C`` cells an individual reaches at most ``C`` of them, so
``g`` is replaced by ``min(g, C)`` (1 for an ungrouped query), and when ``g >= C`` step 2's
ranking is skipped as it would keep everything anyway.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from decimal import Decimal
from typing import Sequence

import sqlglot.expressions as exp

from proxy.policy import ColumnPolicy, TablePolicy
from proxy.sql.domains import cell_count, key_size, key_values
from proxy.sql.filters import date_node
from proxy.sql.keys import key_expression
from proxy.sql.plan import GroupKey, Measure, Plan


# The backend session setting holding the per-query salt of the random choice of cells.
PICK_SALT_SETTING = "hushql.pick_salt"


@dataclass(frozen=True)
class Rewritten:
    """The backend SQL of a plan and the L1 sensitivity (in measure units) of each measure."""

    sql: str
    sensitivities: tuple[int, ...]
    cells: int
    groups_kept: int | None  # min(g, cells) for individual tables, else None
    needs_salt: bool = False  # the query reads PICK_SALT_SETTING: set it per query


def rewrite(plan: Plan, exact_columns: frozenset[str] = frozenset()) -> Rewritten:
    """Build the backend query and sensitivities of an analysed plan. Pure.

    ``exact_columns`` names number columns whose backend type is exact (numeric): their clamped
    values are summed exactly and turned into step units once per cell instead of per row.
    """
    policy = plan.table
    cells = cell_count([key_size(_key_column(policy, k), k) for k in plan.keys])
    if cells == 0:  # the WHERE leaves some key no value: no cell, nothing to read
        tree = _no_cells(plan)
        groups_kept = None
        factor = 1
        rows_cap = 1 if policy.individual is None else policy.individual.rows_cap
    elif policy.individual is None:
        tree = _row_table_query(plan, exact_columns)
        groups_kept = None
        factor = 1
        rows_cap = 1
    else:
        groups_kept = min(policy.individual.groups_cap, cells)
        tree = _individual_table_query(plan, groups_kept, cells, exact_columns)
        factor = groups_kept
        rows_cap = policy.individual.rows_cap
    sensitivities = tuple(
        factor * _unit_sensitivity(policy, m, rows_cap) for m in plan.measures)
    return Rewritten(sql=tree.sql(dialect="postgres"), sensitivities=sensitivities,
                     cells=cells, groups_kept=groups_kept,
                     needs_salt=groups_kept is not None and groups_kept < cells)


def _no_cells(plan: Plan) -> exp.Select:
    """A query of the answer's shape (ordinals, then measures) returning no row."""
    columns = [f"i{j}" for j in range(len(plan.keys))] + [f"m{n}" for n in range(len(plan.measures))]
    return exp.Select().select(*[exp.alias_(_num(0), name, copy=False) for name in columns],
                               copy=False).where(exp.false(), copy=False)


def _unit_sensitivity(policy: TablePolicy, measure: Measure, rows_cap: int) -> int:
    """Largest change of one cell of ``measure`` from one individual (before the groups factor),
    at least 1: a sum over a column declared as [0, 0] cannot move, but noise needs a positive
    scale, and any upper bound is a sound sensitivity."""
    if measure.kind == "count_individuals":
        if policy.individual is None:
            raise ValueError("COUNT(DISTINCT individual) needs an [individual] section")
        return 1
    if measure.kind in ("count_rows", "count_values"):
        return rows_cap
    low, high = _unit_range(policy.columns[measure.column])  # type: ignore[index]
    return max(1, rows_cap * max(abs(low), abs(high)))


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


def _least(a: exp.Expression, b: exp.Expression) -> exp.Expression:
    return exp.Least(this=a, expressions=[b])


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


def _shuffle_key(plan: Plan) -> exp.Expression:
    """A per-query random order of one individual's cells: md5 of (individual, cell, salt).

    The salt is a fresh random value per query (setting ``PICK_SALT_SETTING``), so the order
    depends only on the individual's own cells and on randomness independent of the data.
    """
    parts: list[exp.Expression] = [exp.cast(exp.column("who", "p"), "text", copy=False)]
    for j in range(len(plan.keys)):
        parts += [exp.Literal.string(":"), exp.cast(exp.column("i", f"d{j}"), "text", copy=False)]
    parts += [exp.Literal.string(":"), exp.Anonymous(
        this="current_setting", expressions=[exp.Literal.string(PICK_SALT_SETTING)])]
    text = parts[0]
    for part in parts[1:]:
        text = exp.DPipe(this=text, expression=part)
    return exp.MD5(this=text)


def _individual_table_query(plan: Plan, groups_kept: int, cells: int,
                            exact: frozenset[str]) -> exp.Select:
    policy = plan.table
    assert policy.individual is not None
    rows_cap = policy.individual.rows_cap
    who = exp.alias_(_col(policy.individual.column), "who", copy=False)
    keys = [exp.alias_(_key_expression(policy, k), f"k{j}", copy=False) for j, k in enumerate(plan.keys)]
    partials = [exp.alias_(_aggregate(policy, m, exact, finish=False), f"m{n}", copy=False)
                for n, m in enumerate(plan.measures) if m.kind != "count_individuals"]
    per_individual = _filtered(plan, exp.Select().select(who, *keys, *partials, copy=False)).where(
        exp.Not(this=exp.Is(this=_col(policy.individual.column), expression=exp.Null())),
        copy=False).group_by(*[_num(j + 1) for j in range(len(keys) + 1)], copy=False)
    if plan.keys:
        kept = _in_domains(plan, per_individual, "p")
        if groups_kept < cells:
            pick = exp.Window(this=exp.RowNumber(), partition_by=[exp.column("who", "p")],
                              order=exp.Order(expressions=[exp.Ordered(this=_shuffle_key(plan))]))
            kept.set("expressions", kept.expressions + [exp.alias_(pick, "pick", copy=False)])
            kept = exp.Select().select(exp.Star(), copy=False).from_(
                exp.Subquery(this=kept, alias=exp.TableAlias(this=exp.to_identifier("r"))), copy=False).where(
                exp.LTE(this=exp.column("pick", "r"), expression=_num(groups_kept)), copy=False)
    else:
        kept = per_individual
    frame_alias = "q"
    capped: list[exp.Expression] = []
    for n, measure in enumerate(plan.measures):
        partial = exp.column(f"m{n}", frame_alias)
        if measure.kind == "count_individuals":
            total: exp.Expression = exp.Count(this=exp.Star())
        elif measure.kind == "sum":
            column = policy.columns[measure.column]  # type: ignore[index]
            if _in_column_units(column, measure.column, exact):  # type: ignore[arg-type]
                low, high = Decimal(column.low), Decimal(column.high)
                floor, ceiling = _decimal(rows_cap * min(low, 0)), _decimal(rows_cap * max(high, 0))
                total = _to_units(exp.Sum(this=_clamp_between(partial, floor, ceiling)), column)
            else:
                low_u, high_u = _unit_range(column)
                total = exp.Sum(this=_clamp(partial, rows_cap * min(low_u, 0),
                                            rows_cap * max(high_u, 0)))
        else:
            total = exp.Sum(this=_least(partial, _num(rows_cap)))
        capped.append(exp.alias_(exp.Coalesce(this=total, expressions=[_num(0)]), f"m{n}", copy=False))
    ordinals = [exp.column(f"i{j}", frame_alias).as_(f"i{j}") for j in range(len(plan.keys))]
    summed = exp.Select().select(*ordinals, *capped, copy=False).from_(
        exp.Subquery(this=kept, alias=exp.TableAlias(this=exp.to_identifier(frame_alias))), copy=False)
    if not plan.keys:
        return summed
    summed = summed.group_by(*[exp.column(f"i{j}", frame_alias) for j in range(len(plan.keys))], copy=False)
    return _finish(plan, summed, by_ordinal=True)
