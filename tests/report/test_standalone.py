"""A report a reviewer can sign (issue 9): tables that stand alone, labels of our own, no clipped text.

Rendered from the invented LVT-201 rendering fixture (tests/report/fixtures.py), with a few
coefficient names in the formula style some libraries print, so the check that none reaches a
reader can fail.  The checks read the outputs from the outside: html.parser for the HTML, the
csv module for the CSV files, pypdf for the PDF text, and matplotlib's own renderer for the
drawn extent of every text in the figures.
"""
from __future__ import annotations

import csv
import re
from html.parser import HTMLParser

import pytest

pypdf = pytest.importorskip("pypdf")

from trialcut.report import figures, render_documents
from trialcut.report.document import build_document
from trialcut.report.render import render_html

# Labels another program prints, which the report must not (issue 9, "Labels that are not our own").
# The joint tests and the confidence level are checked by the labels we print instead (below).
NOT_OURS = ("Model term", "Std. error", "Robust no",
            "Root seed", "a unstructured", "Tipping-point map of p-values")
FORMULA_STYLE = re.compile(r"\w+\[[^\]]+\](:\w+\[[^\]]+\])?")
MISSING_PATTERN_STRING = re.compile(r"(?<![\w.])[X.]{4}(?![\w.])")


def _with_formula_names(results: dict) -> dict:
    """The fixture's primary fit with coefficient names in formula style, as a library might give them."""
    fixed = results["endpoints"][0]["analyses"][0]["tables"]["fixed_effects"]
    fixed["data"] += [["arm[Lorvatide 10 mg]:visit[Week 4]", -0.31, 0.12, 170.2, -2.58, 0.011],
                      ["STRAT1R[Severe]", -0.163, 0.0331, 171.0, -4.92, 1.2e-6]]
    return results


@pytest.fixture(scope="module")
def results(report_fixtures):
    return _with_formula_names(report_fixtures.build_results())


@pytest.fixture(scope="module")
def rendered(results, tmp_path_factory):
    return render_documents(results, tmp_path_factory.mktemp("standalone"))


@pytest.fixture(scope="module")
def document(results):
    return build_document(results, draw=False)


class Captions(HTMLParser):
    """Each table's caption, its header rows and the footnotes after it."""

    def __init__(self):
        super().__init__()
        self.tables, self._where = [], None

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if tag == "table":
            self.tables.append({"caption": "", "head": [], "footnotes": []})
        elif tag == "caption":
            self._where = "caption"
        elif tag == "thead":
            self._where = "head"
        elif tag == "ul" and attrs.get("class") == "table-footnotes":
            self._where = "footnotes"
        elif tag in ("th", "li") and self._where in ("head", "footnotes"):
            (self.tables[-1]["head"] if self._where == "head" else self.tables[-1]["footnotes"]).append("")

    def handle_endtag(self, tag):
        if tag in ("caption", "thead", "ul"):
            self._where = None

    def handle_data(self, data):
        if self._where == "caption":
            self.tables[-1]["caption"] += data
        elif self._where in ("head", "footnotes"):
            cells = self.tables[-1]["head" if self._where == "head" else "footnotes"]
            if cells:
                cells[-1] += data


def test_every_table_and_figure_title_is_unique(document):
    titles = [t.title for t in [*document.tables, *document.csv_tables]]
    assert len(titles) == len(set(titles)), sorted(t for t in titles if titles.count(t) > 1)
    figure_titles = [f.title for f in document.figures]
    assert len(figure_titles) == len(set(figure_titles))


def test_every_efficacy_table_has_n_per_arm_and_footnotes(rendered, results):
    parser = Captions()
    parser.feed(rendered["report.html"].read_text(encoding="utf-8"))
    arms = [a["code"] for a in results["plan"]["arms"]["list"]]
    # An efficacy table: an endpoint's table with one row per arm (differences, means, summaries).
    efficacy = [t for t in parser.tables if re.search(r"Differences from|Model-estimated means|every analysis|"
                                                      r"Observed values by arm|conclusion changes", t["caption"])]
    assert len(efficacy) >= 6
    for table in efficacy:
        counts = table["head"][0]
        for arm in arms:
            assert re.search(rf"{re.escape(arm)} N = \d+", counts), (table["caption"], counts)
        notes = " ".join(table["footnotes"])
        assert "Source: " in notes and "data file SHA-256 " in notes, table["caption"]
        assert "Abbreviations: " in notes, table["caption"]
        if "Differences from" in table["caption"]:
            assert "Confidence level: 95%" in notes, table["caption"]
            assert re.search(r"Model: |Imputation under ", notes), table["caption"]


def test_every_table_of_a_model_fit_stands_alone(rendered, results):
    # The supporting tables of a fit (covariance and correlation matrices, structures tried, covariate
    # values, the fit's facts) are read on their own too: N per arm and the source, like the efficacy ones.
    parser = Captions()
    parser.feed(rendered["report.html"].read_text(encoding="utf-8"))
    arms = [a["code"] for a in results["plan"]["arms"]["list"]]
    supporting = [t for t in parser.tables if re.search(r"matrix between visits|Covariance structures tried|"
                                                        r"Covariate values used|Fit of the model|effect within each level|"
                                                        r"Test of equal effects", t["caption"])]
    assert len(supporting) >= 4, [t["caption"] for t in parser.tables]
    for table in supporting:
        assert all(re.search(rf"{re.escape(arm)} N = \d+", table["head"][0]) for arm in arms), table["caption"]
        assert "Source: " in " ".join(table["footnotes"]), table["caption"]


def test_no_axis_label_or_other_text_is_clipped(results, monkeypatch):
    """Every text's drawn extent lies inside its figure (matplotlib's renderer bounding boxes)."""
    drawn = []
    original = figures._svg

    def keep(figure):
        drawn.append(figure)
        return original(figure)

    monkeypatch.setattr(figures, "_svg", keep)
    document = build_document(results, draw=True)
    assert len(drawn) == len(document.figures) >= 6
    for figure in drawn:
        assert figures.clipped_texts(figure) == [], figures.clipped_texts(figure)
        labels = [a.yaxis.label.get_text() for a in figure.axes if a.yaxis.label.get_text()]
        assert not any("0-60" in label or "range" in label.lower() for label in labels), labels


def test_a_long_axis_title_is_kept_inside_the_figure():
    # A y-axis title longer than the axis is tall was cut off at the figure's edge (issue 9, Figures 2–4).
    drawn = []
    original = figures._svg
    try:
        figures._svg = lambda figure: drawn.append(figure) or original(figure)
        figures.profile_chart(
            [{"arm": "A", "visit": "W1", "centre": 1.0, "lower": 0.5, "upper": 1.5}], arms=["A"], visits=["W1"],
            visit_days=None, y_label="Change from baseline in a score with a long and descriptive name of its own")
    finally:
        figures._svg = original
    assert figures.clipped_texts(drawn[0]) == []


def test_rounding_sentence_matches_the_decimals_of_the_tables(results):
    html = render_html(build_document(results))
    sentence = re.search(r"In the tables of this endpoint, means, medians, estimated differences and confidence "
                         r"limits are shown to (\d+) decimals? and standard deviations and standard errors to "
                         r"(\d+) decimals?", html)
    assert sentence, "the endpoint states how its values are rounded"
    mean_decimals, se_decimals = int(sentence.group(1)), int(sentence.group(2))
    decimals = results["plan"]["report"]["decimals"]
    recorded = results["endpoints"][0]["decimals"]
    assert (mean_decimals, se_decimals) == (recorded + decimals["mean_extra"], recorded + decimals["sd_extra"])
    # The primary differences table shows exactly those decimals (estimate and standard error columns).
    table = html[html.index("Differences from Placebo by visit (arm minus reference)", html.index("<main>")):]
    body = table[table.index("<tbody>"):table.index("</tbody>")]
    for row in re.findall(r"<tr>(.*?)</tr>", body):
        cells = re.findall(r'<td class="num">([^<]*)</td>', row)
        assert re.fullmatch(rf"-?\d+\.\d{{{mean_decimals}}}", cells[0]), cells
        assert re.fullmatch(rf"\d+\.\d{{{se_decimals}}}", cells[1]), cells


def test_no_replaced_label_appears_in_any_output(rendered):
    html = rendered["report.html"].read_text(encoding="utf-8")
    pdf = " ".join(page.extract_text() for page in pypdf.PdfReader(rendered["report.pdf"]).pages)
    csv_text = " ".join(cell for key, path in rendered.items() if key.startswith("tables/")
                        for row in csv.reader(path.read_text(encoding="utf-8").splitlines()) for cell in row)
    for name, text in (("HTML", html), ("PDF", " ".join(pdf.split())), ("CSV", csv_text)):
        for label in NOT_OURS:
            assert label not in text, (name, label)
        assert not FORMULA_STYLE.search(text.replace("[", "[") if name != "HTML" else re.sub(r"<[^>]+>", " ", html)), \
            (name, FORMULA_STYLE.search(text))
        assert not MISSING_PATTERN_STRING.search(text), (name, MISSING_PATTERN_STRING.search(text))
    assert "Arm by visit: Lorvatide 10 mg, Week 4" in html and "STRAT1R: Severe" in html
    assert "Tests of each effect in the model" in html and "Confidence level" in html


def test_an_unlocked_dry_run_says_so_in_every_running_header_and_claims_no_locked_plan(report_fixtures):
    results = report_fixtures.build_results(unlocked=True, dummy_arms=True)
    document = build_document(results, draw=False)
    assert document.header_text.startswith("UNLOCKED PLAN · DUMMY TREATMENT CODES · ")
    html = render_html(document)
    assert "run from a prespecified" not in html.lower()
    assert "not locked" in document.kicker and "not locked" in document.cautions[0]
    locked = build_document(report_fixtures.build_results(), draw=False)
    assert not locked.marks and "locked plan" in locked.kicker


def test_the_lock_reason_is_said_once_on_the_cover(report_fixtures):
    results = report_fixtures.build_results()
    facts = dict(build_document(results, draw=False).facts)
    reason = results["plan"]["lock"].get("reason")
    assert facts["Lock status"].startswith("Locked by ") and (reason is None or reason not in facts["Lock status"])
    cover = " ".join(facts.values())
    assert reason is None or cover.count(reason) == 1


def test_multiplicity_shows_the_order_and_a_conclusion(rendered):
    html = rendered["report.html"].read_text(encoding="utf-8")
    section = html[html.index('id="multiplicity-title"'):]
    assert "Conclusion: " in section
    table = section[section.index("<table"):section.index("</table>")]
    assert "<th scope=\"col\" class=\"num\">Weight</th>" not in table   # Holm with equal weights
    assert "&lt;0.001" not in table and "<0.001" not in table          # the order of small p-values shows


def _headings(sections, prefix=""):
    for position, section in enumerate(sections, start=1):
        number = f"{prefix}{position}"
        yield f"{number} {section.title}"
        yield from _headings(section.subsections, f"{number}.")


def test_no_page_strands_a_heading_or_holds_a_stray_line(rendered, document):
    # Issue 9: a section heading stood alone at the foot of a page, and a page held one line.
    pages = [page.extract_text() for page in pypdf.PdfReader(rendered["report.pdf"]).pages]
    openings = {" ".join(h.split())[:40] for h in _headings(document.sections)}
    for number, text in enumerate(pages, start=1):
        body = [" ".join(line.split()) for line in text.splitlines()
                if line.strip() and not re.search(r"Page \d+ of \d+|trialcut report|^Run \S+$", line.strip())]
        body = [line for line in body if not line.startswith(("UNLOCKED PLAN", "DUMMY TREATMENT"))]
        assert len(body) >= 4, (number, body)
        assert not any(body[-1].startswith(opening) for opening in openings), (number, body[-3:])
