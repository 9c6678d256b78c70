"""policies/README.md, the data owners' reference: it documents every key the policy loader
knows, and its worked example of a new table loads, passes check and answers its queries."""

from __future__ import annotations

import re
import shutil
import types
import typing
from pathlib import Path

import psycopg
from pydantic import BaseModel
from rich.console import Console

from proxy.engine import Engine
from proxy.policy import AccessPolicy, TablePolicy, load_policies
from proxy.policy_report import check_command

ROOT = Path(__file__).resolve().parent.parent
REFERENCE = ROOT / "policies" / "README.md"

# Keys the reference documents ahead of the branch that adds them to the loader, and keys the
# loader still knows that that branch replaces ([individual]'s caps become most_rows and
# population). Once both are in, these differences vanish and the comparison is exact.
DOCUMENTED_AHEAD: set[str] = set()
# Retired keys the loader still reads only so that `hushql check` can explain what replaced them.
RETIRED = {"individual.groups_cap", "individual.rows_cap", "columns.<name>.bucket"}


def model_keys(model: type[BaseModel], prefix: str = "") -> set[str]:
    """Every key a policy file may hold, dotted; a table of named entries as ``<name>``."""
    keys: set[str] = set()
    for name, field in model.model_fields.items():
        dotted = f"{prefix}{name}"
        inner = _model_in(field.annotation)
        if inner is not None:
            keys |= model_keys(inner, dotted + ".")
            continue
        named = _named_model_in(field.annotation)
        if named is not None:
            keys |= model_keys(named, dotted + ".<name>.")
            continue
        keys.add(dotted)
    return keys


def _model_in(annotation: object) -> type[BaseModel] | None:
    """The model of a field typed Model or Model | None."""
    if isinstance(annotation, type) and issubclass(annotation, BaseModel):
        return annotation
    if isinstance(annotation, types.UnionType) or typing.get_origin(annotation) is typing.Union:
        models = [a for a in typing.get_args(annotation) if isinstance(a, type)
                  and issubclass(a, BaseModel)]
        return models[0] if len(models) == 1 else None
    return None


def _named_model_in(annotation: object) -> type[BaseModel] | None:
    """The value model of a field typed dict[str, Model]."""
    if typing.get_origin(annotation) is dict:
        value = typing.get_args(annotation)[1]
        return value if isinstance(value, type) and issubclass(value, BaseModel) else None
    return None


KEY_TABLE_HEADER = "| key | type | default | meaning |"


def documented_keys(text: str, part: str) -> set[str]:
    """The keys in the reference's key tables (those headed KEY_TABLE_HEADER) within the part
    for one file ("access.toml" or "tables/"), prefixed by their section heading:
    ``### `[analysts.<name>]` `` gives analysts.<name>.password, ``### Top level`` no prefix."""
    start = text.index(f"\n## {part}")
    end = text.find("\n## ", start + 1)
    keys: set[str] = set()
    section: str | None = None
    in_table = False
    for line in text[start:end if end >= 0 else None].splitlines():
        if line.startswith("### "):
            heading = re.fullmatch(r"### `\[(.+)\]`", line)
            section = heading.group(1) + "." if heading else ("" if line == "### Top level"
                                                              else None)
            in_table = False
        elif line == KEY_TABLE_HEADER:
            in_table = section is not None
        elif not line.strip():
            in_table = False
        elif in_table:
            row = re.match(r"\| `([a-z_]+)` \|", line)
            if row:
                keys.add(f"{section}{row.group(1)}")
    return keys


def test_the_reference_documents_every_key_the_loader_knows() -> None:
    text = REFERENCE.read_text()
    access = documented_keys(text, "access.toml")
    tables = documented_keys(text, "tables/")
    known_access = model_keys(AccessPolicy)
    known_tables = model_keys(TablePolicy)
    assert access == known_access, (access ^ known_access)
    missing = known_tables - tables - RETIRED
    ahead = tables - known_tables - DOCUMENTED_AHEAD
    assert not missing, f"keys check knows that the reference lacks: {sorted(missing)}"
    assert not ahead, f"keys documented that check does not know: {sorted(ahead)}"


def example_policy(text: str) -> str:
    match = re.search(r"```toml tables/water_survey.toml\n(.*?)```", text, re.S)
    assert match, "the worked example's policy block"
    return match.group(1)


def example_queries(text: str) -> list[str]:
    start = text.index("## A new table from scratch")
    match = re.search(r"```sql\n(.*?)```", text[start:], re.S)
    assert match
    return [q.strip() for q in match.group(1).split(";") if q.strip()]


SURVEY_ROWS = """
CREATE TABLE utility.water_survey (
    household_id integer PRIMARY KEY, district text NOT NULL, rating integer NOT NULL,
    noticed_taste boolean, answered_on date NOT NULL, hardness numeric(5,1));
INSERT INTO utility.water_survey
SELECT 100000 + g, (ARRAY['Northbank', 'Old Mill', 'Harbourside'])[1 + g % 3], 1 + g % 5,
       g % 4 = 0, DATE '2026-03-01' + (g % 90), 60 + (g * 7) % 300
FROM generate_series(1, 600) AS g;
"""


def test_the_worked_example_loads_passes_check_and_answers(fresh_dsn: str,
                                                           tmp_path: Path) -> None:
    text = REFERENCE.read_text()
    folder = tmp_path / "policies"
    shutil.copytree(ROOT / "policies", folder)
    (folder / "tables" / "water_survey.toml").write_text(example_policy(text))
    access = (folder / "access.toml").read_text()
    granted = access.replace('tables = ["households", "readings", "tariffs"]',
                             'tables = ["households", "readings", "tariffs", "water_survey"]')
    assert granted != access
    (folder / "access.toml").write_text(granted)
    console = Console(file=open(tmp_path / "check.txt", "w"), width=200)
    assert check_command(folder, console=console) == 0
    console.file.close()
    assert "water_survey" in (tmp_path / "check.txt").read_text()

    with psycopg.connect(fresh_dsn, autocommit=True) as conn:
        conn.execute("CREATE SCHEMA utility")
        conn.execute(SURVEY_ROWS)
    engine = Engine.connect(load_policies(folder), fresh_dsn, pool_size=2)
    try:
        queries = example_queries(text)
        assert len(queries) == 3
        cells = [3, 2, 3]  # districts; true and false; March, April, May
        for query, expected in zip(queries, cells):
            answer = engine.answer("planner", query)
            assert len(answer.rows) == expected, query
            assert answer.epsilon > 0 and answer.accuracy
    finally:
        engine.close()
