"""Reading the ledger as an administrator: summaries, history, grants, exports, verification.

Rules of this module:
- It reads the tables ``proxy.ledger`` migrates and writes only through the schema's own
  functions (``grant_budget``), so the ledger's lock order and hash chain hold for its writes.
- Epsilon stays Decimal; sums are done by PostgreSQL.
- ``verify`` recomputes the hash chain in Python from each row's canonical content (the
  schema's ``charge_content`` / ``budget_event_content``): every charge and budget event stores
  sha256(previous row's hash, newline, its content) and its place in the chain, and the
  ``chain_head`` row holds the last place and hash. An altered row no longer matches its hash; a
  deleted, inserted or reordered row breaks the link to its neighbour or the count of places.
  (Someone able to rewrite the whole chain and its head can hide a change: note the head hash
  ``verify`` prints somewhere the ledger's writers cannot reach.)
"""

from __future__ import annotations

import datetime as dt
import hashlib
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from decimal import Decimal
from typing import Any

import psycopg
from psycopg import sql

from proxy.errors import CANNOT_CONNECT, INVALID_PARAMETER_VALUE, HushError
from proxy.ledger import Ledger

NEAR_EXHAUSTED = Decimal("0.9")
"""Share of a budget or cap spent from which the summary marks it as nearly exhausted."""

GENESIS_HASH = "0" * 64
"""The previous-row hash of the first row of the chain."""


@dataclass(frozen=True)
class AnalystRow:
    analyst: str
    budget: Decimal
    spent: Decimal
    answers: int
    refusals: int
    last_seen: dt.datetime | None

    @property
    def remaining(self) -> Decimal:
        return max(self.budget - self.spent, Decimal(0))


@dataclass(frozen=True)
class TableRow:
    table: str
    cap: Decimal | None
    spent: Decimal


@dataclass(frozen=True)
class HistoryRow:
    """One charge or budget event, in time order."""

    at: dt.datetime
    kind: str          # 'charge' or a budget event kind (import, grant, change, renewal)
    analyst: str | None
    tables: str
    epsilon: Decimal | None
    outcome: str       # a charge's outcome, or the event's reason
    actor: str
    previous: Decimal | None = None  # a 'change' event's previous policy value


@dataclass(frozen=True)
class ChainBreak:
    """Where verification failed: the chain place and row, and why."""

    seq: int
    row: str
    problem: str


@dataclass(frozen=True)
class Verification:
    rows: int
    head_hash: str
    first_break: ChainBreak | None

    @property
    def ok(self) -> bool:
        return self.first_break is None


def near_exhausted(spent: Decimal, limit: Decimal | None) -> bool:
    """True when ``spent`` has reached NEAR_EXHAUSTED of ``limit`` (never for no limit)."""
    return limit is not None and spent >= limit * NEAR_EXHAUSTED


class LedgerReview:
    """An administrator's read-mostly view of one ledger (one connection, autocommit)."""

    def __init__(self, dsn: str, *, schema: str = "hushql") -> None:
        """Open the ledger (migrating it like the proxy does), then a connection for reading.

        Raises HushError 08006 when the ledger cannot be reached.
        """
        try:
            Ledger(dsn, schema=schema, pool_size=1).close()
            self._conn = psycopg.connect(dsn, autocommit=True,
                                         application_name="hushql-ledger-review")
        except psycopg.OperationalError as error:
            raise HushError(CANNOT_CONNECT, "the ledger database could not be reached",
                            hint="check --ledger or HUSHQL_LEDGER") from error
        self._schema = sql.Identifier(schema)

    def close(self) -> None:
        self._conn.close()

    def __enter__(self) -> LedgerReview:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def _rows(self, query: str, params: Any = None) -> list[tuple[Any, ...]]:
        return self._conn.execute(sql.SQL(query).format(s=self._schema), params or []).fetchall()

    # ---- summaries -----------------------------------------------------------------------

    def analysts(self) -> list[AnalystRow]:
        """Each analyst's budget, spending, answers, refusals (failed or cancelled charges) and
        last charge time, by name."""
        return [AnalystRow(*row) for row in self._rows(
            "SELECT b.analyst, b.budget, b.spent,"
            " count(c.id) FILTER (WHERE c.outcome = 'answered'),"
            " count(c.id) FILTER (WHERE c.outcome IN ('failed', 'cancelled')),"
            " max(c.reserved_at)"
            " FROM {s}.analyst_budgets b LEFT JOIN {s}.charges c ON c.analyst = b.analyst"
            " GROUP BY b.analyst, b.budget, b.spent ORDER BY b.analyst COLLATE \"C\"")]

    def tables(self) -> list[TableRow]:
        """Each table's cap (None: none) and what all analysts spent on it, by name."""
        return [TableRow(*row) for row in self._rows(
            "SELECT table_name, cap, spent FROM {s}.table_budgets"
            " ORDER BY table_name COLLATE \"C\"")]

    def history(self, *, analyst: str | None = None, table: str | None = None,
                since: dt.date | None = None, until: dt.date | None = None) -> list[HistoryRow]:
        """Charges and budget events in time order, filtered. ``until`` includes its day.

        A table filter keeps charges that touched the table and the table's own events.
        """
        until_end = until + dt.timedelta(days=1) if until is not None else None
        rows = self._rows(
            "SELECT * FROM ("
            " SELECT reserved_at AS at, 'charge' AS kind, analyst,"
            "  array_to_string(tables, ', ') AS tables, epsilon, outcome, '' AS actor,"
            "  NULL::numeric AS previous, tables AS touched, chain_seq"
            " FROM {s}.charges"
            " UNION ALL"
            " SELECT at, kind, CASE WHEN subject_kind = 'analyst' THEN subject END,"
            "  CASE WHEN subject_kind = 'table' THEN subject ELSE '' END, amount, reason,"
            "  actor, previous,"
            "  CASE WHEN subject_kind = 'table' THEN ARRAY[subject] ELSE '{{}}' END, chain_seq"
            " FROM {s}.budget_events) h"
            " WHERE (%(analyst)s::text IS NULL OR h.analyst = %(analyst)s)"
            "   AND (%(table)s::text IS NULL OR %(table)s = ANY (h.touched))"
            "   AND (%(since)s::date IS NULL OR h.at >= %(since)s::date)"
            "   AND (%(until)s::date IS NULL OR h.at < %(until)s::date)"
            " ORDER BY h.at, h.chain_seq",
            {"analyst": analyst, "table": table, "since": since,
             "until": until_end})
        return [HistoryRow(*row[:8]) for row in rows]

    # ---- changes -------------------------------------------------------------------------

    def grant(self, analyst: str, epsilon: Decimal, reason: str, actor: str) -> Decimal:
        """Add ``epsilon`` to ``analyst``'s budget as an audited 'grant' event; return the new
        budget. HushError 22023 for a non-positive amount, an empty reason or an unknown analyst.
        """
        if not isinstance(epsilon, Decimal) or not epsilon.is_finite() or epsilon <= 0:
            raise HushError(INVALID_PARAMETER_VALUE, f"a grant must be a positive number, "
                            f"got {epsilon}", hint="for example: grant planner 1.5 --reason ...")
        if not reason.strip():
            raise HushError(INVALID_PARAMETER_VALUE, "a grant needs a reason",
                            hint="add --reason TEXT; it is kept in the ledger's history")
        try:
            row = self._rows("SELECT {s}.grant_budget(%s, %s, %s, %s)",
                             [analyst, epsilon, reason.strip(), actor])
        except psycopg.errors.NoDataFound:
            raise HushError(INVALID_PARAMETER_VALUE, f"analyst {analyst} has no budget in the "
                            "ledger", hint="add the analyst to access.toml and start the proxy "
                            "once") from None
        return row[0][0]

    # ---- verification --------------------------------------------------------------------

    def verify(self) -> Verification:
        """Recompute the hash chain over charges and budget events; name the first break."""
        rows = self._rows(
            "SELECT chain_seq, 'charge ' || id, prev_hash, row_hash, {s}.charge_content(c)"
            " FROM {s}.charges c"
            " UNION ALL"
            " SELECT chain_seq, 'budget event ' || id, prev_hash, row_hash,"
            "  {s}.budget_event_content(e) FROM {s}.budget_events e"
            " ORDER BY 1 NULLS FIRST, 2")
        head = self._rows("SELECT seq, hash FROM {s}.chain_head")
        return verify_chain(rows, head[0] if len(head) == 1 else None)


def verify_chain(rows: list[tuple[Any, ...]],
                 head: tuple[int, str] | None) -> Verification:
    """Check chained rows (seq, row name, prev_hash, row_hash, content), sorted by seq, against
    the chain head (seq, hash); the first row that breaks is reported, else none."""
    previous = GENESIS_HASH
    for expected_seq, (seq, name, prev_hash, row_hash, content) in enumerate(rows, start=1):
        if seq != expected_seq:
            problem = ("it has no place in the chain" if seq is None else
                       f"it is at place {seq} where place {expected_seq} was expected "
                       "(a row was deleted, inserted or moved)")
            return Verification(len(rows), previous, ChainBreak(seq or 0, name, problem))
        if prev_hash != previous:
            return Verification(len(rows), previous, ChainBreak(
                seq, name, "its link to the previous row does not match that row's hash "
                "(a row before it was deleted, inserted or moved)"))
        if _link(previous, content) != row_hash:
            return Verification(len(rows), previous, ChainBreak(
                seq, name, "its content does not match its hash (the row was altered)"))
        previous = row_hash
    if head is None:
        return Verification(len(rows), previous, ChainBreak(0, "chain head", "missing"))
    head_seq, head_hash = head
    if head_seq != len(rows) or head_hash != previous:
        return Verification(len(rows), previous, ChainBreak(
            len(rows) + 1, "chain head", f"it records {head_seq} rows but {len(rows)} are "
            "present, or a different last hash (rows at the end were deleted or replaced)"))
    return Verification(len(rows), previous, None)


def _link(previous: str, content: str) -> str:
    """The hash a row stores: sha256 over the previous row's hash, a newline and its content."""
    return hashlib.sha256(f"{previous}\n{content}".encode()).hexdigest()


@contextmanager
def opened(dsn: str) -> Iterator[LedgerReview]:
    """A LedgerReview closed at the end of the block."""
    review = LedgerReview(dsn)
    try:
        yield review
    finally:
        review.close()
