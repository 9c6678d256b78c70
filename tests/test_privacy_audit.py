"""A privacy audit of the real answer path, in the style of Ding, Wang, Wang, Zhang & Kifer
2018, "Detecting Violations of Differential Privacy" (CCS 2018).

Neighbouring databases: ``full`` holds everyone; ``without`` lacks the individual with the most
rows and the largest total (person 99: 40 visits of 60 minutes in three wards, ten times the
owner's declared ``most_rows`` of 4, so only the bounds keep it in check), in both tables of its
population (``visits`` and the one-row-per-person ``residents``, which joined queries read). Each query runs through the engine's
own steps (bounds' noise, backend query, noise, release; the ledger aside) many times on each.

Test: events ``{statistic >= t}`` (and their complements, either database first) are picked on
a pilot third of the samples; on the rest, the privacy loss is bounded from below with
Clopper-Pearson intervals (Clopper & Pearson 1934; scipy.stats.beta): ``ln(lower(p_a) /
upper(p_b))`` at 99.5% each. The real mechanism must stay within epsilon (a lower confidence
bound above epsilon would be evidence of a violation). The companion runs the same audit with
the rewrite's clipping switched off (every factor 1): it must then find a loss above epsilon.
"""

from __future__ import annotations

import math
import textwrap
from collections.abc import Callable
from decimal import Decimal
from pathlib import Path

import numpy as np
import psycopg
import pytest
from scipy.stats import beta

import proxy.sql.rewrite as rewrite_module
from proxy.backend import Backend
from proxy.engine import Engine, _bound_settings, epsilon_split
from proxy.ledger import Ledger
from proxy.policy import load_policies
from tests.policy_fixtures import DUMMY_VERIFIER

pytestmark = pytest.mark.slow

EPSILON = Decimal(1)
SAMPLES = 360        # per database and query: a pilot third, the rest for the test
CONFIDENCE = 0.995   # of each Clopper-Pearson bound

VISITS = """
table = "visits"
source = "audit.{source}"

[individual]
column = "person_id"
population = "people"
most_rows = 4
bounds = "{bounds}"

[columns.person_id]
kind = "integer"
range = [1, 1000]

[columns.ward]
kind = "category"
values = ["north", "south", "east"]

[columns.minutes]
kind = "integer"
range = [0, 60]
"""


# One row per person, the same population as visits: joins of the two are audited too.
RESIDENTS = """
table = "residents"
source = "audit.residents_{source}"

[individual]
column = "person_id"
population = "people"
most_rows = 1

[columns.person_id]
kind = "integer"
range = [1, 1000]

[columns.ward]
kind = "category"
values = ["north", "south", "east"]
"""


def _policies(root: Path, source: str, bounds: str):
    (root / "tables").mkdir(parents=True)
    (root / "tables" / "visits.toml").write_text(VISITS.format(source=source, bounds=bounds))
    (root / "tables" / "residents.toml").write_text(RESIDENTS.format(source=source))
    (root / "access.toml").write_text(textwrap.dedent(f"""
        [defaults]
        largest_epsilon_per_query = 10
        [analysts.auditor]
        password = "{DUMMY_VERIFIER}"
        budget = 1000000
        tables = ["visits", "residents"]
        """))
    return load_policies(root)


@pytest.fixture(scope="module")
def engines(module_dsn: str, tmp_path_factory: pytest.TempPathFactory):
    """Engines over the two neighbouring tables (ordinary people: 1-4 visits of 0-59 minutes),
    with bounds chosen per query, and (``declared ...``) declared, where AVG is centred."""
    with psycopg.connect(module_dsn, autocommit=True) as conn:
        conn.execute("DROP SCHEMA IF EXISTS audit CASCADE; CREATE SCHEMA audit")
        conn.execute("""
            CREATE TABLE audit.full AS
            SELECT p AS person_id, (ARRAY['north','south','east'])[1 + (p + v) % 3] AS ward,
                   (p * 7 + v * 13) % 60 AS minutes
            FROM generate_series(1, 60) AS p, generate_series(1, 1 + p % 4) AS v
            UNION ALL
            SELECT 99, (ARRAY['north','south','east'])[1 + v % 3], 60
            FROM generate_series(1, 40) AS v""")
        conn.execute("CREATE TABLE audit.without AS SELECT * FROM audit.full WHERE person_id <> 99")
        # Neighbours leave every table of their population: person 99 lives in the north.
        conn.execute("CREATE TABLE audit.residents_full AS SELECT p AS person_id, "
                     "(ARRAY['north','south','east'])[1 + p % 3] AS ward "
                     "FROM generate_series(1, 60) AS p UNION ALL SELECT 99, 'north'")
        conn.execute("CREATE TABLE audit.residents_without AS SELECT * FROM audit.residents_full "
                     "WHERE person_id <> 99")
    made = {}
    for name in ("full", "without"):
        for bounds in ("chosen", "declared"):
            label = name if bounds == "chosen" else f"{bounds} {name}"
            policies = _policies(tmp_path_factory.mktemp(name), name, bounds)
            made[label] = Engine(policies, Backend(module_dsn, pool_size=1),
                                 Ledger(module_dsn, schema=f"audit_{name}_{bounds}"))
    yield made
    for engine in made.values():
        engine.close()


def _samples(engine: Engine, sql: str, statistic: Callable[[list[tuple]], float]) -> np.ndarray:
    """``SAMPLES`` answers to ``sql`` through the engine's steps, reduced to one number each."""
    prepared = engine.prepare("auditor", sql)
    split = epsilon_split(prepared.plan, prepared.rewritten, EPSILON)
    found = []
    for _ in range(SAMPLES):
        rows = engine.backend.run(prepared.rewritten.sql, None,
                                  _bound_settings(prepared.rewritten, split))
        answer = engine._release(prepared, EPSILON, split, rows, charge=0)
        found.append(statistic(answer.rows))
    return np.array(found, dtype=float)


def _upper(successes: int, trials: int) -> float:
    return 1.0 if successes == trials else float(beta.ppf(CONFIDENCE, successes + 1, trials - successes))


def _lower(successes: int, trials: int) -> float:
    return 0.0 if successes == 0 else float(beta.ppf(1 - CONFIDENCE, successes, trials - successes + 1))


def privacy_loss_lower_bound(a: np.ndarray, b: np.ndarray) -> float:
    """A lower confidence bound on the privacy loss shown by the two output samples."""
    pilot = len(a) // 3
    pool = np.concatenate([a[:pilot], b[:pilot]])
    best, chosen = -math.inf, None
    for t in np.unique(np.quantile(pool, np.linspace(0.02, 0.98, 25))):
        for first, second in ((a, b), (b, a)):
            for above in (True, False):
                hits = [np.sum((x[:pilot] >= t) == above) for x in (first, second)]
                score = math.log((hits[0] + 1) / (hits[1] + 1))
                if score > best:
                    best, chosen = score, (t, first, second, above)
    t, first, second, above = chosen  # type: ignore[misc]
    rest = len(a) - pilot
    hits_first = int(np.sum((first[pilot:] >= t) == above))
    hits_second = int(np.sum((second[pilot:] >= t) == above))
    low, high = _lower(hits_first, rest), _upper(hits_second, rest)
    return -math.inf if low == 0 else math.log(low / high)


def _first(rows: list[tuple]) -> float:
    return float(rows[0][0] or 0)


def _north(rows: list[tuple]) -> float:
    return float(next(r[1] for r in rows if r[0] == "north") or 0)  # an AVG may be NULL


QUERIES = [
    ("SELECT COUNT(*) FROM visits", _first),
    ("SELECT SUM(minutes) FROM visits", _first),
    ("SELECT AVG(minutes) FROM visits", _first),
    ("SELECT ward, COUNT(*) FROM visits GROUP BY ward", _north),
    # Joined on the individual: person 99 owns 40 joined rows, ten times most_rows 4 x 1.
    ("SELECT r.ward, COUNT(*) FROM visits v JOIN residents r ON r.person_id = v.person_id "
     "GROUP BY r.ward", _north),
    ("SELECT COUNT(*) FROM visits WHERE person_id IN "
     "(SELECT person_id FROM residents WHERE ward = 'north')", _first),
]


@pytest.mark.parametrize("sql, statistic", QUERIES, ids=[q[0] for q in QUERIES])
def test_the_real_path_keeps_within_epsilon(engines, sql, statistic) -> None:
    full = _samples(engines["full"], sql, statistic)
    without = _samples(engines["without"], sql, statistic)
    assert privacy_loss_lower_bound(full, without) <= float(EPSILON)


# Declared bounds (most_rows 4): AVG is a centred sum over a count; the person's 40 rows in
# three wards are rounded cumulatively over its cells.
DECLARED = [
    ("SELECT AVG(minutes) FROM visits", _first),
    ("SELECT ward, AVG(minutes) FROM visits GROUP BY ward", _north),
]


@pytest.mark.parametrize("sql, statistic", DECLARED, ids=[q[0] for q in DECLARED])
def test_the_real_path_keeps_within_epsilon_with_declared_bounds(engines, sql, statistic) -> None:
    assert "midpoint_sum" in [m.kind for m in engines["declared full"].prepare("auditor", sql).plan.measures]
    full = _samples(engines["declared full"], sql, statistic)
    without = _samples(engines["declared without"], sql, statistic)
    assert privacy_loss_lower_bound(full, without) <= float(EPSILON)


@pytest.mark.parametrize("sql, statistic, engine", [
    (*QUERIES[0], ""), (*QUERIES[3], ""), (*QUERIES[4], ""), (*DECLARED[0], "declared ")],
    ids=["count", "group by", "join", "centred average"])
def test_the_audit_catches_a_rewrite_without_clipping(engines, monkeypatch, sql, statistic,
                                                      engine: str) -> None:
    # Clipping switched off: every individual's factor is 1, whatever its rows and totals; the
    # sensitivities claimed stay the same, so the heavy individual's 40 rows leak.
    monkeypatch.setattr(rewrite_module, "_scaled", lambda value, *args, **options: value)
    for each in engines.values():
        each._cache.clear()
    full = _samples(engines[f"{engine}full"], sql, statistic)
    without = _samples(engines[f"{engine}without"], sql, statistic)
    for each in engines.values():
        each._cache.clear()
    assert privacy_loss_lower_bound(full, without) > float(EPSILON)
