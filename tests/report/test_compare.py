"""Comparing two runs: plan change by ids, data change per participant and record, results side by side."""
from __future__ import annotations

import copy
import hashlib
from types import SimpleNamespace

import pytest

from tests.open_data import beat_the_blues_long
from trialcut.report import compare_data_manifests, compare_results, render_comparison
from trialcut.report.compare import compare_decisions, compare_tipping_points
from trialcut.run.participant_records import participant_records
from trialcut.record.participants import participant_hashes

COLUMNS = SimpleNamespace(subject="USUBJID", arm="TRT01P", visit="AVISIT", study_day=None, parameter=None)


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
    # Every page landscape: two runs side by side, and no upright page left nearly empty before a wide table.
    assert boxes == {(792, 612)}
    assert {"comparison.html", "comparison.pdf"} <= set(written)
    html = written["comparison.html"].read_text(encoding="utf-8")
    assert "The plan is the same in both runs" in html
    assert "New participants: LVT-201-9999." in html
    assert any(k.endswith("estimates_compared.csv") for k in written)
    # No page nearly empty: each holds more than its running header and footer and a stray line.
    lines = [len(page.extract_text().splitlines()) for page in pypdf.PdfReader(written["comparison.pdf"]).pages]
    assert min(lines) >= 8, lines
    assert_words_inside_the_margins(written["comparison.pdf"])


def assert_words_inside_the_margins(pdf):
    """Every word (hashes above all) ends inside the right margin: the stylesheet's 15 mm, in points
    (1 pt = 1/72 in, 25.4 mm to the inch).  Word boxes from poppler's pdftotext."""
    import re
    import shutil
    import subprocess

    if shutil.which("pdftotext") is None:
        pytest.skip("poppler-utils (pdftotext) is not installed")
    boxes = subprocess.run(["pdftotext", "-bbox", str(pdf), "-"], capture_output=True, text=True, check=True).stdout
    page_width = float(re.search(r'<page width="([0-9.]+)"', boxes).group(1))
    limit = page_width - 15 * 72 / 25.4 + 0.5
    outside = [(word, float(x_max)) for x_max, word in re.findall(r'xMax="([0-9.]+)"[^>]*>([^<]*)</word>', boxes)
               if float(x_max) > limit]
    assert not outside, outside


def test_plan_changes_are_named_by_item_ids(runs):
    first, second = copy.deepcopy(runs[0]), copy.deepcopy(runs[1])
    sensitivity = [{"id": "mmrm_robust", "options": {"robust": True}},
                   {"id": "mi_jump_to_reference", "options": {"imputations": 50}}]
    first["plan"]["canonical"] = {"endpoints": [{"id": "fbs_change", "analyses": {"sensitivity": sensitivity}}]}
    changed = copy.deepcopy(sensitivity)
    changed[1]["options"]["imputations"] = 100
    changed.reverse()            # order alone is no change: items are matched by id
    second["plan"]["canonical"] = {"endpoints": [{"id": "fbs_change", "analyses": {"sensitivity": changed}}]}
    second["plan"]["sha256"] = "e" * 64
    fields = compare_results(first, second)["plan"]["fields"]
    assert fields == [{"field": "endpoints[fbs_change].analyses.sensitivity[mi_jump_to_reference].options.imputations",
                       "a": 50, "b": 100}]


def two_cuts():
    """Two cuts of the Beat the Blues trial (open data, tests/open_data.py) with known changes.

    Cut A: participants 1-60, records at 2 and 4 months.  Cut B, later: every participant and
    visit, one value edited (participant 5, 2 months) and one record withdrawn (participant 7,
    4 months).  Each change is made here, so the expected split is known exactly.
    """
    data = beat_the_blues_long().dropna(subset=["AVAL"])
    ids = sorted(data["USUBJID"].unique())
    earlier = data[data["USUBJID"].isin(ids[:60]) & data["AVISIT"].isin(["2m", "4m"])].copy()
    later = data.copy()
    edited, withdrawn = ids[4], ids[6]
    at = (later["USUBJID"] == edited) & (later["AVISIT"] == "2m")
    old_value = float(later.loc[at, "AVAL"].iloc[0])
    later.loc[at, "AVAL"] = old_value + 1
    later = later[~((later["USUBJID"] == withdrawn) & (later["AVISIT"] == "4m"))]
    assert ((earlier["USUBJID"] == withdrawn) & (earlier["AVISIT"] == "4m")).any(), "the withdrawn record existed"
    return earlier, later, {"edited": edited, "withdrawn": withdrawn, "old": old_value, "ids": ids}


def data_block(frame):
    return {"sha256": hashlib.sha256(frame.to_csv().encode()).hexdigest(), "rows": len(frame),
            "participants": frame["USUBJID"].nunique(), "participant_hashes": participant_hashes(frame, "USUBJID"),
            "participant_records": participant_records(frame, COLUMNS)}


def test_participants_split_by_kind_of_change_with_every_edited_value_listed():
    earlier, later, known = two_cuts()
    answer = compare_data_manifests(data_block(earlier), data_block(later))
    in_a, in_b = set(earlier["USUBJID"]), set(later["USUBJID"])
    assert answer["record_level"]
    assert answer["participants_added"] == sorted(in_b - in_a)
    assert answer["participants_with_records_removed"] == [known["withdrawn"]]
    assert answer["participants_with_edited_values"] == [known["edited"]]
    # New visits only: in cut A, with a record at 6 or 8 months in cut B, and not edited or withdrawn.
    later_visits = set(later.loc[later["AVISIT"].isin(["6m", "8m"]), "USUBJID"])
    expected_new_visits = sorted((in_a & later_visits) - {known["edited"], known["withdrawn"]})
    assert answer["participants_with_new_visits_only"] == expected_new_visits
    assert answer["participants_unchanged"] == len(in_a) - len(expected_new_visits) - 2
    # Records added and removed, by kind of participant, counted from the two cuts directly.
    def records_of(frame, ids):
        return int(frame["USUBJID"].isin(ids).sum())
    new_visits = records_of(later, expected_new_visits) - records_of(earlier, expected_new_visits)
    assert answer["records_by_kind"]["new_visits"] == {"added": new_visits, "removed": 0}
    withdrawn_added = records_of(later, [known["withdrawn"]]) - records_of(earlier, [known["withdrawn"]]) + 1
    assert answer["records_by_kind"]["records_removed"] == {"added": withdrawn_added, "removed": 1}
    assert answer["edited_values"] == [
        {"participant": known["edited"], "visit": "2m", "field": "AVAL", "a": f"{known['old']:g}",
         "b": f"{known['old'] + 1:g}"},
        {"participant": known["withdrawn"], "visit": "4m", "field": "whole record", "a": "present", "b": "removed"}]
    # The arm is never carried in the records: a comparison of blinded cuts prints no treatment code.
    assert "TRT01P" not in data_block(later)["participant_records"]["fields"]


def test_a_participant_level_edit_is_listed_once_and_the_report_shows_the_listing(runs, tmp_path):
    earlier, later, known = two_cuts()
    later = later.assign(drug=0)
    earlier = earlier.assign(drug=0)
    later.loc[later["USUBJID"] == known["ids"][1], "drug"] = 1      # a value repeated on each of the rows
    answer = compare_data_manifests(data_block(earlier), data_block(later))
    rows = [r for r in answer["edited_values"] if r["participant"] == known["ids"][1]]
    common = int(((earlier["USUBJID"] == known["ids"][1])).sum())
    assert rows == [{"participant": known["ids"][1], "visit": f"all {common} records", "field": "drug",
                     "a": "0", "b": "1"}]
    written = render_comparison(runs[0], runs[1], tmp_path, data_diff=answer)
    html = written["comparison.html"].read_text(encoding="utf-8")
    assert "Participants by how their records changed" in html and known["edited"] in html
    assert any(k.endswith("edited_values.csv") for k in written)


def test_estimates_carry_n_se_and_df_of_both_runs(runs):
    first, second = runs
    for row in compare_results(first, second)["estimates"]:
        analysis = next(a for a in second["endpoints"][0]["analyses"] if a["id"] == row["analysis"])
        table = analysis["tables"]["differences"]
        found = next(dict(zip(table["columns"], r)) for r in table["data"]
                     if dict(zip(table["columns"], r))["arm"] == row["arm"]
                     and dict(zip(table["columns"], r))["visit"] == row["visit"])
        assert (row["se_b"], row["df_b"], row["lower_b"], row["upper_b"]) == (
            found["se"], found["df"], found["lower"], found["upper"])
        population = next(r for r in second["populations"]["data"] if r[0] in ("Full analysis set", "full_analysis"))
        counts = dict(zip(second["populations"]["columns"], population))
        assert row["n_b"] == f"{counts[row['arm']]}/{counts[row['reference']]}"


def test_tipping_points_and_decisions_side_by_side():
    def results(tipping, rejected, crossed=None):
        hypotheses = {"columns": ["id", "analysis", "arm", "visit", "p", "adjusted_p", "rejected"],
                      "data": [["h1", "primary", "Drug", "Week 12", 0.01, 0.02, rejected]]}
        if crossed is not None:
            hypotheses = {"columns": ["id", "analysis", "arm", "visit", "p", "tested", "boundary_p",
                                      "crossed_adjusted"],
                          "data": [["h1", "primary", "Drug", "Week 12", 0.01, True, 0.005, crossed]]}
        return {"endpoints": [{"id": "e", "decimals": 1, "analyses": [
                    {"id": "primary", "label": "Primary", "tables": {}},
                    {"id": "tp", "label": "Tipping", "tables": {"tipping_points": {
                        "columns": ["arm", "reference_shift", "tipping_shift"],
                        "data": [["Drug", 0.0, tipping], ["Drug", -2.5, None]]}}}]}],
                "multiplicity": {"method": "holm", "alpha": 0.05, "hypotheses": hypotheses}}

    tipping = compare_tipping_points(results(3.5, True), results(5.0, True))
    assert [(r["reference_shift"], r["tipping_shift_a"], r["tipping_shift_b"], r["change"]) for r in tipping] == [
        (0.0, 3.5, 5.0, 1.5), (-2.5, None, None, None)]
    same = compare_decisions(results(3.5, True), results(5.0, True))["hypotheses"][0]
    assert same["rejected_a"] is True and same["same"] is True and same["adjusted_p_b"] == 0.02
    # A group-sequential look decides by its boundary: not crossed at the earlier look, crossed later.
    looks = compare_decisions(results(3.5, None, crossed=False), results(5.0, None, crossed=True))["hypotheses"][0]
    assert (looks["rejected_a"], looks["rejected_b"], looks["same"]) == (False, True, False)
    assert looks["boundary_p_a"] == 0.005
