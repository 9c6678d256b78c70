"""Small policy folders and tables for engine tests (not the demo's).

A "clinic" invented for tests: ``people`` (one row per person, a row table) and ``visits``
(many rows per person, protected per person).
"""

from __future__ import annotations

import textwrap
from pathlib import Path

import psycopg

# Not a real verifier: policy validation only checks the form; the engine never reads it.
DUMMY_VERIFIER = "SCRAM-SHA-256$4096:c2FsdA==$c3RvcmVk:c2VydmVy"

PEOPLE = """
table = "people"
source = "clinic.people"

[columns.person_id]
kind = "integer"
range = [1, 100000]

[columns.ward]
kind = "category"
values = ["north", "south", "east"]

[columns.age]
kind = "integer"
range = [0, 100]

[columns.weight]
kind = "number"
range = [-5, 120]
step = 0.5

[columns.smoker]
kind = "boolean"

[columns.admitted]
kind = "date"
range = ["2026-01-01", "2026-12-31"]
"""

VISITS = """
table = "visits"
source = "clinic.visits"

[individual]
column = "person_id"
population = "people"
most_rows = {most_rows}
bounds = "{bounds}"

[columns.person_id]
kind = "integer"
range = [1, 100000]

[columns.ward]
kind = "category"
values = ["north", "south", "east"]

[columns.minutes]
kind = "integer"
range = [0, 60]

[columns.visited]
kind = "date"
range = ["2026-01-01", "2026-12-31"]

[columns.fee]
kind = "number"
range = [0, 50]
step = 0.25
"""


def write_policies(root: Path, *, budget: str = "1000", largest: str = "100",
                   most_rows: int = 10, bounds: str = "chosen", most_cells: int = 10000) -> Path:
    """A policy folder granting analyst ``tester`` both clinic tables."""
    (root / "tables").mkdir(parents=True, exist_ok=True)
    (root / "tables" / "people.toml").write_text(PEOPLE)
    (root / "tables" / "visits.toml").write_text(
        VISITS.format(most_rows=most_rows, bounds=bounds))
    (root / "access.toml").write_text(textwrap.dedent(f"""
        [defaults]
        epsilon_per_query = 1.0
        largest_epsilon_per_query = {largest}
        most_cells = {most_cells}

        [analysts.tester]
        password = "{DUMMY_VERIFIER}"
        budget = {budget}
        tables = ["people", "visits"]

        [analysts.outsider]
        password = "{DUMMY_VERIFIER}"
        budget = 1.0
        tables = []
        """))
    return root


def load_clinic(dsn: str, *, people: int = 2000, seed: int = 7) -> None:
    """Create clinic.people and clinic.visits with values inside and outside the declared ranges,
    NULLs and keys outside the domains, deterministically from ``seed``."""
    with psycopg.connect(dsn, autocommit=True) as conn:
        conn.execute("DROP SCHEMA IF EXISTS clinic CASCADE; CREATE SCHEMA clinic")
        conn.execute("SELECT setseed(%s)", (1.0 / seed,))
        conn.execute("""
            CREATE TABLE clinic.people AS
            SELECT g AS person_id,
                   (ARRAY['north','south','east','west', NULL])[1 + (g * 7) %% 5] AS ward,
                   CASE WHEN g %% 97 = 0 THEN 130 WHEN g %% 89 = 0 THEN NULL ELSE (g * 13) %% 101 END AS age,
                   CASE WHEN g %% 53 = 0 THEN -20.25 WHEN g %% 59 = 0 THEN 500.0
                        ELSE round(((g * 37) %% 1300) / 10.0 - 4.96, 2) END::numeric AS weight,
                   (g %% 3 = 0) AS smoker,
                   DATE '2025-12-20' + ((g * 11) %% 400) AS admitted
            FROM generate_series(1, %s) AS g""", (people,))
        conn.execute("""
            CREATE TABLE clinic.visits AS
            SELECT p.person_id,
                   (ARRAY['north','south','east','west'])[1 + (p.person_id + v) % 4] AS ward,
                   CASE WHEN v % 17 = 0 THEN 75 ELSE (p.person_id * 3 + v * 7) % 61 END AS minutes,
                   DATE '2026-01-01' + ((p.person_id * 5 + v * 29) % 380) AS visited,
                   round(((p.person_id * 7 + v * 13) % 6000) / 97.0, 3)::numeric AS fee
            FROM clinic.people p, generate_series(1, 1 + p.person_id % 9) AS v""")
