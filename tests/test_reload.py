"""SIGHUP reloads a serving proxy's policies: a valid set takes effect, an invalid one is
refused with check's problems and the old set stays; both are logged."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import psycopg
import pytest

from proxy.demo import load_scenario
from proxy.localpg import free_port
from proxy.wire.auth import make_verifier
from tests.test_cli import ROOT, own_policies

pytestmark = pytest.mark.skipif(not hasattr(signal, "SIGHUP"), reason="no SIGHUP here")


def try_login(port: int, user: str, password: str) -> bool:
    try:
        with psycopg.connect(host="127.0.0.1", port=port, user=user, password=password,
                             dbname="hushql_demo", connect_timeout=2):
            return True
    except psycopg.OperationalError:
        return False


def wait_for(condition, seconds: float = 30) -> bool:  # type: ignore[no-untyped-def]
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        if condition():
            return True
        time.sleep(0.2)
    return False


def test_sighup_applies_a_valid_set_and_refuses_an_invalid_one(module_dsn: str,
                                                               tmp_path: Path) -> None:
    load_scenario(module_dsn, households=300, progress=False)
    policies = own_policies(tmp_path / "policies", {"planner": "p-secret-1",
                                                    "researcher": "r-secret-2",
                                                    "auditor": "a-secret-3"})
    port = free_port()
    log_path = tmp_path / "serve.log"
    with log_path.open("w") as log_file:
        server = subprocess.Popen(
            [sys.executable, "-m", "proxy.cli", "serve", "--pool-size", "2", "--policies",
             str(policies), "--backend", module_dsn, "--listen", f"127.0.0.1:{port}"],
            cwd=ROOT, env={**os.environ}, stderr=log_file, stdout=subprocess.DEVNULL)
        try:
            assert wait_for(lambda: try_login(port, "planner", "p-secret-1"), 60)
            assert not try_login(port, "hydrologist", "h-secret-4")
            access = policies / "access.toml"
            access.write_text(access.read_text() + (
                f'\n[analysts.hydrologist]\npassword = "{make_verifier("h-secret-4")}"\n'
                'budget = 0.5\ntables = ["readings"]\n'))
            server.send_signal(signal.SIGHUP)
            assert wait_for(lambda: try_login(port, "hydrologist", "h-secret-4"))
            with psycopg.connect(host="127.0.0.1", port=port, user="hydrologist",
                                 password="h-secret-4", dbname="hushql_demo") as conn:
                conn.execute("SELECT COUNT(*) FROM readings").fetchall()
            # Now a misspelt source: refused, the previous set stays in force.
            readings = policies / "tables" / "readings.toml"
            readings.write_text(readings.read_text().replace("utility.meter_readings",
                                                             "utility.meter_readngs"))
            server.send_signal(signal.SIGHUP)
            assert wait_for(lambda: "previous policies stay in force" in log_path.read_text())
            assert try_login(port, "hydrologist", "h-secret-4")
        finally:
            server.send_signal(signal.SIGTERM)
            server.wait(timeout=30)
    log = log_path.read_text()
    assert server.returncode == 0, log
    assert "policies reloaded: " in log
    assert "policy reload refused: tables/readings.toml: source: utility.meter_readngs is not " \
        "a table or view" in log
    assert "Traceback" not in log
