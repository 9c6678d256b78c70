"""``hushql check [DIR]``: validate a policy directory and show what it grants.

On success a summary for the people who sign policies off: each table with its source, who one
individual is, its population and most rows, each column with its kind and domain, then the analysts with their
budgets and grants, and the administrators. On failure nothing but the problems, one
``file: key: problem`` line each, so that editors and scripts can jump to them. With a backend
DSN it also warns about the backend role's powers (a superuser can read files and other
sessions' queries; hushql needs only to read the policy tables and keep its ledger).
"""

from __future__ import annotations

from pathlib import Path

import psycopg
from rich.console import Console
from rich.table import Table

from proxy.policy import ColumnPolicy, Policies, PolicyError, TablePolicy, date_range, load_policies
from proxy.renewal import guarantee_note
from proxy.sql.domains import key_size
from proxy.sql.plan import GroupKey

_MOST_VALUES_SHOWN = 8


def check_command(directory: str | Path, console: Console | None = None, *,
                  backend: str | None = None, ledger: str | None = None) -> int:
    """Check ``directory``; print the summary (exit code 0) or every problem (exit code 1).

    With ``backend``, also check each source, column and type against that database, and each
    budget and cap against the ledger (``ledger``, else the backend's schema hushql).
    With no ``console`` the summary goes to stdout and problems to stderr.
    """
    err = console or Console(stderr=True)
    try:
        policies = load_policies(directory)
    except PolicyError as error:
        _print_problems(err, error.problems)
        return 1
    warnings: list[str] = []
    if backend:
        from proxy.safe_config import backend_problems, budget_problems

        try:
            warnings = backend_warnings(backend)
        except ConnectionError as error:
            err.print(f"backend: cannot connect ({error})", markup=False)
            return 1
        try:
            problems = backend_problems(policies, backend) + \
                budget_problems(policies, ledger or backend)
        except psycopg.Error as error:
            problems = [f"(backend): the backend or ledger could not be checked "
                        f"({type(error).__name__})"]
        if problems:
            _print_problems(err, problems)
            return 1
    print_summary(policies, console or Console())
    if backend:
        (console or Console()).print("The backend answers every table, column and type; the "
                                     "ledger's budgets stay above what is spent.",
                                     highlight=False)
        for line in warnings:
            (console or Console()).print(f"warning: {line}", markup=False, highlight=False)
    return 0


def _print_problems(console: Console, problems: list[str]) -> None:
    for line in problems:
        console.print(line, markup=False, emoji=False, highlight=False, soft_wrap=True)


def backend_warnings(dsn: str) -> list[str]:
    """What is needlessly powerful about the role hushql connects to the backend as; raises
    ConnectionError (naming only the error's type) when the backend cannot be asked."""
    import psycopg

    try:
        with psycopg.connect(dsn, connect_timeout=10) as conn:
            row = conn.execute("SELECT current_user, rolsuper, rolbypassrls FROM pg_roles "
                               "WHERE rolname = current_user").fetchone()
    except psycopg.Error as error:
        raise ConnectionError(type(error).__name__) from None
    if row is None:
        return []
    role, superuser, bypass = row
    found = []
    if superuser:
        found.append(f'the backend role "{role}" is a superuser: a mistake anywhere could read '
                     "files or other sessions' queries; give hushql a role that may only read "
                     "the policy tables (and create its ledger and catalog mirrors)")
    elif bypass:
        found.append(f'the backend role "{role}" bypasses row-level security')
    return found


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
    admins = ", ".join(name + (" (disabled)" if policies.admins[name].disabled else "")
                       for name in sorted(policies.admins)) or "none"
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
        if table.public:
            view.add_row(name, table.source, "nobody (public)", "-",
                         f"key {table.key}" if table.key else "-", "none (free)")
            continue
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
        return f"{low} .. {high}"
    return f"{column.low} .. {column.high}"


def _grouping_text(column: ColumnPolicy, most_cells: int) -> str:
    """Whether GROUP BY may use the column, and with how many cells."""
    if not column.has_domain:
        return "buckets only (width_bucket, floor)"
    cells = key_size(column, GroupKey("column"))
    if cells > most_cells:
        return f"no ({cells:,} cells > most_cells)"
    return f"{cells:,} cells"


def _analysts_table(policies: Policies) -> Table:
    view = Table(title="Analysts", title_justify="left")
    for heading in ("analyst", "budget (epsilon)", "granted tables"):
        view.add_column(heading, overflow="fold")
    for name in sorted(policies.analysts):
        analyst = policies.analysts[name]
        budget = str(analyst.budget)
        if analyst.renew_every is not None:
            budget += f" ({guarantee_note(analyst.budget, analyst.renew_every)})"
        view.add_row(name + (" (disabled)" if analyst.disabled else ""), budget,
                     ", ".join(analyst.tables) or "none")
    return view
