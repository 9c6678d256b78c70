"""Types of untyped ``$n`` parameters, inferred from the column each one is compared with.

Some clients (asyncpg, pg8000) send parameters without a type and let the server infer one from
context, as PostgreSQL does. The proxy binds parameters as literals before analysis, so it must
know whether ``occupants > $1`` means the number 2 or the text '2'. Pure; reads only policies.
"""

from __future__ import annotations

from typing import Callable

import sqlglot.expressions as exp

from proxy.policy import ColumnPolicy, Policies, TablePolicy
from proxy.sql.vocabulary import column_types

_COMPARISONS = (exp.EQ, exp.NEQ, exp.GT, exp.GTE, exp.LT, exp.LTE, exp.Between, exp.In,
                exp.Like, exp.ILike)


def parameter_types(tree: exp.Expression, policies: Policies) -> list[str | None]:
    """One PostgreSQL type name per ``$1..$n`` of ``tree`` (None where the context says nothing).

    Must hold: ``tree`` is one parsed statement. Grants are not checked here (analysis does).
    """
    parameters = [p for p in tree.find_all(exp.Parameter) if p.name.isdigit()]
    if not parameters:
        return []
    count = max(int(p.name) for p in parameters)
    found: list[str | None] = [None] * count
    column_policy = _column_policies(tree, policies)
    for parameter in parameters:
        index = int(parameter.name) - 1
        parent = parameter.parent
        if isinstance(parent, (exp.Limit, exp.Offset)):
            found[index] = "bigint"
        elif isinstance(parent, _COMPARISONS):
            column = _compared_column(parent, parameter)
            policy = column_policy(column) if column is not None else None
            if policy is not None:
                found[index] = "text" if isinstance(parent, (exp.Like, exp.ILike)) \
                    else column_types(policy).sql
    return found


def _column_policies(tree: exp.Expression,
                     policies: Policies) -> Callable[[exp.Column], ColumnPolicy | None]:
    """A lookup of a column reference's policy among the tables the statement names (joined
    ones too, by alias or name); None when unknown or when the tables that have an unqualified
    column disagree on its kind."""
    named: dict[str, TablePolicy] = {}
    for table in tree.find_all(exp.Table):
        policy = policies.tables.get(table.name)
        if policy is not None:
            named[table.alias_or_name] = policy

    def find(column: exp.Column) -> ColumnPolicy | None:
        if column.table:
            policy = named.get(column.table)
            return policy.columns.get(column.name) if policy is not None else None
        found = [p.columns[column.name] for p in named.values() if column.name in p.columns]
        return found[0] if found and len({c.kind for c in found}) == 1 else None
    return find


def _compared_column(node: exp.Expression, parameter: exp.Expression) -> exp.Column | None:
    """The column a comparison's parameter stands against (the other operand)."""
    subject = node.expression if node.this is parameter else node.this
    while isinstance(subject, exp.Paren):
        subject = subject.this
    return subject if isinstance(subject, exp.Column) else None
