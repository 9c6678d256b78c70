"""The ``hushql`` command line: ask, check and hash-password, through the console script."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

from proxy.demo import load_scenario
from proxy.wire.auth import verify_password

ROOT = Path(__file__).resolve().parent.parent


def hushql(*args: str, env: dict[str, str] | None = None, stdin: str | None = None):
    return subprocess.run([sys.executable, "-m", "proxy.cli", *args], capture_output=True,
                          text=True, input=stdin, timeout=120, cwd=ROOT,
                          env={**os.environ, "COLUMNS": "200", **(env or {})})


@pytest.fixture(scope="module")
def demo_dsn(module_dsn: str) -> str:
    load_scenario(module_dsn, households=300, progress=False)
    return module_dsn


def test_ask_prints_a_noisy_table_the_charge_and_the_bound(demo_dsn: str) -> None:
    done = hushql("ask", "--as", "planner", "--backend", demo_dsn,
                  "SELECT district, COUNT(*) FROM households GROUP BY district")
    assert done.returncode == 0, done.stderr
    for text in ("Northbank", "Old Mill", "Harbourside", "epsilon spent: 0.1", "remaining:",
                 "95% of answers within ±30"):
        assert text in done.stdout
    again = hushql("ask", "--as", "planner", "--epsilon", "0.5",
                   "SELECT COUNT(*) FROM households", env={"HUSHQL_BACKEND": demo_dsn})
    assert again.returncode == 0, again.stderr
    assert "epsilon spent: 0.5" in again.stdout and "remaining: 2.4" in again.stdout


def test_ask_refusals_exit_1_with_sqlstate_and_hint(demo_dsn: str) -> None:
    done = hushql("ask", "--as", "planner", "--backend", demo_dsn, "SELECT * FROM households")
    assert done.returncode == 1
    assert "0A000" in done.stdout and "HINT" in done.stdout and "Traceback" not in done.stderr
    denied = hushql("ask", "--as", "researcher", "--backend", demo_dsn, "SELECT COUNT(*) FROM readings")
    assert denied.returncode == 1 and "42501" in denied.stdout


def test_ask_explain_charges_nothing(demo_dsn: str) -> None:
    done = hushql("ask", "--as", "researcher", "--explain", "--backend", demo_dsn,
                  "SELECT has_garden, COUNT(*) FROM households GROUP BY has_garden")
    assert done.returncode == 0, done.stderr
    assert "sensitivity 1" in done.stdout and "backend sql" in done.stdout
    assert "epsilon spent" not in done.stdout


def test_ask_without_a_backend_says_how_to_give_one() -> None:
    done = hushql("ask", "--as", "planner", "SELECT COUNT(*) FROM households",
                  env={"HUSHQL_BACKEND": ""})
    assert done.returncode == 1 and "--backend" in done.stdout


def test_check_passes_on_the_demo_policies() -> None:
    done = hushql("check", "policies")
    assert done.returncode == 0, done.stdout + done.stderr
    assert "readings" in done.stdout and "planner" in done.stdout


def test_hash_password_makes_a_verifier_that_verifies() -> None:
    done = hushql("hash-password", stdin="a long passphrase\n")
    assert done.returncode == 0
    verifier = done.stdout.strip()
    assert verifier.startswith("SCRAM-SHA-256$4096:")
    assert verify_password("a long passphrase", verifier)
    assert not verify_password("another", verifier)


def test_serve_takes_its_settings_from_the_environment_and_logs_no_values(demo_dsn: str) -> None:
    import signal
    import time

    import psycopg

    from proxy.localpg import free_port

    port = free_port()
    env = {**os.environ, "HUSHQL_POLICIES": str(ROOT / "policies"), "HUSHQL_BACKEND": demo_dsn,
           "HUSHQL_LISTEN": f"127.0.0.1:{port}"}
    server = subprocess.Popen([sys.executable, "-m", "proxy.cli", "serve", "--pool-size", "2"],
                              cwd=ROOT, env=env, stderr=subprocess.PIPE, text=True)
    try:
        deadline = time.monotonic() + 60
        while True:
            try:
                conn = psycopg.connect(host="127.0.0.1", port=port, user="planner",
                                       password="planner-demo", dbname="hushql_demo",
                                       connect_timeout=2)
                break
            except psycopg.OperationalError:
                assert server.poll() is None and time.monotonic() < deadline
                time.sleep(0.2)
        with conn:
            rows = conn.execute("SELECT district, COUNT(*) FROM households GROUP BY district").fetchall()
        assert [r[0] for r in rows] == ["Northbank", "Old Mill", "Harbourside"]
    finally:
        server.send_signal(signal.SIGTERM)
        _, log = server.communicate(timeout=30)
    assert server.returncode == 0
    assert "answer analyst=planner epsilon=0.1 outcome=ok" in log
    # One line per connection and per answer, and never a value or the statement.
    assert "SELECT" not in log and "Northbank" not in log and "Traceback" not in log


def test_check_warns_when_the_backend_role_is_a_superuser(pg_server_dsn: str) -> None:
    import psycopg
    from psycopg.conninfo import conninfo_to_dict, make_conninfo

    with psycopg.connect(pg_server_dsn) as conn:  # the test server's admin role
        superuser = conn.execute("SELECT rolsuper FROM pg_roles "
                                 "WHERE rolname = current_user").fetchone()[0]
    done = hushql("check", "policies", "--backend", pg_server_dsn)
    assert done.returncode == 0, done.stdout + done.stderr
    assert ("is a superuser" in done.stdout) == superuser
    if superuser:  # the same server, as a role with no powers: no warning
        role = "hushql_check_plain"
        with psycopg.connect(pg_server_dsn, autocommit=True) as conn:
            conn.execute(f"DROP ROLE IF EXISTS {role}")
            conn.execute(f"CREATE ROLE {role} LOGIN PASSWORD 'plain-check'")
        try:
            params = conninfo_to_dict(pg_server_dsn)
            params.update(user=role, password="plain-check")
            plain = hushql("check", "policies", "--backend", make_conninfo(**params))
            assert plain.returncode == 0, plain.stdout + plain.stderr
            assert "warning" not in plain.stdout
        finally:
            with psycopg.connect(pg_server_dsn, autocommit=True) as conn:
                conn.execute(f"DROP ROLE IF EXISTS {role}")
    unreachable = hushql("check", "policies", "--backend",
                         "postgresql://nobody@127.0.0.1:1/none?connect_timeout=2")
    assert unreachable.returncode == 1 and "cannot connect" in unreachable.stdout
