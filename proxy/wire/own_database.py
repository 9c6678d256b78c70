"""pg_database as an analyst sees it: one row, the proxy's own database.

psql's ``\\l`` and some GUI tools read ``pg_catalog.pg_database``, which lists every database on
the server: the backend's, other teams', the mirrors. The catalog allows the name only because
every reference to it, bare or qualified by ``pg_catalog``, is replaced in the text, after the
text checks and before it runs, by a subquery over the mirror's own row (``datname =
current_database()``) in which ``datname`` is the proxy's database name. Rules:

- Only relation references are replaced; a column qualifier (``pg_database.datname``) is left,
  and resolves to the subquery, which keeps the relation's name as its alias
  (``pg_catalog.pg_database.datname`` loses its schema so that it does too).
- A reference the rules cannot place makes the text malformed, so the mirror refuses it: the
  failure is a syntax error, never another database's row.
"""

from __future__ import annotations

from typing import Sequence

from psycopg import sql

from proxy.wire import statements
from proxy.wire.statements import Token

RELATION = "pg_database"

# Words that may follow a FROM item when it has no alias (PostgreSQL's grammar; common
# practice for reading FROM lists). Any other word after the relation is taken as its alias.
_ENDS_FROM_ITEM = frozenset({
    "WHERE", "ORDER", "GROUP", "HAVING", "LIMIT", "OFFSET", "FETCH", "JOIN", "INNER", "LEFT",
    "RIGHT", "FULL", "CROSS", "NATURAL", "ON", "USING", "UNION", "INTERSECT", "EXCEPT",
    "WINDOW", "FOR", "TABLESAMPLE"})

COLUMNS_QUERY = ("SELECT attname FROM pg_catalog.pg_attribute WHERE attrelid = "
                 "'pg_catalog.pg_database'::pg_catalog.regclass AND attnum > 0 AND NOT "
                 "attisdropped ORDER BY attnum")


def names_pg_database(text: str, relation: str = RELATION) -> bool:
    """Whether the text mentions pg_database (or another ``relation``) at all (as a word or
    quoted name)."""
    return any(t.kind in ("word", "ident") and t.value.lower() == relation
               for t in statements.tokenize(text))


def own_database_subquery(columns: Sequence[str], database: str) -> str:
    """The one-row stand-in for pg_database: the mirror's row with ``datname`` = ``database``
    (kept as it is when ``database`` is empty). ``columns`` are pg_database's, in order."""
    shown = [sql.SQL("{}::pg_catalog.name AS datname").format(sql.Literal(database))
             if name == "datname" and database else sql.Identifier(name) for name in columns]
    return sql.SQL("(SELECT {} FROM pg_catalog.pg_database WHERE datname = "
                   "pg_catalog.current_database())").format(sql.SQL(", ").join(shown)).as_string()


def replace_pg_database(text: str, subquery: str, relation: str = RELATION,
                        schema: str = "pg_catalog", bare: bool = True) -> str:
    """``text`` with every relation reference to pg_database (or another ``relation`` of
    ``schema``, by the same rules) replaced by ``subquery``; with ``bare`` False only the
    references qualified by ``schema`` (an unqualified name may be the query's own CTE)."""
    tokens = statements.tokenize(text)
    out: list[str] = []
    position = 0
    for i, token in enumerate(tokens):
        if token.kind not in ("word", "ident") or token.value.lower() != relation:
            continue
        following = tokens[i + 1] if i + 1 < len(tokens) else None
        start = token.start
        qualified = i >= 2 and _is_op(tokens[i - 1], ".") \
            and tokens[i - 2].kind in ("word", "ident") and tokens[i - 2].value.lower() == schema
        if qualified:
            start = tokens[i - 2].start
        elif not bare:
            continue
        if _is_op(following, "."):
            # A qualifier: pg_database.datname is left to resolve to the subquery (named after
            # the relation); pg_catalog.pg_database.datname loses its schema to do the same.
            if qualified:
                out += [text[position:start], relation]
                position = token.end
            continue
        has_alias = following is not None and (following.kind == "ident" or (
            following.kind == "word" and following.value not in _ENDS_FROM_ITEM))
        out += [text[position:start], subquery, "" if has_alias else f" AS {relation}"]
        position = token.end
    out.append(text[position:])
    return "".join(out)


def _is_op(token: Token | None, value: str) -> bool:
    return token is not None and token.kind == "op" and token.value == value
