"""VARIANCE/STDDEV and percentiles: measures against PostgreSQL's exact answers, the 95% bounds'
coverage, the exact exponential-mechanism sampler against its distribution, and refusals.

Outside references: PostgreSQL's own var_samp, var_pop, stddev_samp, stddev_pop,
percentile_cont and percentile_disc on the same rows; scipy.stats.chisquare for the sampler.
"""

from __future__ import annotations

import math
from decimal import Decimal
from fractions import Fraction

import psycopg
import pytest
import scipy.stats

from proxy import noise, selection, spread
from proxy.engine import Engine
from proxy.errors import HushError
from proxy.policy import load_policies
from proxy.sql.analyse import analyse
from proxy.sql.rewrite import rewrite
from tests.bounds_helpers import run_with_bounds
from tests.policy_fixtures import load_clinic, write_policies

CLAMPED_AGE = "CASE WHEN age > 100 THEN 100 WHEN age < 0 THEN 0 ELSE age END"
AGE_CENTRE = 50  # floor((0 + 100) / 2)
WARDS = ("north", "south", "east")
# People with at most 2 visits each (1 + person_id % 9, clinic fixture), under most_rows = 3.
FEW_VISITS = "person_id IN ({})".format(", ".join(str(i) for i in range(1, 400) if i % 9 < 2))


@pytest.fixture(scope="module")
def clinic_dsn(module_dsn: str) -> str:
    load_clinic(module_dsn)
    return module_dsn


@pytest.fixture(scope="module")
def policies(tmp_path_factory: pytest.TempPathFactory):
    return load_policies(write_policies(tmp_path_factory.mktemp("policies"), most_rows=3,
                                        bounds="declared", largest="1000"))


@pytest.fixture
def engine(clinic_dsn: str, policies, request):
    from proxy.backend import Backend
    from proxy.ledger import Ledger

    schema = "ledger_" + "".join(c if c.isalnum() else "_" for c in request.node.name[:24].lower())
    made = Engine(policies, Backend(clinic_dsn, pool_size=2), Ledger(clinic_dsn, schema=schema))
    yield made
    made.close()


def exact(dsn: str, sql: str) -> list[tuple]:
    with psycopg.connect(dsn) as conn:
        return conn.execute(sql).fetchall()


def true_parts(dsn: str, policies, sql: str) -> list[tuple[int, ...]]:
    """The rewrite's noise-free measures per cell (bounds at their ceilings)."""
    plan = analyse(sql, policies, "tester")
    rewritten = rewrite(plan)
    with psycopg.connect(dsn, autocommit=True) as conn:
        rows = run_with_bounds(conn, rewritten)
    keys = len(plan.keys)
    return [tuple(int(v) for v in row[keys:keys + len(plan.measures)]) for row in rows]


# ---- variance ---------------------------------------------------------------------------------

def test_spread_measures_equal_postgresql(clinic_dsn: str, policies) -> None:
    """count, centred sum and centred squares per ward equal PostgreSQL's over the clamped ages,
    and the variance made of them equals PostgreSQL's var_samp/var_pop of the clamped ages."""
    parts = true_parts(clinic_dsn, policies,
                       "SELECT ward, VARIANCE(age), VAR_POP(age) FROM people GROUP BY ward")
    for ward, (count, total, squares) in zip(WARDS, parts):
        (ref_count, ref_total, ref_squares, var_samp, var_pop), = exact(clinic_dsn, f"""
            SELECT count(age), sum(({CLAMPED_AGE}) - {AGE_CENTRE}),
                   sum((({CLAMPED_AGE}) - {AGE_CENTRE})^2), var_samp({CLAMPED_AGE}),
                   var_pop({CLAMPED_AGE})
            FROM clinic.people WHERE ward = '{ward}'""")
        assert (count, total, squares) == (ref_count, ref_total, int(ref_squares))
        cap = spread.largest_variance(0, 100)
        assert spread.variance(count, total, squares, True, cap) == pytest.approx(float(var_samp), rel=1e-12)
        assert spread.variance(count, total, squares, False, cap) == pytest.approx(float(var_pop), rel=1e-12)


def test_spread_with_individuals_scales_by_the_rows_bound(clinic_dsn: str, policies) -> None:
    """On visits (most_rows 3, declared) the centred parts' sensitivities are 3 * F and 3 * F^2,
    and with every person within the bound the parts equal PostgreSQL's."""
    plan = analyse("SELECT VAR_POP(minutes) FROM visits WHERE person_id <= 200", policies, "tester")
    rewritten = rewrite(plan)
    assert rewritten.sensitivities((3,)) == (3, 3 * 30, 3 * 30 * 30)  # minutes in [0, 60], centre 30
    (count, total, squares), = true_parts(clinic_dsn, policies,
                                          f"SELECT VAR_POP(minutes) FROM visits WHERE {FEW_VISITS}")
    clamped = "CASE WHEN minutes > 60 THEN 60 WHEN minutes < 0 THEN 0 ELSE minutes END"
    (ref,) = exact(clinic_dsn, f"SELECT count(minutes), sum(({clamped}) - 30), "
                               f"sum((({clamped}) - 30)^2) FROM clinic.visits "
                               f"WHERE {FEW_VISITS}")
    assert (count, total, squares) == (ref[0], ref[1], int(ref[2]))


def _covered(parts: tuple[int, int, int], scales, truth: float, sample: bool, root: bool,
             widths=None, trials: int = 1500) -> float:
    """Share of simulated noisy answers whose stated 95% range holds ``truth``."""
    cap = spread.largest_variance(0, 100)
    draws = [noise.sample_discrete_laplace(scale, trials) for scale in scales]
    hit = 0
    for z in zip(*draws):
        noisy = [p + int(d) for p, d in zip(parts, z)]
        estimate = spread.variance(*noisy, sample, cap)
        if estimate is None:
            hit += 1  # NULL answers claim nothing
            continue
        span = spread.variance_range(*noisy, widths or spread.widths(scales), sample, cap)
        half = spread.half_width(estimate, span, root)
        value = math.sqrt(estimate) if root else float(estimate)
        hit += abs(value - truth) <= half + 1e-9
    return hit / trials


@pytest.mark.parametrize("sample,root", [(True, False), (False, True)])
def test_spread_bound_covers_postgresql(clinic_dsn: str, policies, sample: bool, root: bool) -> None:
    """The stated 95% range holds PostgreSQL's exact var_samp / stddev_pop in at least 95% of
    simulated answers (noise drawn as the engine draws it, at epsilon 1 split three ways); the
    same check fails when the bound ignores the noise of the parts (widths 0)."""
    (count, total, squares), = true_parts(clinic_dsn, policies,
                                          "SELECT VARIANCE(age) FROM people WHERE ward = 'east'")
    function = "var_samp" if sample else "stddev_pop"
    (truth,), = exact(clinic_dsn, f"SELECT {function}({CLAMPED_AGE}) FROM clinic.people "
                                  "WHERE ward = 'east'")
    scales = (Fraction(3), Fraction(3 * 50), Fraction(3 * 2500))  # sensitivity / (1/3)
    # 1500 trials: a true coverage of 95% falls below 93.5% with probability under 0.3%
    # (binomial, 3 standard deviations of sqrt(.95 * .05 / 1500) = 0.56%).
    assert _covered((count, total, squares), scales, float(truth), sample, root) >= 0.935
    assert _covered((count, total, squares), scales, float(truth), sample, root,
                    widths=(0, 0, 0)) < 0.5


def test_spread_answer_near_postgresql_and_explained(engine: Engine, clinic_dsn: str) -> None:
    """At epsilon 1000 the engine's answers are near PostgreSQL's (within twice the bound), and
    EXPLAIN shows the centred measures' sensitivities."""
    answer = engine.answer("tester", "SELECT ward, VARIANCE(age) AS v, STDDEV_POP(weight) AS s, "
                                     "VAR_POP(age), STDDEV(age) FROM people GROUP BY ward "
                                     "ORDER BY ward", epsilon=Decimal(1000))
    assert [c.type for c in answer.columns][1:] == ["double precision"] * 4
    bounds = {a.column: a.bound95 for a in answer.accuracy}
    weight = ("CASE WHEN round(weight * 2) > 240 THEN 120 WHEN round(weight * 2) < -10 THEN -5 "
              "ELSE round(weight * 2) / 2 END")
    reference = {row[0]: row[1:] for row in exact(clinic_dsn, f"""
        SELECT ward, var_samp({CLAMPED_AGE}), stddev_pop({weight}), var_pop({CLAMPED_AGE}),
               stddev_samp({CLAMPED_AGE}) FROM clinic.people GROUP BY ward""")}
    names = [c.name for c in answer.columns]
    for row in answer.rows:
        for name, value, truth in zip(names[1:], row[1:], reference[row[0]]):
            # twice the 95% bound: one answer's 12 values, so no single 95% claim is tested here
            # (coverage is, above); each part beyond twice its 98.3% bound has odds under 1e-3
            assert abs(value - float(truth)) <= 2 * float(bounds[name]), (name, row)
            assert float(bounds[name]) < 0.05 * float(truth)  # at this epsilon, close
    explained = {item: value for item, value in engine.explain(
        "tester", "SELECT STDDEV(weight) FROM people", epsilon=Decimal(1)).rows}
    assert "sensitivity 62.5," in explained["measure sum(weight - centre)"]  # 125 steps of 0.5
    assert "sensitivity 3906.25," in explained["measure sum((weight - centre)^2)"]  # 125^2 * 0.25


# ---- percentiles: the sampler ------------------------------------------------------------------

HISTOGRAM = [3, 0, 5, 9, 1, 0, 2, 4]


def _frequencies(epsilon: Fraction, draws: int) -> list[int]:
    gaps = selection.distances(HISTOGRAM, Fraction(1, 2), discrete=False)
    seen = [0] * len(HISTOGRAM)
    for _ in range(draws):
        seen[selection.choose(gaps, epsilon, 1)] += 1
    return seen


def _expected(epsilon: float) -> list[float]:
    gaps = selection.distances(HISTOGRAM, Fraction(1, 2), discrete=False)
    weights = [math.exp(-epsilon * float(gaps[k]) / 2) for k in range(len(HISTOGRAM))]
    return [w / sum(weights) for w in weights]


def test_sampler_matches_the_exponential_mechanism() -> None:
    """20,000 draws against the exact probabilities exp(-eps d / 2) / sum (scipy chi-square,
    p-value above 0.001); the check rejects draws made at the wrong epsilon."""
    draws = 20_000
    seen = _frequencies(Fraction(1, 2), draws)
    assert scipy.stats.chisquare(seen, [p * draws for p in _expected(0.5)]).pvalue > 0.001
    broken = _frequencies(Fraction(1), draws)  # a sampler using twice the epsilon
    assert scipy.stats.chisquare(broken, [p * draws for p in _expected(0.5)]).pvalue < 0.001


def test_distances_follow_postgresql_positions() -> None:
    """A bucket is at distance 0 exactly when the requested position falls in it."""
    gaps = selection.distances([2, 0, 3], Fraction(1, 2), discrete=False)  # t = 0.5 * 4 = 2
    assert [gaps[k] for k in range(3)] == [1, 1, 0]  # the empty bucket holds no position
    gaps = selection.distances([2, 0, 3], Fraction(2, 5), discrete=True)  # ceil(2) - 1 = 1
    assert gaps[0] == 0 and gaps[2] == 1
    gaps = selection.distances([2, 0, 3], Fraction(1, 3), discrete=False)  # t = 4 / 3
    assert [gaps[k] for k in range(3)] == [Fraction(1, 3), Fraction(2, 3), Fraction(2, 3)]


# ---- percentiles: answers ----------------------------------------------------------------------

def _rank_interval(dsn: str, table: str, column: str, where: str, value) -> tuple[int, int]:
    (below, through), = exact(dsn, f"SELECT count(*) FILTER (WHERE {column} < {value}), "
                                   f"count(*) FILTER (WHERE {column} <= {value}) "
                                   f"FROM {table} WHERE {where}")
    return below, through


def test_percentiles_near_postgresql_ranks(engine: Engine, clinic_dsn: str) -> None:
    """percentile_cont / percentile_disc / median of age per ward land on a value whose rank
    in PostgreSQL's data is within the stated rank bound of the requested position, and the
    values agree with PostgreSQL's own percentile functions to within that rank."""
    answer = engine.answer("tester", "SELECT ward, percentile_cont(0.25) WITHIN GROUP (ORDER BY "
                                     "age) AS q1, median(age) AS m, percentile_disc(0.9) WITHIN "
                                     "GROUP (ORDER BY age) AS p90 FROM people GROUP BY ward",
                           epsilon=Decimal(3))
    assert [c.type for c in answer.columns] == ["text", "double precision", "double precision",
                                                "integer"]
    note = answer.accuracy[0].note
    within = int(note.split("±")[1].split()[0])
    assert within == selection.rank_bound95(101, Fraction(1), 1)
    in_range = "age BETWEEN 0 AND 100 AND age IS NOT NULL"
    for ward, *values in answer.rows:
        (n,), = exact(clinic_dsn, f"SELECT count(*) FROM clinic.people WHERE ward = '{ward}' "
                                  f"AND {in_range}")
        for value, p in zip(values, (0.25, 0.5, 0.9)):
            below, through = _rank_interval(clinic_dsn, "clinic.people", "age",
                                            f"ward = '{ward}' AND {in_range}", value)
            target = p * (n - 1)
            assert below - within <= target <= through - 1 + within, (ward, p, value)
        (pg_median,), = exact(clinic_dsn, "SELECT percentile_cont(0.5) WITHIN GROUP (ORDER BY "
                                          f"age) FROM clinic.people WHERE ward = '{ward}' AND {in_range}")
        # at 1 epsilon per percentile and ~500 rows, the ages near the median are dense
        assert abs(values[1] - float(pg_median)) <= 10


def test_percentile_with_individuals(engine: Engine, clinic_dsn: str) -> None:
    """visits (most_rows 3, declared): sensitivity 3 shown in EXPLAIN, and the median fee of
    people within the bound lands near PostgreSQL's."""
    explained = {item: value for item, value in engine.explain(
        "tester", f"SELECT median(fee) FROM visits WHERE {FEW_VISITS}").rows}
    line = explained["histogram count(fee)"]
    assert "201 values per cell, never released; sensitivity 3 (rows)" in line
    assert f"±{selection.rank_bound95(201, Fraction(1), 3)} ranks" in line
    answer = engine.answer("tester", f"SELECT median(fee) FROM visits WHERE {FEW_VISITS}",
                           epsilon=Decimal(10))
    (value,), = answer.rows
    (pg,), = exact(clinic_dsn, "SELECT percentile_cont(0.5) WITHIN GROUP (ORDER BY fee) FROM "
                               f"clinic.visits WHERE {FEW_VISITS}")
    assert abs(value - float(pg)) <= 2.0  # fee spreads over [0, 50] in steps of 0.25


def test_refusals_name_the_private_alternative(policies) -> None:
    for sql, words in [
        ("SELECT MIN(age) FROM people", "percentile_cont(0.01) WITHIN GROUP (ORDER BY age)"),
        ("SELECT ward, MAX(weight) FROM people GROUP BY ward",
         "percentile_cont(0.99) WITHIN GROUP (ORDER BY weight)"),
        ("SELECT COUNT(*), median(age) FROM people", "separate query"),
        ("SELECT median(age), median(weight) FROM people", "separate query"),
        ("SELECT percentile_cont(1.5) WITHIN GROUP (ORDER BY age) FROM people", "[0, 1]"),
        ("SELECT percentile_cont(0.5) WITHIN GROUP (ORDER BY age DESC) FROM people", "1 - p"),
        ("SELECT median(ward) FROM people", "integer or number columns"),
        ("SELECT STDDEV(DISTINCT age) FROM people", "DISTINCT ...) is not accepted"),
    ]:
        with pytest.raises(HushError) as caught:
            analyse(sql, policies, "tester")
        assert caught.value.sqlstate in ("0A000", "42883")
        assert words in (caught.value.hint or "") + caught.value.message, sql


def test_too_many_candidates_are_refused(policies) -> None:
    """person_id has 100,000 multiples of its step: refused with 54000 and a hint to narrow."""
    with pytest.raises(HushError) as caught:
        analyse("SELECT median(person_id) FROM people", policies, "tester")
    assert caught.value.sqlstate == "54000" and "BETWEEN" in (caught.value.hint or "")
    analyse("SELECT median(person_id) FROM people WHERE person_id BETWEEN 1 AND 5000",
            policies, "tester")


def test_chosen_bounds_answer_percentiles_and_spread(clinic_dsn: str, tmp_path) -> None:
    """With bounds chosen per query (visits, most_rows 10), both shapes are answered: the
    histogram's target for the bound is set from the visible cells, the bound lands among its
    candidates, and the answers are of the right shape and near PostgreSQL's."""
    from proxy.backend import Backend
    from proxy.ledger import Ledger

    chosen = load_policies(write_policies(tmp_path / "chosen", most_rows=10, bounds="chosen",
                                          largest="1000"))
    engine = Engine(chosen, Backend(clinic_dsn, pool_size=2),
                    Ledger(clinic_dsn, schema="ledger_chosen_spread"))
    try:
        median = engine.answer("tester", "SELECT ward, median(minutes) FROM visits GROUP BY ward",
                               epsilon=Decimal(20))
        spread_answer = engine.answer("tester", "SELECT STDDEV(minutes) FROM visits",
                                      epsilon=Decimal(20))
    finally:
        engine.close()
    assert [row[0] for row in median.rows] == list(WARDS)
    reference = dict(exact(clinic_dsn, "SELECT ward, percentile_cont(0.5) WITHIN GROUP (ORDER BY "
                                       "minutes) FROM clinic.visits WHERE minutes BETWEEN 0 AND 60 "
                                       "GROUP BY ward"))
    for ward, value in median.rows:
        assert abs(value - float(reference[ward])) <= 6, ward  # minutes spread over [0, 60]
    (truth,), = exact(clinic_dsn, "SELECT stddev_samp(CASE WHEN minutes > 60 THEN 60 ELSE minutes "
                                  "END) FROM clinic.visits")
    # scaled-down individuals change the spread a little: a loose check of the shape
    assert abs(spread_answer.rows[0][0] - float(truth)) <= 0.1 * float(truth)


def test_percentile_edges(engine: Engine) -> None:
    """HAVING and ORDER BY over percentiles and variances work on the noisy outputs; a WHERE
    that leaves the column no value to rank answers NULL (PostgreSQL's answer for no rows)."""
    answer = engine.answer("tester", "SELECT ward, median(age) AS m FROM people GROUP BY ward "
                                     "HAVING median(age) >= 0 ORDER BY m DESC", epsilon=Decimal(5))
    assert [row[1] for row in answer.rows] == sorted((row[1] for row in answer.rows), reverse=True)
    assert len(answer.rows) == 3
    answer = engine.answer("tester", "SELECT ward, VARIANCE(age) AS v FROM people GROUP BY ward "
                                     "HAVING VARIANCE(age) > 1e9", epsilon=Decimal(5))
    assert answer.rows == []  # no variance of ages in [0, 100] exceeds 2500
    answer = engine.answer("tester", "SELECT median(age) FROM people WHERE age > 200",
                           epsilon=Decimal(1))
    assert answer.rows == [(None,)]
