"""The operating-characteristics page says in words what its codes and its true difference mean."""
from __future__ import annotations

import html

from trialcut.report.simulation_report import TRUTH_NOTE, _html


def _summary(mechanism: str) -> dict:
    return {"multiplicity_note": "One look.", "primary_visit": "Week 12", "reference": "Placebo", "alpha": 0.05,
            "scenarios": [{"id": "s", "label": "A scenario", "participants": 20, "mechanism": mechanism,
                           "data_errors": 0}],
            "hypotheses": [], "analyses": []}


def _page(mechanism: str) -> str:
    return html.unescape(_html(_summary(mechanism), "Title", [], {"power": b"<svg/>", "coverage": b"<svg/>"}))


def test_the_true_difference_under_a_shift_after_leaving_is_explained():
    # run.simulate._truth adds shift x (difference in the share who left) under not_at_random_shift
    # only: the page must say so where that mechanism appears (common practice: a reader must be
    # able to tell where every "true" value in a simulation table comes from).
    assert TRUTH_NOTE in _page("not_at_random_shift")
    assert "not at random (values after leaving shifted)" in _page("not_at_random_shift")
    assert TRUTH_NOTE not in _page("completely_at_random")
    assert "completely at random" in _page("completely_at_random")
    assert "completely_at_random" not in _page("completely_at_random")
