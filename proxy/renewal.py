"""Budgets that renew on a calendar: ``renew_every = "month"`` (or day, week, quarter, year).

Rules of this module:
- At the start of each period (UTC calendar: days at midnight, weeks on Monday, months,
  quarters and years on their first day) an analyst's remaining budget is topped back up to the
  policy's ``budget``: the ledger records a 'renewal' event adding what was missing. Budget
  left over is not carried on; grants still count until they are spent.
- What it means for the guarantee: each period's answers together cost at most ``budget``, so
  over n periods the analyst may spend up to n times ``budget`` about the same people. The
  protection is per period, and weakens the longer the data stay the same; ``hushql check``
  says so beside every renewing analyst.
- Renewals are applied by whichever proxy notices a period boundary first, under the analyst's
  row lock, so several proxies never renew twice for one period.
"""

from __future__ import annotations

import datetime as dt
import threading
from collections.abc import Callable
from decimal import Decimal

from proxy.ledger import Ledger
from proxy.policy import Policies


def period_start(period: str, moment: dt.datetime) -> dt.datetime:
    """The UTC start of the calendar ``period`` containing ``moment``."""
    day = moment.astimezone(dt.timezone.utc).date()
    if period == "week":
        day -= dt.timedelta(days=day.weekday())
    elif period == "month":
        day = day.replace(day=1)
    elif period == "quarter":
        day = day.replace(month=3 * ((day.month - 1) // 3) + 1, day=1)
    elif period == "year":
        day = day.replace(month=1, day=1)
    elif period != "day":
        raise ValueError(f"unknown period {period!r}")
    return dt.datetime.combine(day, dt.time(), dt.timezone.utc)


def next_period_start(period: str, moment: dt.datetime) -> dt.datetime:
    """The UTC start of the period after the one containing ``moment``."""
    start = period_start(period, moment)
    step = {"day": 1, "week": 7}.get(period)
    if step is not None:
        return start + dt.timedelta(days=step)
    months = {"month": 1, "quarter": 3, "year": 12}[period]
    index = start.year * 12 + start.month - 1 + months
    return start.replace(year=index // 12, month=index % 12 + 1)


def guarantee_note(budget: Decimal, period: str) -> str:
    """What renewal means for the guarantee, in one sentence for ``check``."""
    return (f"renews every {period}: at most {budget} per {period}, so n {period}s may spend "
            f"up to n x {budget} about the same people")


class RenewalSchedule:
    """Applies due renewals for the renewing analysts of ``policies``; cheap to call often."""

    def __init__(self, policies: Policies, ledger: Ledger,
                 clock: Callable[[], dt.datetime] = lambda: dt.datetime.now(dt.timezone.utc)
                 ) -> None:
        self._renewing = {name: (a.renew_every, a.budget) for name, a in policies.analysts.items()
                          if a.renew_every is not None and not a.disabled}
        self._ledger = ledger
        self._clock = clock
        self._lock = threading.Lock()
        self._next_check: dt.datetime | None = None

    def apply_due(self) -> list[str]:
        """Renew every analyst whose current period has not been renewed yet (at most once per
        boundary per process: between boundaries this is a clock comparison). Returns the
        analysts renewed by this call."""
        if not self._renewing:
            return []
        now = self._clock()
        with self._lock:
            if self._next_check is not None and now < self._next_check:
                return []
            self._next_check = min(next_period_start(p, now) for p, _ in self._renewing.values())
        renewed = []
        for name in sorted(self._renewing):
            period, budget = self._renewing[name]
            start = period_start(period, now)
            if self._ledger.renew(name, budget, start,
                                  f"renews every {period}: period from {start:%Y-%m-%d}"):
                renewed.append(name)
        return renewed
