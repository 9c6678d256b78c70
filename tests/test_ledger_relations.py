"""Administrators read the ledger's relations through the proxy, exactly; analysts cannot.

What must hold: the auditor (an administrator) reads hushql.budgets, charges, grants and
populations with the same values as the ledger's own tables, with psycopg and with psql; an
analyst gets 42501 for each; the auditor still gets no answers from the protected tables, cannot
reach beyond the four relations, and cannot write through them.
"""

from __future__ import annotations

import shutil
import subprocess
from collections.abc import Iterator

import psycopg
import pytest

from proxy.demo import demo_accounts, load_scenario
from proxy.engine import Engine
from proxy.policy import load_policies
from proxy.wire.catalog import build_catalog
from proxy.wire.ledger_relations import LedgerRelations
from proxy.wire.server import start_in_thread
from tests.proxy_fixtures import DEMO_POLICIES, HOUSEHOLDS
from tests.test_ledger import query

PASSWORDS = dict(demo_accounts())


@pytest.fixture(scope="module")
def proxy(module_dsn: str) -> Iterator[tuple[str, int, str]]:
    """The demo behind a proxy whose catalog is wrapped by LedgerRelations; (host, port, dsn)."""
    load_scenario(module_dsn, households=HOUSEHOLDS, progress=False)
    policies = load_policies(DEMO_POLICIES)
    engine = Engine.connect(policies, module_dsn, pool_size=2)
    catalog = build_catalog(policies, module_dsn)
    relations = LedgerRelations(policies, module_dsn, catalog)
    assert relations.unavailable is None, relations.unavailable
    host, port, stop = start_in_thread(engine, catalog=relations)
    try:
        with connect(host, port, "planner") as conn:
            conn.execute("SET hushql.epsilon = 0.2")
            conn.execute("SELECT COUNT(*) FROM households").fetchall()
            conn.execute("SELECT district, COUNT(*) FROM households GROUP BY district").fetchall()
        yield host, port, module_dsn
    finally:
        stop()
        catalog.drop_mirrors()
        engine.close()


def connect(host: str, port: int, user: str) -> psycopg.Connection:
    return psycopg.connect(host=host, port=port, user=user, password=PASSWORDS[user],
                           dbname="hushql_demo", autocommit=True)


@pytest.mark.parametrize(("relation", "columns", "direct"), [
    ("hushql.budgets", "analyst, budget, spent, remaining",
     "SELECT analyst, budget, spent, greatest(budget - spent, 0) FROM hushql.analyst_budgets"),
    ("hushql.charges", "id, analyst, tables, epsilon, outcome",
     "SELECT id, analyst, tables::text, epsilon, outcome FROM hushql.charges"),  # arrays as text
    ("hushql.grants", "id, kind, subject, amount, reason",
     "SELECT id, kind, subject, amount, reason FROM hushql.budget_events"),
    ("hushql.populations", "name, cap, spent",
     "SELECT population, cap, spent FROM hushql.population_budgets"),
])
def test_an_administrator_reads_each_ledger_relation_exactly(
        proxy: tuple[str, int, str], relation: str, columns: str, direct: str) -> None:
    host, port, dsn = proxy
    with connect(host, port, "auditor") as conn:
        through_proxy = conn.execute(f"SELECT {columns} FROM {relation} ORDER BY 1, 2").fetchall()
    expected = query(dsn, direct + " ORDER BY 1, 2")
    assert through_proxy == expected and expected


def test_psql_as_administrator_reads_the_spending(proxy: tuple[str, int, str]) -> None:
    psql = shutil.which("psql")
    if psql is None:
        pytest.skip("psql is not installed")
    host, port, dsn = proxy
    done = subprocess.run(
        [psql, "-X", "-A", "-t", "-h", host, "-p", str(port), "-U", "auditor", "-d",
         "hushql_demo", "-c", "SELECT analyst, spent FROM hushql.budgets ORDER BY analyst"],
        capture_output=True, text=True, timeout=60, env={"PGPASSWORD": PASSWORDS["auditor"]})
    assert done.returncode == 0, done.stderr
    expected = query(dsn, "SELECT analyst, spent FROM hushql.analyst_budgets ORDER BY analyst")
    assert done.stdout.split() == [f"{a}|{s}" for a, s in expected]


@pytest.mark.parametrize("analyst", ["planner", "researcher"])
@pytest.mark.parametrize("relation", ["budgets", "charges", "grants", "populations"])
def test_an_analyst_gets_42501_for_the_ledger_relations(proxy: tuple[str, int, str],
                                                        analyst: str, relation: str) -> None:
    host, port, _ = proxy
    with connect(host, port, analyst) as conn:
        with pytest.raises(psycopg.errors.InsufficientPrivilege):
            conn.execute(f"SELECT * FROM hushql.{relation}")


def test_an_administrator_gets_no_data_and_nothing_beyond_the_ledger_relations(
        proxy: tuple[str, int, str]) -> None:
    host, port, dsn = proxy
    before = query(dsn, "SELECT budget FROM hushql.analyst_budgets ORDER BY analyst")
    refused = [
        "SELECT COUNT(*) FROM households",  # the engine: not an analyst
        "SELECT COUNT(*) FROM hushql.charges, utility.households",
        "SELECT * FROM hushql.analyst_budgets",  # the ledger's own tables are not offered
        "SELECT pg_read_file('/etc/hostname') FROM hushql.budgets",
        "SELECT hushql.grant_budget('planner', 5, 'x', 'y') FROM hushql.budgets",
    ]
    with connect(host, port, "auditor") as conn:
        for text in refused:
            with pytest.raises(psycopg.Error) as error:
                conn.execute(text).fetchall()
            assert error.value.sqlstate in ("42501", "25006"), (text, error.value.sqlstate)
    assert query(dsn, "SELECT budget FROM hushql.analyst_budgets ORDER BY analyst") == before
