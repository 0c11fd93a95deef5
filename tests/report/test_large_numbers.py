"""Rounding for the report works for every finite double (issue 10: numbers from about 1e26 on
raised decimal.InvalidOperation because the default decimal context keeps 28 digits).
Invariant (common practice): the rounded text of a whole number reads back as the same double."""
from __future__ import annotations

import pytest

from trialcut.report.formatting import round_half_away


@pytest.mark.parametrize("exponent", [20, 25, 26, 27, 28, 50, 100, 200, 300, 308])
@pytest.mark.parametrize("decimals", [0, 2, 4])
def test_huge_numbers_round_and_read_back(exponent, decimals):
    for value in (1.5 * 10.0 ** exponent if exponent < 308 else 1.7e308, -(10.0 ** exponent)):
        text = round_half_away(value, decimals)
        assert float(text) == value
        if decimals:
            assert len(text.rsplit(".", 1)[1]) == decimals
        else:
            assert "." not in text
