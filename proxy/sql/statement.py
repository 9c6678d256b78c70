"""A parameterised statement: parsed once, planned once per class of values, its values bound late.

A prepared statement's text is parsed once (by the wire front), which also folds a cast of a
parameter to the very type it is decoded as (``$1::int``). Each Execute then brings a
``BoundStatement``: that tree with its ``$n`` nodes, and one literal node per value. Its slots are of
two sorts, read from the tree and the policy alone (``late_slots``):

- late: ``column <op> $n`` or ``$n <op> column``, <op> one of = <> < <= > >=, directly under the
  statement's own WHERE (through AND, OR, NOT and parentheses only), where the column is a
  bare column of the one table read, of kind integer, number or date, that appears nowhere else
  in the statement;
- planned: every other slot (LIMIT, HAVING, LIKE patterns, IN lists, key columns, arithmetic,
  casts...).

Why a late value changes nothing but its own text in the plan. Analysis treats a literal in a
late slot in three steps: the tree limits (``proxy.sql.limits.check_tree``) count its nodes and
check its digits; ``proxy.sql.filters.literal`` checks its range and rebuilds it as a fresh
node from its own text; the comparison unifies the column's type with the literal's, and puts
the rebuilt node, unchanged, in the rebuilt WHERE, which the rewrite copies into the backend
SQL. The other readers of WHERE literals are the narrowings of ``proxy.sql.keys.narrowings``:
of GROUP BY keys' domains, which only matter for a key's column (a late slot's column appears
nowhere outside WHERE, so it is no key's column), and of the other columns of an enforced unique
key with the individual, which decide whether the key holds each individual within its bound
(``proxy.sql.rewrite`` notes 10): the engine names those columns (``narrowed``) and a slot on
one of them is planned. Two values of one class (same Python
type, same sign: a negative number is one node more) therefore give plans that differ only in
that literal's text. So the engine plans a class once with a marker value in each late slot,
finds the marker's rendering in the backend SQL (exactly as many times as the slot appears, or
the statement gets no late slots), and on each Execute checks the value with the same two
functions and puts its rendering where the marker was. Fail closed: the first plan of each
class is compared with a fresh analysis of the real values, and any difference turns late
binding off for the statement; planned slots key the plan cache by their values, so a value
that can change cells (a key column's WHERE, a bucket, LIMIT) is planned per value.
``tests/test_statement.py`` compares both paths over many values.

Values are never pasted into SQL as text they brought: a late value's rendering is the SQL of
the node ``filters.literal`` rebuilt from an integer, a finite Decimal or a date. Pure.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from decimal import Decimal
from typing import Any, Callable, Hashable

import sqlglot.expressions as exp

from proxy.errors import UNDEFINED_PARAMETER, HushError
from proxy.policy import Policies
from proxy.sql.filters import literal as checked_literal
from proxy.sql.limits import Limits, check_tree

# Late slots compare with columns of these kinds, and take values of these Python types.
_LATE_KINDS = frozenset({"integer", "number", "date"})
_LATE_TYPES = (int, Decimal, dt.date)
_COMPARISONS = (exp.EQ, exp.NEQ, exp.GT, exp.GTE, exp.LT, exp.LTE)
_CONNECTIVES = (exp.And, exp.Or, exp.Not, exp.Paren)


def slot_index(node: exp.Expression) -> int | None:
    """The n of a ``$n`` node (1-based), or None for any other node."""
    if isinstance(node, (exp.Parameter, exp.Placeholder)):
        inner = node.this
        text = inner.name if isinstance(inner, exp.Expression) else str(inner or "")
        if text.isdigit():
            return int(text)
    return None


@dataclass(frozen=True)
class BoundStatement:
    """A parameterised statement and its values for one Execute.

    ``tree`` holds ``$n`` nodes and is shared: never modified. ``literals[n-1]`` is the literal
    node of ``$n``'s value, ``values[n-1]`` the value it was built from. ``types`` are the slots'
    declared type codes: with the text they decide the tree, so both key the plan cache.
    """

    text: str
    tree: exp.Expression
    values: tuple[Any, ...]
    literals: tuple[exp.Expression, ...]
    types: tuple[int, ...]

    def substituted(self) -> exp.Expression:
        """A copy of the tree with every ``$n`` replaced by its literal (fresh analysis input)."""
        literals = self.literals

        def replace(node: exp.Expression) -> exp.Expression:
            i = slot_index(node)
            if i is None:
                return node
            if not 1 <= i <= len(literals):
                raise HushError(UNDEFINED_PARAMETER, f"there is no parameter ${i}")
            return literals[i - 1].copy()

        return self.tree.transform(replace)

    def shown(self) -> str:
        """The statement as the ledger records it: its text, then each value as a literal."""
        values = ", ".join(f"${i + 1} = {lit.sql(dialect='postgres')}"
                           for i, lit in enumerate(self.literals))
        return f"{self.text}\n-- parameters: {values}" if values else self.text


def _nothing_narrowed(table: str) -> frozenset[str]:
    return frozenset()


def late_slots(tree: exp.Expression, policies: Policies,
               narrowed: Callable[[str], frozenset[str]] = _nothing_narrowed) -> frozenset[int]:
    """The slots (1-based) whose values can be bound late (module rules); ``narrowed(table)``
    names the columns of a policy table whose WHERE literals the rewrite reads (a slot on one
    is planned). Pure given ``narrowed``."""
    if not isinstance(tree, exp.Select):
        return frozenset()
    tables = list(tree.find_all(exp.Table))
    where = tree.args.get("where")
    if len(tables) != 1 or not isinstance(where, exp.Where):
        return frozenset()
    table = policies.tables.get(tables[0].name)
    if table is None:
        return frozenset()
    outside = {c.name for c in tree.find_all(exp.Column)
               if not _under(c, where)} | narrowed(table.table)
    found: set[int] = set()
    refused: set[int] = set()
    for node in tree.find_all(exp.Parameter, exp.Placeholder):
        i = slot_index(node)
        if i is None:
            continue
        column = _compared_column(node, where)
        policy = table.columns.get(column) if column is not None else None
        if policy is None or policy.kind not in _LATE_KINDS or column in outside:
            refused.add(i)
        else:
            found.add(i)
    return frozenset(found - refused)


def _under(node: exp.Expression, ancestor: exp.Expression) -> bool:
    current: exp.Expression | None = node
    while current is not None:
        if current is ancestor:
            return True
        current = current.parent
    return False


def _compared_column(parameter: exp.Expression, where: exp.Where) -> str | None:
    """The bare column a parameter is compared with directly under ``where``, else None."""
    comparison = parameter.parent
    if not isinstance(comparison, _COMPARISONS):
        return None
    other = comparison.expression if comparison.this is parameter else comparison.this
    if not isinstance(other, exp.Column) or not isinstance(other.this, exp.Identifier) \
            or other.table:
        return None
    above = comparison.parent
    while isinstance(above, _CONNECTIVES):
        above = above.parent
    return other.name if above is where else None


def value_class(value: Any) -> Hashable | None:
    """The class a late value plans as (type and sign), or None when it must be planned as
    itself (NULL, text, booleans, floats, timestamps, non-finite numbers)."""
    if isinstance(value, bool) or not isinstance(value, _LATE_TYPES) \
            or isinstance(value, dt.datetime):
        return None
    if isinstance(value, int):
        return ("int", value < 0)
    if isinstance(value, Decimal):
        return ("numeric", value.is_signed()) if value.is_finite() else None
    return ("date",)


def planned_key(value: Any) -> Hashable:
    """A planned value as a cache key: its type and its text (1.0 and 1 plan differently)."""
    return (type(value).__name__, str(value))


def marker(value: Any, slot: int) -> exp.Expression:
    """A literal of ``value``'s class for planning, distinct per slot and unlike ordinary
    values (so its rendering can be found in the backend SQL), shaped as the wire front shapes
    a decoded value (``proxy.wire.types.literal``): a negative number as unary minus."""
    if isinstance(value, dt.date):
        day = dt.date(2731, 1, 1) + dt.timedelta(days=slot)
        return exp.cast(exp.Literal.string(day.isoformat()), "date")
    number = 7_310_000_000_000 + 1_009 * slot
    text = f"{number}.713" if isinstance(value, Decimal) else str(number)
    negative = value.is_signed() if isinstance(value, Decimal) else value < 0
    node: exp.Expression = exp.Literal.number(text)
    return exp.Neg(this=node) if negative else node


def rendering(node: exp.Expression, limits: Limits) -> str:
    """The backend SQL of a late literal, after the checks analysis makes on it: the tree
    limits, then ``filters.literal``'s range rules (raises HushError as analysis would)."""
    check_tree(node, limits)
    checked = checked_literal(node)
    if checked is None:  # not a constant: cannot happen for the types above
        raise ValueError("a late slot's value is not a literal")
    return checked.node.sql(dialect="postgres")


@dataclass(frozen=True)
class Template:
    """Backend SQL with holes for late slots: ``pieces[0] + value(slots[0]) + pieces[1] ...``."""

    pieces: tuple[str, ...]
    slots: tuple[int, ...]

    def fill(self, renderings: dict[int, str]) -> str:
        out = [self.pieces[0]]
        for slot, piece in zip(self.slots, self.pieces[1:]):
            out.append(renderings[slot])
            out.append(piece)
        return "".join(out)


def template(sql: str, markers: dict[int, str], occurrences: dict[int, int]) -> Template | None:
    """``sql`` cut at each slot's marker rendering, or None unless every marker appears exactly
    as often as its slot does in the statement (then the markers cannot be confused with
    anything else the SQL holds)."""
    positions: list[tuple[int, int, int]] = []
    for slot, text in markers.items():
        start = 0
        count = 0
        while True:
            at = sql.find(text, start)
            if at < 0:
                break
            positions.append((at, at + len(text), slot))
            count += 1
            start = at + len(text)
        if count != occurrences[slot]:
            return None
    positions.sort()
    if any(a[1] > b[0] for a, b in zip(positions, positions[1:])):
        return None
    pieces, slots, last = [], [], 0
    for begin, end, slot in positions:
        pieces.append(sql[last:begin])
        slots.append(slot)
        last = end
    pieces.append(sql[last:])
    return Template(tuple(pieces), tuple(slots))


def occurrences(tree: exp.Expression) -> dict[int, int]:
    """How many times each ``$n`` appears in the tree."""
    counts: dict[int, int] = {}
    for node in tree.find_all(exp.Parameter, exp.Placeholder):
        i = slot_index(node)
        if i is not None:
            counts[i] = counts.get(i, 0) + 1
    return counts
