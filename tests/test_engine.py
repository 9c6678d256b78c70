"""The engine end to end on real PostgreSQL: plan -> reserve -> run -> noise -> release.

Checks the ordering rules of proxy.engine (refusals charge nothing, an exhausted budget runs
nothing, a started query's charge stands), the answer's shape and types, and that the noise the
engine adds has exactly the distribution its accuracy claims.
"""

from __future__ import annotations

import math
from decimal import Decimal
from fractions import Fraction

import psycopg
import pytest

from proxy import engine as engine_module
from proxy import noise
from proxy.engine import Engine
from proxy.errors import HushError
from proxy.policy import load_policies
from tests.policy_fixtures import load_clinic, write_policies


@pytest.fixture(scope="module")
def clinic_dsn(module_dsn: str) -> str:
    load_clinic(module_dsn)
    return module_dsn


@pytest.fixture
def make_engine(clinic_dsn: str, tmp_path, request):
    """Engines on the clinic data with a ledger schema of their own (so budgets start fresh)."""
    made: list[Engine] = []

    def make(**policy_options) -> Engine:
        from proxy.backend import Backend
        from proxy.ledger import Ledger

        folder = tmp_path / f"policies{len(made)}"
        policies = load_policies(write_policies(folder, **policy_options))
        schema = f"ledger_{request.node.name[:20].lower().replace('[', '_').replace(']', '')}_{len(made)}"
        schema = "".join(c if c.isalnum() or c == "_" else "_" for c in schema)
        engine = Engine(policies, Backend(clinic_dsn, pool_size=2), Ledger(clinic_dsn, schema=schema))
        made.append(engine)
        return engine

    yield make
    for engine in made:
        engine.close()


def exact(dsn: str, sql: str) -> list[tuple]:
    with psycopg.connect(dsn) as conn:
        return conn.execute(sql).fetchall()


def test_answer_has_one_row_per_cell_with_types_and_a_charge(make_engine) -> None:
    engine = make_engine()
    answer = engine.answer("tester", "SELECT ward, COUNT(*) AS people, SUM(weight), AVG(age) "
                                     "FROM people GROUP BY ward", epsilon=Decimal("0.5"))
    assert [c.name for c in answer.columns] == ["ward", "people", "sum", "avg"]
    assert [c.type for c in answer.columns] == ["text", "bigint", "numeric", "double precision"]
    assert [row[0] for row in answer.rows] == ["north", "south", "east"]
    assert all(isinstance(row[1], int) and row[1] >= 0 for row in answer.rows)
    assert all(isinstance(row[2], Decimal) and row[2] % Decimal("0.5") == 0 for row in answer.rows)
    assert all(row[3] is None or 0 <= row[3] <= 100 for row in answer.rows)
    assert answer.epsilon == Decimal("0.5")
    assert answer.remaining == Decimal("999.5")
    assert engine.remaining("tester") == Decimal("999.5")
    assert [a.column for a in answer.accuracy] == ["people", "sum", "avg"]
    # Four measures (count rows, sum weight, sum age, count age) share epsilon 0.5.
    people = answer.accuracy[0]
    assert people.sensitivity == 1 and people.scale == Fraction(4, 1) / Fraction(1, 2)
    assert people.bound95 == noise.bound95(Fraction(8))
    weight = answer.accuracy[1]  # 240 units of 0.5: sensitivity 120 in the column's units
    assert weight.sensitivity == 120 and weight.scale == Fraction(240 * 4 * 2) / 2


def test_refusals_charge_nothing_and_explain_is_free(make_engine) -> None:
    engine = make_engine()
    for sql in ("SELECT * FROM people", "SELECT ward FROM people", "DELETE FROM people",
                "SELECT COUNT(*) FROM nowhere", "SELECT COUNT(*) FROM people WHERE age / 0 > 1"):
        with pytest.raises(HushError):
            engine.answer("tester", sql)
    explained = engine.explain("tester", "SELECT ward, COUNT(*) FROM people GROUP BY ward")
    assert dict(explained.rows)["cells"] == "3"
    assert engine.remaining("tester") == Decimal("1000")
    with pytest.raises(HushError) as refused:
        engine.answer("outsider", "SELECT COUNT(*) FROM people")
    assert refused.value.sqlstate == "42501"
    assert engine.remaining("outsider") == Decimal("1.0")


def test_exhausted_budget_runs_nothing(make_engine, monkeypatch) -> None:
    engine = make_engine(budget="1.0", largest="1.0")
    runs: list[str] = []
    real_run = engine.backend.run
    monkeypatch.setattr(engine.backend, "run",
                        lambda sql, *a, **k: runs.append(sql) or real_run(sql, *a, **k))
    engine.answer("tester", "SELECT COUNT(*) FROM people", epsilon=Decimal("0.75"))
    with pytest.raises(HushError) as exhausted:
        engine.answer("tester", "SELECT COUNT(*) FROM people", epsilon=Decimal("0.5"))
    assert exhausted.value.sqlstate == "53400"
    assert "0.25" in exhausted.value.message  # says what is left
    assert len(runs) == 1
    assert engine.remaining("tester") == Decimal("0.25")


def test_a_started_query_stays_charged_when_it_fails(make_engine, monkeypatch, clinic_dsn) -> None:
    engine = make_engine()

    def broken(*args, **kwargs):
        raise HushError("XX000", "the backend could not run the query")

    monkeypatch.setattr(engine.backend, "run", broken)
    with pytest.raises(HushError):
        engine.answer("tester", "SELECT COUNT(*) FROM people", epsilon=Decimal("0.3"))
    assert engine.remaining("tester") == Decimal("999.7")
    outcomes = exact(clinic_dsn, f"SELECT outcome FROM {engine.ledger.schema}.charges")
    assert outcomes == [("failed",)]


def test_epsilon_must_be_positive_and_within_the_largest(make_engine) -> None:
    engine = make_engine(largest="2")
    for bad in ("0", "-1", "2.5", "NaN", "abc"):
        with pytest.raises(HushError) as error:
            engine.answer("tester", "SELECT COUNT(*) FROM people", epsilon=bad)
        assert error.value.sqlstate == "22023"
    assert engine.remaining("tester") == Decimal("1000")


def test_rows_outside_domains_and_ranges_follow_the_declared_policy(make_engine, clinic_dsn) -> None:
    engine = make_engine(largest="100000", budget="100000")
    # A huge epsilon makes the noise vanish: SUM(age) has sensitivity 100 and half the epsilon,
    # so scale 100 / 50000 and P(noise != 0) = 2a / (1 + a) with a = exp(-500). (At epsilon
    # 1000 the scale was 0.2 and a cell's sum was off by one in about 1.3% of runs.)
    answer = engine.answer("tester", "SELECT smoker, COUNT(*), SUM(age) FROM people GROUP BY smoker",
                           epsilon=Decimal("100000"))
    truth = exact(clinic_dsn, "SELECT smoker, count(*), sum(LEAST(GREATEST(age, 0), 100)) "
                              "FROM clinic.people GROUP BY smoker ORDER BY smoker")
    assert [tuple(r) for r in answer.rows] == [tuple(r) for r in truth]


def test_post_processing_orders_limits_and_filters_noisy_values(make_engine) -> None:
    engine = make_engine(largest="1000")
    answer = engine.answer("tester", "SELECT age, COUNT(*) AS n FROM people GROUP BY age "
                                     "HAVING COUNT(*) > 19 ORDER BY n DESC, age LIMIT 5",
                           epsilon=Decimal("1000"))
    counts = [row[1] for row in answer.rows]
    assert len(answer.rows) == 5 and counts == sorted(counts, reverse=True)
    assert all(c > 19 for c in counts)


def cell_noise(engine: Engine, dsn: str, epsilon: str, queries: int) -> list[int]:
    """Noise draws observed through the engine: answer minus truth, per cell, over queries.

    Uses age cells whose true counts are large enough that clamping at zero never matters."""
    truth = dict(exact(dsn, "SELECT age, count(*) FROM clinic.people WHERE age BETWEEN 0 AND 100 "
                            "GROUP BY age HAVING count(*) >= 15"))
    draws: list[int] = []
    for _ in range(queries):
        answer = engine.answer("tester", "SELECT age, COUNT(*) FROM people GROUP BY age",
                               epsilon=Decimal(epsilon), fresh=True)  # new noise each time
        draws += [count - truth[age] for age, count in answer.rows if age in truth]
    return draws


def variance_within(draws: list[int], scale: Fraction, standard_errors: float = 6.0) -> bool:
    """Whether the sample variance matches the discrete Laplace variance at ``scale``, within a
    tolerance of ``standard_errors`` standard errors of the sample variance (from the fourth
    moment: Var(s^2) ~ (mu4 - sigma^4) / n)."""
    n = len(draws)
    mean = sum(draws) / n
    sample = sum((x - mean) ** 2 for x in draws) / (n - 1)
    a = math.exp(-1 / float(scale))
    sigma2 = noise.variance(scale)
    # Fourth moment of the two-sided geometric: 2a(1 + 10a + a^2)... computed from the pmf.
    mu4 = sum(k ** 4 * (1 - a) / (1 + a) * a ** abs(k) for k in range(-2000, 2001))
    return abs(sample - sigma2) <= standard_errors * math.sqrt((mu4 - sigma2 ** 2) / n)


def test_engine_noise_has_the_claimed_scale(make_engine, clinic_dsn) -> None:
    engine = make_engine()
    draws = cell_noise(engine, clinic_dsn, "0.5", queries=60)
    assert len(draws) > 2000
    scale = Fraction(1) / Fraction(1, 2)  # count sensitivity 1 (common practice), epsilon 0.5
    assert abs(sum(draws) / len(draws)) < 6 * math.sqrt(noise.variance(scale) / len(draws))
    assert variance_within(draws, scale)
    # The same check rejects the draws for a mechanism off by a factor 1.5 in scale.
    assert not variance_within(draws, scale * Fraction(3, 2))
    assert not variance_within(draws, scale / Fraction(3, 2))


# Palmer penguins (Horst, Hill & Gorman 2020, palmerpenguins package): 344 penguins, of which
# 152 Adelie, 68 Chinstrap and 124 Gentoo (the published group sizes).
PUBLISHED_SPECIES = {"Adelie": 152, "Chinstrap": 68, "Gentoo": 124}

PENGUINS = """
table = "penguins"
source = "public.penguins"

[columns.species]
kind = "category"
values = ["Adelie", "Chinstrap", "Gentoo"]

[columns.island]
kind = "category"
values = ["Biscoe", "Dream", "Torgersen"]

[columns.body_mass_g]
kind = "integer"
range = [2500, 6500]
"""


@pytest.fixture
def penguin_engine(fresh_dsn: str, tmp_path):
    from palmerpenguins import load_penguins

    frame = load_penguins()
    with psycopg.connect(fresh_dsn, autocommit=True) as conn:
        conn.execute("CREATE TABLE public.penguins (species text, island text, body_mass_g integer)")
        with conn.cursor().copy("COPY public.penguins FROM STDIN") as copy:
            for species, island, mass in frame[["species", "island", "body_mass_g"]].itertuples(index=False):
                copy.write_row((species, island, None if mass != mass else int(mass)))
    folder = write_policies(tmp_path / "policies")
    (folder / "tables" / "penguins.toml").write_text(PENGUINS)
    access = (folder / "access.toml").read_text().replace('tables = ["people", "visits"]',
                                                          'tables = ["penguins"]')
    (folder / "access.toml").write_text(access)
    engine = Engine.connect(load_policies(folder), fresh_dsn, pool_size=2)
    yield engine
    engine.close()


def coverage(engine: Engine, queries: int) -> float:
    """Fraction of noisy species counts inside their own 95% bound of the published size."""
    inside = total = 0
    for _ in range(queries):
        answer = engine.answer("tester", "SELECT species, COUNT(*) FROM penguins GROUP BY species",
                               epsilon=Decimal("0.5"), fresh=True)
        bound = answer.accuracy[0].bound95
        for species, count in answer.rows:
            inside += abs(count - PUBLISHED_SPECIES[species]) <= bound
            total += 1
    return inside / total


def test_penguin_counts_fall_inside_their_bounds_around_published_sizes(penguin_engine, monkeypatch) -> None:
    # 600 cells; each is inside with probability >= 0.95 (the bound's definition). A one-sided
    # test at 4 binomial standard errors: sqrt(0.95 * 0.05 / 600) = 0.0089.
    threshold = 0.95 - 4 * math.sqrt(0.95 * 0.05 / 600)
    assert coverage(penguin_engine, 200) >= threshold
    # The same test fails for a mechanism whose noise is twice what it reports.
    real = noise.sample_discrete_laplace
    monkeypatch.setattr(engine_module.noise, "sample_discrete_laplace",
                        lambda scale, size: real(scale * 2, size))
    assert coverage(penguin_engine, 200) < threshold


def test_chosen_bounds_are_explained_and_reported_with_what_they_clipped(make_engine) -> None:
    engine = make_engine(most_rows=10, bounds="chosen")
    sql = "SELECT ward, COUNT(*), SUM(minutes) FROM visits GROUP BY ward"
    explained = dict(engine.explain("tester", sql, epsilon=Decimal(1)).rows)
    # Two measures share 85%; the two bounds share 10% for their choice, 5% for their clipped
    # figures.
    assert explained["epsilon per measure"] == "0.425"
    assert explained["bound on rows per individual"].startswith(
        "chosen per query by a private quantile (noisy max over 8 candidates up to the ceiling 10)")
    assert "epsilon 0.05; clipped-away total reported with epsilon 0.025" in \
        explained["bound on total of minutes per individual"]
    assert explained["measure sum(minutes)"].startswith("sensitivity at most 600,")
    answer = engine.answer("tester", sql, epsilon=Decimal(1))
    assert answer.epsilon == Decimal(1)
    for item in answer.accuracy:
        # Counts and non-negative sums can only be low because of clipping.
        assert item.low_by is not None and item.low_by >= 0 and item.high_by == 0
    assert any(note.startswith("each individual's rows over the whole answer is scaled down to at "
                               "most ") and note.endswith("(chosen privately for this query)")
               for note in answer.notes)


def test_a_percentile_with_chosen_bounds_spends_no_epsilon_on_a_clipped_figure_it_never_reports(
        make_engine) -> None:
    engine = make_engine(most_rows=10, bounds="chosen")
    sql = ("SELECT ward, percentile_cont(0.5) WITHIN GROUP (ORDER BY minutes) FROM visits "
           "GROUP BY ward")
    explained = dict(engine.explain("tester", sql, epsilon=Decimal(1)).rows)
    # One bound (rows) chosen with 10%; the selection gets the other 90%, the 5% a clipped
    # figure would take included: the answer is a rank, and no clipped figure is released.
    assert explained["epsilon per measure"] == "0.9"
    bound_line = explained["bound on rows per individual"]
    assert bound_line.endswith("epsilon 0.1") and "clipped-away" not in bound_line
    answer = engine.answer("tester", sql, epsilon=Decimal(1))
    assert answer.epsilon == Decimal(1)
    assert [item.epsilon for item in answer.accuracy] == [Decimal("0.9")]


def test_declared_bounds_spend_everything_on_the_measures(make_engine) -> None:
    engine = make_engine(most_rows=10, bounds="declared")
    sql = "SELECT COUNT(*), SUM(minutes) FROM visits"
    explained = dict(engine.explain("tester", sql, epsilon=Decimal(1)).rows)
    assert explained["epsilon per measure"] == "0.5"
    assert explained["bound on rows per individual"] == "declared: 10 (the policy's most_rows)"
    assert explained["measure count(*)"].startswith("sensitivity 10,")
    answer = engine.answer("tester", sql, epsilon=Decimal(1))
    assert [a.sensitivity for a in answer.accuracy] == [10, 600]
    assert all(a.low_by is None for a in answer.accuracy)
