"""An adversarial analyst against the engine: shapes, errors and budget tricks that would single
out one individual or read raw values, each checked on real PostgreSQL.

Two kinds of test live here:
- regressions for real findings (each says what went wrong before the fix), and
- attacks that must keep failing, where tests/test_analyse.py and tests/test_rewrite.py do not
  already cover them (other backend column types, NULL individuals, cached grants, parsed trees
  carrying parameters, backend error text).

Exact answers come from PostgreSQL itself; "noise-free" means the rewritten query run directly
with a fixed salt, as in tests/test_rewrite.py.
"""

from __future__ import annotations

from decimal import Decimal
from fractions import Fraction
from pathlib import Path

import psycopg
import pytest
import sqlglot
from hypothesis import given, settings

from proxy.backend import Backend
from proxy.engine import Engine, parse_epsilon
from proxy.errors import HushError
from proxy.ledger import Ledger
from proxy.policy import load_policies
from proxy.sql.analyse import analyse
from proxy.sql.rewrite import rewrite
from tests.bounds_helpers import run_with_bounds
from tests.policy_fixtures import PEOPLE, VISITS, load_clinic, write_policies

# Ranges that cross zero, so that a NULL clamped as if it were a value would show: people.weight
# is already [-5, 120]; visits.minutes becomes [-10, 60] and visits.fee [-5, 50].
VISITS_ACROSS_ZERO = (VISITS.replace("range = [0, 60]", "range = [-10, 60]")
                      .replace("range = [0, 50]", "range = [-5, 50]"))
# people.age with a lower bound above zero: a NULL must not count as 1.
PEOPLE_FROM_ONE = PEOPLE.replace("[columns.age]\nkind = \"integer\"\nrange = [0, 100]",
                                 "[columns.age]\nkind = \"integer\"\nrange = [1, 100]")
# The same people, but weight stored as text in the backend: a data owner's mistake that makes
# a cast fail on one row, quoting that row's value in PostgreSQL's error message.
PEOPLE_AS_TEXT = PEOPLE.replace('table = "people"', 'table = "people_text"').replace(
    'source = "clinic.people"', 'source = "clinic.people_text"')
SECRET = "secret-weight-of-person-17"
# The same people with age declared as [0, 0]: valid for `hushql check`, and a sum that can
# never move.
PEOPLE_AGE_ZERO = PEOPLE.replace('table = "people"', 'table = "people_zero"').replace(
    "range = [0, 100]", "range = [0, 0]")
BUDGET = Decimal(10_000_000)


def _policy_folder(root: Path) -> Path:
    assert PEOPLE_FROM_ONE != PEOPLE and VISITS_ACROSS_ZERO.count("[-") == 2
    assert "[0, 0]" in PEOPLE_AGE_ZERO
    write_policies(root, most_rows=3, bounds="declared", largest="1000000", budget=str(BUDGET))
    (root / "tables" / "visits.toml").write_text(
        VISITS_ACROSS_ZERO.format(most_rows=3, bounds="declared"))
    (root / "tables" / "people.toml").write_text(PEOPLE_FROM_ONE)
    (root / "tables" / "people_text.toml").write_text(PEOPLE_AS_TEXT)
    (root / "tables" / "people_zero.toml").write_text(PEOPLE_AGE_ZERO)
    access = (root / "access.toml").read_text()
    (root / "access.toml").write_text(access.replace('tables = ["people", "visits"]',
                                                     'tables = ["people", "visits", "people_text", "people_zero"]'))
    return root


@pytest.fixture(scope="module")
def dsn(module_dsn: str) -> str:
    """The clinic with NULLs where they hurt: whole individuals whose summed values are all
    NULL, rows whose individual is NULL, and a text-typed copy of people."""
    load_clinic(module_dsn, people=600)
    with psycopg.connect(module_dsn, autocommit=True) as conn:
        conn.execute("UPDATE clinic.people SET weight = NULL, age = NULL WHERE person_id % 7 = 0")
        conn.execute("UPDATE clinic.visits SET minutes = NULL, fee = NULL WHERE person_id % 5 = 0")
        conn.execute("INSERT INTO clinic.visits SELECT NULL, ward, minutes, visited, fee "
                     "FROM clinic.visits WHERE person_id BETWEEN 11 AND 40")
        conn.execute("CREATE TABLE clinic.people_text AS SELECT person_id, ward, age, "
                     "weight::text AS weight, smoker, admitted FROM clinic.people")
        conn.execute("UPDATE clinic.people_text SET weight = %s WHERE person_id = 17", (SECRET,))
    return module_dsn


@pytest.fixture(scope="module")
def policies(tmp_path_factory: pytest.TempPathFactory):
    return load_policies(_policy_folder(tmp_path_factory.mktemp("adversarial")))


@pytest.fixture
def engine(dsn: str, policies, request):
    """An engine with a ledger schema of its own, so every test starts with a full budget."""
    schema = "adv_" + "".join(c if c.isalnum() else "_" for c in request.node.name.lower())[:40]
    made = Engine(policies, Backend(dsn, pool_size=2), Ledger(dsn, schema=schema))
    yield made
    made.close()


def noise_free(dsn: str, policies, sql: str, exact: frozenset[str] = frozenset()) -> list[tuple]:
    """The rewrite's measures per cell for ``sql`` (key ordinals dropped), run directly."""
    plan = analyse(sql, policies, "tester")
    rewritten = rewrite(plan, exact)
    with psycopg.connect(dsn) as conn:
        rows = run_with_bounds(conn, rewritten)
    keys = len(plan.keys)
    return [tuple(int(v) for v in row[keys:keys + len(plan.measures)]) for row in rows]


def reference(dsn: str, sql: str) -> list[tuple]:
    with psycopg.connect(dsn) as conn:
        return [tuple(int(v) if v is not None else 0 for v in row)
                for row in conn.execute(sql).fetchall()]


# ---------------------------------------------------------------------------------------------
# Finding: SUM and AVG counted NULL as the range's lower bound.
#
# The rewrite clamped with LEAST(GREATEST(x, lo), hi), and PostgreSQL's GREATEST ignores NULL:
# GREATEST(NULL, lo) is lo. Every NULL row added lo to a SUM (-5 per NULL weight, +1 per NULL
# age), AVG divided that by a count that rightly skipped NULLs, and an individual whose values in
# a cell were all NULL added its per-cell row cap * lo. The sensitivity bound still held (lo is inside the
# range), but every answer was biased by the number of NULLs, against the rewrite's own contract
# ("NULL stays NULL") and PostgreSQL's SUM.

WEIGHT_UNITS = ("CASE WHEN round(weight * 2) > 240 THEN 240 WHEN round(weight * 2) < -10 "
                "THEN -10 ELSE round(weight * 2) END")
EXACT_WEIGHT_UNITS = ("floor(sum(CASE WHEN weight > 120 THEN 120 WHEN weight < -5 THEN -5 "
                      "ELSE weight END) / 0.5 + 0.5)")
AGE_FROM_ONE = "CASE WHEN age > 100 THEN 100 WHEN age < 1 THEN 1 ELSE age END"


@pytest.mark.parametrize("exact", [frozenset(), frozenset({"weight"})], ids=["per-row", "exact"])
def test_null_values_add_nothing_to_sums_on_row_tables(dsn, policies, exact) -> None:
    with psycopg.connect(dsn) as conn:
        nulls = conn.execute("SELECT count(*) FROM clinic.people WHERE weight IS NULL").fetchone()[0]
    assert nulls > 50  # the data would show the bias
    got = noise_free(dsn, policies, "SELECT SUM(weight), SUM(age), COUNT(age) FROM people", exact)
    weight = EXACT_WEIGHT_UNITS if exact else f"sum({WEIGHT_UNITS})"
    want = reference(dsn, f"SELECT {weight}, sum({AGE_FROM_ONE}), count(age) FROM clinic.people")
    assert got == want


def test_null_values_add_nothing_to_grouped_sums(dsn, policies) -> None:
    got = noise_free(dsn, policies, "SELECT smoker, SUM(weight), SUM(age) FROM people GROUP BY smoker")
    want = reference(dsn, f"SELECT sum({WEIGHT_UNITS}), sum({AGE_FROM_ONE}) FROM "
                          "unnest(ARRAY[false, true]) WITH ORDINALITY AS b(v, i) "
                          "LEFT JOIN clinic.people p ON p.smoker = b.v GROUP BY b.i ORDER BY b.i")
    assert got == want


@pytest.mark.parametrize("exact", [frozenset(), frozenset({"fee"})], ids=["per-row", "exact"])
def test_individuals_whose_values_are_all_null_add_nothing(dsn, policies, exact) -> None:
    # most_rows 3 (declared): bounds of 3 * 60 = 180 minutes and 3 * 50 / 0.25 = 600 fee units
    # on each individual's L1 totals; both sums shrink by one common factor per individual. An
    # individual with no non-NULL value has a NULL partial: it adds nothing and limits nothing.
    got = noise_free(dsn, policies, "SELECT SUM(minutes), SUM(fee) FROM visits", exact)
    fee_partial = ("floor(sum(CASE WHEN fee > 50 THEN 50 WHEN fee < -5 THEN -5 ELSE fee END) / 0.25 + 0.5)"
                   if exact else
                   "sum(round(CASE WHEN fee > 50 THEN 50 WHEN fee < -5 THEN -5 ELSE fee END / 0.25))")
    scaled = ("sign({x}) * least(abs({x}), floor(abs({x}) * 180.0 / nullif(abs(s), 0)), "
              "floor(abs({x}) * 600.0 / nullif(abs(f), 0)))")
    want = reference(dsn, f"""
        SELECT sum({scaled.format(x="s")}), sum({scaled.format(x="f")})
        FROM (SELECT person_id,
                     sum(CASE WHEN minutes > 60 THEN 60 WHEN minutes < -10 THEN -10 ELSE minutes END) AS s,
                     {fee_partial} AS f
              FROM clinic.visits WHERE person_id IS NOT NULL GROUP BY person_id) t""")
    assert got == want


def test_average_skips_nulls_end_to_end(engine, dsn) -> None:
    # Epsilon 1e6 over 2 measures: sum scale 240 * 2 / 1e6, so the noise is 0 but for odds of
    # about exp(-2000). What is left is the rewrite's arithmetic.
    answer = engine.answer("tester", "SELECT AVG(weight), COUNT(weight) FROM people",
                           epsilon=Decimal(1000000))
    ((average, count),) = answer.rows
    with psycopg.connect(dsn) as conn:
        truth, rows = conn.execute("SELECT avg(CASE WHEN weight > 120 THEN 120 WHEN weight < -5 "
                                   "THEN -5 ELSE weight END), count(weight) FROM clinic.people").fetchone()
    assert count == rows
    # Rounding the total to steps of 0.5 moves the average by at most 0.25 / count.
    assert abs(Decimal(repr(average)) - truth) <= Decimal("0.25") / rows + Decimal("1e-6")


# ---------------------------------------------------------------------------------------------
# Finding: an epsilon such as 1e-999999999 was accepted.
#
# parse_epsilon took any finite positive Decimal up to the largest allowed. The engine turns
# epsilon into an exact Fraction to compute noise scales, and the 95% bound works in decimals
# as wide as the scale: 1e-3000 cost seconds of CPU per EXPLAIN (which charges nothing, so it
# could be repeated freely), 1e-10000 failed with a Python ValueError instead of a refusal, and
# 1e-999999999 would build a number of a billion digits (and SET hushql.epsilon formats it in
# full). Epsilons now have at most 12 digits after the decimal point.

@pytest.mark.parametrize("text", ["1e-999999999", "1e-20000", "1e-13", "0." + "0" * 5000 + "1",
                                  "0.1000000000001", "-0", "-0.0", "0e5", "sNaN", "-Infinity",
                                  "Infinity", "0x1", "", " ", "1/10"])
def test_epsilons_outside_the_accepted_form_are_refused(text) -> None:
    with pytest.raises(HushError) as refused:
        parse_epsilon(text, Decimal(100))
    assert refused.value.sqlstate == "22023"
    assert len(refused.value.message) < 200  # never the digits of a huge number spelled out


@pytest.mark.parametrize("text, value", [("0.1 ", "0.1"), ("\t1e-3\n", "0.001"), ("1E+0", "1"),
                                         ("0.000000000001", "1e-12"), ("0.25000000000000000", "0.25"),
                                         ("100", "100")])
def test_epsilons_in_plain_or_exponent_notation_are_accepted(text, value) -> None:
    assert parse_epsilon(text, Decimal(100)) == Decimal(value)


def test_a_tiny_epsilon_is_refused_by_explain_and_answer_without_a_charge(engine) -> None:
    for epsilon in ("1e-10000", Decimal("1e-3000")):
        with pytest.raises(HushError) as refused:
            engine.explain("tester", "SELECT COUNT(*) FROM people", epsilon=epsilon)
        assert refused.value.sqlstate == "22023"
        with pytest.raises(HushError):
            engine.answer("tester", "SELECT COUNT(*) FROM people", epsilon=epsilon)
    assert engine.remaining("tester") == BUDGET


# ---------------------------------------------------------------------------------------------
# Finding: rows with a NULL individual broke the per-individual choice of cells.
#
# The rewrite grouped them as one individual and ranked its cells by md5(individual || cell ||
# salt). md5 of NULL is NULL, so all its cells tied and ROW_NUMBER kept whichever g the executor
# met first, an order that depends on every other individual's rows. Removing one ordinary
# individual then also changed which cells the NULL group kept: COUNT(DISTINCT) moved by 4
# where the claimed sensitivity is 2. (And NULL-id rows may belong to many people, so no cap
# could hold for them anyway.) Rows whose individual is NULL are now not counted.

def test_one_individual_moves_a_two_key_answer_at_most_its_sensitivity(dsn, policies) -> None:
    """Removing one individual (or every row with a NULL individual) moves each measure of a
    two-key grouped query, hidden measures of HAVING and ORDER BY included, by no more than the
    claimed sensitivity. (Under the earlier per-cell caps, removing person 8 moved
    COUNT(DISTINCT) by 4 > 2.)"""
    sql = ("SELECT date_trunc('quarter', visited) AS q, ward, COUNT(DISTINCT person_id), "
           "SUM(minutes) FROM visits WHERE fee IS NOT NULL OR minutes IS NULL GROUP BY 1, 2 "
           "HAVING AVG(fee) > 1 ORDER BY COUNT(*) DESC")
    plan = analyse(sql, policies, "tester")
    rewritten = rewrite(plan)
    # Bounds on rows and minutes (declared); AVG(fee) is centred, under the rows bound.
    assert len(plan.measures) == 5 and len(rewritten.bounds) == 2
    keys = len(plan.keys)
    small = tuple(b.candidates[len(b.candidates) // 2] if b.candidates else b.ceiling
                  for b in rewritten.bounds)

    def measures(conn: psycopg.Connection) -> list[list[int]]:
        rows = run_with_bounds(conn, rewritten, small)
        return [list(map(int, column)) for column in list(zip(*rows))[keys:keys + len(plan.measures)]]

    with psycopg.connect(dsn) as conn:
        full = measures(conn)
        largest = [0] * len(plan.measures)
        for who in ("person_id IS NULL", "person_id = 8", "person_id = 35", "person_id = 10",
                    "person_id = 11"):
            with conn.transaction(force_rollback=True):
                conn.execute(f"DELETE FROM clinic.visits WHERE {who}")
                without = measures(conn)
            for n, (a, b) in enumerate(zip(full, without)):
                move = sum(abs(x - y) for x, y in zip(a, b))
                assert move <= rewritten.sensitivities(small)[n], (who, plan.measures[n], move)
                largest[n] = max(largest[n], move)
    assert all(m > 0 for m in largest), largest  # the check can fail: every measure does move


def test_rows_without_an_individual_are_not_counted(dsn, policies) -> None:
    got = noise_free(dsn, policies, "SELECT COUNT(*), COUNT(DISTINCT person_id) FROM visits")
    want = reference(dsn, "SELECT sum(least(n, 3)), count(*) FROM (SELECT count(*) AS n "
                          "FROM clinic.visits WHERE person_id IS NOT NULL GROUP BY person_id) t")
    with psycopg.connect(dsn) as conn:
        assert conn.execute("SELECT count(*) FROM clinic.visits WHERE person_id IS NULL").fetchone()[0] > 0
    assert got == want


# ---------------------------------------------------------------------------------------------
# Finding: a sum over a column declared as [0, 0] failed after its charge.
#
# Its sensitivity came out as 0, the noise scale as 0, and the sampler refused a zero scale with
# a Python ValueError, after the ledger had charged: the analyst paid for an internal error.
# Sensitivities are now at least 1 (an upper bound, so still sound).

def test_a_sum_that_cannot_move_is_answered(engine) -> None:
    answer = engine.answer("tester", "SELECT SUM(age), AVG(age) FROM people_zero", epsilon=Decimal(1))
    ((total, average),) = answer.rows
    assert isinstance(total, int) and (average is None or average == 0)
    assert answer.accuracy[0].sensitivity == 1
    explained = dict(engine.explain("tester", "SELECT SUM(age) FROM people_zero").rows)
    assert explained["measure sum(age)"].startswith("sensitivity 1,")


# ---------------------------------------------------------------------------------------------
# Attacks that hold.

def test_having_order_by_and_limit_never_reach_the_backend(policies) -> None:
    plain = rewrite(analyse("SELECT ward, COUNT(*) FROM people GROUP BY ward", policies, "tester"))
    post = rewrite(analyse("SELECT ward, COUNT(*) FROM people GROUP BY ward HAVING COUNT(*) > 12345 "
                           "AND ward <> 'east' ORDER BY 2 DESC, ward LIMIT 1 OFFSET 1",
                           policies, "tester"))
    assert post.sql == plain.sql  # the backend sees nothing of the post-processing


def test_explain_reads_no_data(engine, monkeypatch) -> None:
    def no_data(*args, **kwargs):
        raise AssertionError("EXPLAIN ran a query on the backend")

    monkeypatch.setattr(engine.backend, "run", no_data)
    explained = dict(engine.explain("tester", "SELECT ward, AVG(weight) FROM people GROUP BY ward "
                                              "HAVING COUNT(*) > 3 LIMIT 1").rows)
    assert explained["cells"] == "3" and "LIMIT" not in explained["backend sql"]
    assert engine.remaining("tester") == BUDGET


def test_hidden_measures_share_the_epsilon(engine) -> None:
    # HAVING and ORDER BY add SUM(age), SUM(weight) and COUNT(weight): four measures in all.
    answer = engine.answer("tester", "SELECT ward, COUNT(*) FROM people GROUP BY ward "
                                     "HAVING SUM(age) > -1000000 ORDER BY AVG(weight)",
                           epsilon=Decimal("0.8"))
    (count,) = answer.accuracy
    assert count.epsilon == Decimal("0.2") and count.scale == Fraction(1) * 4 / Fraction("0.8")


def test_the_plan_cache_never_skips_a_grant_check(engine) -> None:
    sql = "SELECT COUNT(*) FROM people"
    engine.explain("tester", sql)
    engine.answer("tester", sql, epsilon=Decimal("0.5"))
    for _ in range(2):  # the second time the text is certainly cached for tester
        with pytest.raises(HushError) as denied:
            engine.answer("outsider", sql)
        assert denied.value.sqlstate == "42501"
    with pytest.raises(HushError) as unknown:
        engine.answer("nobody", sql)
    assert unknown.value.sqlstate == "42501"
    assert engine.remaining("outsider") == Decimal("1.0")
    engine.answer("tester", sql, epsilon=Decimal("0.5"))  # and outsider's refusal poisons nothing


@pytest.mark.parametrize("sql", [
    "SELECT COUNT(*) FROM people WHERE age > $1",
    "SELECT COUNT(*) FROM people WHERE ward LIKE $1",
    "SELECT COUNT(*) FROM people HAVING COUNT(*) > $1",
    "SELECT COUNT(*) FROM people LIMIT $1",
    "SELECT ward, COUNT(*) FROM people GROUP BY $1",
    "SELECT COUNT(*) FROM people ORDER BY $1",
    "SELECT SUM($1) FROM people",
    "SELECT COUNT(*) FROM people WHERE age IN ($1, 2)",
    "SELECT COUNT(*) FROM people WHERE age > ?",
])
def test_parsed_trees_with_unbound_parameters_are_refused_free(engine, sql) -> None:
    tree = sqlglot.parse_one(sql, read="postgres")
    with pytest.raises(HushError) as refused:
        engine.answer("tester", tree)
    assert refused.value.sqlstate in ("0A000", "42601", "42P10")
    assert engine.remaining("tester") == BUDGET


def test_backend_errors_carry_no_row_values_and_stay_charged(engine) -> None:
    # weight is text in clinic.people_text: comparing two numbers casts both to NUMERIC, the
    # cast fails on one row, and PostgreSQL's message would quote that row's value. The analyst sees none of it, and pays.
    with pytest.raises(HushError) as failed:
        engine.answer("tester", "SELECT COUNT(*) FROM people_text WHERE weight = age",
                      epsilon=Decimal("0.5"))
    error = failed.value
    assert error.sqlstate == "XX000"
    for text in (error.message, error.hint or "", str(error)):
        assert SECRET not in text and "invalid input syntax" not in text
    assert engine.remaining("tester") == BUDGET - Decimal("0.5")


def test_rows_returned_do_not_depend_on_the_data(engine) -> None:
    # Every declared cell comes back, from an empty selection as from a full one; HAVING,
    # OFFSET and LIMIT then act on noisy values only. (A WHERE on the key's own column narrows
    # the cells, by the query text alone: tests/test_buckets.py.)
    empty = engine.answer("tester", "SELECT age, COUNT(*) FROM people WHERE weight > 1000 GROUP BY age",
                          epsilon=Decimal(1))
    full = engine.answer("tester", "SELECT age, COUNT(*) FROM people GROUP BY age", epsilon=Decimal(1))
    assert [row[0] for row in empty.rows] == [row[0] for row in full.rows] == list(range(1, 101))
    assert all(acc.sensitivity == 1 for acc in empty.accuracy + full.accuracy)


# Accepted WHERE conditions on backend types tests/test_analyse.py does not use: real and double
# precision numbers (overflow on conversion), smallint (2-byte integers), varchar and char(n).
FLOAT_EDGE_ROWS = r"""
    (NULL, NULL, NULL, NULL, NULL, NULL, NULL),
    ('NaN', -32768, 'NaN', '', '', '-infinity', false),
    ('Infinity', 32767, 'Infinity', 'a\', '%_\\', 'infinity', true),
    ('-Infinity', 0, '-Infinity', 'Old Mill', 'x', '4713-01-01 BC', true),
    ({big}, 5, 1.7e308, 'ÄßİI', repeat('y', 200), '5874897-12-31', false),
    (-{big}, 1, -1.7e308, 'Northbank', 'social', '2024-03-01', NULL),
    ({tiny}, 7, 5e-324, 'x', 'standard', '2024-06-30', true)"""


@pytest.mark.parametrize("area, big, tiny", [("real", "3.4e38", "1e-45"),
                                             ("numeric", "9e130000", "1e-16000")])
def test_safe_conditions_never_raise_on_float_and_small_types(fresh_dsn, area, big, tiny) -> None:
    from tests.test_analyse import _accepted_where, conditions

    with psycopg.connect(fresh_dsn, autocommit=True) as conn:
        conn.execute(f"CREATE TABLE households (area {area}, occupants int2, household_id float8, "
                     "district varchar(300), tariff char(300), connected_on date, has_garden boolean)")
        conn.execute("INSERT INTO households VALUES " + FLOAT_EDGE_ROWS.format(big=big, tiny=tiny))

        def check(condition: str) -> None:
            where = _accepted_where(condition)
            if where is not None:
                conn.execute("SELECT count(*) FROM households WHERE "
                             + where.sql(dialect="postgres")).fetchall()

        # Each mixes types PostgreSQL would otherwise resolve to double precision or smallint.
        for worst in ["coalesce(area, household_id) > 1", "coalesce(household_id, area) IS NULL",
                      "area BETWEEN 1 AND household_id", "household_id > 1e29",
                      "household_id * 1e29 * 1e29 > 1", "-occupants < 0",
                      "occupants * occupants * occupants > 1", "occupants IN (1, 2147483647)",
                      "coalesce(occupants, household_id) = 1", "area IN (1e29, 2, NULL)"]:
            check(worst)
        settings(max_examples=150, deadline=None, database=None)(given(conditions)(check))()
