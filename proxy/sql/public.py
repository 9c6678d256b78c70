"""Reading a public table's rows: ``SELECT * FROM tariffs``.

A table whose policy says ``public = true`` holds nothing about anyone (a price list), so its
rows are answered as stored: no noise, no charge. Still only its listed columns exist, the
WHERE goes through the same filter checker (its text reaches the backend only rebuilt), and an
answer may hold at most ``most_cells`` rows (54000 beyond, with a hint), so one statement's
work stays bounded. Accepted:

    SELECT * | <columns> FROM <public table> [WHERE ...] [ORDER BY <columns>] [LIMIT n] [OFFSET n]

Pure: text in, a ``PublicRead`` and its backend SQL out.
"""

from __future__ import annotations

from dataclasses import dataclass

import sqlglot.expressions as exp

from proxy.errors import INVALID_COLUMN_REFERENCE, HushError, refused
from proxy.policy import Policies, TablePolicy
from proxy.sql.filters import check_filter, only_args, unparen
from proxy.sql.joins import Scope, name_of, read_from
from proxy.sql.keys import bucket_reader
from proxy.sql.vocabulary import column_types

READ_HINT = ("a public table answers SELECT * | <columns> FROM <table> [WHERE ...] "
             "[ORDER BY <columns>] [LIMIT n] [OFFSET n]; join it to a protected table for "
             "aggregates over people")
# The PostgreSQL type each column kind is answered as (and cast to, so the answer's types are
# the policy's whatever the backend stores).
_CLAUSES = frozenset({"expressions", "from", "from_", "where", "order", "limit", "offset"})


@dataclass(frozen=True)
class PublicRead:
    """The rows of one public table: ``columns`` are (output name, column) pairs, ``order``
    (column, descending, nulls first) triples."""

    table: TablePolicy
    columns: tuple[tuple[str, str], ...]
    where: exp.Expression | None
    order: tuple[tuple[str, bool, bool], ...]
    limit: int | None
    offset: int | None
    most_rows: int


def is_public_read(select: exp.Select, policies: Policies) -> bool:
    """Whether ``select`` reads one public table and nothing else (no join)."""
    clause = select.args.get("from_") or select.args.get("from")
    if clause is None or select.args.get("joins") or not isinstance(clause.this, exp.Table):
        return False
    source = clause.this
    if not isinstance(source.this, exp.Identifier):
        return False
    table = policies.tables.get(name_of(source.this))
    return table is not None and table.public


def read_public(select: exp.Select, policies: Policies, granted: frozenset[str]) -> PublicRead:
    """The read ``select`` asks for; HushError for anything else (aggregates included: a
    public table alone is read, not summarised)."""
    for key, value in select.args.items():
        if value not in (None, False, []) and key not in _CLAUSES:
            raise refused(f"this form of SELECT is not accepted on a public table ({key})", READ_HINT)
    scope = read_from(select, policies, granted, public=True)
    table = scope.table
    columns: list[tuple[str, str]] = []
    for node in select.expressions:
        alias = name_of(node.args["alias"]) if isinstance(node, exp.Alias) else None
        target = unparen(node.this if isinstance(node, exp.Alias) else node)
        if isinstance(target, exp.Star) or (isinstance(target, exp.Column)
                                            and isinstance(target.this, exp.Star)):
            columns += [(name, name) for name in table.columns]
        elif isinstance(target, exp.Column):
            only_args(target, ("this", "table", "db"), "a column reference", READ_HINT)
            name, _ = scope.resolve(target)
            columns.append((alias or name, name))
        else:
            raise refused("a public table's rows are read as stored: select columns or *",
                          READ_HINT)
    where = select.args.get("where")
    condition = check_filter(where.this, scope.resolve, bucket_reader(table, scope.resolve),
                             policies.limits) if where is not None else None
    return PublicRead(table, tuple(columns), condition, _order(select, scope, columns),
                      _count(select.args.get("limit")), _count(select.args.get("offset")),
                      policies.defaults.most_cells)


def _order(select: exp.Select, scope: Scope,
           columns: list[tuple[str, str]]) -> tuple[tuple[str, bool, bool], ...]:
    order = select.args.get("order")
    if order is None:
        return ()
    only_args(order, ("expressions",), "ORDER BY", READ_HINT)
    items = []
    for ordered in order.expressions:
        only_args(ordered, ("this", "desc", "nulls_first"), "ORDER BY", READ_HINT)
        target = unparen(ordered.this)
        if isinstance(target, exp.Literal) and not target.is_string and target.this.isdigit():
            position = int(target.this)
            if not 1 <= position <= len(columns):
                raise HushError(INVALID_COLUMN_REFERENCE,
                                f"ORDER BY position {position} is not in select list",
                                f"positions run from 1 to {len(columns)}")
            column = columns[position - 1][1]
        elif isinstance(target, exp.Column) and not isinstance(target.this, exp.Star):
            named = [c for output, c in columns if output == name_of(target.this)]
            column = named[0] if named and target.args.get("table") is None \
                else scope.resolve(target)[0]
        else:
            raise refused("ORDER BY on a public table accepts columns and positions", READ_HINT)
        descending = bool(ordered.args.get("desc"))
        nulls_first = ordered.args.get("nulls_first")
        items.append((column, descending, descending if nulls_first is None else bool(nulls_first)))
    return tuple(items)


def _count(clause: exp.Expression | None) -> int | None:
    if clause is None:
        return None
    value = unparen(clause.args.get("expression") or clause.args.get("count") or exp.Null())
    if isinstance(value, exp.Literal) and not value.is_string and value.this.isdigit():
        return int(value.this)
    raise refused("LIMIT and OFFSET take a non-negative integer literal", READ_HINT)


def read_sql(read: PublicRead) -> str:
    """The backend SQL of a read: the listed columns cast to their kinds' types, at most
    ``most_rows + 1`` rows (one more than allowed, so the engine can tell)."""
    def column(name: str) -> exp.Column:
        return exp.Column(this=exp.to_identifier(name, quoted=True))

    source = exp.to_table(read.table.source, dialect="postgres")
    for part in ("this", "db"):
        node = source.args.get(part)
        if isinstance(node, exp.Identifier):
            node.set("quoted", True)
    select = exp.Select().select(*[
        exp.alias_(exp.cast(column(name), column_types(read.table.columns[name]).sql),
                   exp.to_identifier(f"c{n}"), copy=False)
        for n, (_, name) in enumerate(read.columns)], copy=False).from_(source, copy=False)
    if read.where is not None:
        select = select.where(read.where.copy(), copy=False)
    if read.order:
        select = select.order_by(*[exp.Ordered(this=column(name), desc=desc, nulls_first=first)
                                   for name, desc, first in read.order], copy=False)
    limit = read.most_rows + 1 if read.limit is None else min(read.limit, read.most_rows + 1)
    select = select.limit(limit, copy=False)
    if read.offset:
        select = select.offset(read.offset, copy=False)
    return select.sql(dialect="postgres")
