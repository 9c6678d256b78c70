"""``hushql check [DIR]``: validate a policy directory and show what it grants.

On success a summary for the people who sign policies off: each table with its source, who one
individual is, its population and most rows, each column with its kind and domain, then the analysts with their
budgets and grants, and the administrators. On failure nothing but the problems, one
``file: key: problem`` line each, so that editors and scripts can jump to them.
"""

from __future__ import annotations

from pathlib import Path

from rich.console import Console
from rich.table import Table

from proxy.policy import ColumnPolicy, Policies, PolicyError, TablePolicy, date_range, load_policies
from proxy.sql.domains import domain_size

_MOST_VALUES_SHOWN = 8


def check_command(directory: str | Path, console: Console | None = None) -> int:
    """Check ``directory``; print the summary (exit code 0) or every problem (exit code 1).

    With no ``console`` the summary goes to stdout and problems to stderr.
    """
    try:
        policies = load_policies(directory)
    except PolicyError as error:
        err = console or Console(stderr=True)
        for line in error.problems:
            err.print(line, markup=False, emoji=False, highlight=False, soft_wrap=True)
        return 1
    print_summary(policies, console or Console())
    return 0


def print_summary(policies: Policies, console: Console) -> None:
    """Render the tables, their columns, the analysts and the administrators of ``policies``."""
    d = policies.defaults
    console.print(f"Policies in {policies.directory}: {_count(policies.tables, 'table')}, "
                  f"{_count(policies.analysts, 'analyst')}, "
                  f"{_count(policies.admins, 'administrator')}. "
                  f"Defaults: epsilon per query {d.epsilon_per_query} (largest "
                  f"{d.largest_epsilon_per_query}), at most {d.most_cells:,} cells per answer.",
                  markup=False, highlight=False)
    console.print(_tables_table(policies))
    for name in sorted(policies.tables):
        console.print(_columns_table(policies.tables[name], d.most_cells))
    console.print(_analysts_table(policies))
    admins = ", ".join(sorted(policies.admins)) or "none"
    console.print(f"Administrators: {admins}", markup=False, highlight=False)


def _count(items: dict, noun: str) -> str:
    return f"{len(items)} {noun}{'' if len(items) == 1 else 's'}"


def _tables_table(policies: Policies) -> Table:
    view = Table(title="Tables", title_justify="left")
    view.add_column("table", no_wrap=True)
    view.add_column("source", no_wrap=True)
    for heading in ("one individual is", "population", "rows per individual", "table budget cap"):
        view.add_column(heading, overflow="fold")
    for name in sorted(policies.tables):
        table = policies.tables[name]
        ind = table.individual
        view.add_row(name, table.source,
                     f"one {ind.column}" if ind else "one row",
                     table.population,
                     f"at most {ind.most_rows}, bounds {ind.bounds}" if ind else "1",
                     str(table.budget.cap) if table.budget else "none")
    return view


def _columns_table(table: TablePolicy, most_cells: int) -> Table:
    title = f"Columns of {table.table}" + (f": {table.description}" if table.description else "")
    view = Table(title=title, title_justify="left")
    view.add_column("column", no_wrap=True)
    for heading in ("kind", "domain or range", "step", "GROUP BY"):
        view.add_column(heading, overflow="fold")
    for name, column in table.columns.items():
        view.add_row(name, column.kind, _domain_text(column),
                     str(column.step) if column.step is not None else "-",
                     _grouping_text(column, most_cells))
    return view


def _domain_text(column: ColumnPolicy) -> str:
    """How the column's values are bounded, in the words an owner would check."""
    if column.kind == "category":
        values = column.values or []
        shown = ", ".join(values[:_MOST_VALUES_SHOWN])
        more = len(values) - _MOST_VALUES_SHOWN
        return shown + (f", ... (+{more} more)" if more > 0 else "")
    if column.kind == "boolean":
        return "false, true"
    if column.kind == "date":
        low, high = date_range(column)
        by = f", by {column.bucket}" if column.bucket else ""
        return f"{low} .. {high}{by}"
    return f"{column.low} .. {column.high}"


def _grouping_text(column: ColumnPolicy, most_cells: int) -> str:
    """Whether GROUP BY may use the column, and with how many cells."""
    if not column.has_domain:
        reason = "no bucket" if column.kind == "date" else "no domain"
        return f"no ({reason})"
    cells = domain_size(column)
    if cells > most_cells:
        return f"no ({cells:,} cells > most_cells)"
    return f"{cells:,} cells"


def _analysts_table(policies: Policies) -> Table:
    view = Table(title="Analysts", title_justify="left")
    for heading in ("analyst", "budget (epsilon)", "granted tables"):
        view.add_column(heading, overflow="fold")
    for name in sorted(policies.analysts):
        analyst = policies.analysts[name]
        view.add_row(name, str(analyst.budget), ", ".join(analyst.tables) or "none")
    return view
