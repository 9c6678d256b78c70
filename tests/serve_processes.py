"""Helpers for tests that run ``hushql serve`` as real processes: start, wait, connect, read
the ledger's books, and clean up the catalog mirrors a serve process builds."""

from __future__ import annotations

import os
import re
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from decimal import Decimal
from pathlib import Path

import psycopg
from psycopg import sql

from proxy.demo import DEMO_DATABASE, demo_accounts
from proxy.localpg import free_port
from proxy.policy import load_policies
from proxy.wire.catalog import mirror_layout, mirror_name

ROOT = Path(__file__).resolve().parent.parent
DEMO_POLICIES = ROOT / "policies"
# `hushql serve` refuses the demo's published passwords: serve processes get a copy of the demo
# policies whose accounts have these instead.
PASSWORDS = {name: f"{name}-serve-test" for name, _ in demo_accounts()}
_served_policies: Path | None = None


def served_policies() -> Path:
    """The demo policies with PASSWORDS as their accounts' passwords (made once per run)."""
    global _served_policies
    if _served_policies is None:
        _served_policies = with_own_passwords(
            Path(tempfile.mkdtemp(prefix="hushql-served-")) / "policies")
    return _served_policies


def with_own_passwords(target: Path) -> Path:
    """Copies the demo policies to ``target`` with a verifier of PASSWORDS for every account."""
    from proxy.wire.auth import make_verifier

    shutil.copytree(DEMO_POLICIES, target)
    access = target / "access.toml"
    text = access.read_text()
    for name, password in PASSWORDS.items():
        text, found = re.subn(rf'(\[(?:analysts|admins)\.{name}\]\npassword = )"[^"]*"',
                              lambda m: m.group(1) + f'"{make_verifier(password)}"', text)
        assert found == 1, name
    access.write_text(text)
    return target


@dataclass
class ServeProcess:
    """A running ``hushql serve``; its log (stderr) goes to ``log_path``."""

    process: subprocess.Popen[bytes]
    port: int
    log_path: Path

    def log(self) -> str:
        return self.log_path.read_text(errors="replace")

    def connect(self, user: str = "planner", **kwargs: object) -> psycopg.Connection:
        return psycopg.connect(host="127.0.0.1", port=self.port, user=user,
                               password=PASSWORDS[user], dbname=DEMO_DATABASE,
                               connect_timeout=10, **kwargs)  # type: ignore[arg-type]

    def wait_for_log(self, text: str, timeout: float = 30.0, *, count: int = 1) -> str:
        """Waits until ``text`` occurs ``count`` times in the log; returns the log."""
        deadline = time.monotonic() + timeout
        while True:
            log = self.log()
            if log.count(text) >= count:
                return log
            assert time.monotonic() < deadline, f"{text!r} not logged in {timeout} s:\n{log}"
            time.sleep(0.05)

    def stop(self) -> int:
        """SIGTERM, then the exit code (SIGKILL after 30 s)."""
        if self.process.poll() is None:
            self.process.send_signal(signal.SIGTERM)
            try:
                return self.process.wait(30)
            except subprocess.TimeoutExpired:
                self.process.kill()
        return self.process.wait()


def start_serve(backend_dsn: str, log_path: Path, *, workers: int = 1, port: int | None = None,
                policies: Path | None = None, env: dict[str, str] | None = None,
                extra: tuple[str, ...] = (), pool_size: int | None = None) -> ServeProcess:
    """Starts ``hushql serve`` and returns once it accepts analysts' connections."""
    port = port or free_port()
    stderr = open(log_path, "ab")
    process = subprocess.Popen(
        [sys.executable, "-m", "proxy.cli", "serve", "--policies",
         str(policies or served_policies()),
         "--backend", backend_dsn, "--listen", f"127.0.0.1:{port}", "--workers", str(workers),
         "--pool-size", str(pool_size or 2 * workers), *extra],
        cwd=ROOT, env={**os.environ, **(env or {})}, stderr=stderr, stdout=subprocess.DEVNULL)
    stderr.close()
    served = ServeProcess(process, port, log_path)
    deadline = time.monotonic() + 60
    while True:
        try:
            served.connect().close()
            return served
        except psycopg.OperationalError:
            if process.poll() is not None or time.monotonic() > deadline:
                served.stop()
                raise AssertionError(f"serve did not start:\n{served.log()}") from None
            time.sleep(0.1)


@contextmanager
def serving(backend_dsn: str, log_path: Path, **kwargs: object) -> Iterator[ServeProcess]:
    served = start_serve(backend_dsn, log_path, **kwargs)  # type: ignore[arg-type]
    try:
        yield served
    finally:
        served.stop()


def policies_with_budgets(folder: Path, *, planner: str, households_cap: str) -> Path:
    """A copy of the served policies with the planner's budget and the households cap changed,
    and readings made a population of its own ("meters"), so that the households cap binds on
    households answers alone."""
    target = folder / "policies"
    shutil.copytree(served_policies(), target)
    readings = target / "tables" / "readings.toml"
    text = readings.read_text()
    assert 'population = "households"' in text
    readings.write_text(text.replace('population = "households"', 'population = "meters"'))
    access = target / "access.toml"
    text = access.read_text()
    # Many clients log in at once from one address on a possibly loaded machine: this copy is
    # about the ledger, so the login limits must not be what refuses them.
    text = re.sub(r"(?m)^most_logins_in_progress_per_address = \d+",
                  "most_logins_in_progress_per_address = 128", text)
    text = re.sub(r"(?m)^most_logins_in_progress = \d+", "most_logins_in_progress = 256", text)
    text = re.sub(r"(?m)^login_timeout_seconds = \d+", "login_timeout_seconds = 60", text)
    # A login takes its failed-login token when it starts (given back on success), so logins in
    # progress at once from one address count against this allowance too.
    text = re.sub(r"(?m)^failed_logins_allowed = \d+", "failed_logins_allowed = 256", text)
    access.write_text(text.replace("budget = 3.0 ", f"budget = {planner} ", 1))
    households = target / "tables" / "households.toml"
    text = households.read_text()
    households.write_text(text.replace("cap = 20.0 ", f"cap = {households_cap} ", 1))
    assert f"budget = {planner} " in access.read_text()
    assert "failed_logins_allowed = 256" in access.read_text()
    assert f"cap = {households_cap} " in households.read_text()
    return target


@dataclass(frozen=True)
class Books:
    """The ledger as it stands: budget rows and charge rows."""

    analyst_spent: dict[str, Decimal]
    table_spent: dict[str, Decimal]
    charges: list[tuple[int, str, list[str], Decimal, str]]  # id, analyst, tables, eps, outcome

    def charged_to_analyst(self, analyst: str) -> Decimal:
        return sum((c[3] for c in self.charges if c[1] == analyst), Decimal(0))

    def charged_to_table(self, table: str) -> Decimal:
        return sum((c[3] for c in self.charges if table in c[2]), Decimal(0))

    def consistent(self) -> bool:
        """Every spent figure is exactly the sum of its charge rows."""
        return all(self.charged_to_analyst(a) == s for a, s in self.analyst_spent.items()) \
            and all(self.charged_to_table(t) == s for t, s in self.table_spent.items())


def read_books(ledger_dsn: str) -> Books:
    with psycopg.connect(ledger_dsn) as conn:
        analysts = dict(conn.execute("SELECT analyst, spent FROM hushql.analyst_budgets"))
        tables = dict(conn.execute("SELECT table_name, spent FROM hushql.table_budgets"))
        charges = [tuple(row) for row in conn.execute(
            "SELECT id, analyst, tables, epsilon, outcome FROM hushql.charges ORDER BY id")]
    return Books(analysts, tables, charges)  # type: ignore[arg-type]


def drop_mirrors(backend_dsn: str, policies_dir: Path = DEMO_POLICIES) -> None:
    """Drops the catalog mirror databases a serve process built for this backend database."""
    policies = load_policies(policies_dir)
    grants = {tuple(sorted(set(a.tables))) for a in policies.analysts.values()} | {()}
    with psycopg.connect(backend_dsn, autocommit=True) as conn:
        database = conn.execute("SELECT current_database()").fetchone()[0]  # type: ignore[index]
        for tables in grants:
            name = mirror_name(database, mirror_layout(policies, tables))
            conn.execute(sql.SQL("DROP DATABASE IF EXISTS {} WITH (FORCE)").format(
                sql.Identifier(name)))
