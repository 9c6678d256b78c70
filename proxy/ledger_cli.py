"""``hushql ledger [VERB]``: the administrator's view of the privacy ledger.

With no verb, a table per analyst and per table with near-exhausted budgets in bold red; then
``history``, ``grant``, ``export``, ``report`` and ``verify``. The ledger is ``--ledger DSN``,
else ``HUSHQL_LEDGER``, else ``HUSHQL_BACKEND`` (where ``serve`` keeps it by default).
Registered by ``proxy.cli`` through ``add_ledger_command``.
"""

from __future__ import annotations

import argparse
import csv
import datetime as dt
import io
import json
import os
from collections.abc import Callable
from decimal import Decimal, InvalidOperation
from pathlib import Path

from rich.console import Console
from rich.table import Table

from proxy.errors import CANNOT_CONNECT, INVALID_PARAMETER_VALUE, HushError
from proxy.ledger import os_user
from proxy.ledger_review import NEAR_EXHAUSTED, HistoryRow, LedgerReview, near_exhausted


def add_ledger_command(commands: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    """Add ``ledger`` and its verbs to the ``hushql`` parser."""
    ledger = commands.add_parser("ledger", help="review the privacy ledger: spending, history, "
                                 "grants, exports, a report page, verification")
    ledger.add_argument("--ledger", dest="ledger",
                        default=os.environ.get("HUSHQL_LEDGER") or os.environ.get("HUSHQL_BACKEND"),
                        help="DSN of the ledger database (HUSHQL_LEDGER, else HUSHQL_BACKEND)")
    verbs = ledger.add_subparsers(dest="verb")
    history = verbs.add_parser("history", help="charges and budget events in time order")
    history.add_argument("--analyst")
    history.add_argument("--table")
    history.add_argument("--since", type=dt.date.fromisoformat, help="YYYY-MM-DD")
    history.add_argument("--until", type=dt.date.fromisoformat, help="YYYY-MM-DD, included")
    grant = verbs.add_parser("grant", help="add epsilon to an analyst's budget, with a reason")
    grant.add_argument("analyst")
    grant.add_argument("epsilon")
    grant.add_argument("--reason", required=True, help="why; kept in the history")
    export = verbs.add_parser("export", help="every charge and budget event as CSV or JSON")
    export.add_argument("--format", choices=("csv", "json"), required=True)
    export.add_argument("--out", type=Path, help="file to write (default: standard output)")
    report = verbs.add_parser("report", help="one self-contained HTML page with charts")
    report.add_argument("--out", type=Path, required=True)
    verbs.add_parser("verify", help="recompute the ledger's hash chain")


def run_ledger(args: argparse.Namespace, console: Console) -> int:
    """Run one ledger verb; the exit code (verify: 1 when the chain is broken)."""
    if not args.ledger:
        raise HushError(CANNOT_CONNECT, "no ledger database given",
                        hint="pass --ledger DSN or set HUSHQL_LEDGER")
    with LedgerReview(args.ledger) as review:
        return _VERBS[args.verb or "summary"](review, args, console)


def _summary(review: LedgerReview, args: argparse.Namespace, console: Console) -> int:
    analysts = Table(title="Analysts", title_justify="left")
    for heading in ("analyst", "budget", "spent", "remaining", "answers", "refusals",
                    "last seen"):
        analysts.add_column(heading, justify="left" if heading == "analyst" else "right")
    for a in review.analysts():
        analysts.add_row(a.analyst, _num(a.budget), _num(a.spent), _num(a.remaining),
                         str(a.answers), str(a.refusals), _when(a.last_seen),
                         style="bold red" if near_exhausted(a.spent, a.budget) else None)
    console.print(analysts)
    tables = Table(title="Tables", title_justify="left")
    for heading in ("table", "cap", "spent", "remaining"):
        tables.add_column(heading, justify="left" if heading == "table" else "right")
    for t in review.tables():
        remaining = "-" if t.cap is None else _num(max(t.cap - t.spent, Decimal(0)))
        tables.add_row(t.table, "none" if t.cap is None else _num(t.cap), _num(t.spent),
                       remaining, style="bold red" if near_exhausted(t.spent, t.cap) else None)
    console.print(tables)
    console.print(f"bold red: {format(NEAR_EXHAUSTED * 100, 'f')}% or more spent",
                  highlight=False)
    return 0


def _history(review: LedgerReview, args: argparse.Namespace, console: Console) -> int:
    view = Table(title="History", title_justify="left")
    for heading in ("at (UTC)", "kind", "analyst", "tables", "epsilon", "outcome or reason",
                    "by"):
        view.add_column(heading, overflow="fold")
    for row in review.history(analyst=args.analyst, table=args.table, since=args.since,
                              until=args.until):
        view.add_row(_when(row.at), row.kind, row.analyst or "", row.tables,
                     "" if row.epsilon is None else _num(row.epsilon), row.outcome, row.actor)
    console.print(view)
    return 0


def _grant(review: LedgerReview, args: argparse.Namespace, console: Console) -> int:
    try:
        epsilon = Decimal(args.epsilon)
    except InvalidOperation:
        raise HushError(INVALID_PARAMETER_VALUE, f"invalid epsilon {args.epsilon!r}",
                        hint="a positive decimal number such as 1.5") from None
    budget = review.grant(args.analyst, epsilon, args.reason, os_user())
    console.print(f"granted {_num(epsilon)} to {args.analyst}; budget now {_num(budget)}",
                  highlight=False)
    return 0


EXPORT_FIELDS = ["at", "kind", "analyst", "tables", "epsilon", "outcome_or_reason", "by"]


def export_rows(rows: list[HistoryRow], fmt: str) -> str:
    """The history as CSV (header row first) or a JSON list of objects; epsilon as text."""
    records = [{"at": r.at.isoformat(), "kind": r.kind, "analyst": r.analyst or "",
                "tables": r.tables, "epsilon": "" if r.epsilon is None else format(r.epsilon, "f"),
                "outcome_or_reason": r.outcome, "by": r.actor} for r in rows]
    if fmt == "json":
        return json.dumps(records, indent=1) + "\n"
    out = io.StringIO()
    writer = csv.DictWriter(out, fieldnames=EXPORT_FIELDS)
    writer.writeheader()
    writer.writerows(records)
    return out.getvalue()


def _export(review: LedgerReview, args: argparse.Namespace, console: Console) -> int:
    text = export_rows(review.history(), args.format)
    if args.out is None:
        print(text, end="")
    else:
        args.out.write_text(text, encoding="utf-8")
        console.print(f"wrote {args.out}", highlight=False)
    return 0


def _report(review: LedgerReview, args: argparse.Namespace, console: Console) -> int:
    from proxy.ledger_report import write_report

    write_report(review, args.out)
    console.print(f"wrote {args.out}", highlight=False)
    return 0


def _verify(review: LedgerReview, args: argparse.Namespace, console: Console) -> int:
    result = review.verify()
    if result.ok:
        console.print(f"ledger verified: {result.rows} rows, chain head {result.head_hash}",
                      highlight=False)
        return 0
    broken = result.first_break
    assert broken is not None
    console.print(f"[red]ledger chain broken[/red] at place {broken.seq}, {broken.row}: "
                  f"{broken.problem}", highlight=False)
    return 1


def _num(value: Decimal) -> str:
    return format(value, "f")


def _when(moment: dt.datetime | None) -> str:
    if moment is None:
        return "never"
    return moment.astimezone(dt.timezone.utc).strftime("%Y-%m-%d %H:%M:%S")


_VERBS: dict[str, Callable[[LedgerReview, argparse.Namespace, Console], int]] = {
    "summary": _summary,
    "history": _history,
    "grant": _grant,
    "export": _export,
    "report": _report,
    "verify": _verify,
}
