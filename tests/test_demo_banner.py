"""The demo's "try these" banner runs as printed.

The demo is started as a newcomer starts it (the virtual environment's hushql, by path), and
every line of its banner is run in a plain POSIX shell, from another folder, with no hushql on
PATH: the exports first, then each command exactly as printed. psql's line runs when psql is
installed, with a query and \\l on its standard input.
"""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from proxy.localpg import free_port

ROOT = Path(__file__).resolve().parent.parent
HUSHQL = Path(sys.executable).absolute().parent / "hushql"
RULE = "─"


def plain_path() -> str:
    """PATH without any folder holding a hushql, as after the README's install."""
    folders = os.environ.get("PATH", "").split(os.pathsep)
    return os.pathsep.join(f for f in folders if f and not (Path(f) / "hushql").exists())


def read_banner(demo: subprocess.Popen[str], deadline: float) -> list[str]:
    """The lines between the banner's opening rule and its closing one."""
    assert demo.stdout is not None
    lines: list[str] | None = None
    seen: list[str] = []
    while time.monotonic() < deadline:
        line = demo.stdout.readline()
        if not line:
            break
        line = line.rstrip("\n")
        seen.append(line)
        if lines is None:
            if "try these" in line and line.startswith(RULE):
                lines = []
        elif line and set(line) == {RULE}:
            return lines
        else:
            lines.append(line)
    raise AssertionError("no banner; the demo printed:\n" + "\n".join(seen))


def run_line(prelude: list[str], line: str, cwd: Path, stdin: str | None = None
             ) -> subprocess.CompletedProcess[str]:
    script = "\n".join([*prelude, line]) + "\n"
    return subprocess.run(["sh", "-c", script], capture_output=True, text=True, cwd=cwd,
                          input=stdin, timeout=120,
                          env={"PATH": plain_path(), "HOME": str(cwd), "COLUMNS": "200",
                               "LANG": "C.UTF-8"})


@pytest.mark.skipif(not HUSHQL.is_file(), reason="hushql is not installed beside this Python")
def test_every_banner_line_runs_as_printed(fresh_dsn: str, tmp_path: Path) -> None:
    port = free_port()
    demo = subprocess.Popen([str(HUSHQL), "demo", "--backend", fresh_dsn, "--households", "40",
                             "--listen", f"127.0.0.1:{port}"],
                            cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            env={**os.environ, "HUSHQL_BACKEND": "", "HUSHQL_POLICIES": ""})
    try:
        banner = read_banner(demo, time.monotonic() + 120)
        exports = [line for line in banner if line.startswith("export ")]
        commands = [line for line in banner if line not in exports and not line.startswith(
            "Accounts ")]
        assert len(exports) == 2 and len(commands) >= 5, banner
        ran = 0
        for line in commands:
            if line.startswith("psql "):
                continue
            done = run_line(exports, line, tmp_path)
            output = done.stdout + done.stderr
            assert "Traceback" not in output, (line, output)
            if "# refused" in line:
                assert done.returncode == 1 and "HINT" in output, (line, output)
            else:
                assert done.returncode == 0 and "epsilon spent" in output, (line, output)
            ran += 1
        assert ran >= 5
        psql = [line for line in commands if line.startswith("psql ")]
        assert len(psql) == 1
        database = fresh_dsn.rsplit("/", 1)[1]
        assert f"127.0.0.1:{port}/{database}" in psql[0]
        if shutil.which("psql", path=plain_path()) is None:
            pytest.skip("psql is not installed: its line was checked but not run")
        wait_for_port(port, demo)
        done = run_line(exports, psql[0], tmp_path,
                        stdin="SELECT district, COUNT(*) FROM households GROUP BY district;\n"
                              "\\l\n")
        assert done.returncode == 0, done.stdout + done.stderr
        assert "Northbank" in done.stdout and "epsilon" in done.stderr  # the notice
        listed = [row for row in done.stdout.splitlines() if "|" in row]
        assert any(row.split("|")[0].strip() == database for row in listed), done.stdout
        assert not any("hushql_mirror" in row or row.split("|")[0].strip() == "postgres"
                       for row in listed), done.stdout
    finally:
        demo.send_signal(signal.SIGTERM)
        try:
            demo.communicate(timeout=30)
        except subprocess.TimeoutExpired:
            demo.kill()
            demo.communicate()
    assert demo.returncode == 0


def wait_for_port(port: int, demo: subprocess.Popen[str]) -> None:
    import socket

    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:
        assert demo.poll() is None, "the demo stopped"
        try:
            socket.create_connection(("127.0.0.1", port), timeout=1).close()
            return
        except OSError:
            time.sleep(0.2)
    raise AssertionError("the demo never listened")


@pytest.mark.skipif(not HUSHQL.is_file(), reason="hushql is not installed beside this Python")
def test_no_serve_prints_a_serve_line_that_serves_what_was_loaded(fresh_dsn: str,
                                                                  tmp_path: Path) -> None:
    import re

    import psycopg

    port = free_port()
    done = subprocess.run([str(HUSHQL), "demo", "--no-serve", "--backend", fresh_dsn,
                           "--households", "40", "--listen", f"127.0.0.1:{port}"],
                          cwd=ROOT, capture_output=True, text=True, timeout=180,
                          env={**os.environ, "HUSHQL_BACKEND": "", "HUSHQL_POLICIES": ""})
    assert done.returncode == 0, done.stdout + done.stderr
    assert "postgresql://" not in done.stdout.replace(fresh_dsn, "")  # no URL: nothing listens
    lines = done.stdout.splitlines()
    opening = next(i for i, line in enumerate(lines) if "try these" in line)
    closing = next(i for i in range(opening + 1, len(lines)) if set(lines[i]) == {RULE})
    banner = lines[opening + 1:closing]
    exports = [line for line in banner if line.startswith("export ")]
    [serve] = [line for line in banner if " demo --no-load " in line]
    said = re.search(r"connect to database (\S+) as planner / (\S+)", serve)
    assert said and said.group(1) == fresh_dsn.rsplit("/", 1)[1]
    server = subprocess.Popen(["sh", "-c", "\n".join([*exports, f"exec {serve}"])],
                              cwd=tmp_path, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                              text=True, env={"PATH": plain_path(), "HOME": str(tmp_path)})
    try:
        wait_for_port(port, server)
        with psycopg.connect(host="127.0.0.1", port=port, dbname=said.group(1), user="planner",
                             password=said.group(2)) as conn:
            rows = conn.execute("SELECT district, COUNT(*) FROM households "
                                "GROUP BY district").fetchall()
        assert [row[0] for row in rows] == ["Northbank", "Old Mill", "Harbourside"]
    finally:
        server.send_signal(signal.SIGTERM)
        _, log = server.communicate(timeout=30)
    assert server.returncode == 0 and "Traceback" not in log
