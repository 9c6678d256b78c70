"""Budgets as audited events, the hash chain, and ``hushql ledger`` against a real PostgreSQL.

What must hold: a policy run never resets spending or drops grants; a budget lowered below what
is spent is reported and refuses further charges with a message that says why; a grant is an
audited row with its reason; ``verify`` passes on an untouched ledger and names the first broken
row after each kind of tampering (alter, delete, insert, reorder); the CLI's summary, export and
report agree with the ledger's own totals.
"""

from __future__ import annotations

import csv
import io
import json
import os
import subprocess
import sys
from collections.abc import Iterator
from decimal import Decimal
from pathlib import Path

import psycopg
import pytest

from proxy.errors import BUDGET_EXHAUSTED, INVALID_PARAMETER_VALUE, HushError
from proxy.ledger import Ledger
from proxy.ledger_review import LedgerReview, verify_chain
from tests.test_ledger import make_policies, query

D = Decimal
ROOT = Path(__file__).resolve().parent.parent


@pytest.fixture
def spent_ledger(fresh_dsn: str) -> Iterator[Ledger]:
    """A ledger where planner spent 0.5 + 0.25 + 0.25 (answered, failed, answered) on readings
    and researcher 0.1 on households, with planner granted 1.0 once."""
    ledger = Ledger(fresh_dsn, pool_size=1)
    ledger.sync_budgets(make_policies({"planner": "3.0", "researcher": "1.0"},
                                      {"readings": "2.0", "households": None}))
    for analyst, table, eps, outcome in [("planner", "readings", "0.5", "answered"),
                                         ("planner", "readings", "0.25", "failed"),
                                         ("researcher", "households", "0.1", "answered"),
                                         ("planner", "readings", "0.25", "answered")]:
        charge = ledger.reserve(analyst, [table], D(eps), "SELECT COUNT(*) FROM t", "fp")
        ledger.finish(charge.charge_id, outcome)
    with LedgerReview(fresh_dsn) as review:
        review.grant("planner", D("1.0"), "quarterly study of leaks", "auditor")
    yield ledger
    ledger.close()


def verify(dsn: str):
    with LedgerReview(dsn) as review:
        return review.verify()


# --- budgets as events --------------------------------------------------------------------------

def test_a_policy_run_keeps_spending_and_grants_and_records_each_change(
        fresh_dsn: str, spent_ledger: Ledger) -> None:
    # Reading the same policy again changes nothing and records nothing.
    events_before = query(fresh_dsn, "SELECT count(*) FROM hushql.budget_events")[0][0]
    spent_ledger.sync_budgets(make_policies({"planner": "3.0", "researcher": "1.0"},
                                            {"readings": "2.0", "households": None}))
    assert query(fresh_dsn, "SELECT count(*) FROM hushql.budget_events")[0][0] == events_before
    # Another policy moves the budget by its difference: 3.0 + 1.0 granted -> 5.0 + 1.0.
    spent_ledger.sync_budgets(make_policies({"planner": "5.0"}, {"readings": "2.5"}),
                              source="policies/ (digest abc)", actor="ops")
    assert query(fresh_dsn, "SELECT budget, spent FROM hushql.analyst_budgets "
                            "WHERE analyst = 'planner'") == [(D("6.0"), D("1.00"))]
    assert query(fresh_dsn, "SELECT kind, subject, previous, amount, reason, actor "
                            "FROM hushql.budget_events WHERE kind = 'change' ORDER BY id") == [
        ("change", "planner", D("3.0"), D("5.0"), "changed by policies/ (digest abc)", "ops"),
        ("change", "readings", D("2.0"), D("2.5"), "changed by policies/ (digest abc)", "ops")]
    # Analysts missing from the new policy keep their row and history.
    assert query(fresh_dsn, "SELECT budget FROM hushql.analyst_budgets "
                            "WHERE analyst = 'researcher'") == [(D("1.0"),)]


def test_a_budget_lowered_below_spending_is_reported_and_refuses_with_the_reason(
        fresh_dsn: str, spent_ledger: Ledger) -> None:
    # researcher spent 0.1 of 1.0; a policy of 0.05 puts the budget below that.
    lines = spent_ledger.sync_budgets(make_policies({"researcher": "0.05"}, {"readings": "0.5"}))
    assert lines == [
        "analyst researcher: budget 0.05 is below the 0.1 already spent; it answers no further "
        "queries until more is granted",
        "table readings: cap 0.5 is below the 1.00 already spent; it answers no further "
        "queries until the cap is raised"]
    with pytest.raises(HushError) as refused:
        spent_ledger.reserve("researcher", ["households"], D("0.01"), "SELECT 1", "fp")
    assert refused.value.sqlstate == BUDGET_EXHAUSTED
    assert refused.value.message == (
        "analyst researcher's budget of 0.05 is below the 0.10 already spent, after a policy "
        "change; no further queries are answered")
    with pytest.raises(HushError) as capped:
        spent_ledger.reserve("planner", ["readings"], D("0.01"), "SELECT 1", "fp")
    assert "table readings's cap of 0.5 is below the 1.00 already spent" in capped.value.message
    assert "grant" in (refused.value.hint or "")
    # History is kept: every charge is still there.
    assert query(fresh_dsn, "SELECT count(*) FROM hushql.charges")[0][0] == 4


def test_a_grant_is_an_audited_row_and_needs_a_reason(fresh_dsn: str,
                                                      spent_ledger: Ledger) -> None:
    with LedgerReview(fresh_dsn) as review:
        assert review.grant("researcher", D("0.5"), "second study", "auditor") == D("1.5")
        history = review.history(analyst="researcher")
        for bad_amount, reason in [(D("0"), "x"), (D("-1"), "x"), (D("0.5"), "  ")]:
            with pytest.raises(HushError) as refused:
                review.grant("researcher", bad_amount, reason, "auditor")
            assert refused.value.sqlstate == INVALID_PARAMETER_VALUE
        with pytest.raises(HushError):
            review.grant("nobody", D("1"), "typo", "auditor")
    assert [(h.kind, h.epsilon, h.outcome, h.actor) for h in history] == [
        ("import", D("1.0"), "imported from access.toml", history[0].actor),
        ("charge", D("0.1"), "answered", ""),
        ("grant", D("0.5"), "second study", "auditor")]
    assert spent_ledger.remaining("researcher") == D("1.4")


def test_history_filters_by_analyst_table_and_day(fresh_dsn: str, spent_ledger: Ledger) -> None:
    with LedgerReview(fresh_dsn) as review:
        readings = review.history(table="readings")
        assert [h.kind for h in readings] == ["import", "charge", "charge", "charge"]
        today = readings[-1].at.date()
        assert review.history(until=today.replace(year=today.year - 1)) == []
        assert len(review.history(since=today)) == len(review.history())


# --- tamper evidence ----------------------------------------------------------------------------

def test_verify_passes_on_an_untouched_ledger(fresh_dsn: str, spent_ledger: Ledger) -> None:
    result = verify(fresh_dsn)
    # 4 imports (2 analysts, 2 tables), 4 charges, 1 grant.
    assert result.ok and result.rows == 9
    head = query(fresh_dsn, "SELECT hash FROM hushql.chain_head")[0][0]
    assert result.head_hash == head


def tamper(dsn: str, *statements: str) -> None:
    """Run statements as someone with write access who bypasses the ledger's triggers."""
    with psycopg.connect(dsn, autocommit=True) as conn, conn.transaction():
        conn.execute("SET LOCAL session_replication_role = replica")
        for statement in statements:
            conn.execute(statement)


def chain_place(dsn: str, table: str, row_id: int) -> int:
    return query(dsn, f"SELECT chain_seq FROM hushql.{table} WHERE id = %s", [row_id])[0][0]


def test_verify_names_an_altered_row(fresh_dsn: str, spent_ledger: Ledger) -> None:
    tamper(fresh_dsn, "UPDATE hushql.charges SET epsilon = 0.05 WHERE id = 2")
    result = verify(fresh_dsn)
    assert result.first_break is not None and result.first_break.row == "charge 2"
    assert "altered" in result.first_break.problem


def test_verify_names_an_altered_grant_reason(fresh_dsn: str, spent_ledger: Ledger) -> None:
    tamper(fresh_dsn, "UPDATE hushql.budget_events SET reason = 'routine' WHERE kind = 'grant'")
    broken = verify(fresh_dsn).first_break
    assert broken is not None and broken.row.startswith("budget event ")


def test_verify_names_the_row_after_a_deleted_one(fresh_dsn: str, spent_ledger: Ledger) -> None:
    after = chain_place(fresh_dsn, "charges", 3)
    tamper(fresh_dsn, "DELETE FROM hushql.charges WHERE id = 2")
    broken = verify(fresh_dsn).first_break
    assert broken is not None and broken.row == "charge 3" and broken.seq == after


def test_verify_notices_the_last_row_deleted(fresh_dsn: str, spent_ledger: Ledger) -> None:
    tamper(fresh_dsn, "DELETE FROM hushql.budget_events WHERE kind = 'grant'")
    broken = verify(fresh_dsn).first_break
    assert broken is not None and broken.row == "chain head"


def test_verify_names_an_inserted_row_even_with_a_forged_hash(fresh_dsn: str,
                                                              spent_ledger: Ledger) -> None:
    # The forger makes room after charge 1, links a new row to charge 1's hash correctly and
    # computes its own hash; the row that follows still points at charge 1.
    place = chain_place(fresh_dsn, "charges", 1)
    tamper(fresh_dsn,
           f"UPDATE hushql.charges SET chain_seq = chain_seq + 1000 WHERE chain_seq > {place}",
           f"UPDATE hushql.budget_events SET chain_seq = chain_seq + 1000 "
           f"WHERE chain_seq > {place}",
           f"UPDATE hushql.charges SET chain_seq = chain_seq - 999 WHERE chain_seq > {place}",
           f"UPDATE hushql.budget_events SET chain_seq = chain_seq - 999 "
           f"WHERE chain_seq > {place}",
           "INSERT INTO hushql.charges (id, analyst, tables, epsilon, statement, fingerprint, "
           " outcome, finished_at, chain_seq, prev_hash) "
           f"SELECT 99, 'planner', '{{readings}}', 0.01, 'x', 'fp', 'answered', now(), "
           f"{place + 1}, row_hash FROM hushql.charges WHERE id = 1",
           "UPDATE hushql.charges c SET row_hash = encode(sha256(convert_to("
           "c.prev_hash || E'\\n' || hushql.charge_content(c), 'UTF8')), 'hex') WHERE id = 99",
           "UPDATE hushql.chain_head SET seq = seq + 1")
    broken = verify(fresh_dsn).first_break
    assert broken is not None and broken.seq == place + 2
    assert "link to the previous row" in broken.problem


def test_verify_names_reordered_rows(fresh_dsn: str, spent_ledger: Ledger) -> None:
    first, second = chain_place(fresh_dsn, "charges", 1), chain_place(fresh_dsn, "charges", 2)
    tamper(fresh_dsn,
           "UPDATE hushql.charges SET chain_seq = -1 WHERE id = 1",
           f"UPDATE hushql.charges SET chain_seq = {first} WHERE id = 2",
           f"UPDATE hushql.charges SET chain_seq = {second} WHERE id = 1")
    broken = verify(fresh_dsn).first_break
    assert broken is not None and broken.row == "charge 2" and broken.seq == first


def test_verify_chain_rules_on_plain_rows() -> None:
    import hashlib

    def link(prev: str, content: str) -> str:
        return hashlib.sha256(f"{prev}\n{content}".encode()).hexdigest()
    h1 = link("0" * 64, "a")
    h2 = link(h1, "b")
    rows = [(1, "r1", "0" * 64, h1, "a"), (2, "r2", h1, h2, "b")]
    assert verify_chain(rows, (2, h2)).ok
    for broken_rows, head, named in [
            (rows, (3, h2), "chain head"),                           # a row missing at the end
            ([rows[0], (2, "r2", h1, h2, "c")], (2, h2), "r2"),      # content altered
            ([(None, "r0", None, None, "z"), *rows], (2, h2), "r0"),  # a row outside the chain
    ]:
        found = verify_chain(broken_rows, head).first_break
        assert found is not None and found.row == named


def test_charges_made_before_the_chain_join_it_in_order(fresh_dsn: str) -> None:
    """A ledger at schema version 1 with charges is migrated onto the chain and verifies."""
    from proxy import ledger as ledger_module

    saved = ledger_module._MIGRATIONS[:]
    try:
        ledger_module._MIGRATIONS[:] = saved[:1]
        ledger_module.SCHEMA_VERSION = 1
        old = Ledger(fresh_dsn, pool_size=1)
        with psycopg.connect(fresh_dsn, autocommit=True) as conn:
            conn.execute("INSERT INTO hushql.analyst_budgets (analyst, budget) VALUES ('p', 3)")
            conn.execute("INSERT INTO hushql.table_budgets (table_name, cap) VALUES ('t', NULL)")
            for _ in range(3):  # version 1's own reservation function
                conn.execute("SELECT hushql.reserve_charge('p', ARRAY['t'], 0.1, 'SELECT 1', "
                             "'fp')")
        old.close()
    finally:
        ledger_module._MIGRATIONS[:] = saved
        ledger_module.SCHEMA_VERSION = len(saved)
    Ledger(fresh_dsn, pool_size=1).close()
    result = verify(fresh_dsn)
    assert result.ok and result.rows == 3


# --- the command line ---------------------------------------------------------------------------

def hushql(*args: str) -> subprocess.CompletedProcess[str]:
    env = {**os.environ, "COLUMNS": "200"}
    env.pop("HUSHQL_LEDGER", None)
    return subprocess.run([sys.executable, "-m", "proxy.cli", *args], capture_output=True,
                          text=True, timeout=120, cwd=ROOT, env=env)


def test_ledger_command_summary_grant_history_export_verify(fresh_dsn: str,
                                                            spent_ledger: Ledger,
                                                            tmp_path: Path) -> None:
    summary = hushql("ledger", "--ledger", fresh_dsn)
    assert summary.returncode == 0, summary.stderr
    planner = next(line for line in summary.stdout.splitlines() if "planner" in line)
    # budget 4.0, spent 1.00, remaining 3.00, 2 answers, 1 refusal (the failed charge).
    assert [cell.strip() for cell in planner.split("│")[1:7]] == [
        "planner", "4.0", "1.00", "3.00", "2", "1"]
    granted = hushql("ledger", "--ledger", fresh_dsn, "grant", "researcher", "0.9",
                     "--reason", "pilot on garden water use")
    assert granted.returncode == 0 and "budget now 1.9" in granted.stdout
    history = hushql("ledger", "--ledger", fresh_dsn, "history", "--analyst", "researcher")
    assert "pilot on garden water use" in history.stdout and "planner" not in history.stdout
    # researcher is now at 0.1 of 1.9: not near exhausted; planner at 1.00 of 4.0 neither.
    out = tmp_path / "ledger.json"
    assert hushql("ledger", "--ledger", fresh_dsn, "export", "--format", "json",
                  "--out", str(out)).returncode == 0
    records = json.loads(out.read_text())
    charged = sum(D(r["epsilon"]) for r in records if r["kind"] == "charge")
    spent = query(fresh_dsn, "SELECT sum(spent) FROM hushql.analyst_budgets")[0][0]
    assert charged == spent
    as_csv = hushql("ledger", "--ledger", fresh_dsn, "export", "--format", "csv")
    assert list(csv.DictReader(io.StringIO(as_csv.stdout))) == records
    verified = hushql("ledger", "--ledger", fresh_dsn, "verify")
    assert verified.returncode == 0 and "ledger verified: 10 rows" in verified.stdout
    tamper(fresh_dsn, "UPDATE hushql.charges SET analyst = 'researcher' WHERE id = 1")
    broken = hushql("ledger", "--ledger", fresh_dsn, "verify")
    assert broken.returncode == 1 and "charge 1" in broken.stdout
    assert "Traceback" not in broken.stderr


def test_ledger_command_without_a_ledger_says_how_to_give_one() -> None:
    env = {k: v for k, v in os.environ.items() if k not in ("HUSHQL_LEDGER", "HUSHQL_BACKEND")}
    done = subprocess.run([sys.executable, "-m", "proxy.cli", "ledger"], capture_output=True,
                          text=True, timeout=60, cwd=ROOT, env=env)
    assert done.returncode == 1 and "--ledger" in done.stdout and "Traceback" not in done.stderr


def test_near_exhausted_budgets_stand_out(fresh_dsn: str, spent_ledger: Ledger) -> None:
    from rich.console import Console

    from proxy.ledger_cli import _summary

    spent_ledger.sync_budgets(make_policies({"researcher": "0.1"}, {}))  # 0.1 of 0.1 spent
    console = Console(record=True, width=200, force_terminal=True, color_system="truecolor")
    with LedgerReview(fresh_dsn) as review:
        _summary(review, None, console)  # type: ignore[arg-type]
    lines = console.export_text(styles=True).splitlines()
    researcher = next(line for line in lines if "researcher" in line)
    planner = next(line for line in lines if "planner" in line)
    assert "\x1b[1;31m" in researcher and "\x1b[1;31m" not in planner


def test_after_a_demo_session_of_two_analysts_the_ledger_shows_their_spending(
        fresh_dsn: str, tmp_path: Path) -> None:
    from proxy.demo import load_scenario
    from proxy.engine import Engine
    from proxy.policy import load_policies

    load_scenario(fresh_dsn, households=300, progress=False)
    engine = Engine.connect(load_policies(ROOT / "policies"), fresh_dsn, pool_size=2)
    try:
        engine.answer("planner", "SELECT district, COUNT(*) FROM households GROUP BY district",
                      epsilon=D("0.25"))
        engine.answer("planner", "SELECT COUNT(*) FROM readings")
        engine.answer("researcher", "SELECT has_garden, COUNT(*) FROM households "
                                    "GROUP BY has_garden", epsilon=D("0.3"))
    finally:
        engine.close()
    summary = hushql("ledger", "--ledger", fresh_dsn)
    assert summary.returncode == 0, summary.stderr
    rows = {cells[0]: cells[1:6] for cells in (
        [c.strip() for c in line.split("│")[1:-1]] for line in summary.stdout.splitlines()
        if line.startswith("│")) if cells}
    assert rows["planner"] == ["3.0", "0.35", "2.65", "2", "0"]
    assert rows["researcher"] == ["1.0", "0.3", "0.7", "1", "0"]
    assert rows["households"][:3] == ["20.0", "0.55", "19.45"]
    assert rows["readings"][:3] == ["20.0", "0.1", "19.9"]
    report = tmp_path / "report.html"
    done = hushql("ledger", "--ledger", fresh_dsn, "report", "--out", str(report))
    assert done.returncode == 0 and report.read_text().count("<svg") == 3
