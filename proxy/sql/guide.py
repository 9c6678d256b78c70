"""The analysts' summary of accepted SQL, written from the analyser's own hints.

The README's list of what is accepted is the output of ``accepted_sql_markdown`` (a test compares
the two), so the guide says exactly what the analyser's hints say and cannot drift from them.
"""

from __future__ import annotations

from proxy.sql.analyse import (BUCKETS, HAVING_HINT, LIMIT_HINT, ORDER_HINT, SELECT_HINT,
                               SHAPE_HINT)
from proxy.sql.filters import FUNCTION_HINT, WHERE_HINT
from proxy.sql.joins import JOIN_HINT
from proxy.sql.keys import BUCKET_HINT
from proxy.sql.public import READ_HINT

GROUP_BY_HINT = (BUCKET_HINT.replace("date_trunc('<unit>'", "date_trunc('<" + "|".join(BUCKETS)
                                     + ">'")
                 + "; every declared value is a cell, narrowed by the WHERE literals on its column")

# (what, the analyser's own words for what it accepts there)
ACCEPTED: tuple[tuple[str, str], ...] = (
    ("Statement", SHAPE_HINT),
    ("Joins", JOIN_HINT + "; every table must be granted, and the charge names each protected one"),
    ("Public tables", READ_HINT + " (exact rows, nothing charged)"),
    ("Select list", SELECT_HINT),
    ("WHERE", WHERE_HINT),
    ("Functions", FUNCTION_HINT + " (in WHERE; the select list takes round, coalesce and casts)"),
    ("GROUP BY", GROUP_BY_HINT),
    ("HAVING", HAVING_HINT + " (applied to the noisy answer, free)"),
    ("ORDER BY", ORDER_HINT + " (applied to the noisy answer, free)"),
    ("LIMIT, OFFSET", LIMIT_HINT),
)


def accepted_sql_markdown() -> str:
    """One Markdown list item per clause: what the analyser accepts there (``<`` and ``*``
    escaped, so that <table> is not read as HTML nor COUNT(*) as emphasis)."""
    return "\n".join(f"- **{what}**: {_escaped(text)}." for what, text in ACCEPTED)


def _escaped(text: str) -> str:
    for special in ("\\", "<", "*", "_"):
        text = text.replace(special, "\\" + special)
    return text
