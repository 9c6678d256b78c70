"""Fault injection for crash tests: TEST-ONLY, inert unless ``HUSHQL_TEST_FAULTS`` is set.

The crash tests must kill a proxy at a chosen moment of an answer (after its charge is durable
but before anything is released; while the backend query runs). They name that moment in the
environment variable ``HUSHQL_TEST_FAULTS``, read once when this module is imported:

    HUSHQL_TEST_FAULTS="after-reserve=30"      pause 30 s after the reservation commits
    HUSHQL_TEST_FAULTS="during-query=30"       a 30 s pg_sleep on the backend connection
                                               before the query (so cancel works as on a
                                               slow query)

While paused the process logs ``test fault: pausing at <point> (pid N)`` so the test knows
which process to kill. Without the variable ``pause`` is a dictionary lookup on an empty dict
and does nothing; no production setting reads or writes it. An unknown point name is an error
at start, so a misspelt test cannot pass by never pausing.
"""

from __future__ import annotations

import logging
import os
import time

ENVIRONMENT_VARIABLE = "HUSHQL_TEST_FAULTS"
POINTS = ("after-reserve", "during-query")
"""Where the code pauses: engine after ``reserve``; backend before the query."""

log = logging.getLogger("hushql.faults")


def _parse(text: str) -> dict[str, float]:
    """``point=seconds,point=seconds`` -> {point: seconds}; ValueError for an unknown point."""
    pauses: dict[str, float] = {}
    for item in filter(None, (part.strip() for part in text.split(","))):
        point, _, seconds = item.partition("=")
        if point not in POINTS:
            raise ValueError(f"{ENVIRONMENT_VARIABLE}: unknown fault point {point!r}; "
                             f"known: {', '.join(POINTS)}")
        pauses[point] = float(seconds or "30")
    return pauses


_PAUSES = _parse(os.environ.get(ENVIRONMENT_VARIABLE, ""))


def seconds(point: str) -> float | None:
    """How long to pause at ``point`` when the test switch names it (logged), else None."""
    delay = _PAUSES.get(point)
    if delay is not None:
        log.warning("test fault: pausing at %s (pid %d)", point, os.getpid())
    return delay


def pause(point: str) -> None:
    """Sleeps at ``point`` when the test switch names it; otherwise returns at once."""
    delay = seconds(point)
    if delay is not None:
        time.sleep(delay)
