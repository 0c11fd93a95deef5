"""Comparing two runs: plan change, data change per participant, estimates side by side."""
from __future__ import annotations

import copy
import hashlib

import pytest

from trialcut.report import compare_data_manifests, compare_results, render_comparison


def hashes(ids):
    return {i: hashlib.sha256(i.encode()).hexdigest() for i in ids}


@pytest.fixture(scope="module")
def runs(report_fixtures):
    first = report_fixtures.build_results()
    second = report_fixtures.build_results(seed=11)       # a later cut: other simulated values
    second["run"].update(id="run-b", cut="interim-2")
    second["data"]["sha256"] = "f" * 64
    return first, second


def test_participants_added_removed_and_changed():
    a = {"sha256": "1" * 64, "rows": 10, "participant_hashes": hashes(["P1", "P2", "P3"])}
    later = hashes(["P2", "P3", "P4"])
    later["P3"] = "0" * 64
    b = {"sha256": "2" * 64, "rows": 12, "participant_hashes": later}
    answer = compare_data_manifests(a, b)
    assert answer["changed"] and answer["participant_level"]
    assert answer["participants_added"] == ["P4"]
    assert answer["participants_removed"] == ["P1"]
    assert answer["participants_changed"] == ["P3"]
    assert answer["participants_unchanged"] == 1
    assert answer["rows_difference"] == 2


def test_without_participant_hashes_only_the_file_is_compared():
    answer = compare_data_manifests({"sha256": "1" * 64}, {"sha256": "1" * 64})
    assert answer["changed"] is False and answer["participant_level"] is False


def test_plan_fields_that_changed_are_named(runs):
    first, second = copy.deepcopy(runs[0]), copy.deepcopy(runs[1])
    first["plan"]["canonical"] = {"version": "1.0", "endpoints": [{"primary_visit": "Week 8"}]}
    second["plan"]["canonical"] = {"version": "1.1", "endpoints": [{"primary_visit": "Week 12"}], "seed": 5}
    second["plan"]["sha256"] = "e" * 64
    plan = compare_results(first, second)["plan"]
    assert plan["changed"]
    assert {d["field"]: (d["a"], d["b"]) for d in plan["fields"]} == {
        "version": ("1.0", "1.1"), "endpoints[0].primary_visit": ("Week 8", "Week 12"), "seed": ("(absent)", 5)}


def test_estimates_side_by_side_with_their_change(runs):
    first, second = runs
    rows = compare_results(first, second)["estimates"]
    # One row per analysis with a differences table and per non-reference arm.
    assert len(rows) == 3 * 2
    for row in rows:
        analysis_a = next(a for a in first["endpoints"][0]["analyses"] if a["id"] == row["analysis"])
        analysis_b = next(a for a in second["endpoints"][0]["analyses"] if a["id"] == row["analysis"])

        def estimate(analysis):
            table = analysis["tables"]["differences"]
            found = [dict(zip(table["columns"], r)) for r in table["data"]]
            return next(r["estimate"] for r in found if r["arm"] == row["arm"] and r["visit"] == "Week 12")

        assert row["estimate_a"] == estimate(analysis_a) and row["estimate_b"] == estimate(analysis_b)
        assert row["change"] == pytest.approx(row["estimate_b"] - row["estimate_a"], abs=1e-15)


def test_render_comparison_writes_html_pdf_and_csv(runs, tmp_path):
    first, second = runs[0], copy.deepcopy(runs[1])
    second["plan"]["report"]["paper"] = "Letter"
    written = render_comparison(first, second, tmp_path, data_diff={"participants_added": ["LVT-201-9999"],
                                                                    "participant_level": True})
    pypdf = pytest.importorskip("pypdf")
    # US Letter is 8.5 x 11 inches = 612 x 792 PostScript points (ANSI/ASME Y14.1).
    boxes = {(round(float(p.mediabox.width)), round(float(p.mediabox.height)))
             for p in pypdf.PdfReader(written["comparison.pdf"]).pages}
    assert (612, 792) in boxes and boxes <= {(612, 792), (792, 612)}
    assert {"comparison.html", "comparison.pdf"} <= set(written)
    html = written["comparison.html"].read_text(encoding="utf-8")
    assert "The plan is the same in both runs" in html
    assert "Added participants: LVT-201-9999." in html
    assert any(k.endswith("estimates_compared.csv") for k in written)
