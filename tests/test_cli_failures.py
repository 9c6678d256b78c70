"""Expected failures of the ``hushql`` command: one or two lines saying what failed and what to
do, a non-zero exit code, and never a traceback.

Each case runs the console script as a subprocess, as a newcomer would.
"""

from __future__ import annotations

import os
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import pytest

from proxy.localpg import free_port

ROOT = Path(__file__).resolve().parent.parent
POLICIES = ROOT / "policies"
QUERY = "SELECT COUNT(*) FROM households"


def hushql(*args: str, env: dict[str, str] | None = None, code: str | None = None,
           cwd: Path = ROOT) -> subprocess.CompletedProcess[str]:
    """Run ``hushql ARGS`` (or, with ``code``, a Python snippet that ends by calling the CLI's
    main with ARGS, to take a dependency away first)."""
    command = [sys.executable, "-m", "proxy.cli", *args] if code is None else \
        [sys.executable, "-c", f"{code}\nimport sys\nfrom proxy.cli import main\n"
                               f"sys.exit(main({list(args)!r}))"]
    return subprocess.run(command, capture_output=True, text=True, timeout=120, cwd=cwd,
                          env={**os.environ, "COLUMNS": "80", "HUSHQL_BACKEND": "",
                               "HUSHQL_LEDGER": "", **(env or {})})


def assert_short_failure(done: subprocess.CompletedProcess[str], *expected: str) -> str:
    """Non-zero exit, no traceback, each expected text present; returns all the output."""
    text = done.stdout + done.stderr
    assert done.returncode != 0, text
    assert "Traceback" not in text, text
    for part in expected:
        assert part in text, (part, text)
    return text


def error_lines(text: str) -> list[str]:
    """The lines of the ERROR/HINT report (log lines carry a timestamp and are left out)."""
    return [line for line in text.splitlines() if line.startswith(("ERROR", "HINT"))]


@pytest.fixture()
def busy_port() -> Iterator[int]:
    """A port on 127.0.0.1 another program listens on."""
    with socket.socket() as taken:
        taken.bind(("127.0.0.1", 0))
        taken.listen()
        yield taken.getsockname()[1]


def test_demo_on_a_busy_port_says_so_before_loading_anything(busy_port: int, fresh_dsn: str,
                                                             tmp_path: Path) -> None:
    started = time.monotonic()
    done = hushql("demo", "--backend", fresh_dsn, "--listen", f"127.0.0.1:{busy_port}",
                  "--data-dir", str(tmp_path / "pg"))
    text = assert_short_failure(done, f"cannot listen on 127.0.0.1:{busy_port}",
                                "Address already in use", "--listen 127.0.0.1:")
    assert len(error_lines(text)) == 2 and "Loaded" not in text and "try these" not in text
    assert time.monotonic() - started < 60
    # Nothing was loaded: the check came first.
    import psycopg
    with psycopg.connect(fresh_dsn) as conn:
        assert conn.execute("SELECT to_regclass('utility.households')").fetchone()[0] is None
    # Nor is a private server initialised when the demo would start one.
    done = hushql("demo", "--listen", f"127.0.0.1:{busy_port}", "--data-dir", str(tmp_path / "pg"))
    assert_short_failure(done, f"cannot listen on 127.0.0.1:{busy_port}")
    assert not (tmp_path / "pg").exists()


def test_serve_on_a_busy_port_suggests_listen(busy_port: int, module_dsn: str) -> None:
    done = hushql("serve", "--policies", str(POLICIES), "--backend", module_dsn,
                  "--listen", f"127.0.0.1:{busy_port}")
    text = assert_short_failure(done, f"cannot listen on 127.0.0.1:{busy_port}", "--listen")
    assert len(error_lines(text)) == 2


def test_demo_without_postgresql_names_both_ways_to_get_one(tmp_path: Path) -> None:
    # Take the server binaries and the embedded wheel away, as on a machine with neither.
    code = ("import sys, proxy.localpg\nsys.modules['pgserver'] = None\n"
            "proxy.localpg.find_binaries = lambda: None")
    done = hushql("demo", "--data-dir", str(tmp_path / "pg"), "--listen",
                  f"127.0.0.1:{free_port()}", code=code)
    assert_short_failure(done, "no PostgreSQL found", "initdb", "pgserver", "--backend DSN")


@pytest.mark.parametrize("flags, which, flag", [
    (["--backend", "postgresql://hushql@127.0.0.1:{port}/nothing"], "backend", "--backend"),
    (["--backend", "not a connection string"], "backend", "--backend"),
    (["--backend", "{dsn}", "--ledger", "postgresql://hushql@127.0.0.1:{port}/nothing"],
     "ledger", "--ledger"),
])
def test_unreachable_backend_or_ledger_is_one_line(flags: list[str], which: str, flag: str,
                                                   module_dsn: str) -> None:
    port = free_port()  # nothing listens there
    args = [f.format(port=port, dsn=module_dsn) for f in flags]
    started = time.monotonic()
    done = hushql("ask", "--policies", str(POLICIES), "--as", "planner", *args, QUERY)
    text = assert_short_failure(done, f"cannot connect to the {which} database", flag)
    assert len(error_lines(text)) == 2
    assert time.monotonic() - started < 30  # not a pool's 30-second wait


@pytest.mark.parametrize("command", ["ask", "serve", "check"])
def test_a_missing_or_broken_policy_folder_is_reported_by_file_and_key(command: str,
                                                                       tmp_path: Path) -> None:
    missing = tmp_path / "nowhere"
    args = {"ask": ["ask", "--policies", str(missing), "--as", "planner", QUERY],
            "serve": ["serve", "--policies", str(missing)],
            "check": ["check", str(missing)]}[command]
    assert_short_failure(hushql(*args, env={"HUSHQL_BACKEND": "postgresql://unused"}),
                         f"{missing}: (directory): not found")
    broken = tmp_path / "broken"
    (broken / "tables").mkdir(parents=True)
    (broken / "access.toml").write_text("[defaults\n")
    args = [str(broken) if a == str(missing) else a for a in args]
    assert_short_failure(hushql(*args, env={"HUSHQL_BACKEND": "postgresql://unused"}),
                         "access.toml")


def test_bad_tls_files_name_the_file(tmp_path: Path, module_dsn: str) -> None:
    common = ["serve", "--policies", str(POLICIES), "--backend", module_dsn,
              "--listen", f"127.0.0.1:{free_port()}"]
    missing = tmp_path / "cert.pem"
    done = hushql(*common, "--tls-cert", str(missing), "--tls-key", str(missing))
    assert_short_failure(done, f"the TLS certificate {missing} does not exist")
    garbage = tmp_path / "garbage.pem"
    garbage.write_text("not a certificate\n")
    done = hushql(*common, "--tls-cert", str(garbage), "--tls-key", str(garbage))
    assert_short_failure(done, f"cannot load the TLS certificate {garbage}", "PEM")
    done = hushql(*common, "--tls-cert", str(garbage))
    assert_short_failure(done, "TLS needs both --tls-cert and --tls-key")


def test_a_malformed_epsilon_is_one_line(module_dsn: str) -> None:
    done = hushql("ask", "--policies", str(POLICIES), "--backend", module_dsn, "--as", "planner",
                  "--epsilon", "a lot", QUERY)
    assert_short_failure(done, "invalid epsilon 'a lot'", "--epsilon 0.25")


@pytest.mark.parametrize("command", [
    ["ask", "--policies", str(POLICIES), "--as", "planner", QUERY],
    ["serve", "--policies", str(POLICIES)],
    ["demo", "--no-serve"],
])
def test_a_spark_backend_without_a_ledger_is_refused_in_one_line(command: list[str]) -> None:
    # The ledger stays in PostgreSQL; nothing is contacted before the refusal (port 9 answers
    # nothing here).
    done = hushql(*command, "--backend", "sc://127.0.0.1:9")
    text = assert_short_failure(done, "a Spark backend (sc://) needs a PostgreSQL ledger",
                                "--ledger")
    assert len(error_lines(text)) == 2, text


def test_an_unreachable_spark_server_is_one_line(pg_server_dsn: str) -> None:
    done = hushql("ask", "--policies", str(POLICIES), "--as", "planner", QUERY,
                  "--backend", f"sc://127.0.0.1:{free_port()}", "--ledger", pg_server_dsn)
    text = assert_short_failure(done, "cannot connect to the Spark Connect server")
    assert len(error_lines(text)) == 2, text
