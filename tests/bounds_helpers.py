"""Running a rewritten query without noise, with its contribution bounds fixed.

A chosen bound is picked inside the backend query by noisy max over its candidates, from the
noise the engine passes in a setting. Tests fix the pick instead: target 0 and a noise far
above any score on the wanted candidate, so the SQL's own choice lands there.
"""

from __future__ import annotations

from typing import Any

import psycopg

from proxy.sql.rewrite import BOUND_NOISE_SETTING, Rewritten

_WINS = 10 ** 15  # above any |above_k - A| a test table can produce


def forced_settings(rewritten: Rewritten, values: tuple[int, ...]) -> dict[str, str]:
    """Settings that make each chosen bound j pick ``values[j]`` (one of its candidates)."""
    settings = {}
    for j, (bound, value) in enumerate(zip(rewritten.bounds, values)):
        if bound.chosen:
            noise = [str(_WINS if c == value else 0) for c in bound.candidates]
            settings[BOUND_NOISE_SETTING.format(j)] = ",".join(["0", *noise])
    return settings


def run_with_bounds(conn: psycopg.Connection, rewritten: Rewritten,
                    values: tuple[int, ...] | None = None) -> list[tuple[Any, ...]]:
    """The backend rows of ``rewritten`` with bounds ``values`` (default: the ceilings)."""
    chosen = values if values is not None else tuple(b.ceiling for b in rewritten.bounds)
    with conn.transaction():
        for name, value in forced_settings(rewritten, chosen).items():
            conn.execute("SELECT set_config(%s, %s, true)", (name, value))
        return conn.execute(rewritten.sql).fetchall()


def measure_columns(rewritten: Rewritten, keys: int, measures: int,
                    rows: list[tuple[Any, ...]]) -> list[list[int]]:
    """Per measure, its noise-free values over the cells."""
    return [[int(row[keys + n]) for row in rows] for n in range(measures)]
