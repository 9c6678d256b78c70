"""Analysis: one SQL statement -> a ``Plan``, or a HushError saying what was refused and why.

Pure (no I/O, no cache: the engine caches plans by statement text). The statement is parsed with
sqlglot's PostgreSQL dialect and must be exactly one SELECT of the accepted shape:

    SELECT <group keys and aggregates> FROM <table> [WHERE <safe condition>]
    [GROUP BY <keys>] [HAVING <condition on aggregates and keys>]
    [ORDER BY <outputs>] [LIMIT n] [OFFSET n]

- table: a policy table granted to the analyst, unqualified or qualified by ``public``, with an
  optional alias. Unknown tables are 42P01 and columns not in the policy 42703, worded as
  PostgreSQL words them for objects that do not exist, so an unlisted column is
  indistinguishable from an absent one.
- aggregates: COUNT(*), COUNT(col), SUM(col) and AVG(col) of integer or number columns,
  COUNT(DISTINCT <individual column>) on tables with [individual]. Their measures are
  deduplicated (AVG(x) = SUM(x) / COUNT(x) shares the sum of x with SUM(x)).
- keys: columns with a declared domain (a date column groups by day) and buckets of one column
  (date_trunc, extract/date_part, CASE over literal conditions, width_bucket, floor(x / w) * w),
  read by ``proxy.sql.keys``. GROUP BY names them by expression, select alias or position
  (PostgreSQL's resolution order: input columns first). Each key's values are its declared
  domain narrowed by the WHERE literals on its column; the product of their numbers may not
  exceed ``most_cells`` (refused with 54000 and a hint, never coarsened).
- WHERE: checked and rebuilt by ``proxy.sql.filters`` so that no row value can raise.
- HAVING and ORDER BY work on noisy outputs in post-processing; an aggregate or key they name
  that is not selected becomes a hidden output (an aggregate costs epsilon like any measure).

Everything else is refused, failing closed: the SELECT is checked against an allow-list of its
clauses, and every expression node against the forms each clause accepts.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import sqlglot
import sqlglot.errors
import sqlglot.expressions as exp

from proxy.errors import (AMBIGUOUS_COLUMN, DATATYPE_MISMATCH, GROUPING_ERROR,
                          INSUFFICIENT_PRIVILEGE, INVALID_COLUMN_REFERENCE, INVALID_LIMIT,
                          INVALID_OFFSET, PROGRAM_LIMIT_EXCEEDED, STATEMENT_TOO_COMPLEX,
                          SYNTAX_ERROR, UNDEFINED_COLUMN, UNDEFINED_FUNCTION, UNDEFINED_TABLE,
                          HushError, refused)
from proxy.policy import ColumnPolicy, Policies, TablePolicy
from proxy.sql.domains import TRUNC_UNITS, EmptyBucket, cell_count, key_size, key_type
from proxy.sql.filters import (KIND_TYPE, Typed, chain_operands, check_filter, date_node, literal,
                               mark_written_names, only_args, refuse_expression, unify, unparen,
                               written_name, written_sql)
from proxy.sql.keys import (BUCKET_HINT, bucket_reader, is_key_expression, narrowings, read_key,
                            restrictions)
from proxy.sql.limits import check_statement_text, check_tree
from proxy.sql.limits import hint as limit_hint
from proxy.sql.plan import GroupKey, Measure, OrderItem, Output, Plan, output_ref
from proxy.sql.rewrite import centres_averages

BUCKETS = tuple(TRUNC_UNITS)  # the date_trunc units a group key accepts

SHAPE_HINT = ("hushql answers read-only aggregate queries: SELECT <group keys>, COUNT(*) | COUNT(col) "
              "| SUM(col) | AVG(col) FROM <table> [WHERE ...] [GROUP BY <keys>] [HAVING ...] "
              "[ORDER BY ...] [LIMIT n] [OFFSET n]")
SELECT_HINT = ("select group keys (as written in GROUP BY) and the aggregates COUNT(*), COUNT(col), SUM(col), AVG(col); "
               "do arithmetic on the answers in your client")
HAVING_HINT = ("HAVING accepts aggregates, group keys, literals, comparisons, BETWEEN, IN, "
               "IS [NOT] NULL, AND/OR/NOT and + - *")
ORDER_HINT = "ORDER BY accepts output names, output positions, group keys and aggregates"
LIMIT_HINT = "LIMIT and OFFSET take a non-negative integer literal"

_SELECT_CLAUSES = frozenset({"expressions", "from", "from_", "where", "group", "having", "order",
                             "limit", "offset"})
_CLAUSE_REFUSALS = {
    "with": "WITH (common table expressions) is not accepted",
    "with_": "WITH (common table expressions) is not accepted",
    "distinct": "DISTINCT is not accepted: GROUP BY already gives one row per declared value",
    "into": "SELECT INTO is not accepted: hushql is read-only",
    "locks": "FOR UPDATE / FOR SHARE is not accepted: hushql is read-only",
    "joins": "joins are not accepted: query one table at a time",
    "laterals": "LATERAL is not accepted: query one table at a time",
    "windows": "window functions are not accepted",
    "sample": "TABLESAMPLE is not accepted",
}
_WRITES = tuple(getattr(exp, name) for name in (
    "Insert", "Update", "Delete", "Merge", "Create", "Drop", "Alter", "TruncateTable", "Copy",
    "Grant", "Revoke", "Analyze") if hasattr(exp, name))
_STRUCTURAL = (exp.Window, exp.Subquery, exp.Select, exp.Exists)  # refused whatever they hold
_ACCEPTED_AGGREGATES = (exp.Count, exp.Sum, exp.Avg)
_ASCII_LOWER = str.maketrans("ABCDEFGHIJKLMNOPQRSTUVWXYZ", "abcdefghijklmnopqrstuvwxyz")
_PG_TYPE = {"category": "text", "integer": "integer", "number": "numeric", "date": "date",
            "boolean": "boolean"}
# The analysis type (as in proxy.sql.filters) of a key's PostgreSQL type, for HAVING.
_KEY_FAMILY = {"text": "text", "integer": "number", "bigint": "number", "numeric": "number",
               "double precision": "number", "date": "date", "boolean": "boolean"}


def analyse(statement: str | exp.Expression, policies: Policies, analyst: str) -> Plan:
    """The plan of one accepted SELECT by ``analyst``; HushError (SQLSTATE, message, hint) otherwise.

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


def _name(identifier: exp.Expression | None) -> str:
    """An identifier as PostgreSQL resolves it: quoted names exact, unquoted ones with A-Z folded
    to lower case (PostgreSQL folds only ASCII letters in UTF-8 databases)."""
    if not isinstance(identifier, exp.Identifier):
        raise refused("this name is not accepted", SHAPE_HINT)
    if "\x00" in identifier.this:
        raise HushError(SYNTAX_ERROR, "names may not contain NUL characters", SHAPE_HINT)
    return identifier.this if identifier.quoted else identifier.this.translate(_ASCII_LOWER)


@dataclass(frozen=True)
class _Aggregate:
    """An accepted aggregate call: the output kind, its measures, column and default name."""

    kind: str
    measures: tuple[Measure, ...]
    column: str | None
    name: str


@dataclass(frozen=True)
class _SelectItem:
    """One select-list entry before outputs are built: an aggregate, or a key candidate."""

    name: str
    aggregate: _Aggregate | None = None
    key: GroupKey | None = None
    column: str | None = None  # the column of a key candidate (key is None when it has no domain)


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
        self.qualifiers: frozenset[str]
        self.alias: str | None = None

    # ---------------------------------------------------------------------------------------
    def plan(self) -> Plan:
        select = self.select
        for key, value in select.args.items():
            if value not in (None, False, []) and key not in _SELECT_CLAUSES:
                raise refused(_CLAUSE_REFUSALS.get(key, f"this form of SELECT is not accepted ({key})"),
                              SHAPE_HINT)
        self._from(select.args.get("from_") or select.args.get("from"))
        items = [self._select_item(node) for node in select.expressions]
        group = select.args.get("group")
        having = select.args.get("having")
        if not any(item.aggregate for item in items) and group is None and having is None:
            raise refused("SELECT without aggregates is not accepted: hushql never returns rows",
                          SELECT_HINT)
        if group is not None:
            self._group_by(group, items)
        where = select.args.get("where")
        condition = check_filter(where.this, self._column, bucket_reader(self.table, self._column),
                                 self.policies.limits) if where is not None else None
        within = narrowings(condition, self.table)
        among = restrictions(where.this, self._column) if where is not None else {}
        keys = tuple(replace(key, within=within.get(key.column), among=among.get(key))
                     for key in self.keys)
        self._check_cells(keys)
        for item in items:
            self.outputs.append(self._select_output(item))
        having_condition = self._having(having.this) if having is not None else None
        order = self._order_by(select.args.get("order"), len(items))
        limit = self._count(select.args.get("limit"), "LIMIT")
        offset = self._count(select.args.get("offset"), "OFFSET")
        if not self.measures:
            raise refused("the query has no aggregate", SELECT_HINT)
        self._centre_averages()
        return Plan(table=self.table, measures=tuple(self.measures), outputs=tuple(self.outputs),
                    keys=keys, where=condition, having=having_condition,
                    order_by=order, limit=limit, offset=offset)

    # FROM ----------------------------------------------------------------------------------
    def _from(self, clause: exp.Expression | None) -> None:
        if clause is None:
            raise refused("SELECT without FROM is not accepted", "name one table: FROM <table>")
        source = clause.this
        if not isinstance(source, exp.Table) or not isinstance(source.this, exp.Identifier):
            raise refused("FROM accepts one table, not a function, subquery or list of values",
                          "write FROM <table> [AS alias]")
        for key, value in source.args.items():
            if value not in (None, False, []) and key not in ("this", "db", "alias"):
                raise refused(_CLAUSE_REFUSALS.get(key, f"this form of FROM is not accepted ({key})"),
                              "write FROM <table> [AS alias]")
        name = _name(source.this)
        schema = _name(source.args["db"]) if source.args.get("db") is not None else None
        if schema is not None and schema != "public":
            raise self._no_table(f"{schema}.{name}")
        table = self.policies.tables.get(name)
        if table is None:
            raise self._no_table(name)
        if name not in self.granted:
            raise HushError(INSUFFICIENT_PRIVILEGE, f"permission denied for table {name}",
                            "ask an administrator to grant it; " + self._granted_list())
        self.table = table
        alias = source.args.get("alias")
        if alias is not None:
            only_args(alias, ("this",), "a table alias with column names", "write FROM <table> AS a")
            self.alias = _name(alias.this)
        self.qualifiers = frozenset({self.alias or name})

    def _no_table(self, name: str) -> HushError:
        return HushError(UNDEFINED_TABLE, f'relation "{name}" does not exist', self._granted_list())

    def _granted_list(self) -> str:
        names = sorted(self.granted & set(self.policies.tables))
        return "tables you may query: " + (", ".join(names) if names else "none")

    # columns -------------------------------------------------------------------------------
    def _column(self, node: exp.Column) -> tuple[str, ColumnPolicy]:
        """Resolve a column reference against the table's policy (42P01 / 42703 when absent)."""
        if isinstance(node.this, exp.Star):
            raise refuse_expression(node, "the select list", SELECT_HINT)
        only_args(node, ("this", "table", "db"), "a column reference", SHAPE_HINT)
        qualifier = node.args.get("table")
        if qualifier is not None:
            prefix = _name(qualifier)
            schema = node.args.get("db")
            if schema is not None and (_name(schema) != "public" or self.alias is not None):
                prefix = f"{_name(schema)}.{prefix}"
            if prefix not in self.qualifiers:
                raise HushError(UNDEFINED_TABLE, f'missing FROM-clause entry for table "{prefix}"',
                                f"qualify columns with {next(iter(self.qualifiers))} or not at all")
        name = _name(node.this)
        column = self.table.columns.get(name)
        if column is None:
            raise HushError(UNDEFINED_COLUMN, f'column "{name}" does not exist',
                            f"columns of {self.table.table}: " + ", ".join(self.table.columns))
        return name, column

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
        if isinstance(node, (exp.Filter, exp.WithinGroup)):
            raise refused("FILTER and WITHIN GROUP are not accepted on aggregates",
                          "filter rows with WHERE; " + SELECT_HINT)
        if isinstance(node, exp.AggFunc):
            aggregate = self._aggregate(node)
            return _SelectItem(alias or aggregate.name, aggregate=aggregate)
        if is_key_expression(node) and not _holds_aggregate(node):
            key, column, name = read_key(node, self._column)
            return _SelectItem(alias or name, key=key, column=column)
        if literal(node) is not None:
            raise refused("constants are not accepted in the select list", SELECT_HINT)
        if _holds_aggregate(node):
            raise refused(f"aggregates inside expressions are not accepted ({_short(node)})",
                          SELECT_HINT)
        raise refuse_expression(node, "the select list", SELECT_HINT)

    def _select_output(self, item: _SelectItem) -> Output:
        if item.aggregate is not None:
            a = item.aggregate
            return Output(item.name, a.kind, measures=self._measure_ids(a), column=a.column)
        if item.key is None or item.key not in self.keys:
            raise self._not_grouped(item.column or item.name)
        return Output(item.name, "key", key=self.keys.index(item.key), column=item.key.column)

    def _not_grouped(self, column: str) -> HushError:
        return HushError(GROUPING_ERROR,
                         f'column "{column}" must appear in the GROUP BY clause or be used in an '
                         "aggregate function", SELECT_HINT)

    # aggregates ----------------------------------------------------------------------------
    def _aggregate(self, node: exp.AggFunc) -> _Aggregate:
        if not isinstance(node, _ACCEPTED_AGGREGATES):
            raise refused(f"the aggregate {written_name(node)}() is not accepted",
                          "accepted aggregates: COUNT(*), COUNT(col), SUM(col), AVG(col)"
                          + (", COUNT(DISTINCT <individual column>)" if self.table.individual else ""))
        only_args(node, ("this", "big_int"), f"{node.sql_name()}()", SELECT_HINT)
        argument = unparen(node.this) if node.this is not None else None
        if isinstance(node, exp.Count):
            return self._count_aggregate(argument)
        function = "sum" if isinstance(node, exp.Sum) else "avg"
        if isinstance(argument, exp.Distinct):
            raise refused(f"{function.upper()}(DISTINCT ...) is not accepted", SELECT_HINT)
        name, column = self._aggregate_column(argument, function)
        if not column.summable:
            raise HushError(UNDEFINED_FUNCTION, f"function {function}({_PG_TYPE[column.kind]}) does not exist",
                            f"{function.upper()} takes integer or number columns: "
                            + (", ".join(n for n, c in self.table.columns.items() if c.summable) or "none"))
        if function == "sum":
            return _Aggregate("sum", (Measure("sum", name),), name, "sum")
        return _Aggregate("avg", (Measure("sum", name), Measure("count_values", name)), name, "avg")

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
        name, _ = self._aggregate_column(argument, "count")
        return _Aggregate("count", (Measure("count_values", name),), name, "count")

    def _aggregate_column(self, argument: exp.Expression | None, function: str) -> tuple[str, ColumnPolicy]:
        if isinstance(argument, exp.Column) and not isinstance(argument.this, exp.Star):
            return self._column(argument)
        if argument is not None and _holds_aggregate(argument):
            raise HushError(GROUPING_ERROR, "aggregate function calls cannot be nested", SELECT_HINT)
        raise refused(f"{function.upper()}() accepts a column, not an expression", SELECT_HINT)

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
                self.measures[index] = Measure("midpoint_sum", self.measures[index].column)

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
            if name not in self.table.columns:  # PostgreSQL: input columns first, then output names
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
            if output.kind == aggregate.kind and output.measures == measures:
                return index
        self.outputs.append(Output(aggregate.name, aggregate.kind, measures=measures,
                                   column=aggregate.column, visible=False))
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

    def _output_type(self, index: int) -> str:
        output = self.outputs[index]
        if output.kind != "key":
            return "number"
        key = self.keys[output.key]  # type: ignore[index]
        return _KEY_FAMILY[key_type(self.table.columns[key.column], key)]

    # HAVING --------------------------------------------------------------------------------
    def _having(self, node: exp.Expression) -> exp.Expression:
        checked = self._having_term(node)
        if checked.type not in ("boolean", "null"):
            raise HushError(DATATYPE_MISMATCH, "argument of HAVING must be a condition", HAVING_HINT)
        return checked.node

    def _having_term(self, node: exp.Expression) -> Typed:
        constant = literal(node)
        if constant is not None:
            return constant
        if isinstance(node, exp.Paren):
            inner = self._having_term(node.this)
            return Typed(exp.Paren(this=inner.node), inner.type, literal=inner.literal,
                         string=inner.string)
        if isinstance(node, (exp.And, exp.Or)):
            parts = [self._having_condition(p) for p in chain_operands(node)]
            built = parts[0]
            for part in parts[1:]:
                built = type(node)(this=built, expression=part)
            return Typed(built, "boolean")
        if isinstance(node, exp.Not):
            return Typed(exp.Not(this=self._having_condition(node.this)), "boolean")
        if isinstance(node, (exp.EQ, exp.NEQ, exp.LT, exp.LTE, exp.GT, exp.GTE)):
            items = [self._having_term(node.this), self._having_term(node.expression)]
            a, b = self._having_operands(items, "HAVING comparison")
            return Typed(type(node)(this=a, expression=b), "boolean")
        if isinstance(node, exp.Between):
            only_args(node, ("this", "low", "high"), "BETWEEN in HAVING", HAVING_HINT)
            items = [self._having_term(node.this), self._having_term(node.args["low"]),
                     self._having_term(node.args["high"])]
            this, low, high = self._having_operands(items, "HAVING BETWEEN")
            return Typed(exp.Between(this=this, low=low, high=high), "boolean")
        if isinstance(node, exp.In):
            only_args(node, ("this", "expressions"), "IN in HAVING", HAVING_HINT)
            values = [literal(item) for item in node.expressions]
            if not values or any(v is None for v in values):
                raise refused("IN accepts a list of literals", HAVING_HINT)
            this, *rest = self._having_operands([self._having_term(node.this), *values], "HAVING IN")  # type: ignore[list-item]
            return Typed(exp.In(this=this, expressions=rest), "boolean")
        if isinstance(node, exp.Is):
            only_args(node, ("this", "expression", "negate"), "IS in HAVING", HAVING_HINT)
            this = self._having_term(node.this)
            target = node.expression
            if isinstance(target, exp.Boolean):
                if this.type not in ("boolean", "null"):
                    raise HushError(DATATYPE_MISMATCH, "IS TRUE/FALSE takes a condition", HAVING_HINT)
                right: exp.Expression = exp.Boolean(this=bool(target.this))
            elif isinstance(target, exp.Null):
                right = exp.Null()
            else:
                raise refused("HAVING accepts IS [NOT] NULL and IS [NOT] TRUE/FALSE on conditions",
                              HAVING_HINT)
            kwargs = {"negate": True} if node.args.get("negate") else {}
            return Typed(exp.Is(this=this.node, expression=right, **kwargs), "boolean")
        if isinstance(node, (exp.Add, exp.Sub, exp.Mul)):
            left, right_ = self._having_term(node.this), self._having_term(node.expression)
            for side in (left, right_):
                if side.type not in ("number", "null"):
                    raise HushError(DATATYPE_MISMATCH, "+, - and * take numbers", HAVING_HINT)
            return Typed(type(node)(this=left.node, expression=right_.node), "number")
        if isinstance(node, exp.Neg):
            inner = self._having_term(node.this)
            if inner.type not in ("number", "null"):
                raise HushError(DATATYPE_MISMATCH, "unary minus takes a number", HAVING_HINT)
            return Typed(exp.Neg(this=inner.node), "number")
        if isinstance(node, exp.AggFunc):
            index = self._output_for_aggregate(self._aggregate(node))
            return Typed(_output_column(index), "number")
        if is_key_expression(node) and not _holds_aggregate(node) and not (
                isinstance(node, exp.Column) and isinstance(node.this, exp.Star)):
            index = self._output_for_key(node)
            return Typed(_output_column(index), self._output_type(index))
        raise refuse_expression(node, "HAVING", HAVING_HINT)

    def _having_condition(self, node: exp.Expression) -> exp.Expression:
        checked = self._having_term(node)
        if checked.type not in ("boolean", "null"):
            raise HushError(DATATYPE_MISMATCH, "AND, OR and NOT take conditions", HAVING_HINT)
        return checked.node

    def _having_operands(self, items: list[Typed], what: str) -> list[exp.Expression]:
        """Operands after the type check; text literals meeting a date become dates."""
        family = unify(items, what)
        if family != "date":
            return [i.node for i in items]
        return [date_node(i.string or "") if i.type == "string" else i.node for i in items]

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
        if isinstance(node, exp.AggFunc):
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


def _output_column(index: int) -> exp.Column:
    """The placeholder standing for output ``index`` in Plan.having (see plan.output_ref)."""
    return exp.Column(this=exp.to_identifier(output_ref(index)))


def _holds_aggregate(node: exp.Expression) -> bool:
    return isinstance(node, exp.AggFunc) or node.find(exp.AggFunc) is not None


def _short(node: exp.Expression) -> str:
    try:
        text = written_sql(node)
    except Exception:  # the generator may not know every node; the message need not quote it
        return node.key
    return text if len(text) <= 60 else text[:57] + "..."
