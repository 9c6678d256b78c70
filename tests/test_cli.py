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
    """Run the command with the demo policies named through HUSHQL_POLICIES unless ``env``
    says otherwise."""
    return subprocess.run([sys.executable, "-m", "proxy.cli", *args], capture_output=True,
                          text=True, input=stdin, timeout=120, cwd=ROOT,
                          env={**os.environ, "COLUMNS": "200",
                               "HUSHQL_POLICIES": str(ROOT / "policies"), **(env or {})})


def own_policies(folder: Path, passwords: dict[str, str]) -> Path:
    """A copy of the demo policies in ``folder`` with new verifiers for ``passwords``
    (every account of the copy gets one)."""
    import re
    import shutil

    from proxy.wire.auth import make_verifier

    shutil.copytree(ROOT / "policies", folder)
    access = (folder / "access.toml").read_text()
    for name, password in passwords.items():
        access = re.sub(rf'(\[(?:analysts|admins)\.{name}\]\npassword = )"[^"]*"',
                        lambda m: m.group(1) + f'"{make_verifier(password)}"', access)
    (folder / "access.toml").write_text(access)
    return folder


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


def test_serve_takes_its_settings_from_the_environment_and_logs_no_values(
        demo_dsn: str, tmp_path: Path) -> None:
    import signal
    import time

    import psycopg

    from proxy.localpg import free_port

    port = free_port()
    policies = own_policies(tmp_path / "policies", {"planner": "planner-secret-1",
                                                    "researcher": "researcher-secret-2",
                                                    "auditor": "auditor-secret-3"})
    env = {**os.environ, "HUSHQL_POLICIES": str(policies), "HUSHQL_BACKEND": demo_dsn,
           "HUSHQL_LISTEN": f"127.0.0.1:{port}"}
    server = subprocess.Popen([sys.executable, "-m", "proxy.cli", "serve", "--pool-size", "2"],
                              cwd=ROOT, env=env, stderr=subprocess.PIPE, text=True)
    try:
        deadline = time.monotonic() + 60
        while True:
            try:
                conn = psycopg.connect(host="127.0.0.1", port=port, user="planner",
                                       password="planner-secret-1", dbname="hushql_demo",
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
    # Start-up names the policy set in force: its folder and a digest of its files.
    from proxy.safe_config import policy_digest
    assert f"policies: {policies.resolve()} (digest {policy_digest(policies)[:16]})" in log
    # One line per connection and per answer, and never a value or the statement.
    assert "SELECT" not in log and "Northbank" not in log and "Traceback" not in log


def test_serve_and_ask_need_their_policies_named(demo_dsn: str) -> None:
    for command in (["serve"], ["ask", "--as", "planner", "SELECT COUNT(*) FROM households"]):
        done = hushql(*command, "--backend", demo_dsn, env={"HUSHQL_POLICIES": ""})
        assert done.returncode == 1, done.stdout + done.stderr
        assert "no policy folder named" in done.stdout and "--policies" in done.stdout
        assert "Traceback" not in done.stderr


def test_serve_refuses_the_demo_passwords_and_tables_the_backend_cannot_answer(
        demo_dsn: str, tmp_path: Path) -> None:
    done = hushql("serve", "--backend", demo_dsn)  # the bundled demo policies
    assert done.returncode == 1 and "Traceback" not in done.stderr
    for account in ("analysts.planner", "analysts.researcher", "admins.auditor"):
        assert f"access.toml: {account}.password: accepts a password published with the demo" \
            in done.stdout
    # A verifier made anew (another salt) for a published password is refused just the same.
    reused = own_policies(tmp_path / "reused", {"planner": "planner-demo"})
    assert "analysts.planner.password" in hushql("serve", "--policies", str(reused),
                                                 "--backend", demo_dsn).stdout
    # Own passwords, but a misspelt source: refused at start, before any analyst pays.
    policies = own_policies(tmp_path / "typo", {"planner": "p-1", "researcher": "r-2",
                                                "auditor": "a-3"})
    readings = policies / "tables" / "readings.toml"
    readings.write_text(readings.read_text().replace("utility.meter_readings",
                                                     "utility.meter_reading"))
    typo = hushql("serve", "--policies", str(policies), "--backend", demo_dsn)
    assert typo.returncode == 1 and "password" not in typo.stdout
    assert "tables/readings.toml: source: utility.meter_reading is not a table or view" \
        in typo.stdout


def test_check_with_a_backend_names_each_wrong_source_column_and_type(demo_dsn: str,
                                                                       tmp_path: Path) -> None:
    import shutil

    assert hushql("check", "policies", "--backend", demo_dsn).returncode == 0
    folder = tmp_path / "policies"
    shutil.copytree(ROOT / "policies", folder)
    households = folder / "tables" / "households.toml"
    text = households.read_text()
    assert "[columns.district]" in text and "[columns.has_garden]" in text
    text = text.replace("[columns.district]", "[columns.distrct]")
    # has_garden is boolean in the backend: declaring it a category is a type problem.
    text = text.replace('[columns.has_garden]\nkind = "boolean"',
                        '[columns.has_garden]\nkind = "category"\nvalues = ["yes", "no"]')
    households.write_text(text)
    done = hushql("check", str(folder), "--backend", demo_dsn)
    assert done.returncode == 1, done.stdout
    assert "tables/households.toml: columns.distrct: utility.households has no such column" \
        in done.stdout
    assert "tables/households.toml: columns.has_garden: kind category does not fit the " \
        "backend's type boolean" in done.stdout


def test_check_reports_a_budget_lowered_below_spending(demo_dsn: str, tmp_path: Path) -> None:
    import shutil

    assert hushql("ask", "--as", "researcher", "--epsilon", "0.5", "--backend", demo_dsn,
                  "SELECT COUNT(*) FROM households").returncode == 0
    folder = tmp_path / "policies"
    shutil.copytree(ROOT / "policies", folder)
    access = folder / "access.toml"
    access.write_text(access.read_text().replace("budget = 1.0", "budget = 0.2"))
    done = hushql("check", str(folder), "--backend", demo_dsn)
    assert done.returncode == 1
    assert "access.toml: analysts.researcher.budget: the ledger's budget would become" \
        in done.stdout and "below the" in done.stdout


def test_check_warns_when_the_backend_role_is_a_superuser(demo_dsn: str) -> None:
    import psycopg
    from psycopg.conninfo import conninfo_to_dict, make_conninfo

    with psycopg.connect(demo_dsn) as conn:  # the test server's admin role
        superuser = conn.execute("SELECT rolsuper FROM pg_roles "
                                 "WHERE rolname = current_user").fetchone()[0]
    done = hushql("check", "policies", "--backend", demo_dsn)
    assert done.returncode == 0, done.stdout + done.stderr
    assert ("is a superuser" in done.stdout) == superuser
    if superuser:  # the same server, as a role with no powers: no warning
        role = "hushql_check_plain"
        with psycopg.connect(demo_dsn, autocommit=True) as conn:
            conn.execute(f"DROP OWNED BY {role}" if conn.execute(
                "SELECT 1 FROM pg_roles WHERE rolname = %s", [role]).fetchone() else "SELECT 1")
            conn.execute(f"DROP ROLE IF EXISTS {role}")
            conn.execute(f"CREATE ROLE {role} LOGIN PASSWORD 'plain-check'")
            # What a reading role needs for the check: the tables, and the ledger's budgets.
            for (schema,) in conn.execute("SELECT nspname FROM pg_namespace WHERE nspname IN "
                                          "('utility', 'hushql')").fetchall():
                conn.execute(f"GRANT USAGE ON SCHEMA {schema} TO {role}")
                conn.execute(f"GRANT SELECT ON ALL TABLES IN SCHEMA {schema} TO {role}")
        try:
            params = conninfo_to_dict(demo_dsn)
            params.update(user=role, password="plain-check")
            plain = hushql("check", "policies", "--backend", make_conninfo(**params))
            assert plain.returncode == 0, plain.stdout + plain.stderr
            assert "warning" not in plain.stdout
        finally:
            with psycopg.connect(demo_dsn, autocommit=True) as conn:
                conn.execute(f"DROP OWNED BY {role}")
                conn.execute(f"DROP ROLE IF EXISTS {role}")
    unreachable = hushql("check", "policies", "--backend",
                         "postgresql://nobody@127.0.0.1:1/none?connect_timeout=2")
    assert unreachable.returncode == 1 and "cannot connect" in unreachable.stdout
