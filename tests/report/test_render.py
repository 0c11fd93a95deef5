"""The rendered report, checked from the outside: html.parser reads the HTML, pypdf reads the PDF.

The fixture is the invented LVT-201 rendering fixture (tests/report/fixtures.py).  Numbers are
checked against results.json with the rounding rule the report states (decimals by kind, half
away from zero), not by calling the report's own formatter.
"""
from __future__ import annotations

import json
import re
from html.parser import HTMLParser

import pytest

pypdf = pytest.importorskip("pypdf")

from trialcut.errors import InputError
from trialcut.report import render_documents, render_run
from trialcut.report.document import build_document
from trialcut.report.render import render_html, templates_folder

NUMBER = re.compile(r"<0\.\d+|-?\d+(?:\.\d+)?")


# --------------------------------------------------------------------------- reading the HTML
class TableReader(HTMLParser):
    """Every <table>: its caption text, header cells (with their scope) and body rows."""

    def __init__(self):
        super().__init__()
        self.tables, self.images, self.scripts = [], [], 0
        self._table = self._cell = None
        self._in_caption = self._in_head = False
        self._row = None

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if tag == "script":
            self.scripts += 1
        elif tag == "img":
            self.images.append(attrs)
        elif tag == "table":
            self._table = {"caption": "", "header": [], "scopes": [], "rows": []}
        elif self._table is not None:
            if tag == "caption":
                self._in_caption = True
            elif tag == "thead":
                self._in_head = True
            elif tag == "tr":
                self._row = []
            elif tag in ("td", "th"):
                self._cell = ""
                if tag == "th":
                    self._table["scopes"].append(attrs.get("scope"))

    def handle_endtag(self, tag):
        if self._table is None:
            return
        if tag == "caption":
            self._in_caption = False
        elif tag == "thead":
            self._in_head = False
        elif tag in ("td", "th") and self._cell is not None:
            self._row.append(self._cell.strip())
            self._cell = None
        elif tag == "tr":
            (self._table["header"] if self._in_head else self._table["rows"]).append(self._row)
        elif tag == "table":
            self.tables.append(self._table)
            self._table = None

    def handle_data(self, data):
        if self._in_caption:
            self._table["caption"] += data
        elif self._cell is not None:
            self._cell += data


def read_html(text: str) -> TableReader:
    reader = TableReader()
    reader.feed(text)
    return reader


def table_by_caption(reader: TableReader, fragment: str) -> dict:
    found = [t for t in reader.tables if fragment in t["caption"]]
    assert len(found) == 1, f"expected one table captioned {fragment!r}, found {len(found)}"
    return found[0]


def rows_of(results_table: dict) -> list[dict]:
    return [dict(zip(results_table["columns"], row)) for row in results_table["data"]]


# --------------------------------------------------------------------------- the rounding rule
def assert_shown(text: str, value: float | None, decimals: int) -> None:
    """``text`` is ``value`` rounded to ``decimals`` places (the report's stated rule)."""
    if value is None:
        assert text == "–"
        return
    assert re.fullmatch(rf"-?\d+\.\d{{{decimals}}}" if decimals else r"-?\d+", text), (text, decimals)
    assert abs(float(text) - value) <= 0.5 * 10 ** -decimals + 1e-9, (text, value)


def assert_p_shown(text: str, value: float) -> None:
    # p-values to 3 decimals, "<0.001" below that: common practice in trial reporting.
    if value < 0.001:
        assert text == "<0.001"
    else:
        assert_shown(text, value, 3)


# Decimals the plan of the fixture asks for: raw data to 1 decimal, means +1, SDs/SEs +2.
MEAN, SE, DF, T = 2, 3, 1, 2


def check_difference_row(cells: list[str], row: dict) -> None:
    assert_shown(cells[0], row["estimate"], MEAN)
    assert_shown(cells[1], row["se"], SE)
    assert_shown(cells[2], row["df"], DF)
    assert_shown(cells[3], row["t"], T)
    assert_p_shown(cells[4], row["p"])
    assert_shown(cells[5], row["lower"], MEAN)
    assert_shown(cells[6], row["upper"], MEAN)


# --------------------------------------------------------------------------- renders, once per module
@pytest.fixture(scope="module")
def results(report_fixtures):
    # Unlocked plan and dummy arms: the banners must then be on every PDF page.
    results = report_fixtures.build_results(unlocked=True, dummy_arms=True)
    # A listing longer than a page among the primary analysis' tables (the primary analysis
    # shows every table it carries), so a table continues onto the next PDF page.
    residuals = results["endpoints"][0]["analyses"][0]["diagnostics"]["residuals"]
    results["endpoints"][0]["analyses"][0]["tables"]["fitted_values"] = {
        "title": "Fitted values and residuals, first 70 records", "columns": residuals["columns"],
        "data": residuals["data"][:70]}
    return results


@pytest.fixture(scope="module")
def rendered(results, tmp_path_factory):
    folder = tmp_path_factory.mktemp("report")
    return render_documents(results, folder)


@pytest.fixture(scope="module")
def pdf_pages(rendered):
    return [page.extract_text() for page in pypdf.PdfReader(rendered["report.pdf"]).pages]


@pytest.fixture(scope="module")
def html_reader(rendered):
    return read_html(rendered["report.html"].read_text(encoding="utf-8"))


def primary(results):
    return results["endpoints"][0]["analyses"][0]


# --------------------------------------------------------------------------- HTML
def test_html_primary_differences_equal_results(results, html_reader):
    table = table_by_caption(html_reader, "Differences from Placebo by visit (arm minus reference)")
    # The first header row gives N per arm (issue 9: a table that stands alone); then the columns.
    assert table["header"][0][0].startswith("Full analysis set: Placebo N = ")
    assert table["header"][1] == ["Arm", "Visit", "Estimate", "Standard error", "DF", "t", "p-value",
                                  "95% confidence interval"]
    expected = rows_of(primary(results)["tables"]["differences"])
    assert len(table["rows"]) == len(expected)
    for cells, row in zip(table["rows"], expected):
        assert cells[:2] == [row["arm"], row["visit"]]
        lower, upper = re.fullmatch(r"\((\S+), (\S+)\)", cells[7]).groups()
        check_difference_row(cells[2:7] + [lower, upper], row)


def test_html_model_means_equal_results(results, html_reader):
    table = table_by_caption(html_reader, "Model-estimated means by arm and visit")
    expected = rows_of(primary(results)["tables"]["marginal_means"])
    assert len(table["rows"]) == len(expected)
    for cells, row in zip(table["rows"], expected):
        assert cells[:2] == [row["arm"], row["visit"]]
        assert_shown(cells[2], row["estimate"], MEAN)
        assert_shown(cells[3], row["se"], SE)
        lower, upper = re.fullmatch(r"\((\S+), (\S+)\)", cells[5]).groups()
        assert_shown(lower, row["lower"], MEAN)
        assert_shown(upper, row["upper"], MEAN)


def test_html_joint_tests_and_correlations_equal_results(results, html_reader):
    joint = table_by_caption(html_reader, "Tests of each effect in the model")
    for cells, row in zip(joint["rows"], rows_of(primary(results)["tables"]["joint_tests"])):
        assert_shown(cells[2], row["den_df"], DF)
        assert_shown(cells[3], row["F"], T)
        assert_p_shown(cells[4], row["p"])
    correlation = table_by_caption(html_reader, "Estimated correlation matrix")
    for cells, row in zip(correlation["rows"], primary(results)["tables"]["correlation"]["data"]):
        for text, value in zip(cells[1:], row[1:]):
            assert_shown(text, value, 3)


def test_html_is_self_contained_and_accessible(rendered, html_reader):
    text = rendered["report.html"].read_text(encoding="utf-8")
    # One file: no stylesheet links, no scripts, every image an inline data URI with alt text.
    assert "<link" not in text and html_reader.scripts == 0
    assert html_reader.images and all(i["src"].startswith("data:image/") for i in html_reader.images)
    assert all(i.get("alt", "").strip() for i in html_reader.images)
    for table in html_reader.tables:
        assert table["caption"].strip()
        assert table["scopes"] and all(scope in ("col", "row", "colgroup") for scope in table["scopes"])


def test_csv_files_hold_every_table_at_full_precision(results, rendered, html_reader):
    csv_paths = [p for key, p in rendered.items() if key.startswith("tables/")]
    # Tables laid out in the report, plus detail tables of sensitivity analyses that the report
    # names as CSV files only.
    listed = re.findall(r"<code>tables/([^<]+\.csv)</code>", rendered["report.html"].read_text(encoding="utf-8"))
    assert listed and all(f"tables/{name}" in rendered for name in listed)
    assert len(csv_paths) == len(html_reader.tables) + len(listed)
    differences = next(p for p in csv_paths if p.name.endswith("primary_differences.csv"))
    lines = differences.read_text(encoding="utf-8").splitlines()
    first = rows_of(primary(results)["tables"]["differences"])[0]
    assert float(lines[1].split(",")[3]) == first["estimate"]   # shortest round-trip repr


# --------------------------------------------------------------------------- PDF
def test_pdf_every_page_has_header_footer_and_banner(results, pdf_pages):
    total = len(pdf_pages)
    assert total > 5
    short_hash = results["plan"]["sha256"][:12]
    for number, text in enumerate(pdf_pages, start=1):
        flat = " ".join(text.split())
        assert f"LVT-201 · cut interim-1 · plan {short_hash}" in flat, number
        assert f"Page {number} of {total}" in flat, number
        assert f"Run {results['run']['id']}" in flat, number
        assert "UNLOCKED PLAN" in flat and "DUMMY TREATMENT CODES" in flat, number


def test_pdf_title_page_carries_identity_and_cautions(results, pdf_pages):
    first = " ".join(pdf_pages[0].split())
    for fact in (results["plan"]["sha256"], results["data"]["sha256"], results["run"]["id"], "Plan version 1.1",
                 "NOT LOCKED"):
        assert fact in first
    # The cautions the brief requires, on the page every reader sees.
    for words in ("qualified statistician", "regulatory, ethics committee or local review",
                  "assumptions about missing data"):
        assert words in first


def test_pdf_contents_lists_every_table_and_figure_on_its_page(pdf_pages, html_reader, rendered):
    html = rendered["report.html"].read_text(encoding="utf-8")
    listed = re.findall(r'<span class="toc-number">((?:Table|Figure) 14\.2\.\d+)</span>', html)
    contents = " ".join(" ".join(text.split()) for text in pdf_pages[1:4])
    # A title that fills its line leaves no room for the dots: the page number then follows a space.
    entries = re.findall(r"((?:Table|Figure) 14\.2\.\d+) (.+?)(?: \.{3,} ?| )(\d+)(?= Table| Figure| [A-Z]{3,}|$)",
                         contents)[:len(listed)]   # the pages read may run on past the contents
    assert [e[0] for e in entries] == listed
    for number, title, page in entries:
        page_text = " ".join(pdf_pages[int(page) - 1].split())
        # A hyphenated word broken at a line end reads "treatment- policy" in the extracted text.
        assert f"{number} {title}".replace("- ", "-") in page_text.replace("- ", "-"), (number, title, page)


def test_pdf_primary_differences_equal_results(results, pdf_pages):
    caption = "Differences from Placebo by visit (arm minus reference)"
    page = next(t for t in pdf_pages[4:] if caption in t)
    lines = page.splitlines()
    lines = lines[next(i for i, l in enumerate(lines) if caption in l):]   # this table's rows only
    for row in rows_of(primary(results)["tables"]["differences"]):
        line = next(l for l in lines if l.startswith(f"{row['arm']} {row['visit']} "))
        numbers = NUMBER.findall(line[len(f"{row['arm']} {row['visit']} "):])
        check_difference_row(numbers, row)


def test_pdf_a_table_continued_on_the_next_page_repeats_its_header(pdf_pages):
    # The listing of 70 fitted values added to the fixture's primary analysis does not fit one page.
    start = next(i for i, t in enumerate(pdf_pages) if "Fitted values and residuals, first 70" in t and i > 3)
    lines = pdf_pages[start].splitlines()
    caption = next(i for i, l in enumerate(lines) if "Fitted values and residuals" in l)
    header = next(l for l in lines[caption + 1:caption + 5] if l.startswith("USUBJID"))   # after the N-per-arm line
    assert header.startswith("USUBJID Arm Visit")
    following = pdf_pages[start + 1].splitlines()
    assert header in following[:4], following[:4]


def test_sensitivity_detail_tables_are_csv_files_named_in_the_report(results, rendered, html_reader, pdf_pages):
    # The tipping-point grid is detail of a sensitivity analysis: a CSV file at full precision,
    # named in its section; the map figure and the tipping shifts stay in the report.
    assert not [t for t in html_reader.tables if "Tipping-point grid" in t["caption"]]
    grid_csv = next(p for key, p in rendered.items() if key.startswith("tables/") and key.endswith("_tipping_grid.csv"))
    grid = results["endpoints"][0]["analyses"][-1]["tables"]["tipping_grid"]
    assert len(grid_csv.read_text(encoding="utf-8").splitlines()) == 1 + len(grid["data"])
    text = " ".join(" ".join(page.split()) for page in pdf_pages)
    assert f"tables/ {grid_csv.name}" in text or f"tables/{grid_csv.name}" in text
    assert "Tipping-point map: estimated difference" in text and "at which the conclusion changes" in text


def test_pdf_wide_tables_sit_on_landscape_pages(rendered, pdf_pages):
    reader = pypdf.PdfReader(rendered["report.pdf"])
    page = next(i for i, t in enumerate(pdf_pages) if "every analysis" in t and "Full analysis set: Placebo N" in t
                and i > 3)
    box = reader.pages[page].mediabox
    assert float(box.width) > float(box.height)


# --------------------------------------------------------------------------- determinism, re-rendering
def test_rerendering_a_run_folder_gives_identical_bytes_and_leaves_it_untouched(results, rendered, tmp_path,
                                                                                 monkeypatch):
    # Re-rendering from results.json alone must reproduce the first rendering byte for byte,
    # also when the figures are drawn in this process rather than in a forked child.
    monkeypatch.setenv("TRIALCUT_DRAW_IN_PROCESS", "1")
    run = tmp_path / "run"
    run.mkdir()
    (run / "results.json").write_text(json.dumps(results), encoding="utf-8")
    before = {p.name: p.read_bytes() for p in run.iterdir()}
    again = render_run(run, out=tmp_path / "again")
    assert {p.name: p.read_bytes() for p in run.iterdir()} == before
    assert again.pop("folder") == tmp_path / "again"
    again.pop("results.json", None)     # a re-rendering carries a copy of the results it read
    assert set(again) == set(rendered)
    for key in rendered:
        assert again[key].read_bytes() == rendered[key].read_bytes(), key
    with pytest.raises(InputError):
        render_run(run, out=run / "inside")


def test_audit_record_reaches_the_appendix(results):
    audit = {"environment": {"python": "3.11.2", "packages": {"numpy": "1.26.4"}},
             "steps": [{"step": "load plan", "seconds": 0.0123}, {"step": "endpoint fbs_change", "seconds": 4.5}],
             "warnings": ["a warning from the audit record"]}
    reader = read_html(render_html(build_document(results, audit)))
    steps = table_by_caption(reader, "Steps and their timing")
    # Steps in words, the endpoint by its label (sections_audit.py).
    endpoint_label = results["endpoints"][0]["label"]
    assert steps["rows"] == [["Load plan", "0.012"], [f"All analyses of {endpoint_label}", "4.500"]]
    assert table_by_caption(reader, "Package versions")["rows"] == [["numpy", "1.26.4"]]


def test_the_appendix_says_when_endpoints_shared_two_processes(results):
    # Steps timed in two processes at once add up to more than their whole: the note says why
    # (common practice: a reader must be able to reconcile every number in a table).
    def facts_and_note(executor):
        audit = {"executor": executor, "steps": [{"step": "load plan", "seconds": 0.01}]}
        text = render_html(build_document(results, audit))
        facts = dict(table_by_caption(read_html(text), "How the run was made")["rows"])
        return facts.get("Where the endpoints were analysed"), "two at a time, on two processes" in text

    shared, noted = facts_and_note({"workers": 1, "scheduler": None, "endpoint_processes": 2})
    assert shared.startswith("shared between the process that ran the plan and a second one") and noted
    assert facts_and_note({"workers": 1, "scheduler": None, "endpoint_processes": 1}) == (
        "in the process that ran the plan", False)
    assert facts_and_note({"workers": 1, "scheduler": None}) == (None, False)   # a run recorded before


def test_render_run_without_results_is_an_input_error(tmp_path):
    with pytest.raises(InputError, match="not found"):
        render_run(tmp_path, out=tmp_path / "out")


# --------------------------------------------------------------------------- HTML-only variants (quick)
def test_markup_in_labels_is_inert_text(report_fixtures):
    hostile = report_fixtures.with_hostile_text(report_fixtures.build_results())
    text = render_html(build_document(hostile))
    reader = read_html(text)
    assert reader.scripts == 0
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in text


def test_unknown_method_and_failed_analysis_are_shown(report_fixtures):
    results = report_fixtures.with_unknown_and_failed(report_fixtures.build_results())
    text = render_html(build_document(results))
    reader = read_html(text)
    shares = table_by_caption(reader, "Share of participants reaching the target")
    assert shares["rows"][0][0] == "Placebo"
    assert "did not complete (status: failed)" in text and "not positive definite" in text


def test_locked_plan_shows_its_lock_and_amendments_and_no_banner(report_fixtures):
    text = render_html(build_document(report_fixtures.build_results()))
    assert "Locked by A. Statistician on 2026-10-02T09:30:00Z" in text
    history = table_by_caption(read_html(text), "Plan versions and amendments")
    assert [row[0] for row in history["rows"]] == ["1.0", "1.1"]
    assert 'class="banner"' not in text and 'class="watermark"' not in text


def test_missing_trajectories_skip_the_figure_with_a_note(report_fixtures):
    results = report_fixtures.build_results()
    del results["endpoints"][0]["trajectories"]
    text = render_html(build_document(results))
    assert "Individual trajectories by arm: Not drawn" in text


def test_run_records_are_summarised_in_words(report_fixtures):
    text = render_html(build_document(report_fixtures.build_results()))
    checks = table_by_caption(read_html(text), "Conformance checks on the data cut")
    assert ["LVT-201-0117 Week 8 (line 388), LVT-201-0142 Week 4 (line 512)"] in [row[-1:] for row in checks["rows"]]
    assert "visit window: 7 records." in text and "(and 2 more in conformance.json)" in text
    assert "Lorvatide 10 mg, with Placebo shifted by δᵣ = 0.00: significant at every shift of the grid, up to δ = 1.50." in text


def test_a_repeated_measures_sensitivity_analysis_gets_its_differences_and_a_fit_sentence(report_fixtures):
    results = report_fixtures.build_results()
    analyses = results["endpoints"][0]["analyses"]
    extra = {**analyses[0], "id": "mmrm_robust", "label": "Model with sandwich errors", "role": "sensitivity"}
    analyses.append(extra)
    text = render_html(build_document(results))
    fit = extra["fit"]
    assert (f"Fit: unstructured covariance, converged after {fit['iterations']} iterations; log-likelihood "
            f"-512.83; {fit['n_subjects']} participants and {fit['n_obs']} observations.") in text
    table = [t for t in read_html(text).tables if "Differences from Placebo by visit: Model with sandwich errors;" in t["caption"]]
    assert len(table) == 1
    for cells, row in zip(table[0]["rows"], rows_of(extra["tables"]["differences"])):
        assert_shown(cells[2], row["estimate"], MEAN)


@pytest.mark.parametrize("partial", [
    {},
    {"run": {"id": "r1"}, "plan": {}, "endpoints": [{"id": "e", "analyses": []}]},
    {"endpoints": [{"id": "e", "primary_visit": "W1", "analyses": [
        {"id": "a", "role": "primary", "method": "mmrm", "status": "ok", "tables": {}, "fit": {}, "options": {}}]}]},
])
def test_sparse_results_still_render_and_say_what_is_missing(partial):
    text = render_html(build_document(partial))
    assert "<h1>" in text and "not recorded" in text


def test_templates_are_found_from_the_repository():
    assert (templates_folder() / "report.html.j2").is_file()


def test_a_templates_folder_can_be_named_and_a_bad_one_is_refused(tmp_path, monkeypatch):
    import shutil

    from trialcut.report import render as render_module

    copy_folder = tmp_path / "named"
    shutil.copytree(templates_folder(), copy_folder)
    monkeypatch.setenv("TRIALCUT_TEMPLATES", str(copy_folder))
    assert templates_folder() == copy_folder
    # Nothing anywhere: the error names the places it looked.
    monkeypatch.setenv("TRIALCUT_TEMPLATES", str(tmp_path / "empty"))
    monkeypatch.setattr(render_module, "__file__", str(tmp_path / "a" / "b" / "c" / "render.py"))
    monkeypatch.setattr(render_module.resources, "files", lambda package: tmp_path / "nowhere")
    with pytest.raises(render_module.ReportError) as raised:
        templates_folder()
    assert raised.value.problems[0].code == "report.templates_missing"


def test_a_figure_that_cannot_be_drawn_becomes_a_note_when_drawn_in_a_child(report_fixtures, tmp_path, monkeypatch):
    # The figures are drawn in a forked child while the PDF is laid out; a failure there must
    # end as it does when drawing here: a note in the figure's place, the other figures drawn.
    from trialcut.report import figures

    def broken(*args, **kwargs):
        raise RuntimeError("no ink")

    monkeypatch.setattr(figures, "forest_chart", broken)
    written = render_documents(report_fixtures.build_results(), tmp_path)
    html = written["report.html"].read_text(encoding="utf-8")
    assert "Not drawn: RuntimeError: no ink" in html
    assert not any(key.endswith("_forest.svg") for key in written)
    assert any(key.endswith("_tipping_map.svg") for key in written)
    assert written["report.pdf"].read_bytes().startswith(b"%PDF")
