"""The README's analyst guide: its list of accepted SQL is the analyser's own words, and the
figures it quotes are the noise module's."""

from __future__ import annotations

import re
from fractions import Fraction
from pathlib import Path

from proxy import noise
from proxy.sql.guide import ACCEPTED, accepted_sql_markdown

README = Path(__file__).resolve().parent.parent / "README.md"


def test_the_accepted_list_is_generated_from_the_analyser() -> None:
    text = README.read_text()
    block = re.search(r"<!-- accepted:begin[^>]*-->\n(.*?)\n<!-- accepted:end -->", text, re.S)
    assert block, "the README keeps the generated block between its markers"
    assert block.group(1) == accepted_sql_markdown(), \
        "README is stale: paste proxy.sql.guide.accepted_sql_markdown() between the markers"
    assert len(block.group(1).splitlines()) == len(ACCEPTED)


def test_the_quoted_bounds_are_the_noise_modules() -> None:
    text = README.read_text()
    # A count (sensitivity 1) at epsilon 0.1 has scale 10; at 0.4, scale 2.5.
    assert f"within ±{noise.bound95(Fraction(10))} of the exact value" in text
    assert f"count is within ±{noise.bound95(Fraction(5, 2))} instead of " \
           f"±{noise.bound95(Fraction(10))}" in text
