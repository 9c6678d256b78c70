"""What an analyst may ask, in words and rows: the comments the catalog mirror carries on its
tables and columns, and the read-only relation ``hushql.my_tables``. Pure (no I/O).

Why this reveals nothing: everything here is the policy (declared kinds, ranges, values,
steps, units, descriptions, individuals) and the analyst's own remaining budget, which
``SHOW hushql.remaining`` already tells. None of it is read from the data; declared domains
are chosen by data owners from knowledge of the data, never computed from it.

``hushql.my_tables`` is answered by the catalog from the analyst's mirror: every reference to
it is replaced, after the text checks, by a subquery over literal rows (one per granted column),
built from the policies and the remaining budget the session passes in. So analysts can filter
and sort it with ordinary SQL, and it holds only their own tables.
"""

from __future__ import annotations

from decimal import Decimal
from typing import Sequence

from psycopg import sql

from proxy.policy import ColumnPolicy, Policies, TablePolicy
from proxy.wire import own_database, statements

SCHEMA = "hushql"
RELATION = "my_tables"

# What each kind may be asked for (the analyser's rules, as the README's kind table says).
_AGGREGATES = {"category": "COUNT", "boolean": "COUNT", "date": "COUNT",
               "integer": "COUNT, SUM, AVG", "number": "COUNT, SUM, AVG"}

# The relation's columns and their types, in order.
COLUMNS: tuple[tuple[str, str], ...] = (
    ("table_name", "text"), ("column_name", "text"), ("kind", "text"), ("low", "text"),
    ("high", "text"), ("step", "numeric"), ("allowed_values", "text"), ("measured_in", "text"),
    ("description", "text"), ("aggregates", "text"), ("group_by", "boolean"),
    ("identifies_individual", "boolean"), ("population", "text"), ("most_rows", "integer"),
    ("remaining_budget", "numeric"),
)


def _shown(value: object) -> str:
    return format(value, "f") if isinstance(value, Decimal) else str(value)


def column_facts(column: ColumnPolicy) -> str:
    """What may be asked of a column, in words: its kind and declared range, values, step and
    unit."""
    if column.kind == "category":
        facts = "category, one of: " + ", ".join(column.values or [])
    elif column.kind == "boolean":
        facts = "boolean, true or false"
    else:
        facts = f"{column.kind} from {_shown(column.low)} to {_shown(column.high)}"
        if column.kind == "number":
            facts += f" in steps of {_shown(column.unit)}"
        if column.kind in ("integer", "number"):
            facts += " (sums count values outside as the nearest end)"
    return facts + (f", measured in {column.measured_in}" if column.measured_in else "")


def column_comment(column: ColumnPolicy, identifying: bool = False) -> str:
    """A mirror column's comment: its description (if any), then ``column_facts``."""
    parts = [column.description] if column.description else []
    parts.append(column_facts(column))
    if identifying:
        parts.append("identifies the individual whose contributions are bounded")
    return "; ".join(parts)


def table_comment(policy: TablePolicy) -> str:
    """A mirror table's comment: its description, then whom it protects."""
    parts = [policy.description] if policy.description else []
    if policy.individual is None:
        parts.append("each row is one individual")
    else:
        rows = f"{policy.most_rows} row{'s' if policy.most_rows != 1 else ''}"
        parts.append(f"individuals: rows sharing {policy.individual.column} are one individual "
                     f"of population {policy.population}, at most {rows} each")
    return "; ".join(parts)


def my_tables_rows(policies: Policies, analyst: str, remaining: Decimal | None
                   ) -> list[tuple[object, ...]]:
    """The rows of ``hushql.my_tables`` for ``analyst``: one per column of each granted table
    (none for an account without grants), in ``COLUMNS`` order."""
    grant = policies.analysts.get(analyst)
    out: list[tuple[object, ...]] = []
    for name in sorted(set(grant.tables) if grant is not None else ()):
        table = policies.tables[name]
        identifying = table.individual.column if table.individual is not None else None
        for column_name, column in table.columns.items():
            ranged = column.kind in ("integer", "number", "date")
            out.append((
                name, column_name, column.kind,
                _shown(column.low) if ranged else None, _shown(column.high) if ranged else None,
                column.unit if column.kind == "number" else None,
                ", ".join(column.values) if column.values else None, column.measured_in,
                column.description, _AGGREGATES[column.kind], column.has_domain,
                column_name == identifying, table.population, table.most_rows, remaining))
    return out


def names_my_tables(text: str) -> bool:
    """Whether the text names ``hushql.my_tables`` (schema-qualified, as it must be)."""
    tokens = statements.tokenize(text)
    return any(_word(tokens[i], SCHEMA) and tokens[i + 1].kind == "op"
               and tokens[i + 1].value == "." and _word(tokens[i + 2], RELATION)
               for i in range(len(tokens) - 2))


def _word(token: statements.Token, value: str) -> bool:
    return token.kind in ("word", "ident") and token.value.lower() == value


def with_my_tables(text: str, rows: Sequence[tuple[object, ...]]) -> str:
    """``text`` with every reference to ``hushql.my_tables`` replaced by a subquery over
    ``rows`` (literals, quoted by psycopg). Runs on checked text."""
    if not names_my_tables(text):
        return text
    typed = [sql.SQL("{}::{} AS {}").format(sql.Literal(None), sql.SQL(kind), sql.Identifier(name))
             for name, kind in COLUMNS]
    selects = [sql.SQL("SELECT {} WHERE false").format(sql.SQL(", ").join(typed))]
    for row in rows:
        selects.append(sql.SQL("SELECT {}").format(sql.SQL(", ").join(
            sql.SQL("{}::{}").format(sql.Literal(value), sql.SQL(kind))
            for value, (_, kind) in zip(row, COLUMNS))))
    body = sql.SQL("({})").format(sql.SQL(" UNION ALL ").join(selects)).as_string()
    return own_database.replace_pg_database(text, body, RELATION, schema=SCHEMA)
