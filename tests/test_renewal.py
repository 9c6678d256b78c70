"""Budgets renewing on a calendar: period arithmetic, and renewals recorded once per period."""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterator
from decimal import Decimal
from pathlib import Path

import pytest

from proxy.ledger import Ledger
from proxy.policy import AnalystPolicy, Policies
from proxy.renewal import RenewalSchedule, next_period_start, period_start
from tests.test_ledger import make_policies, query

UTC = dt.timezone.utc
D = Decimal


@pytest.mark.parametrize(("period", "moment", "start", "following"), [
    ("day", "2026-03-15T23:59", "2026-03-15", "2026-03-16"),
    ("week", "2026-03-15T10:00", "2026-03-09", "2026-03-16"),  # 2026-03-15 is a Sunday
    ("month", "2026-12-31T12:00", "2026-12-01", "2027-01-01"),
    ("quarter", "2026-08-20T00:00", "2026-07-01", "2026-10-01"),
    ("year", "2026-02-28T00:00", "2026-01-01", "2027-01-01"),
])
def test_period_boundaries(period: str, moment: str, start: str, following: str) -> None:
    at = dt.datetime.fromisoformat(moment).replace(tzinfo=UTC)
    assert period_start(period, at) == dt.datetime.fromisoformat(start).replace(tzinfo=UTC)
    assert next_period_start(period, at) == dt.datetime.fromisoformat(following).replace(tzinfo=UTC)


def renewing(budget: str, period: str = "month") -> Policies:
    base = make_policies({"planner": budget}, {"readings": None})
    planner = base.analysts["planner"].model_copy(update={"renew_every": period})
    assert isinstance(planner, AnalystPolicy)
    return Policies(access=base.access.model_copy(update={"analysts": {"planner": planner}}),
                    tables=base.tables)


@pytest.fixture
def ledger(fresh_dsn: str) -> Iterator[Ledger]:
    made = Ledger(fresh_dsn, pool_size=1)
    yield made
    made.close()


def test_a_renewal_tops_the_budget_up_once_per_period_across_proxies(fresh_dsn: str,
                                                                     ledger: Ledger) -> None:
    policies = renewing("1.0")
    ledger.sync_budgets(policies)
    now = dt.datetime.now(UTC)
    this_period = RenewalSchedule(policies, ledger, clock=lambda: now)
    assert this_period.apply_due() == []  # imported during this period: already full
    ledger.reserve("planner", ["readings"], D("0.75"), "SELECT 1", "fp")
    later = next_period_start("month", now) + dt.timedelta(hours=1)
    first, second = (RenewalSchedule(policies, ledger, clock=lambda: later) for _ in range(2))
    assert first.apply_due() == ["planner"]
    assert second.apply_due() == []  # another proxy at the same boundary: nothing twice
    assert first.apply_due() == []   # between boundaries: a clock comparison
    assert ledger.remaining("planner") == D("1.00")
    assert ledger.spent("planner") == D("0.75")  # spending and history are never reset
    assert query(fresh_dsn, "SELECT kind, amount::text FROM hushql.budget_events "
                            "WHERE subject = 'planner' ORDER BY id") == [
        ("import", "1.0"), ("renewal", "0.75")]


def test_without_renew_every_nothing_renews(ledger: Ledger) -> None:
    policies = make_policies({"planner": "1.0"}, {"readings": None})
    ledger.sync_budgets(policies)
    ledger.reserve("planner", ["readings"], D("0.5"), "SELECT 1", "fp")
    far = dt.datetime.now(UTC) + dt.timedelta(days=400)
    assert RenewalSchedule(policies, ledger, clock=lambda: far).apply_due() == []
    assert ledger.remaining("planner") == D("0.5")


def test_check_states_what_renewal_means_for_the_guarantee(tmp_path: Path) -> None:
    import shutil

    from rich.console import Console

    from proxy.policy_report import check_command

    folder = tmp_path / "policies"
    shutil.copytree(Path(__file__).resolve().parent.parent / "policies", folder)
    access = folder / "access.toml"
    access.write_text(access.read_text().replace(
        "budget = 3.0                     # total epsilon",
        'budget = 3.0\nrenew_every = "month"'))
    console = Console(record=True, width=300)
    assert check_command(folder, console=console) == 0
    assert "renews every month: at most 3.0 per month, so n months may spend up to n x 3.0 " \
        "about the same people" in console.export_text()
