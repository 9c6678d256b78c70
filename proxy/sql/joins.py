"""FROM: the tables a query reads, their joins, and the one table analysis sees.

Pure (sqlglot trees and policies only). A query reads one policy table, or several joined in
one of these shapes, each kept to what the rewrite can bound (``proxy.sql.rewrite``'s module
notes hold the sensitivity argument):

- same population: ``FROM a JOIN b ON b.<individual> = a.<individual>`` (or ``USING``), inner
  join only, on equality of the two tables' individual columns and nothing else, both tables
  with ``[individual]`` naming the same population. Every joined row then belongs to exactly
  one individual, the one both its halves belong to, so removing an individual from every
  table of its population removes exactly its joined rows; one individual owns at most the
  product of the tables' ``most_rows`` joined rows, the ceiling of the rows bound.
- public lookup: ``JOIN tariffs t ON t.tariff = h.tariff``, a table with ``public = true``
  joined on its declared ``key`` to a column of the same kind of a protected table already in
  FROM. The rewrite keeps only key values that occur once in the public table, so each row of
  the protected tables meets at most one of its rows: the join maps rows to rows and nobody
  owns more joined rows than before. Its columns group and filter like any other; their group
  domains are the public table's declared values (the cells stay decided by the policy and the
  query text, before anything runs).
- semi-join: a top-level AND term ``<individual> IN (SELECT <individual> FROM <table of the
  same population> [WHERE <condition>])``. Whether a row passes depends only on the rows of its
  own individual in the other table, so removing one individual changes no one else's rows.
  The inner WHERE goes through the same filter checker as the outer one.

Everything else is refused (0A000) with a hint: outer, cross, natural and lateral joins, comma
lists, joins on other columns or on several conditions, self-joins, tables of different
populations, and row tables (no ``[individual]``) joined to anything but public tables.

The tables joined become one ``TablePolicy`` for analysis: a column keeps its name when only
one table has it, else it is named ``<table>.<column>``; the individual columns of the
protected tables are one column (they are equal in every joined row). Analysts name columns
qualified by table or alias, or unqualified when that is unambiguous (42702 otherwise).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from math import prod

import sqlglot.expressions as exp

from proxy.errors import (AMBIGUOUS_COLUMN, DUPLICATE_ALIAS, INSUFFICIENT_PRIVILEGE, SYNTAX_ERROR,
                          UNDEFINED_COLUMN, UNDEFINED_TABLE, HushError, refused)
from proxy.policy import ColumnPolicy, Individual, Policies, TablePolicy
from proxy.sql.filters import check_filter
from proxy.sql.keys import bucket_reader
from proxy.sql.plan import Join

_ASCII_LOWER = str.maketrans("ABCDEFGHIJKLMNOPQRSTUVWXYZ", "abcdefghijklmnopqrstuvwxyz")

JOIN_HINT = ("joins accepted: tables of the same population joined on their individual columns "
             "(FROM readings r JOIN households h ON h.household_id = r.household_id), a public "
             "table joined on its key (JOIN tariffs t ON t.tariff = h.tariff), and WHERE "
             "<individual> IN (SELECT <individual> FROM <table of the same population> WHERE ...)")
FROM_HINT = "write FROM <table> [AS alias] [JOIN <table> [AS alias] ON <a.column> = <b.column>]"
SEMI_HINT = ("write <individual column> IN (SELECT <individual column> FROM <table of the same "
             "population> [WHERE ...]) as a term of the WHERE's top-level AND")

# Join arguments that make a join other than a plain inner join, with the refusal's words.
_JOIN_REFUSALS = {
    "side": "{} JOIN is not accepted: only inner joins keep each row with its individual",
    "method": "{} JOIN is not accepted: name the join columns with ON or USING",
    "kind": "{} JOIN is not accepted",
    "global_": "GLOBAL joins are not accepted",
    "hint": "join hints are not accepted",
    "match_condition": "ASOF joins are not accepted",
    "pivots": "PIVOT is not accepted",
}


def name_of(identifier: exp.Expression | None) -> str:
    """An identifier as PostgreSQL resolves it: quoted names exact, unquoted ones with A-Z folded
    to lower case (PostgreSQL folds only ASCII letters in UTF-8 databases)."""
    if not isinstance(identifier, exp.Identifier):
        raise refused("this name is not accepted", FROM_HINT)
    if "\x00" in identifier.this:
        raise HushError(SYNTAX_ERROR, "names may not contain NUL characters", FROM_HINT)
    return identifier.this if identifier.quoted else identifier.this.translate(_ASCII_LOWER)


@dataclass(frozen=True)
class _Named:
    """One table in FROM: its policy and the qualifiers that name it (alias, or name)."""

    policy: TablePolicy
    qualifiers: frozenset[str]


@dataclass
class Scope:
    """What a FROM makes visible: ``table`` (the one table analysis sees), ``joins`` (empty
    for one table), and how written column names resolve to its columns."""

    table: TablePolicy
    joins: tuple[Join, ...] = ()
    qualified: dict[tuple[str, str], str] = field(default_factory=dict)  # (qualifier, column) -> name
    unqualified: dict[str, set[str]] = field(default_factory=dict)  # column -> names
    qualifiers: tuple[str, ...] = ()

    def resolve(self, node: exp.Column) -> tuple[str, ColumnPolicy]:
        """A column reference's name in ``table`` and its policy (42P01 / 42703 / 42702)."""
        qualifier = node.args.get("table")
        name = name_of(node.this)
        if qualifier is not None:
            prefix = name_of(qualifier)
            schema = node.args.get("db")
            if schema is not None:
                prefix = f"{name_of(schema)}.{prefix}"
            if prefix not in self.qualifiers:
                raise HushError(UNDEFINED_TABLE, f'missing FROM-clause entry for table "{prefix}"',
                                f"qualify columns with {' or '.join(self.qualifiers[:4])}, "
                                "or not at all")
            found = self.qualified.get((prefix, name))
            if found is None:
                raise self._no_column(name)
            return found, self.table.columns[found]
        names = self.unqualified.get(name, set())
        if not names:
            raise self._no_column(name)
        if len(names) > 1:
            raise HushError(AMBIGUOUS_COLUMN, f'column reference "{name}" is ambiguous',
                            "qualify it with its table or alias: " + ", ".join(
                                f"{q}.{name}" for (q, c) in self.qualified
                                if c == name and not q.startswith("public.")))
        found = next(iter(names))
        return found, self.table.columns[found]

    def _no_column(self, name: str) -> HushError:
        return HushError(UNDEFINED_COLUMN, f'column "{name}" does not exist',
                         f"columns of {self.table.table}: " + ", ".join(self.table.columns))


def read_from(select: exp.Select, policies: Policies, granted: frozenset[str], *,
              public: bool = False) -> Scope:
    """The scope of a SELECT's FROM and JOINs; HushError for anything not accepted. A public
    table alone is accepted only when ``public`` (a read of its rows, ``proxy.sql.public``)."""
    clause = select.args.get("from_") or select.args.get("from")
    if clause is None:
        raise refused("SELECT without FROM is not accepted", "name one table: FROM <table>")
    first = _named_table(clause.this, policies, granted)
    named = [first]
    edges: list[tuple[int, str, int, str]] = []  # (table, its column, earlier table, its column)
    for join in select.args.get("joins") or []:
        for key, value in join.args.items():
            if key in ("this", "on", "using") or value in (None, False, []) \
                    or (key == "kind" and str(value).upper() == "INNER"):
                continue
            word = str(value).upper() if isinstance(value, str) else key.upper()
            raise refused(_JOIN_REFUSALS.get(key, "this form of JOIN is not accepted ({})").format(word),
                          JOIN_HINT)
        if join.args.get("on") is None and not join.args.get("using"):
            raise refused("a join without ON or USING (a cross join or a list of tables) is not "
                          "accepted", JOIN_HINT)
        table = _named_table(join.this, policies, granted)
        for taken in [q for t in named for q in t.qualifiers]:
            if taken in table.qualifiers:
                raise HushError(DUPLICATE_ALIAS, f'table name "{taken}" specified more than once',
                                "give each table its own alias")
        if any(t.policy.table == table.policy.table for t in named):
            raise refused(f"table {table.policy.table} is joined to itself: self-joins are not "
                          "accepted", JOIN_HINT)
        named.append(table)
        edges.append(_join_edge(join, named))
    if len(named) == 1:
        return _single_scope(first, public)
    return _joined_scope(named, edges)


def _named_table(source: exp.Expression, policies: Policies, granted: frozenset[str]) -> _Named:
    """A FROM or JOIN item: a granted policy table, unqualified or in schema public, with an
    optional alias."""
    if not isinstance(source, exp.Table) or not isinstance(source.this, exp.Identifier):
        raise refused("FROM accepts tables, not a function, subquery or list of values", FROM_HINT)
    for key, value in source.args.items():
        if value not in (None, False, []) and key not in ("this", "db", "alias"):
            raise refused(f"this form of FROM is not accepted ({key})", FROM_HINT)
    name = name_of(source.this)
    schema = name_of(source.args["db"]) if source.args.get("db") is not None else None
    if schema is not None and schema != "public":
        raise no_table(f"{schema}.{name}", policies, granted)
    table = policies.tables.get(name)
    if table is None:
        raise no_table(name, policies, granted)
    if name not in granted:
        raise HushError(INSUFFICIENT_PRIVILEGE, f"permission denied for table {name}",
                        "ask an administrator to grant it; " + granted_list(policies, granted))
    alias = source.args.get("alias")
    if alias is not None:
        if any(v not in (None, False, []) for k, v in alias.args.items() if k != "this"):
            raise refused("a table alias with column names is not accepted", "write FROM <table> AS a")
        return _Named(table, frozenset({name_of(alias.this)}))
    return _Named(table, frozenset({name, f"public.{name}"}))


def no_table(name: str, policies: Policies, granted: frozenset[str]) -> HushError:
    return HushError(UNDEFINED_TABLE, f'relation "{name}" does not exist',
                     granted_list(policies, granted))


def granted_list(policies: Policies, granted: frozenset[str]) -> str:
    names = sorted(granted & set(policies.tables))
    return "tables you may query: " + (", ".join(names) if names else "none")


def _join_edge(join: exp.Join, named: list[_Named]) -> tuple[int, str, int, str]:
    """(new table, its column, earlier table, its column) of a join's one equality."""
    new = len(named) - 1
    using = join.args.get("using")
    if using:
        if len(using) != 1:
            raise refused("a join is accepted on one pair of columns", JOIN_HINT)
        column = name_of(using[0] if isinstance(using[0], exp.Identifier) else using[0].this)
        having = [i for i in range(new) if column in named[i].policy.columns]
        if len(having) != 1 or column not in named[new].policy.columns:
            raise refused(f"USING ({column}) must name a column of the joined table and of "
                          "exactly one table before it", JOIN_HINT)
        return new, column, having[0], column
    condition = join.args["on"]
    while isinstance(condition, exp.Paren):
        condition = condition.this
    if not isinstance(condition, exp.EQ) or not all(
            isinstance(side, exp.Column) and side.args.get("table") is not None
            and not isinstance(side.this, exp.Star) for side in (condition.this, condition.expression)):
        raise refused("a join is accepted on one equality of two qualified columns "
                      "(ON a.column = b.column), nothing else", JOIN_HINT)
    sides = [_side(column, named) for column in (condition.this, condition.expression)]
    ends = sorted(sides, key=lambda s: -s[0])
    if ends[0][0] != new or ends[1][0] == new:
        raise refused("a join's ON must compare a column of the joined table with a column of a "
                      "table before it", JOIN_HINT)
    return new, ends[0][1], ends[1][0], ends[1][1]


def _side(node: exp.Column, named: list[_Named]) -> tuple[int, str]:
    prefix = name_of(node.args["table"])
    if node.args.get("db") is not None:
        prefix = f"{name_of(node.args['db'])}.{prefix}"
    for index, table in enumerate(named):
        if prefix in table.qualifiers:
            column = name_of(node.this)
            if column not in table.policy.columns:
                raise HushError(UNDEFINED_COLUMN, f'column {prefix}.{column} does not exist',
                                f"columns of {table.policy.table}: " + ", ".join(table.policy.columns))
            return index, column
    raise HushError(UNDEFINED_TABLE, f'missing FROM-clause entry for table "{prefix}"', FROM_HINT)


def _single_scope(table: _Named, public: bool = False) -> Scope:
    policy = table.policy
    if policy.public and not public:
        raise refused(f"{policy.table} is a public table: read its rows (SELECT * FROM "
                      f"{policy.table}), or join it to a protected table", JOIN_HINT)
    scope = Scope(policy, qualifiers=tuple(sorted(table.qualifiers)))
    for column in policy.columns:
        scope.unqualified[column] = {column}
        for qualifier in table.qualifiers:
            scope.qualified[(qualifier, column)] = column
    return scope


def _joined_scope(named: list[_Named], edges: list[tuple[int, str, int, str]]) -> Scope:
    """Check each join against the accepted shapes, then build the one table they make."""
    protected = [t.policy for t in named if not t.policy.public]
    if not protected:
        raise refused("a join of public tables only is not accepted", JOIN_HINT)
    for new, column, earlier, other in edges:
        _check_edge(named[new].policy, column, named[earlier].policy, other)
    # A public table meets one protected table on its key, and protected tables meet each
    # other only directly: never two protected tables through a public one (a join of
    # different individuals' rows).
    first_protected = next(i for i, t in enumerate(named) if not t.policy.public)
    for new, _, earlier, _ in edges:
        if new > first_protected and not named[new].policy.public and named[earlier].policy.public:
            raise refused(f"table {named[new].policy.table} is joined through public table "
                          f"{named[earlier].policy.table}: join it on its individual column to "
                          "a protected table", JOIN_HINT)
    for index, table in enumerate(named):
        if table.policy.public and sum(index in (e[0], e[2]) for e in edges) != 1:
            raise refused(f"public table {table.policy.table} is joined more than once",
                          JOIN_HINT)
    individuals = [p for p in protected if p.individual is not None]
    if len(protected) > 1 and len(individuals) < len(protected):
        row_table = next(p.table for p in protected if p.individual is None)
        raise refused(f"table {row_table} has no [individual]: it may be joined only to public "
                      "tables", JOIN_HINT)
    timings = {p.timing for p in protected}
    if len(timings) > 1:
        raise refused("the joined tables declare different [timing]: their answers cannot keep "
                      "both promises", "query the tables one at a time")
    # The individual column of every protected table is one plan column (equal in joined rows).
    owner = protected[0]
    shared = owner.individual.column if owner.individual is not None else None
    counts: dict[str, int] = {}
    for table in named:
        for column in table.policy.columns:
            if not _is_individual(table.policy, column):
                counts[column] = counts.get(column, 0) + 1
    columns: dict[str, ColumnPolicy] = {}
    joins: list[Join] = []
    scope = Scope(owner, qualifiers=tuple(sorted(q for t in named for q in t.qualifiers)))
    for index, table in enumerate(named):
        provided = []
        for column, policy in table.policy.columns.items():
            if _is_individual(table.policy, column):
                name = shared or column
            else:
                # A name two tables have (or the shared individual's) is qualified by table.
                name = column if counts[column] == 1 and column != shared \
                    else f"{table.policy.table}.{column}"
            columns.setdefault(name, policy)
            provided.append((name, column))
            scope.unqualified.setdefault(column, set()).add(name)
            for qualifier in table.qualifiers:
                scope.qualified[(qualifier, column)] = name
        edge = next((e for e in edges if e[0] == index), None)
        joins.append(Join(table.policy, "from" if edge is None else "inner", tuple(provided),
                          column=edge[1] if edge else None,
                          to=(edge[2], edge[3]) if edge else None))
    individual = None
    if owner.individual is not None:
        individual = Individual(
            column=shared, population=owner.individual.population,  # type: ignore[arg-type]
            most_rows=prod(p.most_rows for p in protected),
            bounds="declared" if any(p.individual.bounds == "declared"  # type: ignore[union-attr]
                                     for p in protected) else "chosen")
    scope.table = TablePolicy(
        table=", ".join(t.policy.table for t in named), source=owner.source,
        description="joined: " + ", ".join(t.policy.table for t in named),
        individual=individual, timing=owner.timing, columns=columns)
    scope.joins = tuple(joins)
    return scope


def _is_individual(policy: TablePolicy, column: str) -> bool:
    return policy.individual is not None and policy.individual.column == column


def _check_edge(new: TablePolicy, column: str, earlier: TablePolicy, other: str) -> None:
    """Refuse a join whose one equality is not of an accepted shape (module notes)."""
    shown = f"{new.table}.{column} = {earlier.table}.{other}"
    if new.public or earlier.public:
        public, key, partner, partner_column = ((new, column, earlier, other) if new.public
                                                else (earlier, other, new, column))
        if partner.public:
            raise refused(f"the join {shown} joins two public tables", JOIN_HINT)
        if public.key is None or key != public.key:
            raise refused(f"the join {shown} is not on the declared key of public table "
                          f"{public.table}" + (f" ({public.key})" if public.key else
                                               " (it declares none)"), JOIN_HINT)
        if public.columns[key].kind != partner.columns[partner_column].kind:
            raise refused(f"the join {shown} compares a {public.columns[key].kind} column with a "
                          f"{partner.columns[partner_column].kind} column", JOIN_HINT)
        return
    if new.individual is None or earlier.individual is None:
        row_table = new.table if new.individual is None else earlier.table
        raise refused(f"table {row_table} has no [individual]: it may be joined only to public "
                      "tables", JOIN_HINT)
    if new.individual.population != earlier.individual.population:
        raise refused(f"tables {earlier.table} and {new.table} protect different populations "
                      f"({earlier.individual.population}, {new.individual.population}): a join "
                      "would mix individuals", JOIN_HINT)
    if column != new.individual.column or other != earlier.individual.column:
        raise refused(f"the join {shown} is not on the individual columns "
                      f"({new.table}.{new.individual.column} = "
                      f"{earlier.table}.{earlier.individual.column})", JOIN_HINT)


def take_semi_joins(condition: exp.Expression, scope: Scope, policies: Policies,
                    granted: frozenset[str]) -> exp.Expression | None:
    """``condition`` without its top-level AND terms ``<individual> IN (SELECT <individual>
    FROM <table of the same population> [WHERE ...])``, each of which becomes a semi-join in
    ``scope.joins`` (its WHERE checked like the outer one); None when nothing is left."""
    terms = _and_terms(condition)
    kept = [term for term in terms if not _is_semi_join(term)]
    for term in terms:
        if _is_semi_join(term):
            _add_semi_join(term, scope, policies, granted)
    if len(kept) == len(terms):
        return condition
    return exp.and_(*kept) if kept else None  # copies: the analysed tree is never modified


def _and_terms(condition: exp.Expression) -> list[exp.Expression]:
    """The terms of a top-level AND chain, in order (without recursion: chains can be long)."""
    terms, stack = [], [condition]
    while stack:
        node = stack.pop()
        while isinstance(node, exp.Paren):
            node = node.this
        if isinstance(node, exp.And):
            stack += [node.expression, node.this]
        else:
            terms.append(node)
    return terms


def _is_semi_join(term: exp.Expression) -> bool:
    return isinstance(term, exp.In) and term.args.get("query") is not None


def _add_semi_join(term: exp.In, scope: Scope, policies: Policies, granted: frozenset[str]) -> None:
    if any(v not in (None, False, []) for k, v in term.args.items() if k not in ("this", "query")) \
            or not isinstance(term.this, exp.Column):
        raise refused("IN (SELECT ...) is accepted on the individual column only", SEMI_HINT)
    individual = scope.table.individual
    outer, _ = scope.resolve(term.this)
    if individual is None or outer != individual.column:
        raise refused("IN (SELECT ...) is accepted on the individual column of a table with "
                      "[individual] only", SEMI_HINT)
    inner = term.args["query"]
    inner = inner.this if isinstance(inner, exp.Subquery) else inner
    if not isinstance(inner, exp.Select) or any(
            v not in (None, False, []) for k, v in inner.args.items()
            if k not in ("expressions", "from", "from_", "where")):
        raise refused("the subquery of IN is accepted as SELECT <individual> FROM <table> "
                      "[WHERE ...], nothing else", SEMI_HINT)
    clause = inner.args.get("from_") or inner.args.get("from")
    if clause is None:
        raise refused("the subquery of IN needs a FROM", SEMI_HINT)
    table = _named_table(clause.this, policies, granted)
    inner_scope = _single_scope(table)
    policy = table.policy
    if policy.individual is None:
        raise refused(f"table {policy.table} has no [individual]: IN (SELECT ...) is accepted "
                      "over tables of the same population", SEMI_HINT)
    if policy.individual.population != individual.population:
        raise refused(f"table {policy.table} does not protect the population "
                      f"{individual.population}: IN (SELECT ...) is accepted over tables of the "
                      "same population", SEMI_HINT)
    selected = inner.expressions
    if len(selected) != 1 or not isinstance(selected[0], exp.Column) \
            or isinstance(selected[0].this, exp.Star) \
            or inner_scope.resolve(selected[0])[0] != policy.individual.column:
        raise refused(f"the subquery of IN must select {policy.individual.column}, the "
                      f"individual column of {policy.table}", SEMI_HINT)
    where = inner.args.get("where")
    checked = check_filter(where.this, inner_scope.resolve, bucket_reader(policy, inner_scope.resolve),
                           policies.limits) if where is not None else None
    if not scope.joins:
        scope.joins = (Join(scope.table, "from", tuple((c, c) for c in scope.table.columns)),)
    provider = next((i, own) for i, j in enumerate(scope.joins) if j.kind != "semi"
                    for name, own in j.columns if name == outer)
    scope.joins = scope.joins + (Join(policy, "semi", column=policy.individual.column,
                                      to=provider, where=checked),)
