"""The multiplicity section of a plan with planned looks: an interim never reads as a final,
and a cut that is not a planned look carries no decision (issue 8)."""
from __future__ import annotations

from tests.run.test_interim import _cut, _hypotheses, _plan
from trialcut.report.blocks import Section
from trialcut.report.formatting import NumberFormat
from trialcut.report.sections_front import multiplicity
from trialcut.run.interim import interim_multiplicity


def _text(cut_label: str, n_due: int, p_values=(1e-4, 0.3)) -> str:
    record = interim_multiplicity(_plan(), _cut(n_due=n_due), {"run": {"cut": cut_label}}, _hypotheses(*p_values))
    section = Section("multiplicity", "Multiple comparisons")
    multiplicity(section, {"multiplicity": record, "endpoints": []}, NumberFormat())
    parts = []
    for block in section.blocks:
        if block.kind == "table":
            parts.append(" ".join(c.label for c in block.content.display))
        else:
            parts.append(str(block.content))
    return "\n".join(parts)


def test_interim_look_says_which_look_its_fraction_and_boundary():
    text = _text("interim", 48)
    assert "Interim look 1 of 2" in text and "0.480" in text and "|z| ≥" in text
    assert "Rejected" not in text and "Boundary crossed (interim)" in text


def test_final_look_may_reject():
    text = _text("final", 97)
    assert "Look 2 of 2 (final analysis)" in text and "Rejected" in text


def test_unplanned_cut_shows_no_decision():
    text = _text("rehearsal", 30, p_values=(1e-9, 1e-9))
    assert "not a planned look" in text and "no decision" in text
    assert "reject" not in text.lower() and "crossed" not in text.lower()
