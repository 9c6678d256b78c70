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

import datetime as dt
import tomllib
from dataclasses import dataclass
from decimal import Decimal
from pathlib import Path
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError

GroupBucket = Literal["day", "week", "month", "quarter", "year"]
ColumnKind = Literal["category", "integer", "number", "date", "boolean"]


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class Defaults(_Strict):
    epsilon_per_query: Decimal = Decimal("0.1")
    largest_epsilon_per_query: Decimal = Decimal("1.0")
    most_cells: int = 10_000


class AnalystPolicy(_Strict):
    password: str
    budget: Decimal
    tables: list[str] = Field(default_factory=list)


class AdminPolicy(_Strict):
    password: str


class AccessPolicy(_Strict):
    defaults: Defaults = Field(default_factory=Defaults)
    analysts: dict[str, AnalystPolicy] = Field(default_factory=dict)
    admins: dict[str, AdminPolicy] = Field(default_factory=dict)


class Individual(_Strict):
    """Who one individual is: rows sharing ``column`` belong to one person or household."""

    column: str
    groups_cap: int
    rows_cap: int


class TableBudget(_Strict):
    cap: Decimal


class ColumnPolicy(_Strict):
    """One exposed column. Which keys apply depends on ``kind`` (checked after parsing)."""

    kind: ColumnKind
    values: list[str] | None = None
    range: list[Any] | None = None
    step: Decimal | None = None
    bucket: GroupBucket | None = None
    description: str | None = None

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
        """True when GROUP BY may use this column (a finite list of declared values)."""
        return self.kind in ("category", "integer", "boolean") or (
            self.kind == "date" and self.bucket is not None)

    @property
    def summable(self) -> bool:
        return self.kind in ("integer", "number")


class TablePolicy(_Strict):
    table: str
    source: str
    description: str = ""
    individual: Individual | None = None
    budget: TableBudget | None = None
    columns: dict[str, ColumnPolicy]

    def column(self, name: str) -> ColumnPolicy | None:
        return self.columns.get(name)


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
    problems: list[str] = []
    tables: dict[str, TablePolicy] = {}
    table_files: dict[str, str] = {}
    tables_dir = root / "tables"
    for path in sorted(tables_dir.glob("*.toml")) if tables_dir.is_dir() else []:
        label = f"tables/{path.name}"
        policy = _parse(path, label, TablePolicy, problems)
        if policy is None:
            continue
        found = _table_problems(policy)
        problems += [f"{label}: {key}: {problem}" for key, problem in found]
        if policy.table in tables:
            problems.append(f"{label}: table: {policy.table!r} is already declared by "
                            f"{table_files[policy.table]}")
        elif not found:
            tables[policy.table] = policy
            table_files[policy.table] = label
    access_path = root / "access.toml"
    access: AccessPolicy | None = None
    if not access_path.is_file():
        problems.append("access.toml: (file): missing; the administrator's file is required")
    else:
        access = _parse(access_path, "access.toml", AccessPolicy, problems)
        if access is not None:
            problems += [f"access.toml: {key}: {problem}"
                         for key, problem in _access_problems(access, set(tables) | set(table_files))]
    if problems or access is None:
        raise PolicyError(problems)
    return Policies(access=access, tables=tables, directory=root)


def _parse(path: Path, label: str, model: type[_Strict], problems: list[str]) -> Any:
    """Parse one TOML file into ``model``; on failure append ``file: key: problem`` lines."""
    try:
        with path.open("rb") as handle:
            raw = tomllib.load(handle, parse_float=Decimal)
    except tomllib.TOMLDecodeError as error:
        problems.append(f"{label}: (syntax): {error}")
        return None
    except OSError as error:
        problems.append(f"{label}: (file): cannot read: {error.strerror}")
        return None
    try:
        return model.model_validate(raw)
    except ValidationError as error:
        for item in error.errors():
            key = ".".join(str(part) for part in item["loc"]) or "(top)"
            message = "unknown key" if item["type"] == "extra_forbidden" else item["msg"]
            problems.append(f"{label}: {key}: {message}")
        return None


_KEYS_BY_KIND: dict[str, set[str]] = {
    "category": {"values"},
    "integer": {"range"},
    "number": {"range", "step"},
    "date": {"range", "bucket"},
    "boolean": set(),
}


def _table_problems(policy: TablePolicy) -> list[tuple[str, str]]:
    """Meaning checks for one table policy; returns (key, problem) pairs."""
    found: list[tuple[str, str]] = []
    if not policy.table.isidentifier() or policy.table != policy.table.lower():
        found.append(("table", "must be a lower-case SQL identifier (letters, digits, _)"))
    if not policy.source.strip():
        found.append(("source", "must name a relation in the backend database"))
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
        if ind.groups_cap < 1:
            found.append(("individual.groups_cap", "must be a positive integer"))
        if ind.rows_cap < 1:
            found.append(("individual.rows_cap", "must be a positive integer"))
    if policy.budget is not None and policy.budget.cap <= 0:
        found.append(("budget.cap", "must be positive"))
    return found


def _column_problems(column: ColumnPolicy) -> list[tuple[str, str]]:
    """Meaning checks for one column; keys are relative to the column."""
    found: list[tuple[str, str]] = []
    allowed = _KEYS_BY_KIND[column.kind]
    for key in ("values", "range", "step", "bucket"):
        if getattr(column, key) is not None and key not in allowed:
            found.append((key, f"not used by a {column.kind} column"))
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
            if (low % column.step) != 0 or (high % column.step) != 0:
                found.append(("step", f"step {column.step} does not divide the range "
                                      f"[{low}, {high}]; both bounds must be multiples of it"))
    return found


def _range_problems(column: ColumnPolicy) -> list[tuple[str, str]]:
    if column.range is None:
        return [("range", f"a {column.kind} column needs range = [low, high]")]
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
    accounts = [("analysts", n, a.password) for n, a in access.analysts.items()]
    accounts += [("admins", n, a.password) for n, a in access.admins.items()]
    for section, name, password in accounts:
        if not password.startswith("SCRAM-SHA-256$"):
            found.append((f"{section}.{name}.password",
                          "must be a SCRAM-SHA-256 verifier from `hushql hash-password`, "
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
