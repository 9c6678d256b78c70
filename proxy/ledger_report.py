"""``hushql ledger report``: one self-contained HTML page on the ledger, with charts.

Rules of this module:
- The page needs no network: charts are inline SVG drawn by matplotlib (the optional ``report``
  extra), styles are inline, and there is no script from elsewhere.
- Each chart is built from the same rows as the tables, and writes its totals as SVG text
  (``svg.fonttype = none`` keeps text as text), so a reader, or the browser test, can compare
  them with the ledger.
- The charts: cumulative epsilon per analyst over time against the analyst's budget (a step
  line rebuilt from the budget events), spending per table against its cap, answers and
  refusals (failed or cancelled charges) per day.
- Values shown are Decimal text; floats appear only as plotting coordinates.
"""

from __future__ import annotations

import datetime as dt
import html
import io
from collections import Counter, defaultdict
from decimal import Decimal
from pathlib import Path

from proxy.errors import FEATURE_NOT_SUPPORTED, HushError
from proxy.ledger_review import HistoryRow, LedgerReview, near_exhausted

# Colours of the series (the browser test looks for them in the screenshot).
ANSWER_COLOUR = "#2a7ab0"
REFUSAL_COLOUR = "#c0392b"
SPENT_COLOUR = "#e08a1e"


def write_report(review: LedgerReview, out: Path) -> None:
    """Write the report page for ``review``'s ledger to ``out``.

    HushError 0A000 when matplotlib is not installed (``pip install 'hushql[report]'``).
    """
    out.write_text(render_report(review), encoding="utf-8")


def render_report(review: LedgerReview) -> str:
    """The report page as HTML text."""
    try:
        import matplotlib
    except ImportError:
        raise HushError(FEATURE_NOT_SUPPORTED, "the report needs matplotlib",
                        hint="pip install 'hushql[report]'") from None
    matplotlib.use("Agg")
    matplotlib.rcParams["svg.fonttype"] = "none"
    matplotlib.rcParams["svg.hashsalt"] = "hushql"  # stable element ids between runs
    analysts, tables, history = review.analysts(), review.tables(), review.history()
    charts = [
        ("cumulative-epsilon", "Cumulative epsilon per analyst, against the budget",
         _cumulative_chart(history, {a.analyst: a.budget for a in analysts})),
        ("table-spending", "Spending per table, against its cap", _tables_chart(tables)),
        ("daily-outcomes", "Answers and refusals per day", _daily_chart(history)),
    ]
    now = dt.datetime.now(dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    parts = [_HEAD, f"<h1>Privacy ledger report</h1><p>Made {now}. Every charge stands "
             "whatever the query's outcome; refusals are charges whose query failed or was "
             "cancelled.</p>"]
    for ident, title, svg in charts:
        parts.append(f'<figure class="chart" id="{ident}"><figcaption>{html.escape(title)}'
                     f"</figcaption>{svg}</figure>")
    parts.append(_html_table(
        "Analysts", ["analyst", "budget", "spent", "remaining", "answers", "refusals",
                     "last seen"],
        [([a.analyst, _num(a.budget), _num(a.spent), _num(a.remaining), str(a.answers),
           str(a.refusals), _when(a.last_seen)], near_exhausted(a.spent, a.budget))
         for a in analysts], ident="analysts"))
    parts.append(_html_table(
        "Tables", ["table", "cap", "spent"],
        [([t.table, "none" if t.cap is None else _num(t.cap), _num(t.spent)],
          near_exhausted(t.spent, t.cap)) for t in tables], ident="tables"))
    parts.append("</body></html>\n")
    return "\n".join(parts)


def _cumulative_chart(history: list[HistoryRow], budgets: dict[str, Decimal]) -> str:
    import matplotlib.pyplot as plt

    spent: dict[str, list[tuple[dt.datetime, Decimal]]] = defaultdict(list)
    limit: dict[str, list[tuple[dt.datetime, Decimal]]] = defaultdict(list)
    for row in history:
        if row.analyst is None or row.epsilon is None:
            continue
        if row.kind == "charge":
            if not spent[row.analyst]:
                spent[row.analyst].append((row.at, Decimal(0)))
            spent[row.analyst].append((row.at, spent[row.analyst][-1][1] + row.epsilon))
        else:
            limit[row.analyst].append((row.at, _budget_after(limit[row.analyst], row)))
    figure, axes = plt.subplots(figsize=(8, 3.6))
    colours = plt.rcParams["axes.prop_cycle"].by_key()["color"]
    end = max((row.at for row in history), default=None)
    for index, name in enumerate(sorted(budgets)):
        colour = colours[index % len(colours)]
        points = spent.get(name, [])
        if points and end is not None:
            axes.step([p[0] for p in points] + [end], [float(p[1]) for p in points] +
                      [float(points[-1][1])], where="post", color=colour, linewidth=2,
                      label=f"{name} spent")
        steps = limit.get(name, [])
        if steps and end is not None:
            axes.step([s[0] for s in steps] + [end], [float(s[1]) for s in steps] +
                      [float(budgets[name])], where="post", color=colour, linestyle="--",
                      linewidth=1, label=f"{name} budget")
        total = points[-1][1] if points else Decimal(0)
        axes.annotate(f"{name}: {_num(total)} of {_num(budgets[name])}",
                      xy=(0.01, 0.93 - 0.09 * index), xycoords="axes fraction", color=colour,
                      gid=f"total-{name}")
    axes.set_ylabel("epsilon")
    axes.set_ylim(bottom=0)
    axes.legend(loc="lower right", fontsize="small")
    figure.autofmt_xdate()
    return _svg(figure)


def _budget_after(steps: list[tuple[dt.datetime, Decimal]], event: HistoryRow) -> Decimal:
    """An analyst's budget after one budget event (the ledger's own rule: import sets, change
    moves by the policy's difference, never below zero; grant and renewal add)."""
    before = steps[-1][1] if steps else Decimal(0)
    assert event.epsilon is not None
    if event.kind == "import":
        return event.epsilon
    if event.kind == "change":
        previous = event.previous if event.previous is not None else before
        return max(before + event.epsilon - previous, Decimal(0))
    return before + event.epsilon


def _tables_chart(tables: list) -> str:
    import matplotlib.pyplot as plt

    figure, axes = plt.subplots(figsize=(8, 0.6 + 0.5 * max(1, len(tables))))
    names = [t.table for t in tables]
    axes.barh(names, [float(t.spent) for t in tables], color=SPENT_COLOUR, label="spent")
    for index, t in enumerate(tables):
        if t.cap is not None:
            axes.plot([float(t.cap)] * 2, [index - 0.4, index + 0.4], color="black",
                      linewidth=2)
        cap = "no cap" if t.cap is None else f"cap {_num(t.cap)}"
        axes.annotate(f"{t.table}: {_num(t.spent)} spent, {cap}", xy=(0, index),
                      xytext=(4, 0), textcoords="offset points", va="center",
                      gid=f"total-{t.table}")
    axes.set_xlabel("epsilon (black bar: cap)")
    axes.set_yticks(range(len(names)), [""] * len(names))
    return _svg(figure)


def _daily_chart(history: list[HistoryRow]) -> str:
    import matplotlib.pyplot as plt

    answers: Counter[dt.date] = Counter()
    refusals: Counter[dt.date] = Counter()
    for row in history:
        if row.kind != "charge":
            continue
        day = row.at.astimezone(dt.timezone.utc).date()
        if row.outcome == "answered":
            answers[day] += 1
        elif row.outcome in ("failed", "cancelled"):
            refusals[day] += 1
    days = sorted(set(answers) | set(refusals))
    figure, axes = plt.subplots(figsize=(8, 3))
    positions = range(len(days))
    axes.bar([p - 0.2 for p in positions], [answers[d] for d in days], width=0.4,
             color=ANSWER_COLOUR, label="answers")
    axes.bar([p + 0.2 for p in positions], [refusals[d] for d in days], width=0.4,
             color=REFUSAL_COLOUR, label="refusals")
    axes.set_xticks(list(positions), [d.isoformat() for d in days])
    axes.legend(loc="upper left", fontsize="small")
    axes.annotate(f"answers: {sum(answers.values())}, refusals: {sum(refusals.values())}",
                  xy=(0.99, 0.93), xycoords="axes fraction", ha="right", gid="total-outcomes")
    return _svg(figure)


def _svg(figure) -> str:  # type: ignore[no-untyped-def]
    """The figure as inline SVG text (without the XML prologue), and the figure closed."""
    import matplotlib.pyplot as plt

    buffer = io.StringIO()
    figure.tight_layout()
    figure.savefig(buffer, format="svg")
    plt.close(figure)
    text = buffer.getvalue()
    return text[text.index("<svg"):]


def _html_table(title: str, headings: list[str], rows: list[tuple[list[str], bool]], *,
                ident: str) -> str:
    head = "".join(f"<th>{html.escape(h)}</th>" for h in headings)
    body = "".join(
        f'<tr{" class=near" if near else ""}>' +
        "".join(f"<td>{html.escape(cell)}</td>" for cell in cells) + "</tr>"
        for cells, near in rows)
    return (f'<h2>{html.escape(title)}</h2><table id="{ident}"><thead><tr>{head}</tr></thead>'
            f"<tbody>{body}</tbody></table>")


def _num(value: Decimal) -> str:
    return format(value, "f")


def _when(moment: dt.datetime | None) -> str:
    if moment is None:
        return "never"
    return moment.astimezone(dt.timezone.utc).strftime("%Y-%m-%d %H:%M:%S")


_HEAD = """<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>hushql ledger report</title>
<style>
body { font-family: sans-serif; margin: 1.5em; color: #222; }
figure.chart { margin: 1em 0; }
figure.chart svg { max-width: 100%; height: auto; }
figcaption { font-weight: bold; margin-bottom: 0.3em; }
table { border-collapse: collapse; margin-bottom: 1em; }
th, td { border: 1px solid #bbb; padding: 0.2em 0.6em; text-align: right; }
th:first-child, td:first-child { text-align: left; }
tr.near td { color: #b00; font-weight: bold; }
</style></head><body>"""
