"""Policy files: what analysts may see, and how each table is protected.

Rules of this module:
- ``access.toml`` (administrator) and ``tables/<name>.toml`` (one per table, its data owner) are
  read with tomllib, floats parsed as exact ``Decimal`` so that epsilon and ranges are never
  rounded.
- pydantic checks the shape (known keys only, types); ``_table_problems`` and
  ``_access_problems`` then check the meaning (ordered ranges, steps that divide them, domains
  that are not empty, caps that are positive, grants that name existing tables).
- Every problem is reported as ``file: key: problem`` and all problems of a directory are
  reported together, so an owner fixes them in one pass.
- Nothing here touches a database.
"""

from __future__ import annotations

import base64
import binascii
import copy
import datetime as dt
import re
import tomllib
from dataclasses import dataclass
from decimal import Decimal
from fractions import Fraction
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field, Strict, ValidationError

from proxy.sql.limits import Limits

ColumnKind = Literal["category", "integer", "number", "date", "boolean"]
# Counts and caps are whole numbers written as TOML integers: `true` or `4.0` is refused, not
# silently read as 1 or 4.
WholeNumber = Annotated[int, Strict()]


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class Defaults(_Strict):
    epsilon_per_query: Decimal = Decimal("0.1")
    largest_epsilon_per_query: Decimal = Decimal("1.0")
    # So that a budget buys a bounded number of queries: budget / smallest at most.
    smallest_epsilon_per_query: Decimal = Decimal("0.001")
    most_cells: WholeNumber = 10_000


class AnalystPolicy(_Strict):
    password: str
    budget: Decimal
    tables: list[str] = Field(default_factory=list)
    # A disabled account cannot log in or be charged; its budget and history stay in the ledger.
    disabled: bool = False
    # The remaining budget is topped up to ``budget`` at the start of each such period (UTC).
    renew_every: Literal["day", "week", "month", "quarter", "year"] | None = None


class AdminPolicy(_Strict):
    password: str
    disabled: bool = False


class Connections(_Strict):
    """What the wire front lets clients hold and try (``[connections]`` in access.toml).

    Logged-in sessions are counted against ``most_sessions``, of which ``admin_sessions_kept``
    only administrators may take. Connections still logging in are counted apart (in total and
    per client address) and must finish within ``login_timeout_seconds``. Failed logins and
    refused statements cost tokens from buckets that refill over time (see
    proxy/wire/guard.py).
    """

    most_sessions: WholeNumber = 200
    admin_sessions_kept: WholeNumber = 3
    most_logins_in_progress: WholeNumber = 256
    most_logins_in_progress_per_address: WholeNumber = 32
    login_timeout_seconds: Decimal = Decimal(10)
    failed_logins_allowed: WholeNumber = 10  # per address and per account, before waiting
    seconds_per_failed_login: Decimal = Decimal(3)  # one more failure allowed after each
    refusals_allowed: WholeNumber = 60  # refusal units per account, before waiting
    seconds_per_refusal: Decimal = Decimal("0.5")  # one unit back after each


class AccessPolicy(_Strict):
    defaults: Defaults = Field(default_factory=Defaults)
    connections: Connections = Field(default_factory=Connections)
    analysts: dict[str, AnalystPolicy] = Field(default_factory=dict)
    admins: dict[str, AdminPolicy] = Field(default_factory=dict)
    limits: Limits = Field(default_factory=Limits)


BoundsChoice = Literal["chosen", "declared"]


class Individual(_Strict):
    """Who one individual is: rows sharing ``column`` belong to one person or household.

    ``population`` names whom the table protects: tables naming the same population protect the
    same people, and their spending adds up against one cap. ``most_rows`` is the data owner's
    ceiling on the rows one individual owns (from knowledge of the data, never read from it).
    ``bounds``: "chosen" lets each query pick its contribution bounds below the ceiling by a
    private quantile (a share of its epsilon); "declared" always uses the ceiling.
    """

    column: str
    population: str
    most_rows: WholeNumber
    bounds: BoundsChoice = "chosen"


class TableBudget(_Strict):
    cap: Decimal


class Timing(_Strict):
    """[timing]: answers on this table are released no earlier than ``answer_after_ms`` after
    the query reaches the engine, and a query still running then ends with a fixed error at
    that same time, so an answer's timing carries nothing about the data."""

    answer_after_ms: WholeNumber


LONGEST_ANSWER_AFTER_MS = 600_000


class ColumnPolicy(_Strict):
    """One exposed column. Which keys apply depends on ``kind`` (checked after parsing)."""

    kind: ColumnKind
    values: list[str] | None = None
    range: list[Any] | None = None
    step: Decimal | None = None
    # No longer used (a date column groups by day; queries write date_trunc for coarser cells).
    # Still read, so that `hushql check` can say so with a hint rather than "unknown key".
    bucket: str | None = None
    description: str | None = None
    # What one unit of the column is, in words ("litres", "people"), for analysts to read.
    measured_in: str | None = None

    @property
    def low(self) -> Any:
        return self.range[0] if self.range else None

    @property
    def high(self) -> Any:
        return self.range[1] if self.range else None

    @property
    def unit(self) -> Decimal:
        """The quantum sums are counted in: ``step`` for numbers, 1 for integers."""
        return self.step if self.step is not None else Decimal(1)

    @property
    def has_domain(self) -> bool:
        """True when GROUP BY may use this column as is (a finite list of declared values; a
        date column has one value per day of its range)."""
        return self.kind in ("category", "integer", "boolean", "date")

    @property
    def summable(self) -> bool:
        return self.kind in ("integer", "number")


class TablePolicy(_Strict):
    table: str
    source: str
    description: str = ""
    individual: Individual | None = None
    budget: TableBudget | None = None
    timing: Timing | None = None
    # A public table (a list of tariffs, a calendar) holds nothing about anyone: its rows are
    # readable as they are, cost nothing, and it may be joined many-to-one on ``key``, a column
    # whose values are unique in it (the proxy also drops any key value that repeats).
    public: bool = False
    key: str | None = None
    columns: dict[str, ColumnPolicy]

    def column(self, name: str) -> ColumnPolicy | None:
        return self.columns.get(name)

    @property
    def population(self) -> str:
        """Whom the table protects: its ``[individual]`` population, else the table itself."""
        return self.individual.population if self.individual is not None else self.table

    @property
    def most_rows(self) -> int:
        """The most rows one individual owns: 1 for a table of one row per individual."""
        return self.individual.most_rows if self.individual is not None else 1


@dataclass(frozen=True)
class Policies:
    """Everything loaded from one policy directory."""

    access: AccessPolicy
    tables: dict[str, TablePolicy]
    directory: Path | None = None

    @property
    def defaults(self) -> Defaults:
        return self.access.defaults

    @property
    def analysts(self) -> dict[str, AnalystPolicy]:
        return self.access.analysts

    @property
    def admins(self) -> dict[str, AdminPolicy]:
        return self.access.admins

    @property
    def limits(self) -> Limits:
        return self.access.limits


class PolicyError(Exception):
    """One or more problems in a policy directory; ``problems`` holds ``file: key: problem`` lines."""

    def __init__(self, problems: list[str]) -> None:
        super().__init__("\n".join(problems))
        self.problems = problems


def load_policies(directory: str | Path) -> Policies:
    """Read and check ``directory/access.toml`` and ``directory/tables/*.toml``.

    Returns the policies, or raises PolicyError listing every problem found.
    """
    root = Path(directory)
    if not root.is_dir():
        raise PolicyError([f"{root}: (directory): not found; expected access.toml and tables/"])
    problems: list[str] = []
    tables: dict[str, TablePolicy] = {}
    table_files: dict[str, str] = {}
    # Names declared by any table file, even one with problems, so that a grant of that table
    # is not reported a second time as "no policy file".
    declared: set[str] = set()
    tables_dir = root / "tables"
    for path in sorted(tables_dir.glob("*.toml")) if tables_dir.is_dir() else []:
        label = f"tables/{path.name}"
        raw = _read_toml(path, label, problems)
        if raw is None:
            declared.add(path.stem)  # unreadable: assume it declares the table it is named for
            continue
        if isinstance(raw.get("table"), str):
            declared.add(raw["table"])
        policy, shape_keys = _validate(raw, label, TablePolicy, problems)
        if policy is None:
            continue
        found = [(key, problem) for key, problem in _table_problems(policy)
                 if not _overlaps(key, shape_keys)]
        problems += [f"{label}: {key}: {problem}" for key, problem in found]
        if policy.table in table_files:
            problems.append(f"{label}: table: {policy.table!r} is already declared by "
                            f"{table_files[policy.table]}")
            continue
        table_files[policy.table] = label
        if not found and not shape_keys:
            tables[policy.table] = policy
    access_path = root / "access.toml"
    access: AccessPolicy | None = None
    if not access_path.is_file():
        problems.append("access.toml: (file): missing; the administrator's file is required")
    else:
        raw = _read_toml(access_path, "access.toml", problems)
        if raw is not None:
            access, shape_keys = _validate(raw, "access.toml", AccessPolicy, problems)
            if access is not None:
                problems += [f"access.toml: {key}: {problem}"
                             for key, problem in _access_problems(access, declared)
                             if not _overlaps(key, shape_keys)]
    if problems or access is None:
        raise PolicyError(problems)
    return Policies(access=access, tables=tables, directory=root)


def _read_toml(path: Path, label: str, problems: list[str]) -> dict[str, Any] | None:
    """Read one TOML file (floats as exact Decimal); on failure append a problem, return None."""
    try:
        with path.open("rb") as handle:
            return tomllib.load(handle, parse_float=Decimal)
    except tomllib.TOMLDecodeError as error:
        problems.append(f"{label}: (syntax): {error}")
    except (OSError, UnicodeDecodeError) as error:
        reason = error.strerror if isinstance(error, OSError) else "not UTF-8 text"
        problems.append(f"{label}: (file): cannot read: {reason}")
    return None


# Keys of earlier policy layouts, with what replaced them.
_REPLACED_KEYS = {
    ("individual", "groups_cap"): "no longer used: an individual's contribution is bounded over "
                                  "the whole answer; set most_rows (the most rows one individual "
                                  "can own) and population instead",
    ("individual", "rows_cap"): "no longer used: set most_rows (the most rows one individual can "
                                "own, e.g. 366 for one row a day) and population instead",
}

_PYDANTIC_WORDING = {
    "extra_forbidden": "unknown key",
    "missing": "required key is missing",
}


def _validate(raw: dict[str, Any], label: str, model: type[_Strict],
              problems: list[str]) -> tuple[Any, set[str]]:
    """Check the shape of ``raw`` against ``model``; returns (model or None, keys in error).

    On failure appends ``file: key: problem`` lines, then tries again without the offending
    keys, so that the meaning checks still run on the rest of the file and an owner sees every
    problem in one pass. The model returned then is only for reporting: the file has problems.
    """
    try:
        return model.model_validate(raw), set()
    except ValidationError as error:
        keys: set[str] = set()
        pruned = copy.deepcopy(raw)
        for item in error.errors():
            key = ".".join(str(part) for part in item["loc"]) or "(top)"
            wording = _REPLACED_KEYS.get(tuple(item["loc"])) if item["type"] == "extra_forbidden" \
                else None
            problems.append(f"{label}: {key}: "
                            f"{wording or _PYDANTIC_WORDING.get(item['type'], item['msg'])}")
            keys.add(key)
            _prune(pruned, item["loc"])
    try:
        return model.model_validate(pruned), keys
    except ValidationError:
        return None, keys


def _prune(tree: dict[str, Any], loc: tuple[Any, ...]) -> None:
    """Delete the key at ``loc`` (or the list holding it) from nested dicts, if present."""
    node: Any = tree
    for depth, part in enumerate(loc):
        if not isinstance(node, dict) or part not in node:
            return
        if depth == len(loc) - 1 or not isinstance(node[part], dict):
            del node[part]
            return
        node = node[part]


def _overlaps(key: str, reported: set[str]) -> bool:
    """True when ``key`` is, contains or lies inside a key already reported as malformed."""
    return any(key == other or key.startswith(other + ".") or other.startswith(key + ".")
               for other in reported)


# A backend relation, optionally schema-qualified, in plain identifiers (no quoting needed).
_SOURCE = re.compile(r"[A-Za-z_][A-Za-z0-9_]*(\.[A-Za-z_][A-Za-z0-9_]*)?")

_KEYS_BY_KIND: dict[str, set[str]] = {
    "category": {"values"},
    "integer": {"range"},
    "number": {"range", "step"},
    "date": {"range"},
    "boolean": set(),
}


def _table_problems(policy: TablePolicy) -> list[tuple[str, str]]:
    """Meaning checks for one table policy; returns (key, problem) pairs."""
    found: list[tuple[str, str]] = []
    if not policy.table.isidentifier() or policy.table != policy.table.lower():
        found.append(("table", "must be a lower-case SQL identifier (letters, digits, _)"))
    if not _SOURCE.fullmatch(policy.source):
        found.append(("source", "must name a relation in the backend database as relation or "
                                "schema.relation (letters, digits, _)"))
    if not policy.columns:
        found.append(("columns", "no columns are listed; analysts would see nothing"))
    for name, column in policy.columns.items():
        found += [(f"columns.{name}.{key}", problem) for key, problem in _column_problems(column)]
        if not name.isidentifier() or name != name.lower():
            found.append((f"columns.{name}", "must be a lower-case SQL identifier"))
    if policy.individual is not None:
        ind = policy.individual
        if ind.column not in policy.columns:
            found.append(("individual.column",
                          f"{ind.column!r} is not a listed column; list it under [columns]"))
        if ind.most_rows < 1:
            found.append(("individual.most_rows", "must be a positive integer"))
        if not ind.population.isidentifier() or ind.population != ind.population.lower():
            found.append(("individual.population", "must be a lower-case name (letters, digits, _)"))
    if policy.budget is not None and policy.budget.cap <= 0:
        found.append(("budget.cap", "must be positive"))
    found += _public_problems(policy)
    if policy.timing is not None and not 1 <= policy.timing.answer_after_ms <= LONGEST_ANSWER_AFTER_MS:
        found.append(("timing.answer_after_ms",
                      f"must be a whole number of milliseconds from 1 to {LONGEST_ANSWER_AFTER_MS}"))
    return found


def _public_problems(policy: TablePolicy) -> list[tuple[str, str]]:
    """A public table protects nobody (no individual, budget or timing); ``key`` names one of
    its columns and is only meaningful on a public table."""
    found: list[tuple[str, str]] = []
    if policy.key is not None and not policy.public:
        found.append(("key", "only a public table (public = true) declares a join key"))
    if policy.key is not None and policy.key not in policy.columns:
        found.append(("key", f"{policy.key!r} is not a listed column; list it under [columns]"))
    if policy.key is not None and policy.key in policy.columns \
            and policy.columns[policy.key].kind not in ("category", "integer", "date"):
        found.append(("key", "a join key is a category, integer or date column"))
    if policy.public:
        for section in ("individual", "budget", "timing"):
            if getattr(policy, section) is not None:
                found.append((section, "a public table protects nobody: remove this section, "
                                       "or set public = false"))
    return found


def _column_problems(column: ColumnPolicy) -> list[tuple[str, str]]:
    """Meaning checks for one column; keys are relative to the column."""
    found: list[tuple[str, str]] = []
    allowed = _KEYS_BY_KIND[column.kind]
    if column.bucket is not None:
        found.append(("bucket", "no longer used: GROUP BY on a date column now groups by day, "
                                "as written; delete this key, and write date_trunc('"
                                f"{column.bucket}', <column>) in queries for coarser cells"))
    for key in ("values", "range", "step"):
        if getattr(column, key) is not None and key not in allowed:
            found.append((key, f"not used by {_a(column.kind)} column"))
    if column.kind == "category":
        values = column.values
        if not values:
            found.append(("values", "a category column needs a non-empty list of values"))
        elif len(set(values)) != len(values):
            duplicates = sorted({v for v in values if values.count(v) > 1})
            found.append(("values", f"duplicate values: {', '.join(map(repr, duplicates))}"))
    if column.kind in ("integer", "number", "date"):
        found += _range_problems(column)
    if column.kind == "number":
        if column.step is None:
            found.append(("step", "a number column needs a step (values are rounded to it)"))
        elif column.step <= 0:
            found.append(("step", "must be positive"))
        elif column.range is not None and not found:
            low, high = column.range
            # Exact rational arithmetic: Decimal's % fails on quotients beyond its precision.
            step = Fraction(column.step)
            if Fraction(low) % step != 0 or Fraction(high) % step != 0:
                found.append(("step", f"step {column.step} does not divide the range "
                                      f"[{low}, {high}]; both bounds must be multiples of it"))
    return found


def _range_problems(column: ColumnPolicy) -> list[tuple[str, str]]:
    if column.range is None:
        return [("range", f"{_a(column.kind)} column needs range = [low, high]")]
    if len(column.range) != 2:
        return [("range", "must have exactly two values, [low, high]")]
    low, high = column.range
    if column.kind == "integer":
        if not all(isinstance(v, int) and not isinstance(v, bool) for v in (low, high)):
            return [("range", "bounds of an integer column must be integers")]
    elif column.kind == "number":
        if not all(isinstance(v, (int, Decimal)) and not isinstance(v, bool) for v in (low, high)):
            return [("range", "bounds of a number column must be numbers")]
    elif column.kind == "date":
        try:
            low, high = (_as_date(v) for v in (low, high))
        except ValueError:
            return [("range", "bounds of a date column must be dates (YYYY-MM-DD)")]
    if low > high:
        return [("range", f"lower bound {low} is above upper bound {high}")]
    return []


def _a(word: str) -> str:
    """``word`` with its indefinite article ("an integer", "a date")."""
    return f"an {word}" if word[0] in "aeiou" else f"a {word}"


def _as_date(value: Any) -> dt.date:
    if isinstance(value, dt.datetime):
        raise ValueError("a date, not a date-time")
    if isinstance(value, dt.date):
        return value
    if isinstance(value, str):
        return dt.date.fromisoformat(value)
    raise ValueError("not a date")


def date_range(column: ColumnPolicy) -> tuple[dt.date, dt.date]:
    """The declared bounds of a checked date column as dates."""
    assert column.kind == "date" and column.range is not None
    return _as_date(column.range[0]), _as_date(column.range[1])


def _access_problems(access: AccessPolicy, table_names: set[str]) -> list[tuple[str, str]]:
    found: list[tuple[str, str]] = []
    d = access.defaults
    if d.epsilon_per_query <= 0:
        found.append(("defaults.epsilon_per_query", "must be positive"))
    if d.largest_epsilon_per_query <= 0:
        found.append(("defaults.largest_epsilon_per_query", "must be positive"))
    elif d.epsilon_per_query > d.largest_epsilon_per_query:
        found.append(("defaults.epsilon_per_query",
                      f"{d.epsilon_per_query} is above largest_epsilon_per_query "
                      f"{d.largest_epsilon_per_query}"))
    if d.most_cells < 1:
        found.append(("defaults.most_cells", "must be a positive integer"))
    found += [(f"connections.{key}", problem)
              for key, problem in _connection_problems(access.connections)]
    found += _smallest_epsilon_problems(d)
    found += [(f"limits.{key}", problem) for key, problem in access.limits.problems()]
    accounts = [("analysts", n, a.password) for n, a in access.analysts.items()]
    accounts += [("admins", n, a.password) for n, a in access.admins.items()]
    for section, name, password in accounts:
        try:
            parse_scram_verifier(password)
        except ValueError as error:
            found.append((f"{section}.{name}.password",
                          f"{error}; paste the verifier from `hushql hash-password`, "
                          "never a plaintext password"))
    for name in set(access.analysts) & set(access.admins):
        found.append((f"admins.{name}", "the same name is also an analyst; use separate accounts"))
    for name, analyst in access.analysts.items():
        if analyst.budget <= 0:
            found.append((f"analysts.{name}.budget", "must be positive"))
        for table in analyst.tables:
            if table not in table_names:
                found.append((f"analysts.{name}.tables",
                              f"{table!r} has no policy file in tables/"))
    return found


def _connection_problems(c: Connections) -> list[tuple[str, str]]:
    """Meaning checks for ``[connections]``; keys are relative to the table."""
    found: list[tuple[str, str]] = []
    for key in ("most_sessions", "most_logins_in_progress",
                "most_logins_in_progress_per_address", "failed_logins_allowed",
                "refusals_allowed"):
        if getattr(c, key) < 1:
            found.append((key, "must be a positive integer"))
    if c.admin_sessions_kept < 0:
        found.append(("admin_sessions_kept", "must not be negative"))
    elif c.admin_sessions_kept >= c.most_sessions >= 1:
        found.append(("admin_sessions_kept", f"{c.admin_sessions_kept} leaves no session for "
                                             f"analysts out of most_sessions {c.most_sessions}"))
    if c.most_logins_in_progress_per_address > c.most_logins_in_progress >= 1:
        found.append(("most_logins_in_progress_per_address",
                      f"is above most_logins_in_progress {c.most_logins_in_progress}"))
    for key, most in (("login_timeout_seconds", 600), ("seconds_per_failed_login", 3600),
                      ("seconds_per_refusal", 3600)):
        value = getattr(c, key)
        if not value.is_finite() or not 0 < value <= most:
            found.append((key, f"must be above 0 and at most {most}"))
    return found


def _smallest_epsilon_problems(d: Defaults) -> list[tuple[str, str]]:
    """smallest_epsilon_per_query is positive and no larger than the epsilons it must allow."""
    key = "defaults.smallest_epsilon_per_query"
    if d.smallest_epsilon_per_query <= 0:
        return [(key, "must be positive")]
    if d.epsilon_per_query > 0 and d.smallest_epsilon_per_query > d.epsilon_per_query:
        return [(key, f"{d.smallest_epsilon_per_query} is above epsilon_per_query "
                      f"{d.epsilon_per_query}")]
    return []


# PostgreSQL's stored form of a SCRAM-SHA-256 password, as in pg_authid.rolpassword
# (PostgreSQL documentation, "pg_authid"):
#     SCRAM-SHA-256$<iterations>:<salt>$<StoredKey>:<ServerKey>
# salt and keys in base64. (The keys of a real verifier are 32-byte SHA-256 digests, RFC 7677;
# a wrong length is not refused here: such a verifier simply never authenticates anyone.)
_B64 = r"([A-Za-z0-9+/=]+)"
_VERIFIER = re.compile(rf"SCRAM-SHA-256\$([0-9]{{1,9}}):{_B64}\${_B64}:{_B64}")
# RFC 7677 section 4 asks for an iteration count of at least 4096 (from memory); PostgreSQL's
# default is 4096.
LEAST_SCRAM_ITERATIONS = 4096


def parse_scram_verifier(text: str) -> tuple[int, bytes, bytes, bytes]:
    """Split a stored verifier into (iterations, salt, stored_key, server_key).

    Raises ValueError saying what is wrong; never echoes the text (it may be a password).
    """
    match = _VERIFIER.fullmatch(text)
    if match is None:
        raise ValueError("not a SCRAM-SHA-256 verifier "
                         "(SCRAM-SHA-256$<iterations>:<salt>$<StoredKey>:<ServerKey>)")
    iterations = int(match.group(1))
    try:
        salt, stored_key, server_key = (base64.b64decode(part, validate=True)
                                        for part in match.group(2, 3, 4))
    except binascii.Error:
        raise ValueError("the verifier's salt or keys are not valid base64") from None
    if iterations < LEAST_SCRAM_ITERATIONS:
        raise ValueError(f"the verifier's iteration count {iterations} is below "
                         f"{LEAST_SCRAM_ITERATIONS}")
    return iterations, salt, stored_key, server_key
