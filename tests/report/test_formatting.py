"""Number formatting rules: decimals by kind, half-away-from-zero rounding, small p-values."""
from __future__ import annotations

import pytest

from trialcut.report.formatting import NumberFormat, round_half_away, term_text


@pytest.mark.parametrize(("value", "decimals", "text"), [
    # Half away from zero on the written decimal (common practice when rounding by hand):
    # binary floating point would give 0.2 for 0.25 and 2.67 for 2.675.
    (0.25, 1, "0.3"), (-0.25, 1, "-0.3"), (2.675, 2, "2.68"), (1.0, 2, "1.00"),
    (-0.04, 1, "0.0"),          # no "-0.0": a zero has no sign in a table
    (123456.789, 0, "123457"),
])
def test_round_half_away(value, decimals, text):
    assert round_half_away(value, decimals) == text


def test_decimals_follow_the_raw_precision():
    # Means and CIs one decimal beyond the data, SDs two (common practice in trial reporting).
    rule = NumberFormat(raw=1, mean_extra=1, sd_extra=2, p_value=3)
    assert rule.cell(-1.23456, "mean") == "-1.23"
    assert rule.cell(0.98765, "sd") == "0.988"
    assert NumberFormat(raw=0).cell(12.345, "mean") == "12.3"
    assert NumberFormat(raw=0).cell(12.345, "sd") == "12.35"


@pytest.mark.parametrize(("p", "text"), [
    (0.0004999, "<0.001"), (1e-15, "<0.001"), (0.001, "0.001"), (0.0496, "0.050"), (0.5, "0.500"), (1.0, "1.000"),
])
def test_p_values(p, text):
    assert NumberFormat(p_value=3).cell(p, "p") == text


def test_missing_and_flags_and_intervals():
    rule = NumberFormat(raw=1)
    assert rule.cell(None, "mean") == "–"
    assert rule.cell(True, "flag") == "yes"
    assert rule.interval(-1.64, -1.02) == "(-1.64, -1.02)"
    assert rule.cell(0.8166, "share") == "81.7"   # a proportion shown as a percentage


def test_plan_settings_are_read_from_results():
    results = {"plan": {"report": {"decimals": {"mean_extra": 2, "sd_extra": 3, "p_value": 4}}}}
    rule = NumberFormat.from_results(results, raw=0)
    assert (rule.mean_decimals, rule.sd_decimals, rule.cell(0.00005, "p")) == (2, 3, "<0.0001")


def test_terms_in_words():
    assert term_text("arm_by_visit") == "Arm by visit"
    assert term_text("BASE_by_visit") == "BASE by visit"
    assert term_text("BASE") == "BASE"


def test_formula_style_coefficient_names_read_as_words():
    # Issue 9: no "arm[Level]:visit[Week 4]" label reaches a reader, whatever the engine names.
    assert term_text("arm[Lorvatide 10 mg]:visit[Week 4]") == "Arm by visit: Lorvatide 10 mg, Week 4"
    assert term_text("STRAT1R[Severe]") == "STRAT1R: Severe"
    assert term_text("visit[Week 12]") == "Visit: Week 12"
    assert term_text("BASE:visit") == "BASE by visit"
    # Names already in words pass unchanged (a colon followed by words is not formula syntax).
    assert term_text("STRAT1R: Severe vs Mild") == "STRAT1R: Severe vs Mild"


def test_slopes_keep_three_significant_digits_and_ordered_p_values_stay_exact():
    rule = NumberFormat(raw=0)
    # A slope of -0.163 per point would read -0.2 if rounded like a mean (1 decimal here).
    assert rule.cell(-0.16343, "coefficient") == "-0.163"
    assert rule.cell(-1.893, "coefficient") == "-1.89"
    assert rule.cell(0.03314, "coefficient") == "0.0331"
    # Two p-values below 0.001 keep their order instead of both reading "<0.001".
    assert rule.cell(1.2877e-13, "p_exact") == "1.29 × 10⁻¹³"
    assert rule.cell(6.543e-5, "p_exact") == "6.54 × 10⁻⁵"
    assert rule.cell(0.0123, "p_exact") == "0.012"
