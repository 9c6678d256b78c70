"""Checks that keep a proxy from starting on a configuration it should not serve.

Rules of this module:
- The demo's passwords are published, so an account whose verifier accepts one of them is
  refused everywhere but ``hushql demo`` (whatever salt the verifier was made with).
- A policy folder is identified in logs and in the ledger's budget events by its path and a
  digest of its files, so that an administrator can tell which policy set was in force.
- Each table's ``source``, each declared column and each column's type are checked against the
  backend before any analyst can pay for a mistake: a misspelt name, or a type the column's kind
  cannot be computed on, is a problem reported as ``tables/<name>.toml: key: problem``.
- This module reads the backend's catalog only (``pg_attribute``, ``pg_type``); never a row.
"""

from __future__ import annotations

import hashlib
import logging
from pathlib import Path

import psycopg

from proxy.errors import CANNOT_CONNECT, CONFIG_FILE_ERROR, HushError
from proxy.policy import Policies, TablePolicy
from proxy.sql.vocabulary import KIND_CATEGORIES

log = logging.getLogger("hushql.config")

# Which PostgreSQL type categories (pg_type.typcategory) each column kind may sit on.
KIND_TYPE_CATEGORIES: dict[str, frozenset[str]] = KIND_CATEGORIES


def policy_digest(directory: Path) -> str:
    """sha256 over access.toml and tables/*.toml (names and bytes, in name order), as hex."""
    digest = hashlib.sha256()
    files = [directory / "access.toml", *sorted((directory / "tables").glob("*.toml"))]
    for path in files:
        if path.is_file():
            digest.update(str(path.relative_to(directory)).encode() + b"\0")
            digest.update(path.read_bytes() + b"\0")
    return digest.hexdigest()


def policy_source(policies: Policies) -> str:
    """How logs and budget events name a policy set: its folder and a short digest."""
    if policies.directory is None:
        return "policies given in code"
    folder = policies.directory.resolve()
    return f"{folder} (digest {policy_digest(folder)[:16]})"


def demo_account_problems(policies: Policies) -> list[str]:
    """One ``access.toml: key: problem`` line per account whose verifier accepts a published
    demo password."""
    from proxy.demo import demo_accounts
    from proxy.wire.auth import verify_password

    accounts = [("analysts", name, a.password) for name, a in policies.analysts.items()]
    accounts += [("admins", name, a.password) for name, a in policies.admins.items()]
    problems = []
    for section, name, verifier in sorted(accounts):
        for _, published in demo_accounts():
            try:
                matches = verify_password(published, verifier)
            except ValueError:
                matches = False
            if matches:
                problems.append(f"access.toml: {section}.{name}.password: accepts a password "
                                "published with the demo; make a new verifier with "
                                "`hushql hash-password`")
                break
    return problems


_COLUMNS = """
SELECT a.attname, t.typcategory, format_type(a.atttypid, a.atttypmod)
  FROM pg_attribute a
  JOIN pg_type declared ON declared.oid = a.atttypid
  JOIN pg_type t ON t.oid = CASE WHEN declared.typtype = 'd' THEN declared.typbasetype
                                 ELSE declared.oid END
 WHERE a.attrelid = to_regclass(%s) AND a.attnum > 0 AND NOT a.attisdropped
"""
"""Columns of a relation: name, type category (of a domain's base type), type as written."""


def backend_problems(policies: Policies, backend_dsn: str) -> list[str]:
    """Every table, column and type of ``policies`` the backend cannot answer, one line each.

    Reads the catalog as the backend DSN's role, so a source that role cannot see is reported
    too. Raises psycopg.OperationalError when the backend cannot be reached.
    """
    problems: list[str] = []
    with psycopg.connect(backend_dsn, autocommit=True,
                         application_name="hushql-check") as conn:
        for name in sorted(policies.tables):
            table = policies.tables[name]
            label = f"tables/{name}.toml"
            try:
                exists = conn.execute("SELECT to_regclass(%s) IS NOT NULL",
                                      [table.source]).fetchone()
            except psycopg.errors.InvalidName:
                exists = (False,)
            if not exists or not exists[0]:
                problems.append(f"{label}: source: {table.source} is not a table or view the "
                                "backend's role can see")
                continue
            readable = conn.execute("SELECT has_table_privilege(to_regclass(%s), 'SELECT')",
                                    [table.source]).fetchone()
            if not readable or not readable[0]:
                problems.append(f"{label}: source: the backend's role may not read "
                                f"{table.source}")
            found = {row[0]: (row[1], row[2])
                     for row in conn.execute(_COLUMNS, [table.source]).fetchall()}
            problems += column_problems(label, table, found, "the backend's")
    return problems


def column_problems(label: str, table: TablePolicy, found: dict[str, tuple[str, str]],
                    whose: str) -> list[str]:
    """The policy's columns (and individual column) missing from a backend relation, or of a
    kind its type does not fit; ``found`` maps each column there to (PostgreSQL type category
    letter, type name), ``whose`` names the backend in the messages ("Spark's")."""
    problems = []
    if table.individual is not None and table.individual.column not in found:
        problems.append(f"{label}: individual.column: {table.source} has no column "
                        f"{table.individual.column}")
    for column_name, column in table.columns.items():
        if column_name not in found:
            problems.append(f"{label}: columns.{column_name}: {table.source} has no such column")
            continue
        category, type_name = found[column_name]
        if category not in KIND_TYPE_CATEGORIES[column.kind]:
            problems.append(f"{label}: columns.{column_name}: kind {column.kind} does not fit "
                            f"{whose} type {type_name}")
    return problems


def budget_problems(policies: Policies, ledger_dsn: str, schema: str = "hushql") -> list[str]:
    """Analysts and tables whose budget or cap, once ``policies`` is applied to the ledger
    (the ledger's rule: the budget moves by the policy's difference, keeping grants), would be
    below what they have already spent. Reads only; nothing when the ledger has no schema yet."""
    from psycopg import sql

    ident = sql.Identifier(schema)
    problems = []
    with psycopg.connect(ledger_dsn, autocommit=True, application_name="hushql-check") as conn:
        present = conn.execute("SELECT to_regclass(%s) IS NOT NULL",
                               [f"{ident.as_string(conn)}.analyst_budgets"]).fetchone()
        if not present or not present[0]:
            return []
        analysts = conn.execute(sql.SQL(
            "SELECT analyst, budget, coalesce((to_jsonb(b) ->> 'policy_budget')::numeric, "
            "budget), spent FROM {}.analyst_budgets b").format(ident)).fetchall()
        tables = dict(conn.execute(sql.SQL("SELECT table_name, spent FROM {}.table_budgets")
                                   .format(ident)).fetchall())
    for name, budget, policy_budget, spent in analysts:
        if name not in policies.analysts:
            continue
        after = max(budget + policies.analysts[name].budget - policy_budget, 0)
        if spent > after:
            problems.append(f"access.toml: analysts.{name}.budget: the ledger's budget would "
                            f"become {after}, below the {spent} already spent; the analyst "
                            "could run no further queries")
    for name, table in sorted(policies.tables.items()):
        if table.budget is not None and tables.get(name, 0) > table.budget.cap:
            problems.append(f"tables/{name}.toml: budget.cap: {table.budget.cap} is below the "
                            f"{tables[name]} already spent on the table; it would answer no "
                            "further queries")
    return problems


def refuse_unsafe_serving(policies: Policies, backend_dsn: str, *,
                          allow_demo_accounts: bool = False) -> None:
    """Log which policies are about to be served; raise HushError F0000 listing every problem
    when an account uses a published demo password (unless ``allow_demo_accounts``, for
    ``hushql demo``) or a table is one the backend cannot answer."""
    log.info("policies: %s", policy_source(policies))
    problems = [] if allow_demo_accounts else demo_account_problems(policies)
    from proxy.spark_backend import is_spark_dsn, source_problems

    try:
        if is_spark_dsn(backend_dsn):
            problems += source_problems(policies, backend_dsn)
        else:
            problems += backend_problems(policies, backend_dsn)
    except Exception as error:  # psycopg's or Spark Connect's; the class is enough here
        log.error("backend check failed: %s", type(error).__name__)
        raise HushError(CANNOT_CONNECT, "the backend database could not be checked",
                        hint="check --backend or HUSHQL_BACKEND") from None
    if problems:
        raise HushError(CONFIG_FILE_ERROR, "refusing to serve these policies:\n" +
                        "\n".join(problems),
                        hint=f"fix them, then check with `hushql check {policies.directory} "
                             "--backend DSN`")
