"""Policy files: the demo policies load, and every check reports its exact ``file: key: problem``.

Each case starts from a copy of the demo's policies/ and breaks one thing, so a case fails if the
check is missing, words its problem differently, or names the wrong file or key.
"""

from __future__ import annotations

import io
import shutil
import tomllib
from decimal import Decimal
from pathlib import Path

import pytest
import scramp
from rich.console import Console

from proxy.demo import demo_accounts
from proxy.policy import PolicyError, load_policies, parse_scram_verifier
from proxy.policy_report import check_command

R = "tables/readings.toml"
H = "tables/households.toml"
A = "access.toml"
DEMO_POLICIES = Path(__file__).resolve().parent.parent / "policies"
PLAINTEXT_HINT = ("paste the verifier from `hushql hash-password`, never a plaintext password")
NOT_A_VERIFIER = ("not a SCRAM-SHA-256 verifier "
                  "(SCRAM-SHA-256$<iterations>:<salt>$<StoredKey>:<ServerKey>)")


@pytest.fixture
def policies(tmp_path: Path) -> Path:
    """A private copy of the demo policies to break."""
    target = tmp_path / "policies"
    shutil.copytree(DEMO_POLICIES, target)
    return target


def edit(root: Path, file: str, old: str, new: str) -> None:
    """Replace ``old`` (which must occur exactly once) by ``new`` in ``root/file``."""
    path = root / file
    text = path.read_text()
    assert text.count(old) == 1, f"{old!r} occurs {text.count(old)} times in {file}"
    path.write_text(text.replace(old, new))


def set_password(root: Path, section: str, value: str) -> None:
    """Replace the password of the account under ``section`` in access.toml."""
    text = (root / A).read_text()
    start = text.index('password = "', text.index(section)) + len('password = "')
    end = text.index('"', start)
    (root / A).write_text(text[:start] + value + text[end:])


def problems(root: Path) -> list[str]:
    with pytest.raises(PolicyError) as caught:
        load_policies(root)
    assert str(caught.value) == "\n".join(caught.value.problems)
    return caught.value.problems


# --- the demo policies ---------------------------------------------------------------------------

def test_demo_policies_load_cleanly() -> None:
    loaded = load_policies(DEMO_POLICIES)
    assert sorted(loaded.tables) == ["households", "readings", "tariffs"]
    assert loaded.defaults.epsilon_per_query == Decimal("0.1")
    assert loaded.defaults.largest_epsilon_per_query == Decimal("1.0")
    assert loaded.defaults.most_cells == 10000
    assert {n: (a.budget, sorted(a.tables)) for n, a in loaded.analysts.items()} == {
        "planner": (Decimal("3.0"), ["households", "readings", "tariffs"]),
        "researcher": (Decimal("1.0"), ["households"]),
    }
    assert list(loaded.admins) == ["auditor"]
    readings = loaded.tables["readings"]
    assert readings.source == "utility.meter_readings"
    assert (readings.individual.column, readings.individual.population,
            readings.individual.most_rows, readings.individual.bounds) == (
        "household_id", "households", 366, "chosen")
    assert readings.budget.cap == Decimal("20.0")
    litres = readings.columns["litres"]
    assert (litres.kind, litres.low, litres.high) == ("number", 0, 2000)
    assert litres.step == Decimal("0.1")
    assert readings.columns["reading_date"].bucket is None  # a date groups by day, as written
    households = loaded.tables["households"]
    assert households.source == "utility.households"
    assert (households.individual.most_rows, households.population) == (1, "households")
    assert readings.population == households.population
    assert set(households.columns) == {"household_id", "district", "occupants", "tariff",
                                       "has_garden"}


def test_demo_verifiers_match_the_documented_demo_passwords() -> None:
    """Each demo account's verifier is the SCRAM-SHA-256 of its password in proxy/demo.py."""
    loaded = load_policies(DEMO_POLICIES)
    accounts = {**loaded.analysts, **loaded.admins}
    assert sorted(accounts) == sorted(name for name, _ in demo_accounts())
    mechanism = scramp.ScramMechanism("SCRAM-SHA-256")
    for name, password in demo_accounts():
        iterations, salt, stored_key, server_key = parse_scram_verifier(accounts[name].password)
        assert iterations == 4096
        _, stored, server, _ = mechanism.make_auth_info(password, iteration_count=iterations,
                                                        salt=salt)
        assert (stored, server) == (stored_key, server_key), name
        wrong = mechanism.make_auth_info(password + "x", iteration_count=iterations, salt=salt)
        assert wrong[1] != stored_key


# --- one broken thing, one exact line --------------------------------------------------------

CASES = [
    pytest.param(R, 'description = "Daily', 'colour = "blue"\ndescription = "Daily',
                 f"{R}: colour: unknown key", id="unknown-top-level-key"),
    pytest.param(R, "step = 0.1", "step = 0.1\nunit = \"l\"",
                 f"{R}: columns.litres.unit: unknown key", id="unknown-column-key"),
    pytest.param(R, "most_rows = 366", "most_rows = 366\nper_day = 1",
                 f"{R}: individual.per_day: unknown key", id="unknown-individual-key"),
    pytest.param(A, "most_cells = 10000", "most_rows = 10000",
                 f"{A}: defaults.most_rows: unknown key", id="unknown-defaults-key"),
    pytest.param(R, "range = [0, 2000]", "range = [50, 10]",
                 f"{R}: columns.litres.range: lower bound 50 is above upper bound 10",
                 id="number-range-not-ordered"),
    pytest.param(H, "range = [1, 8]", "range = [8, 1]",
                 f"{H}: columns.occupants.range: lower bound 8 is above upper bound 1",
                 id="integer-range-not-ordered"),
    pytest.param(R, 'range = ["2026-01-01", "2026-12-31"]',
                 'range = ["2026-01-01", "2026-12-31"]\nbucket = "month"',
                 f"{R}: columns.reading_date.bucket: no longer used: GROUP BY on a date column now "
                 "groups by day, as written; delete this key, and write date_trunc('month', "
                 "<column>) in queries for coarser cells", id="retired-date-bucket"),
    pytest.param(R, 'range = ["2026-01-01", "2026-12-31"]', 'range = ["2026-12-31", "2026-01-01"]',
                 f"{R}: columns.reading_date.range: lower bound 2026-12-31 is above upper bound "
                 "2026-01-01", id="date-range-not-ordered"),
    pytest.param(R, 'range = ["2026-01-01", "2026-12-31"]', 'range = ["2026-01-01", "2026-02-30"]',
                 f"{R}: columns.reading_date.range: bounds of a date column must be dates "
                 "(YYYY-MM-DD)", id="date-range-not-a-date"),
    pytest.param(H, "range = [1, 8]", "range = [1, 8.5]",
                 f"{H}: columns.occupants.range: bounds of an integer column must be integers",
                 id="integer-range-not-integers"),
    pytest.param(H, "range = [1, 8]", "range = [1, 4, 8]",
                 f"{H}: columns.occupants.range: must have exactly two values, [low, high]",
                 id="range-of-three"),
    pytest.param(R, "step = 0.1", "step = 0.3",
                 f"{R}: columns.litres.step: step 0.3 does not divide the range [0, 2000]; "
                 "both bounds must be multiples of it", id="step-not-dividing-range"),
    pytest.param(R, "range = [0, 2000]", "range = [0, 1e40]", None,
                 id="huge-range-still-exact"),
    pytest.param(R, "step = 0.1", "step = 0",
                 f"{R}: columns.litres.step: must be positive", id="step-zero"),
    pytest.param(R, "step = 0.1", "",
                 f"{R}: columns.litres.step: a number column needs a step (values are rounded "
                 "to it)", id="step-missing"),
    pytest.param(H, 'range = [1, 8]                      # larger',
                 'range = [1, 8]\nstep = 1 # larger',
                 f"{H}: columns.occupants.step: not used by an integer column",
                 id="step-on-integer-column"),
    pytest.param(H, 'values = ["standard", "saver", "social"]', "values = []",
                 f"{H}: columns.tariff.values: a category column needs a non-empty list of values",
                 id="empty-category-domain"),
    pytest.param(H, 'values = ["Northbank", "Old Mill", "Harbourside"]',
                 'values = ["Northbank", "Old Mill", "Harbourside", "Old Mill"]',
                 f"{H}: columns.district.values: duplicate values: 'Old Mill'",
                 id="duplicate-category-values"),
    pytest.param(R, 'column = "household_id"', 'column = "meter_id"',
                 f"{R}: individual.column: 'meter_id' is not a listed column; list it under "
                 "[columns]", id="individual-column-not-listed"),
    pytest.param(R, "most_rows = 366", "most_rows = 0",
                 f"{R}: individual.most_rows: must be a positive integer", id="most-rows-zero"),
    pytest.param(R, 'population = "households"', 'population = "Households!"',
                 f"{R}: individual.population: must be a lower-case name (letters, digits, _)",
                 id="population-not-a-name"),
    pytest.param(R, 'bounds = "chosen"', 'bounds = "guessed"',
                 f"{R}: individual.bounds: Input should be 'chosen' or 'declared'",
                 id="bounds-unknown"),
    # Keys of the earlier per-cell layout are explained, naming what replaced them.
    pytest.param(R, "most_rows = 366", "most_rows = 366\ngroups_cap = 4",
                 f"{R}: individual.groups_cap: no longer used: an individual's contribution is "
                 "bounded over the whole answer; set most_rows (the most rows one individual can "
                 "own) and population instead", id="old-groups-cap"),
    pytest.param(R, "most_rows = 366", "most_rows = 366\nrows_cap = 31",
                 f"{R}: individual.rows_cap: no longer used: set most_rows (the most rows one "
                 "individual can own, e.g. 366 for one row a day) and population instead",
                 id="old-rows-cap"),
    pytest.param(A, 'tables = ["households"]', 'tables = ["households", "pipes"]',
                 f"{A}: analysts.researcher.tables: 'pipes' has no policy file in tables/",
                 id="granted-table-without-policy"),
    pytest.param(A, "budget = 3.0", "budget = 0.0",
                 f"{A}: analysts.planner.budget: must be positive", id="analyst-budget-zero"),
    pytest.param(A, "budget = 1.0", "budget = -1",
                 f"{A}: analysts.researcher.budget: must be positive",
                 id="analyst-budget-negative"),
    pytest.param(R, "cap = 20.0", "cap = -5.0",
                 f"{R}: budget.cap: must be positive", id="table-budget-negative"),
    pytest.param(A, "epsilon_per_query = 0.1", "epsilon_per_query = 0",
                 f"{A}: defaults.epsilon_per_query: must be positive", id="default-epsilon-zero"),
    pytest.param(A, "epsilon_per_query = 0.1", "epsilon_per_query = 2.5",
                 f"{A}: defaults.epsilon_per_query: 2.5 is above largest_epsilon_per_query 1.0",
                 id="default-epsilon-above-largest"),
    pytest.param(A, "most_cells = 10000", "most_cells = 0",
                 f"{A}: defaults.most_cells: must be a positive integer", id="most-cells-zero"),
    pytest.param(R, 'source = "utility.meter_readings"',
                 'source = "utility.meter_readings; DROP TABLE x"',
                 f"{R}: source: must name a relation in the backend database as relation or "
                 "schema.relation (letters, digits, _)", id="source-not-a-relation-name"),
    pytest.param(R, 'table = "readings"', 'table = "Readings"',
                 [f"{R}: table: must be a lower-case SQL identifier (letters, digits, _)",
                  f"{A}: analysts.planner.tables: 'readings' has no policy file in tables/"],
                 id="table-name-not-lower-case"),
    pytest.param(R, 'source = "utility.meter_readings"\n', "",
                 f"{R}: source: required key is missing", id="required-key-missing"),
    pytest.param(A, "[admins.auditor]", "[admins.planner]",
                 f"{A}: admins.planner: the same name is also an analyst; use separate accounts",
                 id="admin-also-analyst"),
]


@pytest.mark.parametrize(("file", "old", "new", "expected"), CASES)
def test_each_check_reports_its_exact_line(policies: Path, file: str, old: str, new: str,
                                           expected: str | list[str] | None) -> None:
    edit(policies, file, old, new)
    if expected is None:
        load_policies(policies)  # no problem, and no crash on exact arithmetic
    else:
        assert problems(policies) == ([expected] if isinstance(expected, str) else expected)


@pytest.mark.parametrize(("password", "reason"), [
    ("planner-demo", NOT_A_VERIFIER),
    ("SCRAM-SHA-256$planner-demo", NOT_A_VERIFIER),
    ("md5a3556571e93b0d20722ba62be61e8c2d", NOT_A_VERIFIER),
    ("SCRAM-SHA-256$4096:c2FsdA==$not*base64:AAAA", NOT_A_VERIFIER),
    ("SCRAM-SHA-256$4096:====$" + "A" * 43 + "=:" + "A" * 43 + "=",
     "the verifier's salt or keys are not valid base64"),
    ("SCRAM-SHA-256$4096:c2FsdA=$" + "A" * 43 + "=:" + "A" * 43 + "=",
     "the verifier's salt or keys are not valid base64"),
    ("SCRAM-SHA-256$1000:c2FsdA==$" + "A" * 43 + "=:" + "A" * 43 + "=",
     "the verifier's iteration count 1000 is below 4096"),
])
def test_a_password_that_is_not_a_verifier_is_refused(policies: Path, password: str,
                                                      reason: str) -> None:
    set_password(policies, "[admins.auditor]", password)
    line = problems(policies)[0]
    assert line == f"{A}: admins.auditor.password: {reason}; {PLAINTEXT_HINT}"
    assert password not in line


def test_the_password_text_is_never_echoed(policies: Path) -> None:
    set_password(policies, "[analysts.planner]", "correct horse battery")
    found = problems(policies)
    assert found == [f"{A}: analysts.planner.password: {NOT_A_VERIFIER}; {PLAINTEXT_HINT}"]
    assert "horse" not in "\n".join(found)


def test_missing_access_file(policies: Path) -> None:
    (policies / A).unlink()
    assert problems(policies) == [f"{A}: (file): missing; the administrator's file is required"]


def test_missing_directory(tmp_path: Path) -> None:
    missing = tmp_path / "nowhere"
    assert problems(missing) == [f"{missing}: (directory): not found; expected access.toml and "
                                 "tables/"]


def test_toml_syntax_error(policies: Path) -> None:
    broken = (policies / R).read_text().replace("most_rows = 366", "most_rows = ")
    (policies / R).write_text(broken)
    with pytest.raises(tomllib.TOMLDecodeError) as reference:
        tomllib.loads(broken)
    found = problems(policies)
    # The grant of readings is not reported again: the broken file still declares it.
    assert found == [f"{R}: (syntax): {reference.value}"]
    assert "line 13" in found[0]  # the most_rows line


def test_shape_errors_name_the_key(policies: Path) -> None:
    """Wrong types, including ones a lax reader would coerce (true as 1, 4.0 as 4)."""
    edit(policies, R, "most_rows = 366", "most_rows = true")
    edit(policies, R, 'kind = "number"', 'kind = "float"')
    edit(policies, A, "budget = 3.0", 'budget = "lots"')
    edit(policies, A, "epsilon_per_query = 0.1", "epsilon_per_query = nan")
    found = problems(policies)
    keys = [line.split(": ")[:2] for line in found]
    assert keys == [[R, "individual.most_rows"],
                    [R, "columns.litres.kind"],
                    [A, "defaults.epsilon_per_query"], [A, "analysts.planner.budget"]]


def test_a_table_declared_twice(policies: Path) -> None:
    shutil.copy(policies / R, policies / "tables/readings_copy.toml")
    assert problems(policies) == [
        "tables/readings_copy.toml: table: 'readings' is already declared by "
        "tables/readings.toml"]


def test_grant_of_a_table_with_problems_is_reported_once(policies: Path) -> None:
    edit(policies, R, "range = [0, 2000]", "range = [50, 10]")
    assert problems(policies) == [
        f"{R}: columns.litres.range: lower bound 50 is above upper bound 10"]


# --- hushql check ----------------------------------------------------------------------------

def capture(width: int = 200) -> tuple[Console, io.StringIO]:
    buffer = io.StringIO()
    return Console(file=buffer, width=width, color_system=None), buffer


def test_check_command_reports_every_seeded_error(policies: Path) -> None:
    """A broken copy of the demo policies with several errors: each one on its own line."""
    edit(policies, R, "range = [0, 2000]", "range = [50, 10]")
    edit(policies, R, 'column = "household_id"', 'column = "meter_id"')
    edit(policies, R, "cap = 20.0", "cap = 0")
    edit(policies, H, 'values = ["standard", "saver", "social"]',
         'values = ["standard", "saver", "standard"]')
    edit(policies, H, "[columns.has_garden]", "[columns.has_garden]\nshade = true")
    edit(policies, A, 'tables = ["households"]', 'tables = ["households", "pipes"]')
    edit(policies, A, "budget = 3.0", "budget = -3.0")
    (policies / "tables/pipes_draft.toml").write_text('table = "mains"\nsource = "utility.mains"\n'
                                                      "[columns.diameter\n")
    console, buffer = capture(width=60)  # narrower than the lines: they must not wrap
    assert check_command(policies, console) == 1
    lines = buffer.getvalue().splitlines()
    expected = {
        f"{R}: columns.litres.range: lower bound 50 is above upper bound 10",
        f"{R}: individual.column: 'meter_id' is not a listed column; list it under [columns]",
        f"{R}: budget.cap: must be positive",
        f"{H}: columns.tariff.values: duplicate values: 'standard'",
        f"{H}: columns.has_garden.shade: unknown key",
        f"{A}: analysts.planner.budget: must be positive",
        f"{A}: analysts.researcher.tables: 'pipes' has no policy file in tables/",
    }
    syntax = [line for line in lines if line.startswith("tables/pipes_draft.toml: (syntax): ")]
    assert len(syntax) == 1
    assert set(lines) - set(syntax) == expected
    assert len(lines) == len(expected) + 1


def test_check_command_errors_go_to_stderr(policies: Path, capsys: pytest.CaptureFixture) -> None:
    edit(policies, A, "budget = 3.0", "budget = 0")
    assert check_command(policies) == 1
    captured = capsys.readouterr()
    assert captured.out == ""
    assert captured.err.splitlines() == [f"{A}: analysts.planner.budget: must be positive"]


def test_check_command_summarises_the_demo_policies() -> None:
    console, buffer = capture()
    assert check_command(DEMO_POLICIES, console) == 0
    text = buffer.getvalue()
    for expected in ("utility.households", "utility.meter_readings", "one household_id",
                     "at most 366, bounds chosen", "households", "Northbank, Old Mill, Harbourside",
                     "2026-01-01 .. 2026-12-31", "365 cells", "0 .. 2000", "0.1",
                     "no (100,000 cells > most_cells)", "planner", "3.0",
                     "households, readings", "researcher", "1.0", "Administrators: auditor",
                     "nobody (public)", "key tariff", "none (free)",
                     "3 tables, 2 analysts, 1 administrator."):
        assert expected in text, expected


def test_a_malformed_key_is_reported_once_and_the_rest_still_checked(policies: Path) -> None:
    """A wrongly typed step is one problem (not also "needs a step"); other checks still run."""
    edit(policies, R, "step = 0.1", 'step = "fine"')
    edit(policies, R, "most_rows = 366", "most_rows = 0")
    found = problems(policies)
    assert [line.split(": ")[1] for line in found] == ["columns.litres.step",
                                                       "individual.most_rows"]
    assert found[1] == f"{R}: individual.most_rows: must be a positive integer"


# --- [connections] --------------------------------------------------------------------------------

def set_connections(root: Path, lines: str) -> None:
    """Replaces the demo's [connections] table (the last in access.toml) by ``lines``."""
    text = (root / A).read_text()
    text = text[:text.index("[connections]")] if "[connections]" in text else text
    (root / A).write_text(text + f"\n[connections]\n{lines}\n")


def test_connection_limits_have_safe_defaults_and_can_be_set(policies: Path) -> None:
    defaults = load_policies(policies).access.connections
    assert defaults.login_timeout_seconds == 10 and defaults.admin_sessions_kept >= 1
    set_connections(policies, "most_sessions = 20\nadmin_sessions_kept = 2\n"
                              "login_timeout_seconds = 2.5")
    limits = load_policies(policies).access.connections
    assert (limits.most_sessions, limits.admin_sessions_kept) == (20, 2)
    assert limits.login_timeout_seconds == Decimal("2.5")


@pytest.mark.parametrize(("lines", "expected"), [
    ("most_sessions = 0", [f"{A}: connections.most_sessions: must be a positive integer"]),
    ("most_sessions = 4\nadmin_sessions_kept = 4",
     [f"{A}: connections.admin_sessions_kept: 4 leaves no session for analysts out of "
      "most_sessions 4"]),
    ("most_logins_in_progress = 8\nmost_logins_in_progress_per_address = 9",
     [f"{A}: connections.most_logins_in_progress_per_address: is above "
      "most_logins_in_progress 8"]),
    ("login_timeout_seconds = 0", [f"{A}: connections.login_timeout_seconds: must be above 0 "
                                   "and at most 600"]),
    ("seconds_per_refusal = 7200", [f"{A}: connections.seconds_per_refusal: must be above 0 "
                                    "and at most 3600"]),
    ("seconds_per_refusal = nan", [f"{A}: connections.seconds_per_refusal: "
                                   "Input should be a finite number"]),
    ("failed_logins_allowed = 2.0", [f"{A}: connections.failed_logins_allowed: "
                                     "Input should be a valid integer"]),
    ("most_connections = 5", [f"{A}: connections.most_connections: unknown key"]),
])
def test_connection_limit_problems_name_their_key(policies: Path, lines: str,
                                                  expected: list[str]) -> None:
    set_connections(policies, lines)
    assert problems(policies) == expected


def test_public_table_keys_are_checked(tmp_path) -> None:
    """public and key: a public table protects nobody and names a listed join key."""
    folder = tmp_path / "p"
    shutil.copytree(DEMO_POLICIES, folder)
    tariffs = folder / "tables" / "tariffs.toml"
    text = tariffs.read_text()
    tariffs.write_text(text.replace('key = "tariff"', 'key = "price"') +
                       "\n[budget]\ncap = 1.0\n")
    (folder / "tables" / "households.toml").write_text(
        (folder / "tables" / "households.toml").read_text().replace(
            'table = "households"', 'table = "households"\nkey = "district"'))
    with pytest.raises(PolicyError) as caught:
        load_policies(folder)
    problems = "\n".join(caught.value.problems)
    assert "tariffs.toml: key: 'price' is not a listed column" in problems
    assert "tariffs.toml: budget: a public table protects nobody" in problems
    assert "households.toml: key: only a public table (public = true) declares a join key" in problems
