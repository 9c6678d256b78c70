"""Analysis: one SQL statement -> a ``Plan``, or a HushError saying what was refused and why.

Pure (no I/O, no cache: the engine caches plans by statement text). The statement is parsed with
sqlglot's PostgreSQL dialect and must be exactly one SELECT of the accepted shape:

    SELECT <group keys and aggregates> FROM <table> [WHERE <safe condition>]
    [GROUP BY <keys>] [HAVING <condition on aggregates and keys>]
    [ORDER BY <outputs>] [LIMIT n] [OFFSET n]

- table: a policy table granted to the analyst, unqualified or qualified by ``public``, with an
  optional alias. Unknown tables are 42P01 and columns not in the policy 42703, worded as
  PostgreSQL words them for objects that do not exist, so an unlisted column is
  indistinguishable from an absent one. Tables of one population joined on their individual
  columns, public tables joined on their key, and ``<individual> IN (SELECT ...)`` semi-joins
  are read by ``proxy.sql.joins`` into one table; other joins are refused.
- aggregates: COUNT(*), COUNT(col), SUM(col) and AVG(col) of integer or number columns,
  COUNT(DISTINCT <individual column>) on tables with [individual]. Their measures are
  deduplicated (AVG(x) = SUM(x) / COUNT(x) shares the sum of x with SUM(x)).
  VARIANCE, VAR_SAMP, VAR_POP, STDDEV, STDDEV_SAMP and STDDEV_POP of integer or number columns
  (a count, a centred sum and a centred sum of squares). Percentiles (percentile_cont(p) and
  percentile_disc(p) WITHIN GROUP (ORDER BY col), median(col)) of one column, asked alone: the
  plan's ``ranked`` key makes the backend return a histogram per cell. MIN and MAX are refused
  with a hint naming the percentile that answers them privately.
  SUM, AVG and COUNT
  also take a bounded per-row value (a boolean column cast to integer, a CASE of integer
  literals over WHERE-checked conditions), and every aggregate takes FILTER (WHERE <condition>)
  with the condition checked as WHERE: both become measures over a derived column
  (``Measure.value``; their sensitivity is argued in ``proxy.sql.rewrite``).
- select-list expressions: + - * /, round, casts to number types and coalesce over aggregates
  and keys, checked by ``proxy.sql.filters.ExpressionChecker`` for the select list and computed
  on the noisy row by ``proxy.sql.postprocess`` (never by the backend).
- keys: columns with a declared domain (a date column groups by day) and buckets of one column
  (date_trunc, extract/date_part, CASE over literal conditions, width_bucket, floor(x / w) * w),
  read by ``proxy.sql.keys``. GROUP BY names them by expression, select alias or position
  (PostgreSQL's resolution order: input columns first). Each key's values are its declared
  domain narrowed by the WHERE literals on its column; the product of their numbers may not
  exceed ``most_cells`` (refused with 54000 and a hint, never coarsened).
- WHERE: checked and rebuilt by ``proxy.sql.filters`` so that no row value can raise.
- HAVING and ORDER BY work on noisy outputs in post-processing; an aggregate or key they (or a
  select-list expression) name that is not selected becomes a hidden output (an aggregate
  costs epsilon like any measure). WHERE, HAVING and the select list share one vocabulary of
  expression nodes (``proxy.sql.vocabulary``), each node saying which clauses accept it.

Everything else is refused, failing closed: the SELECT is checked against an allow-list of its
clauses, and every expression node against the forms each clause accepts.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from decimal import Decimal

import sqlglot
import sqlglot.errors
import sqlglot.expressions as exp

from proxy.errors import (AMBIGUOUS_COLUMN, GROUPING_ERROR,
                          INSUFFICIENT_PRIVILEGE, INVALID_COLUMN_REFERENCE, INVALID_LIMIT,
                          INVALID_OFFSET, PROGRAM_LIMIT_EXCEEDED, STATEMENT_TOO_COMPLEX,
                          SYNTAX_ERROR, UNDEFINED_COLUMN, UNDEFINED_FUNCTION, UNDEFINED_TABLE,
                          HushError, refused)
from proxy.policy import ColumnPolicy, Policies, TablePolicy
from proxy.sql.domains import TRUNC_UNITS, EmptyBucket, cell_count, key_size, key_type
from proxy.sql.filters import (ExpressionChecker, Typed, check_filter, literal, mark_written_names,
                               number_value, only_args, refuse_expression, unparen, written_name, written_sql)
from proxy.sql.joins import Scope, name_of as _name, read_from, take_semi_joins
from proxy.sql.keys import (BUCKET_HINT, bucket_reader, is_key_expression, narrowings, read_key,
                            restrictions)
from proxy.sql.public import PublicRead, is_public_read, read_public
from proxy.sql.limits import check_statement_text, check_tree
from proxy.sql.limits import hint as limit_hint
from proxy.sql.plan import (PERCENTILE_KINDS, GroupKey, Measure, OrderItem, Output, Plan,
                            output_ref)
from proxy.sql.vocabulary import (CAST_TYPES, HAVING, SELECT, SQL_FAMILY, column_node, column_types,
                                  literal_type, rule, sum_type)
from proxy.sql.rewrite import centres_averages

BUCKETS = tuple(TRUNC_UNITS)  # the date_trunc units a group key accepts

SHAPE_HINT = ("hushql answers read-only aggregate queries: SELECT <group keys>, COUNT(*) | COUNT(col) "
              "| SUM(col) | AVG(col) | VARIANCE(col) | STDDEV(col) | percentile_cont(p) WITHIN GROUP "
              "(ORDER BY col) FROM <table> [WHERE ...] [GROUP BY <keys>] [HAVING ...] "
              "[ORDER BY ...] [LIMIT n] [OFFSET n]")
AGGREGATES_HINT = ("accepted aggregates: COUNT(*), COUNT(col), SUM(col), AVG(col), VARIANCE(col), "
                   "VAR_SAMP(col), VAR_POP(col), STDDEV(col), STDDEV_SAMP(col), STDDEV_POP(col), "
                   "percentile_cont(p) | percentile_disc(p) WITHIN GROUP (ORDER BY col), median(col)")
SELECT_HINT = ("select group keys (as written in GROUP BY), the aggregates COUNT(*), COUNT(col), "
               "SUM(col), AVG(col), VARIANCE/VAR_SAMP/VAR_POP/STDDEV/STDDEV_SAMP/STDDEV_POP(col) "
               "or percentiles of one column alone, and + - * /, round(x[, n]), ::integer, "
               "::bigint, ::numeric(p, s), ::float and coalesce over them")
PERCENTILE_HINT = ("write percentile_cont(p) or percentile_disc(p) WITHIN GROUP (ORDER BY <number "
                   "or integer column>), p a literal in [0, 1], or median(<column>); percentiles "
                   "of one column are asked without other aggregates")
HAVING_HINT = ("HAVING accepts aggregates, group keys, literals, comparisons, BETWEEN, IN, "
               "IS [NOT] NULL, IS [NOT] DISTINCT FROM, AND/OR/NOT, + - * and coalesce")
ORDER_HINT = "ORDER BY accepts output names, output positions, group keys and aggregates"
LIMIT_HINT = "LIMIT and OFFSET take a non-negative integer literal"

_SELECT_CLAUSES = frozenset({"expressions", "from", "from_", "joins", "where", "group", "having", "order",
                             "limit", "offset"})
_CLAUSE_REFUSALS = {
    "with": "WITH (common table expressions) is not accepted",
    "with_": "WITH (common table expressions) is not accepted",
    "distinct": "DISTINCT is not accepted: GROUP BY already gives one row per declared value",
    "into": "SELECT INTO is not accepted: hushql is read-only",
    "locks": "FOR UPDATE / FOR SHARE is not accepted: hushql is read-only",
    "laterals": "LATERAL is not accepted: query one table at a time",
    "windows": "window functions are not accepted",
    "sample": "TABLESAMPLE is not accepted",
}
_WRITES = tuple(getattr(exp, name) for name in (
    "Insert", "Update", "Delete", "Merge", "Create", "Drop", "Alter", "TruncateTable", "Copy",
    "Grant", "Revoke", "Analyze") if hasattr(exp, name))
_STRUCTURAL = (exp.Window, exp.Subquery, exp.Select, exp.Exists)  # refused whatever they hold
_ACCEPTED_AGGREGATES = (exp.Count, exp.Sum, exp.Avg)
# Output kind of each spread aggregate (sqlglot reads VARIANCE as VAR_SAMP, STDDEV as STDDEV).
_SPREADS: dict[type, str] = {exp.Variance: "var_samp", exp.VariancePop: "var_pop",
                             exp.Stddev: "stddev_samp", exp.StddevSamp: "stddev_samp",
                             exp.StddevPop: "stddev_pop"}
# MIN and MAX are refused; the percentile named in their hint answers them privately.
_EXTREMES: dict[type, str] = {exp.Min: "0.01", exp.Max: "0.99"}
# Candidates of a percentile (multiples of the step in the column's range, narrowed by WHERE),
# and backend histogram rows (cells times candidates), at most: the proxy reads the histogram
# and samples among the candidates in Python.
MOST_PERCENTILE_CANDIDATES = 25_000
MOST_HISTOGRAM_ROWS = 250_000
_ASCII_LOWER = str.maketrans("ABCDEFGHIJKLMNOPQRSTUVWXYZ", "abcdefghijklmnopqrstuvwxyz")
_SQL_TYPES = {name: kind for kind, name in CAST_TYPES.items()}
_INTEGER_CASTS = (exp.DataType.Type.INT, exp.DataType.Type.BIGINT, exp.DataType.Type.SMALLINT)
_LARGEST_BRANCH = 10 ** 15


def analyse(statement: str | exp.Expression, policies: Policies, analyst: str) -> Plan | PublicRead:
    """The plan of one accepted SELECT by ``analyst`` (a ``PublicRead`` for the rows of a public
    table); HushError (SQLSTATE, message, hint) otherwise.

    A string is parsed with sqlglot (PostgreSQL dialect); a parsed tree is used as is and never
    modified. Nothing here reads data or touches a database.
    """
    analyst_policy = policies.analysts.get(analyst)
    if analyst_policy is None or analyst_policy.disabled:
        raise HushError(INSUFFICIENT_PRIVILEGE, f'role "{analyst}" is not an analyst' +
                        (" (disabled)" if analyst_policy is not None else ""),
                        "connect as an analyst account listed in access.toml")
    try:
        if isinstance(statement, str):
            check_statement_text(statement, policies.limits)
        tree = _parse(statement) if isinstance(statement, str) else statement
        check_tree(tree, policies.limits)
        select = _as_select(tree)
        if is_public_read(select, policies):
            return read_public(select, policies, frozenset(analyst_policy.tables))
        return _Analysis(select, policies, frozenset(analyst_policy.tables)).plan()
    except RecursionError:  # the parser's own recursion can run out before check_tree runs
        raise HushError(STATEMENT_TOO_COMPLEX, "the statement is nested too deeply",
                        limit_hint(policies.limits, "nesting_depth",
                                   "write a flatter statement")) from None


def _parse(text: str) -> exp.Expression:
    """Exactly one statement, or 42601 for a syntax error / 0A000 for several statements."""
    try:
        trees = [tree for tree in sqlglot.parse(text, read="postgres") if tree is not None]
    except sqlglot.errors.ParseError as error:
        where = error.errors[0] if error.errors else {}
        line, column = where.get("line"), where.get("col")
        at = f" at line {line}, column {column}" if line and column else ""
        raise HushError(SYNTAX_ERROR, f"syntax error{at}", SHAPE_HINT) from None
    except sqlglot.errors.SqlglotError:
        raise HushError(SYNTAX_ERROR, "syntax error (unterminated quote or comment?)",
                        SHAPE_HINT) from None
    if not trees:
        raise HushError(SYNTAX_ERROR, "the statement is empty", SHAPE_HINT)
    if len(trees) > 1:
        raise refused("several statements in one query string are not accepted",
                      "send one SELECT statement at a time")
    return mark_written_names(trees[0], text)


def _as_select(tree: exp.Expression) -> exp.Select:
    """The tree as a SELECT, or a refusal naming what kind of statement it is."""
    if isinstance(tree, exp.Select):
        return tree
    if isinstance(tree, exp.SetOperation):
        raise refused("UNION, INTERSECT and EXCEPT are not accepted",
                      "send each SELECT on its own and combine the answers in your client")
    if isinstance(tree, exp.Subquery):
        raise refused("a parenthesised or nested SELECT is not accepted",
                      "send the SELECT without surrounding parentheses")
    name = _statement_name(tree)
    if isinstance(tree, _WRITES):
        raise HushError(INSUFFICIENT_PRIVILEGE,
                        f"{name} is not permitted: hushql is read-only", SHAPE_HINT)
    raise refused(f"{name} is not accepted: hushql answers read-only aggregate SELECT only",
                  SHAPE_HINT)


def _statement_name(tree: exp.Expression) -> str:
    if isinstance(tree, exp.Command):
        return str(tree.this).upper()
    if isinstance(tree, exp.TruncateTable):
        return "TRUNCATE"
    if isinstance(tree, exp.Transaction):
        return "BEGIN"
    return tree.key.upper()


@dataclass(frozen=True)
class _Aggregate:
    """An accepted aggregate call: the output kind, its measures, column and default name."""

    kind: str
    measures: tuple[Measure, ...]
    column: str | None
    name: str
    fraction: Decimal | None = None  # a percentile's p


@dataclass(frozen=True)
class _SelectItem:
    """One select-list entry before outputs are built: an aggregate, or a key candidate."""

    name: str
    aggregate: _Aggregate | None = None
    key: GroupKey | None = None
    column: str | None = None  # the column of a key candidate (key is None when it has no domain)
    expression: exp.Expression | None = None  # post-processing over aggregates and keys


class _Analysis:
    """The state of analysing one SELECT: scope, measures and outputs built so far."""

    def __init__(self, select: exp.Select, policies: Policies, granted: frozenset[str]) -> None:
        self.select = select
        self.policies = policies
        self.granted = granted
        self.measures: list[Measure] = []
        self.measure_index: dict[Measure, int] = {}
        self.outputs: list[Output] = []
        self.keys: list[GroupKey] = []
        self.table: TablePolicy
        self.scope: Scope
        self.derived: dict[str, ColumnPolicy] = {}  # derived columns of measures (Measure.value)

    # ---------------------------------------------------------------------------------------
    def plan(self) -> Plan:
        select = self.select
        for key, value in select.args.items():
            if value not in (None, False, []) and key not in _SELECT_CLAUSES:
                raise refused(_CLAUSE_REFUSALS.get(key, f"this form of SELECT is not accepted ({key})"),
                              SHAPE_HINT)
        self.scope = read_from(select, self.policies, self.granted)
        self.table = self.scope.table
        items = [self._select_item(node) for node in select.expressions]
        group = select.args.get("group")
        having = select.args.get("having")
        if not any(item.aggregate or (item.expression is not None and _holds_aggregate(item.expression))
                   for item in items) and group is None and having is None:
            raise refused("SELECT without aggregates is not accepted: hushql never returns rows",
                          SELECT_HINT)
        if group is not None:
            self._group_by(group, items)
        where = select.args.get("where")
        # The WHERE without its semi-joins (a copy when it had any: the tree is never modified).
        written = take_semi_joins(where.this, self.scope, self.policies, self.granted) \
            if where is not None else None
        condition = check_filter(written, self._column, bucket_reader(self.table, self._column),
                                 self.policies.limits) if written is not None else None
        within = narrowings(condition, self.table)
        among = restrictions(written, self._column) if written is not None else {}
        keys = tuple(replace(key, within=within.get(key.column), among=among.get(key))
                     for key in self.keys)
        self._check_cells(keys)
        # Expressions last: the outputs they name but nobody selected are appended as hidden
        # ones, after the selected outputs, which keep their positions.
        self.outputs += [self._select_output(item) if item.expression is None
                         else Output(item.name, "expression") for item in items]
        for position, item in enumerate(items):
            if item.expression is not None:
                self.outputs[position] = self._expression_output(item)
        having_condition = self._having(having.this) if having is not None else None
        order = self._order_by(select.args.get("order"), len(items))
        limit = self._count(select.args.get("limit"), "LIMIT")
        offset = self._count(select.args.get("offset"), "OFFSET")
        if not self.measures:
            raise refused("the query has no aggregate", SELECT_HINT)
        self._centre_averages()
        return Plan(table=self._plan_table(), measures=tuple(self.measures), outputs=tuple(self.outputs),
                    keys=keys, where=condition, having=having_condition,
                    order_by=order, limit=limit, offset=offset, joins=self.scope.joins,
                    ranked=self._ranked(keys, within))

    def _ranked(self, keys: tuple[GroupKey, ...], within: dict) -> GroupKey | None:
        """The histogram key of a percentile plan (``Plan.ranked``), None for other plans;
        refused when percentiles are mixed with other aggregates or columns, or when the
        histogram would be too large (54000)."""
        kinds = {o.kind for o in self.outputs if o.kind != "key"}
        if not kinds & set(PERCENTILE_KINDS):
            return None
        columns = {o.column for o in self.outputs if o.kind != "key"}
        if not kinds <= set(PERCENTILE_KINDS) or len(columns) != 1:
            raise refused("percentiles are answered only alongside percentiles of the same column",
                          "ask other aggregates, or percentiles of another column, in a separate "
                          "query; " + PERCENTILE_HINT)
        name = next(iter(columns))
        column = self.table.columns[name]  # type: ignore[index]
        ranked = GroupKey(name, "floor", arguments=(column.unit,), within=within.get(name))
        candidates = key_size(column, ranked)
        rows = cell_count([key_size(self.table.columns[k.column], k) for k in keys]) * candidates
        if candidates > MOST_PERCENTILE_CANDIDATES or rows > MOST_HISTOGRAM_ROWS:
            raise HushError(PROGRAM_LIMIT_EXCEEDED,
                            f"a percentile of {name} would choose among {candidates:,} values "
                            f"(multiples of its step {column.unit}) in each of "
                            f"{rows // max(1, candidates):,} cells",
                            f"at most {MOST_PERCENTILE_CANDIDATES:,} values per cell and "
                            f"{MOST_HISTOGRAM_ROWS:,} values over all cells: narrow {name} in "
                            f"WHERE ({name} BETWEEN <low> AND <high>) or group by fewer cells")
        return ranked

    # FROM ----------------------------------------------------------------------------------
    def _column(self, node: exp.Column) -> tuple[str, ColumnPolicy]:
        """Resolve a column reference against the FROM's tables (42P01 / 42703 / 42702)."""
        if isinstance(node.this, exp.Star):
            raise refuse_expression(node, "the select list", SELECT_HINT)
        only_args(node, ("this", "table", "db"), "a column reference", SHAPE_HINT)
        return self.scope.resolve(node)

    # select list ---------------------------------------------------------------------------
    def _select_item(self, node: exp.Expression) -> _SelectItem:
        alias = None
        if isinstance(node, exp.Alias):
            alias = _name(node.args.get("alias"))
            node = node.this
        node = unparen(node)
        if isinstance(node, exp.Star) or (isinstance(node, exp.Column) and isinstance(node.this, exp.Star)):
            raise refused("SELECT * is not accepted: hushql never returns rows", SELECT_HINT)
        if isinstance(node, _STRUCTURAL):
            raise refuse_expression(node, "the select list", SELECT_HINT)
        if isinstance(node, (exp.AggFunc, exp.WithinGroup, exp.Filter)):
            aggregate = self._aggregate(node)
            return _SelectItem(alias or aggregate.name, aggregate=aggregate)
        if is_key_expression(node) and not _holds_aggregate(node):
            key, column, name = read_key(node, self._column)
            if isinstance(node, exp.Column):  # a joined column may be named table.column inside
                name = _name(node.this)
            return _SelectItem(alias or name, key=key, column=column)
        if literal(node) is not None:
            raise refused("constants are not accepted in the select list", SELECT_HINT)
        if rule(node, SELECT) is not None:
            return _SelectItem(alias or _expression_name(node), expression=node)
        if _holds_aggregate(node):
            raise refused(f"aggregates inside expressions are not accepted ({_short(node)})",
                          SELECT_HINT)
        raise refuse_expression(node, "the select list", SELECT_HINT)

    def _select_output(self, item: _SelectItem) -> Output:
        if item.expression is not None:
            return self._expression_output(item)
        if item.aggregate is not None:
            a = item.aggregate
            return Output(item.name, a.kind, measures=self._measure_ids(a), column=a.column,
                          fraction=a.fraction)
        if item.key is None or item.key not in self.keys:
            raise self._not_grouped(item.column or item.name)
        return Output(item.name, "key", key=self.keys.index(item.key), column=item.key.column)

    def _not_grouped(self, column: str) -> HushError:
        return HushError(GROUPING_ERROR,
                         f'column "{column}" must appear in the GROUP BY clause or be used in an '
                         "aggregate function", SELECT_HINT)

    # aggregates ----------------------------------------------------------------------------
    def _aggregate(self, node: exp.Expression) -> _Aggregate:
        if isinstance(node, exp.Filter):
            return self._filtered(node)
        if isinstance(node, (exp.WithinGroup, exp.Median, exp.PercentileCont, exp.PercentileDisc)):
            return self._percentile_aggregate(node)
        if type(node) in _SPREADS:
            return self._spread_aggregate(node, _SPREADS[type(node)])
        if type(node) in _EXTREMES:
            argument = _short(node.this) if node.this is not None else "col"
            raise refused(f"the aggregate {written_name(node)}() is not accepted: the most extreme "
                          "value is one row's value, which no noise can hide",
                          f"ask for a high or low percentile instead, which is answered privately: "
                          f"percentile_cont({_EXTREMES[type(node)]}) WITHIN GROUP (ORDER BY "
                          f"{argument})")
        if not isinstance(node, _ACCEPTED_AGGREGATES):
            raise refused(f"the aggregate {written_name(node)}() is not accepted",
                          AGGREGATES_HINT
                          + (", COUNT(DISTINCT <individual column>)" if self.table.individual else ""))
        only_args(node, ("this", "big_int"), f"{node.sql_name()}()", SELECT_HINT)
        argument = unparen(node.this) if node.this is not None else None
        if isinstance(node, exp.Count):
            return self._count_aggregate(argument)
        function = "sum" if isinstance(node, exp.Sum) else "avg"
        if isinstance(argument, exp.Distinct):
            raise refused(f"{function.upper()}(DISTINCT ...) is not accepted", SELECT_HINT)
        name, column, value = self._aggregate_column(argument, function)
        if not column.summable:
            raise HushError(UNDEFINED_FUNCTION, f"function {function}({column_types(column).sql}) does not exist",
                            f"{function.upper()} takes integer or number columns: "
                            + (", ".join(n for n, c in self.table.columns.items() if c.summable) or "none"))
        if function == "sum":
            return _Aggregate("sum", (Measure("sum", name, value),), name, "sum")
        return _Aggregate("avg", (Measure("sum", name, value), Measure("count_values", name, value)),
                          name, "avg")

    def _count_aggregate(self, argument: exp.Expression | None) -> _Aggregate:
        if isinstance(argument, exp.Star):
            return _Aggregate("count", (Measure("count_rows"),), None, "count")
        if isinstance(argument, exp.Literal) and not argument.is_string:
            return _Aggregate("count", (Measure("count_rows"),), None, "count")
        if isinstance(argument, exp.Distinct):
            individual = self.table.individual
            only_args(argument, ("expressions",), "COUNT(DISTINCT ...)", SELECT_HINT)
            target = [unparen(e) for e in argument.expressions]
            if individual is not None and len(target) == 1 and isinstance(target[0], exp.Column) \
                    and self._column(target[0])[0] == individual.column:
                return _Aggregate("count", (Measure("count_individuals"),), None, "count")
            raise refused("COUNT(DISTINCT ...) is accepted only on the individual column of a "
                          "table with [individual]",
                          f"write COUNT(DISTINCT {individual.column})" if individual
                          else "use COUNT(*) or COUNT(col)")
        name, _, value = self._aggregate_column(argument, "count")
        return _Aggregate("count", (Measure("count_values", name, value),), name, "count")

    def _summable_argument(self, argument: exp.Expression | None, function: str) -> tuple[str, ColumnPolicy]:
        """The integer or number column an aggregate reads (42883 for other kinds)."""
        name, column, value = self._aggregate_column(argument, function)
        if value is not None:  # a derived value: spreads and percentiles read columns only
            raise refused(f"{function.upper()}() accepts a column, not an expression", SELECT_HINT)
        if not column.summable:
            raise HushError(UNDEFINED_FUNCTION, f"function {function}({column_types(column).sql}) does not exist",
                            f"{function.upper()} takes integer or number columns: "
                            + (", ".join(n for n, c in self.table.columns.items() if c.summable) or "none"))
        return name, column

    def _spread_aggregate(self, node: exp.Expression, kind: str) -> _Aggregate:
        """VARIANCE and STDDEV and their _samp/_pop forms: a count, a centred sum and a centred
        sum of squares of the column (post-processed by ``proxy.spread``)."""
        function = written_name(node).lower()
        only_args(node, ("this",), f"{function}()", SELECT_HINT)
        argument = unparen(node.this) if node.this is not None else None
        if isinstance(argument, exp.Distinct):
            raise refused(f"{function.upper()}(DISTINCT ...) is not accepted", SELECT_HINT)
        name, _ = self._summable_argument(argument, function)
        return _Aggregate(kind, (Measure("count_values", name), Measure("centred_sum", name),
                                 Measure("centred_squares", name)), name, function)

    def _percentile_aggregate(self, node: exp.Expression) -> _Aggregate:
        """percentile_cont(p) / percentile_disc(p) WITHIN GROUP (ORDER BY col), or median(col):
        a histogram of the column per cell, from which the engine selects privately."""
        if isinstance(node, exp.Median):
            only_args(node, ("this",), "median()", PERCENTILE_HINT)
            name, _ = self._summable_argument(unparen(node.this), "median")
            return _Aggregate("percentile_cont", (Measure("count_values", name),), name,
                              "median", fraction=Decimal("0.5"))
        if not isinstance(node, exp.WithinGroup):
            raise refused(f"{written_name(node)}() needs WITHIN GROUP (ORDER BY <column>)",
                          PERCENTILE_HINT)
        only_args(node, ("this", "expression"), "WITHIN GROUP", PERCENTILE_HINT)
        function, order = node.this, node.expression
        if not isinstance(function, (exp.PercentileCont, exp.PercentileDisc)):
            raise refused(f"WITHIN GROUP is accepted only on percentile_cont and percentile_disc, "
                          f"not {_short(function)}", PERCENTILE_HINT)
        written = "percentile_cont" if isinstance(function, exp.PercentileCont) else "percentile_disc"
        only_args(function, ("this",), f"{written}()", PERCENTILE_HINT)
        value = _fraction(function.this)
        if value is None:
            raise refused(f"{written}() takes one numeric literal between 0 and 1", PERCENTILE_HINT)
        if not isinstance(order, exp.Order) or len(order.expressions) != 1:
            raise refused(f"{written}() orders by exactly one column", PERCENTILE_HINT)
        ordered = order.expressions[0]
        only_args(ordered, ("this", "desc", "nulls_first"), "WITHIN GROUP (ORDER BY ...)",
                  PERCENTILE_HINT)
        if ordered.args.get("desc"):
            raise refused(f"{written}() ... ORDER BY <column> DESC is not accepted",
                          f"write {written}(1 - p) WITHIN GROUP (ORDER BY <column>) instead")
        name, _ = self._summable_argument(unparen(ordered.this), written)
        return _Aggregate(written, (Measure("count_values", name),), name, written,
                          fraction=value)

    def _aggregate_column(self, argument: exp.Expression | None,
                          function: str) -> tuple[str, ColumnPolicy, exp.Expression | None]:
        """The column an aggregate takes, or the derived column of a bounded per-row value,
        with that value's SQL."""
        if isinstance(argument, exp.Column) and not isinstance(argument.this, exp.Star):
            return (*self._column(argument), None)
        if argument is not None and _holds_aggregate(argument):
            raise HushError(GROUPING_ERROR, "aggregate function calls cannot be nested", SELECT_HINT)
        bounded = self._bounded_value(argument) if argument is not None else None
        if bounded is not None:
            return bounded
        raise refused(f"{function.upper()}() accepts a column, a boolean column cast to integer "
                      "or a CASE of integer literals, not another expression", SELECT_HINT)

    # bounded per-row values and FILTER -------------------------------------------------------
    def _bounded_value(self, node: exp.Expression) -> tuple[str, ColumnPolicy, exp.Expression] | None:
        """A per-row value with a range known from the text: ``b::integer`` of a boolean column
        (0 or 1; PostgreSQL's cast of a boolean never fails) or ``CASE WHEN <condition> THEN
        <integer> ... [ELSE <integer>] END`` (conditions checked as in WHERE; its range runs from
        the smallest branch to the largest). None for anything else."""
        if isinstance(node, exp.Cast) and node.to.this in _INTEGER_CASTS and not node.to.expressions \
                and isinstance(unparen(node.this), exp.Column) \
                and not isinstance(unparen(node.this).this, exp.Star):
            name, column = self._column(unparen(node.this))
            if column.kind != "boolean":
                return None
            value = exp.Cast(this=column_node(name),
                             to=exp.DataType(this=exp.DataType.Type.INT))
            return self._derive(f"{name}::integer", ColumnPolicy(kind="integer", range=[0, 1]), value)
        if not isinstance(node, exp.Case):
            return None
        only_args(node, ("ifs", "default"), "CASE with an operand", SELECT_HINT)
        reader = bucket_reader(self.table, self._column)
        branches, values = [], []
        for branch in node.args.get("ifs") or []:
            only_args(branch, ("this", "true"), "CASE", SELECT_HINT)
            condition = check_filter(branch.this, self._column, reader, self.policies.limits)
            number, built = self._branch_value(branch.args.get("true"))
            values.append(number)
            branches.append(exp.If(this=condition, true=built))
        default = node.args.get("default")
        number, built_default = self._branch_value(default) if default is not None else (None, None)
        values.append(number)
        present = [v for v in values if v is not None]
        if not branches or not present:
            raise refused("a CASE inside an aggregate needs an integer literal in some branch",
                          SELECT_HINT)
        value = exp.Case(ifs=branches, default=built_default)
        policy = ColumnPolicy(kind="integer", range=[min(present), max(present)])
        return self._derive(written_sql(node), policy, value)

    def _branch_value(self, node: exp.Expression | None) -> tuple[int | None, exp.Expression]:
        checked = literal(node) if node is not None else None
        if checked is not None and checked.type == "null":
            return None, exp.Null()
        if checked is None or checked.type != "number" or literal_type(number_value(checked.node)) == "numeric" \
                or abs(number_value(checked.node)) > _LARGEST_BRANCH:
            raise refused("a CASE inside an aggregate takes integer literals (at most 1e15 in size) "
                          "or NULL in its branches", SELECT_HINT)
        return int(number_value(checked.node)), checked.node

    def _filtered(self, node: exp.Filter) -> _Aggregate:
        """``<aggregate> FILTER (WHERE <condition>)``: the condition is checked as a WHERE
        condition and folded into each measure's per-row value (a different measure, of the
        same sensitivity: ``proxy.sql.rewrite``)."""
        inner, where = node.this, node.expression
        if not isinstance(inner, exp.AggFunc) or isinstance(inner, exp.Filter) \
                or not isinstance(where, exp.Where):
            raise refused("FILTER (WHERE ...) follows an aggregate", SELECT_HINT)
        only_args(where, ("this",), "FILTER", SELECT_HINT)
        condition = check_filter(where.this, self._column, bucket_reader(self.table, self._column),
                                 self.policies.limits)
        base = self._aggregate(inner)
        if base.kind not in ("count", "sum", "avg"):
            raise refused(f"FILTER is accepted on COUNT, SUM and AVG, not on {base.name}()",
                          "filter the rows with WHERE instead")
        measures = tuple(self._filter_measure(m, condition) for m in base.measures)
        return _Aggregate(base.kind, measures, measures[0].column, base.name)

    def _filter_measure(self, measure: Measure, condition: exp.Expression) -> Measure:
        if measure.kind in ("count_rows", "count_individuals"):
            return replace(measure, where=condition)
        assert measure.column is not None
        name, _, _ = self._derive(f"{measure.column} FILTER (WHERE {condition.sql(dialect='postgres')})",
                                  self._columns()[measure.column], condition)
        source = measure.value if measure.value is not None else column_node(measure.column)
        return replace(measure, column=name, value=source, where=condition)

    def _derive(self, name: str, policy: ColumnPolicy,
                value: exp.Expression) -> tuple[str, ColumnPolicy, exp.Expression]:
        """Register a derived column (a bounded value, a filtered column) under a name no
        policy column can have (it holds spaces, parentheses or ::)."""
        self.derived[name] = policy
        return name, policy, value

    def _columns(self) -> dict[str, ColumnPolicy]:
        return {**self.table.columns, **self.derived} if self.derived else self.table.columns

    def _plan_table(self) -> TablePolicy:
        """The table of the plan: the policy's, with the derived columns its measures name."""
        if not self.derived:
            return self.table
        return self.table.model_copy(update={"columns": self._columns()})

    def _centre_averages(self) -> None:
        """AVG's sum becomes a centred sum where the rewrite centres averages, unless a SUM of
        the same column needs the plain sum: then AVG reuses it, so the query has one measure
        fewer to share its epsilon (``proxy.sql.rewrite``, "Averages")."""
        if not centres_averages(self.table):
            return
        summed = {self.measures[o.measures[0]] for o in self.outputs if o.kind == "sum"}
        for output in self.outputs:
            index = output.measures[0] if output.kind == "avg" else None
            if index is not None and self.measures[index] not in summed:
                # the same rows, value and FILTER, summed about the midpoint
                self.measures[index] = replace(self.measures[index], kind="midpoint_sum")

    def _measure_ids(self, aggregate: _Aggregate) -> tuple[int, ...]:
        ids = []
        for measure in aggregate.measures:
            if measure not in self.measure_index:
                self.measure_index[measure] = len(self.measures)
                self.measures.append(measure)
            ids.append(self.measure_index[measure])
        return tuple(ids)

    # group keys ----------------------------------------------------------------------------
    def _key_candidate(self, node: exp.Expression) -> tuple[GroupKey | None, str]:
        """The key an expression names (None when its column has no domain), and its column."""
        key, column, _ = read_key(node, self._column)
        return key, column

    def _group_by(self, group: exp.Group, items: list[_SelectItem]) -> None:
        only_args(group, ("expressions",), "GROUP BY", "GROUPING SETS, ROLLUP, CUBE and GROUP BY ALL "
                  "are not accepted; " + self._groupable_hint())
        for node in group.expressions:
            target = unparen(node)
            key, column = self._group_key(target, items)
            if key is None:
                raise self._no_domain(column)
            if key not in self.keys:
                self.keys.append(key)

    def _group_key(self, node: exp.Expression, items: list[_SelectItem]) -> tuple[GroupKey | None, str]:
        if isinstance(node, exp.Literal) and not node.is_string:
            item = self._select_position(node, items, "GROUP BY")
            return self._item_key(item)
        if isinstance(node, exp.Column) and node.args.get("table") is None \
                and not isinstance(node.this, exp.Star):
            name = _name(node.this)
            if name not in self.scope.unqualified:  # PostgreSQL: input columns first, then output names
                matches = [item for item in items if item.name == name]
                if matches:
                    return self._item_key(matches[0])
        if isinstance(node, exp.AggFunc) or _holds_aggregate(node):
            raise HushError(GROUPING_ERROR, "aggregate functions are not allowed in GROUP BY",
                            self._groupable_hint())
        if isinstance(node, (exp.Rollup, exp.Cube, exp.GroupingSets)):
            raise refused("GROUPING SETS, ROLLUP and CUBE are not accepted", self._groupable_hint())
        if isinstance(node, (exp.Subquery, exp.Select, exp.Window)):
            raise refuse_expression(node, "GROUP BY", self._groupable_hint())
        if is_key_expression(node):
            return self._key_candidate(node)
        raise refused(f"GROUP BY accepts columns and buckets of one column, not {_short(node)}",
                      self._groupable_hint())

    def _item_key(self, item: _SelectItem) -> tuple[GroupKey | None, str]:
        if item.expression is not None:
            if _holds_aggregate(item.expression):
                raise HushError(GROUPING_ERROR, "aggregate functions are not allowed in GROUP BY",
                                self._groupable_hint())
            raise refused(f"GROUP BY accepts columns and buckets of one column, not "
                          f"{_short(item.expression)}", self._groupable_hint())
        if item.aggregate is not None:
            raise HushError(GROUPING_ERROR, "aggregate functions are not allowed in GROUP BY",
                            self._groupable_hint())
        return item.key, item.column or item.name

    def _select_position(self, node: exp.Literal, items: list, clause: str):
        text = node.this
        if not text.isdigit() or not 1 <= int(text) <= len(items):
            raise HushError(INVALID_COLUMN_REFERENCE, f"{clause} position {text} is not in select list",
                            f"positions run from 1 to {len(items)}")
        return items[int(text) - 1]

    def _no_domain(self, name: str) -> HushError:
        column = self.table.columns[name]
        if column.kind == "number":
            return refused(f'number column "{name}" has no finite list of values and cannot be '
                           "grouped as is",
                           f"group by its buckets, width_bucket({name}, <low>, <high>, <count>) "
                           f"or floor({name} / <width>) * <width>; " + self._groupable_hint())
        return refused(f'column "{name}" has no declared domain and cannot be grouped',
                       self._groupable_hint())

    def _groupable_hint(self) -> str:
        plain = [n for n, c in self.table.columns.items() if c.kind != "number"]
        return ("GROUP BY accepts " + (", ".join(plain) if plain else "no plain columns of this table")
                + "; " + BUCKET_HINT)

    def _check_cells(self, keys: tuple[GroupKey, ...]) -> None:
        """Refuse (54000) an answer with more cells than most_cells: never coarsen silently."""
        most = self.policies.defaults.most_cells
        sizes = []
        for key in keys:
            try:
                sizes.append(key_size(self.table.columns[key.column], key))
            except EmptyBucket as error:
                raise refused(f"{error}: PostgreSQL names that bucket in a year hushql cannot "
                              "write", "use a finer unit") from None
        cells = cell_count(sizes)
        if cells > most:
            shown = " x ".join(f"{size:,}" for size in sizes)
            raise HushError(PROGRAM_LIMIT_EXCEEDED,
                            f"the answer would have {cells:,} cells ({shown}), more than the "
                            f"{most:,} allowed (one cell per combination of key values)",
                            "narrow the keys' columns in WHERE with literals (e.g. a date range), "
                            "group by a coarser bucket (date_trunc('month', ...), width_bucket, "
                            "floor(x / w) * w), or group by fewer keys")

    # outputs named by HAVING and ORDER BY ------------------------------------------------
    def _output_for_aggregate(self, aggregate: _Aggregate) -> int:
        measures = self._measure_ids(aggregate)
        for index, output in enumerate(self.outputs):
            if output.kind == aggregate.kind and output.measures == measures \
                    and output.fraction == aggregate.fraction:
                return index
        self.outputs.append(Output(aggregate.name, aggregate.kind, measures=measures,
                                   column=aggregate.column, visible=False,
                                   fraction=aggregate.fraction))
        return len(self.outputs) - 1

    def _output_for_key(self, node: exp.Expression) -> int:
        key, column = self._key_candidate(node)
        if key is None or key not in self.keys:
            raise self._not_grouped(column)
        index = self.keys.index(key)
        for position, output in enumerate(self.outputs):
            if output.kind == "key" and output.key == index:
                return position
        self.outputs.append(Output(read_key(node, self._column)[2], "key",
                                   key=index, column=key.column, visible=False))
        return len(self.outputs) - 1

    def _output_sql_type(self, index: int) -> str:
        return output_type(self._plan_table(), self.keys, self.measures, self.outputs[index])

    # HAVING and select-list expressions ----------------------------------------------------
    def _having(self, node: exp.Expression) -> exp.Expression:
        return self._in_proxy(HAVING, HAVING_HINT).condition(node, "HAVING")

    def _in_proxy(self, clause: str, hint: str) -> ExpressionChecker:
        """The checker of a clause evaluated in the proxy on noisy rows: aggregates and group
        keys become placeholders of (possibly hidden) outputs."""
        return ExpressionChecker(clause=clause, hint=hint, limits=self.policies.limits,
                                 reader=lambda node: self._output_leaf(node, clause),
                                 fallback=lambda node: self._key_leaf(node, clause))

    def _output_leaf(self, node: exp.Expression, clause: str) -> Typed | None:
        if isinstance(node, (exp.AggFunc, exp.Filter)):
            return self._placeholder(self._output_for_aggregate(self._aggregate(node)), clause)
        if isinstance(node, exp.Column) and not isinstance(node.this, exp.Star):
            return self._placeholder(self._output_for_key(node), clause)
        return None

    def _key_leaf(self, node: exp.Expression, clause: str) -> Typed | None:
        if is_key_expression(node) and not _holds_aggregate(node) and not (
                isinstance(node, exp.Column) and isinstance(node.this, exp.Star)):
            return self._placeholder(self._output_for_key(node), clause)
        return None

    def _placeholder(self, index: int, clause: str) -> Typed:
        """Output ``index`` typed for a clause; in the select list a number is cast to its own
        type, so that evaluation holds the Python type standing for it (int, Decimal, float)."""
        sql = self._output_sql_type(index)
        family = SQL_FAMILY[sql]
        node: exp.Expression = _output_column(index)
        if clause == SELECT and family == "number":
            node = exp.Cast(this=node, to=exp.DataType(this=_SQL_TYPES[sql]))
        return Typed(node, family, sql=sql if family == "number" else None,
                     as_numeric=lambda: node, as_bounded=lambda: node)

    def _expression_output(self, item: _SelectItem) -> Output:
        """A select-list expression over aggregates and keys, computed on the noisy row."""
        assert item.expression is not None
        checked = self._in_proxy(SELECT, SELECT_HINT).check(item.expression)
        if checked.node.find(exp.Column) is None:
            raise refused("constants are not accepted in the select list", SELECT_HINT)
        if checked.type != "number" or checked.sql is None:
            raise refused(f"the select list accepts arithmetic over numbers, not "
                          f"{_short(item.expression)}", SELECT_HINT)
        return Output(item.name, "expression", expression=checked.node, type=checked.sql)

    # ORDER BY ------------------------------------------------------------------------------
    def _order_by(self, order: exp.Order | None, selected: int) -> tuple[OrderItem, ...]:
        if order is None:
            return ()
        only_args(order, ("expressions",), "ORDER BY", ORDER_HINT)
        result = []
        for ordered in order.expressions:
            only_args(ordered, ("this", "desc", "nulls_first"), "ORDER BY", ORDER_HINT)
            descending = bool(ordered.args.get("desc"))
            nulls_first = ordered.args.get("nulls_first")
            result.append(OrderItem(self._order_target(unparen(ordered.this), selected), descending,
                                    descending if nulls_first is None else bool(nulls_first)))
        return tuple(result)

    def _order_target(self, node: exp.Expression, selected: int) -> int:
        if isinstance(node, exp.Literal):
            if node.is_string or not node.this.isdigit():
                raise HushError(SYNTAX_ERROR, f"non-integer constant in ORDER BY: {node.this}", ORDER_HINT)
            positions = list(range(selected))
            return self._select_position(node, positions, "ORDER BY")
        if isinstance(node, exp.Column) and node.args.get("table") is None \
                and not isinstance(node.this, exp.Star):
            name = _name(node.this)  # PostgreSQL: output names first, then input columns
            matches = [i for i in range(selected) if self.outputs[i].name == name]
            if matches:
                first = self.outputs[matches[0]]
                if any((self.outputs[i].kind, self.outputs[i].key, self.outputs[i].measures)
                       != (first.kind, first.key, first.measures) for i in matches):
                    raise HushError(AMBIGUOUS_COLUMN, f'ORDER BY "{name}" is ambiguous',
                                    "give the outputs different aliases, or order by position")
                return matches[0]
        if isinstance(node, _STRUCTURAL):
            raise refuse_expression(node, "ORDER BY", ORDER_HINT)
        if isinstance(node, (exp.AggFunc, exp.Filter)):
            return self._output_for_aggregate(self._aggregate(node))
        if is_key_expression(node) and not _holds_aggregate(node):
            return self._output_for_key(node)
        if _holds_aggregate(node):
            raise refused(f"ORDER BY accepts aggregates, not expressions over them ({_short(node)})",
                          ORDER_HINT)
        raise refuse_expression(node, "ORDER BY", ORDER_HINT)

    # LIMIT / OFFSET ------------------------------------------------------------------------
    def _count(self, clause: exp.Expression | None, word: str) -> int | None:
        if clause is None:
            return None
        if isinstance(clause, exp.Fetch):
            only_args(clause, ("count", "direction", "limit_options"), "FETCH", LIMIT_HINT)
            options = clause.args.get("limit_options")
            if options is not None and (options.args.get("percent") or options.args.get("with_ties")):
                raise refused("FETCH ... PERCENT / WITH TIES is not accepted", LIMIT_HINT)
            value = clause.args.get("count")
            if value is None:
                return 1
        else:
            only_args(clause, ("expression",), word, LIMIT_HINT)
            value = clause.args.get("expression")
        value = unparen(value) if value is not None else None
        if value is None or isinstance(value, exp.Null) or (
                word == "LIMIT" and isinstance(value, exp.Var) and value.name.upper() == "ALL"):
            return None
        if isinstance(value, exp.Neg) and isinstance(unparen(value.this), exp.Literal):
            raise HushError(INVALID_LIMIT if word == "LIMIT" else INVALID_OFFSET,
                            f"{word} must not be negative", LIMIT_HINT)
        if isinstance(value, exp.Literal) and not value.is_string and value.this.isdigit():
            return int(value.this)
        raise refused(f"{word} accepts a non-negative integer literal, not {_short(value)}", LIMIT_HINT)


def output_type(table: TablePolicy, keys: list[GroupKey] | tuple[GroupKey, ...],
                measures: list[Measure] | tuple[Measure, ...], output: Output) -> str:
    """The PostgreSQL type of one output: a key's as PostgreSQL types its expression, COUNT
    bigint, SUM PostgreSQL's sum type of its column, AVG double precision, an expression its
    own (``Output.type``)."""
    if output.kind == "key":
        key = keys[output.key]  # type: ignore[index]
        return key_type(table.columns[key.column], key)
    if output.kind == "count":
        return "bigint"
    if output.kind == "sum":
        return sum_type(table.columns[measures[output.measures[0]].column])  # type: ignore[index]
    if output.kind == "percentile_disc":  # the column's own type, as PostgreSQL's
        return column_types(table.columns[measures[output.measures[0]].column]).sql  # type: ignore[index]
    if output.kind == "expression":
        assert output.type is not None
        return output.type
    return "double precision"


def _expression_name(node: exp.Expression) -> str:
    """The column name PostgreSQL gives an unaliased expression (FigureColname): a column's or
    function's name, through casts (else the cast's type name), or ?column?."""
    return _figure_name(node) or "?column?"


def _figure_name(node: exp.Expression) -> str | None:
    node = unparen(node)
    if isinstance(node, exp.Column):
        return node.name
    if isinstance(node, exp.Filter):
        return _figure_name(node.this)
    if isinstance(node, exp.Cast):
        inner = _figure_name(node.this)
        if inner is not None:
            return inner
        return {"integer": "int4", "bigint": "int8", "numeric": "numeric",
                "double precision": "float8"}.get(CAST_TYPES.get(node.to.this, ""), None)
    if isinstance(node, exp.Func) and not isinstance(node, exp.Binary):
        return written_name(node)
    return None


def _output_column(index: int) -> exp.Column:
    """The placeholder standing for output ``index`` in Plan.having (see plan.output_ref)."""
    return exp.Column(this=exp.to_identifier(output_ref(index)))


def _fraction(node: exp.Expression | None) -> Decimal | None:
    """A percentile's p: a plain numeric literal in [0, 1] (exactly as written), else None."""
    node = unparen(node) if node is not None else None
    if not isinstance(node, exp.Literal) or node.is_string:
        return None
    try:
        value = Decimal(node.this)
    except ArithmeticError:
        return None
    return value if value.is_finite() and 0 <= value <= 1 else None


def _holds_aggregate(node: exp.Expression) -> bool:
    return isinstance(node, exp.AggFunc) or node.find(exp.AggFunc) is not None


def _short(node: exp.Expression) -> str:
    try:
        text = written_sql(node)
    except Exception:  # the generator may not know every node; the message need not quote it
        return node.key
    return text if len(text) <= 60 else text[:57] + "..."
