"""A disabled account cannot log in or be charged, and keeps its budget and history."""

from __future__ import annotations

import shutil
from pathlib import Path

import psycopg
import pytest

from proxy.demo import demo_accounts, load_scenario
from proxy.engine import Engine
from proxy.errors import INSUFFICIENT_PRIVILEGE, HushError
from proxy.policy import load_policies
from proxy.wire.server import start_in_thread
from tests.proxy_fixtures import DEMO_POLICIES, HOUSEHOLDS
from tests.test_ledger import query


def disabled_copy(folder: Path, account: str) -> Path:
    shutil.copytree(DEMO_POLICIES, folder)
    access = folder / "access.toml"
    text = access.read_text()
    for section in ("analysts", "admins"):
        text = text.replace(f"[{section}.{account}]\n", f"[{section}.{account}]\ndisabled = true\n")
    access.write_text(text)
    return folder


def test_a_disabled_analyst_cannot_log_in_or_spend_and_keeps_the_history(
        fresh_dsn: str, tmp_path: Path) -> None:
    load_scenario(fresh_dsn, households=HOUSEHOLDS, progress=False)
    engine = Engine.connect(load_policies(DEMO_POLICIES), fresh_dsn, pool_size=2)
    try:
        engine.answer("researcher", "SELECT COUNT(*) FROM households")
    finally:
        engine.close()
    policies = load_policies(disabled_copy(tmp_path / "policies", "researcher"))
    assert policies.analysts["researcher"].disabled
    engine = Engine.connect(policies, fresh_dsn, pool_size=2)
    host, port, stop = start_in_thread(engine)
    try:
        passwords = dict(demo_accounts())
        with pytest.raises(psycopg.OperationalError) as refused:
            psycopg.connect(host=host, port=port, user="researcher",
                            password=passwords["researcher"], dbname="hushql_demo")
        assert "password authentication failed" in str(refused.value)
        with psycopg.connect(host=host, port=port, user="planner", password=passwords["planner"],
                             dbname="hushql_demo") as conn:  # others are unaffected
            conn.execute("SELECT COUNT(*) FROM households").fetchall()
        with pytest.raises(HushError) as denied:  # nor through the engine (hushql ask)
            engine.answer("researcher", "SELECT COUNT(*) FROM households")
        assert denied.value.sqlstate == INSUFFICIENT_PRIVILEGE
        assert "disabled" in denied.value.message
    finally:
        stop()
        engine.close()
    assert query(fresh_dsn, "SELECT budget::text, spent::text FROM hushql.analyst_budgets "
                            "WHERE analyst = 'researcher'") == [("1.0", "0.1")]
    assert query(fresh_dsn, "SELECT count(*) FROM hushql.charges "
                            "WHERE analyst = 'researcher'") == [(1,)]
