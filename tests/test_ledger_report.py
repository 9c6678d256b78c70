"""The ledger report page: self-contained, its charts' totals equal to the ledger's, and drawn
in a real browser (headless Chromium, skipped with the reason when it is not installed)."""

from __future__ import annotations

import re
import shutil
import subprocess
import os
from pathlib import Path

import pytest

from proxy.ledger import Ledger
from proxy.ledger_report import ANSWER_COLOUR, REFUSAL_COLOUR, SPENT_COLOUR, write_report
from proxy.ledger_review import LedgerReview
from tests.test_ledger import query
from tests.test_ledger_review import spent_ledger  # noqa: F401  (fixture)

pytest.importorskip("matplotlib")

# Flags for a browser on a machine with no network to reach: no background fetches, no updates,
# no sync, no first-run pages; --no-sandbox because CI runs as root (common practice for
# headless Chromium in containers).
CHROMIUM_FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
                  "--disable-component-update", "--disable-sync", "--no-first-run",
                  "--hide-scrollbars"]


def chart_totals(page: str) -> dict[str, str]:
    """The text each chart writes as its totals (the SVG groups with ids total-*)."""
    found = re.findall(r'<g id="(total-[^"]+)">.*?<text[^>]*>([^<]*)</text>', page, re.S)
    return dict(found)


def expected_totals(dsn: str) -> dict[str, str]:
    """The same totals computed straight from the ledger's tables."""
    totals = {f"total-{a}": f"{a}: {s} of {b}" for a, b, s in query(
        dsn, "SELECT analyst, budget, spent FROM hushql.analyst_budgets")}
    for table, cap, spent in query(dsn, "SELECT table_name, cap, spent FROM hushql.table_budgets"):
        totals[f"total-{table}"] = f"{table}: {spent} spent, " + (
            "no cap" if cap is None else f"cap {cap}")
    answers, refusals = query(
        dsn, "SELECT count(*) FILTER (WHERE outcome = 'answered'), "
             "count(*) FILTER (WHERE outcome IN ('failed', 'cancelled')) FROM hushql.charges")[0]
    totals["total-outcomes"] = f"answers: {answers}, refusals: {refusals}"
    return totals


@pytest.fixture
def report(fresh_dsn: str, spent_ledger: Ledger, tmp_path: Path) -> Path:  # noqa: F811
    out = tmp_path / "report.html"
    with LedgerReview(fresh_dsn) as review:
        write_report(review, out)
    return out


def test_the_report_is_self_contained_and_its_totals_are_the_ledgers(fresh_dsn: str,
                                                                     report: Path) -> None:
    page = report.read_text()
    # Nothing to fetch: no scripts, images or style sheets from elsewhere (xmlns and the SVG
    # metadata's namespace URIs are names, not fetches).
    assert not re.search(r'(src|href)\s*=\s*"(https?:)?//', page)
    assert "<script" not in page and "@import" not in page
    assert page.count('<figure class="chart"') == 3 and page.count("<svg") == 3
    assert chart_totals(page) == expected_totals(fresh_dsn)
    assert "quarterly study" not in page  # reasons stay in history, not on the summary page


def test_the_report_draws_in_headless_chromium(fresh_dsn: str, report: Path,
                                               tmp_path: Path) -> None:
    browser = shutil.which("chromium") or shutil.which("chromium-browser")
    if browser is None:
        pytest.skip("headless Chromium is not installed (Debian package chromium)")
    from PIL import Image

    profile = tmp_path / "profile"  # a fresh profile: no state from earlier runs
    shot = tmp_path / "report.png"
    common = [browser, *CHROMIUM_FLAGS, f"--user-data-dir={profile}"]
    subprocess.run([*common, "--window-size=1000,2200", f"--screenshot={shot}",
                    report.as_uri()], capture_output=True, timeout=120, check=True)
    dom = subprocess.run([*common, "--dump-dom", report.as_uri()], capture_output=True,
                         text=True, timeout=120, check=True).stdout
    # The browser parsed all three charts as SVG and kept their totals, equal to the ledger's.
    assert dom.count("<svg") == 3
    assert chart_totals(dom) == expected_totals(fresh_dsn)
    # Each chart drew: its own colour covers a visible area of the screenshot.
    image = Image.open(shot).convert("RGB")
    counts = _colour_counts(image, {"spending bars": SPENT_COLOUR, "answer bars": ANSWER_COLOUR,
                                    "refusal bars": REFUSAL_COLOUR,
                                    "planner's line": "#1f77b4"})
    for series, pixels in counts.items():
        assert pixels > 200, f"{series} not drawn ({pixels} pixels)"
    if os.environ.get("HUSHQL_KEEP_SCREENSHOT"):  # for a person to look at
        shutil.copy(shot, os.environ["HUSHQL_KEEP_SCREENSHOT"])


def _colour_counts(image, colours: dict[str, str]) -> dict[str, int]:  # type: ignore[no-untyped-def]
    """Pixels within a small distance of each colour (anti-aliasing blurs edges only)."""
    wanted = {name: tuple(int(hex_[i:i + 2], 16) for i in (1, 3, 5))
              for name, hex_ in colours.items()}
    counts = dict.fromkeys(colours, 0)
    for number, pixel in image.getcolors(maxcolors=1 << 20) or []:
        for name, rgb in wanted.items():
            if sum(abs(a - b) for a, b in zip(pixel, rgb)) <= 12:
                counts[name] += number
    return counts


def test_the_colour_check_fails_on_a_blank_page(tmp_path: Path) -> None:
    """Companion: the same pixel check finds nothing on a page whose charts did not draw."""
    from PIL import Image

    blank = Image.new("RGB", (1000, 2200), "white")
    counts = _colour_counts(blank, {"spending bars": SPENT_COLOUR})
    assert counts["spending bars"] == 0
