"""Types of untyped ``$n`` parameters, inferred from the column each one is compared with.

Some clients (asyncpg, pg8000) send parameters without a type and let the server infer one from
context, as PostgreSQL does. The proxy binds parameters as literals before analysis, so it must
know whether ``occupants > $1`` means the number 2 or the text '2'. Pure; reads only policies.
"""

from __future__ import annotations

import sqlglot.expressions as exp

from proxy.policy import Policies
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
    table = _policy_table(tree, policies)
    for parameter in parameters:
        index = int(parameter.name) - 1
        parent = parameter.parent
        if isinstance(parent, (exp.Limit, exp.Offset)):
            found[index] = "bigint"
        elif table is not None and isinstance(parent, _COMPARISONS):
            column = _compared_column(parent, parameter)
            policy = table.columns.get(column) if column else None
            if policy is not None:
                found[index] = "text" if isinstance(parent, (exp.Like, exp.ILike)) \
                    else column_types(policy).sql
    return found


def _policy_table(tree: exp.Expression, policies: Policies):
    tables = list(tree.find_all(exp.Table))
    if len(tables) != 1:
        return None
    return policies.tables.get(tables[0].name)


def _compared_column(node: exp.Expression, parameter: exp.Expression) -> str | None:
    """The column a comparison's parameter stands against (the other operand)."""
    subject = node.expression if node.this is parameter else node.this
    while isinstance(subject, exp.Paren):
        subject = subject.this
    return subject.name if isinstance(subject, exp.Column) else None
