"""The report's figures: one drawing for the SVG and the DOCX picture, margins fitted to the
texts as matplotlib lays them out, and a pattern chart that stays readable with many patterns.

Extents come from matplotlib's own renderer (figures.text_extents); the pattern counts are
checked against the rows given (a sum: common practice for an "all other" row).
"""
from __future__ import annotations

import io
import itertools
import random

import pytest

from trialcut.report import figures

VISITS = ["Week 2", "Week 4", "Week 8", "Week 12"]
POINTS = [{"arm": arm, "visit": visit, "centre": centre + shift, "lower": centre + shift - 1, "upper": centre + shift + 1}
          for arm, shift in (("Placebo", 0.0), ("Active", -2.0)) for visit, centre in zip(VISITS, (-1, -2, -3, -4))]


def _kept(draw):
    """The matplotlib figure a drawing call saved, and its SVG."""
    kept = []
    original = figures._svg
    try:
        figures._svg = lambda figure: kept.append(figure) or original(figure)
        svg = draw()
    finally:
        figures._svg = original
    return kept[-1], svg


def _profile():
    return figures.profile_chart(POINTS, arms=["Placebo", "Active"], visits=VISITS, visit_days=None,
                                 y_label="Change from baseline")


def test_the_picture_is_the_drawing_of_the_svg():
    # The DOCX picture is saved from the figure drawn for the SVG: the same bytes as drawing it again.
    svg, picture = figures.svg_and_picture(_profile)
    assert svg == _profile()
    png = picture()
    assert png.startswith(b"\x89PNG") and png == figures.png_of(_profile)


def test_margins_are_not_widened_when_the_texts_fit():
    # A short axis title fits in the default margins (10% of the width at the left): measuring
    # before the layout pass put it at the figure's edge and widened the margin three times over.
    import matplotlib

    figure, _ = _kept(_profile)
    with matplotlib.rc_context(figures.RC):      # laid out as saved, at the figure's own size
        figure.draw_without_rendering()
        leftmost = min(box[0] for _, box in figures.text_extents(figure))
    assert 0 <= leftmost <= 0.1 * figure.bbox.width, leftmost
    assert figures.clipped_texts(figure) == []


@pytest.mark.parametrize("seed", range(3))
def test_a_pattern_chart_with_many_patterns_shows_the_most_frequent_and_one_row_for_the_rest(seed):
    rng = random.Random(seed)
    visits = [f"Week {i}" for i in range(1, 9)]
    rows = [{"arm": arm, "pattern": "".join(bits), "count": rng.randint(1, 60)}
            for arm in ("Placebo", "Active") for bits in itertools.product("X.", repeat=8) if rng.random() < 0.4]
    figure, _ = _kept(lambda: figures.pattern_chart(rows, arms=["Placebo", "Active"], visits=visits))
    labels = [label.get_text() for label in figure.axes[0].get_yticklabels()]
    texts = [text for text, _ in figures.text_extents(figure)]
    for arm in ("Placebo", "Active"):
        mine = sorted((r["count"] for r in rows if r["arm"] == arm), reverse=True)
        assert len(mine) > figures.PATTERNS_PER_ARM, f"seed {seed}"
        assert labels.count(arm) == figures.PATTERNS_PER_ARM, f"seed {seed}"
        rest = mine[figures.PATTERNS_PER_ARM - 1:]
        assert f"{len(rest)} other patterns" in texts, f"seed {seed}"
        assert str(sum(rest)) in texts, f"seed {seed}"
    assert figures.clipped_texts(figure) == [], f"seed {seed}"


def test_a_few_patterns_are_all_drawn():
    rows = [{"arm": "Placebo", "pattern": "XXXX", "count": 40}, {"arm": "Placebo", "pattern": "XX..", "count": 3},
            {"arm": "Active", "pattern": "X...", "count": 2}]
    figure, _ = _kept(lambda: figures.pattern_chart(rows, arms=["Placebo", "Active"], visits=VISITS))
    assert [label.get_text() for label in figure.axes[0].get_yticklabels()] == ["Placebo", "Placebo", "Active"]
    assert not any("other patterns" in text for text, _ in figures.text_extents(figure))


def test_a_job_that_makes_its_svg_another_way_is_drawn_without_a_picture():
    # FigureImage.drawn takes any call that returns SVG bytes; only the DOCX picture needs a
    # matplotlib drawing, and its absence is said when the picture is asked for.
    image = figures.FigureImage("plain", "Plain", "", None, job=lambda: b"<svg/>")
    drawn, picture = image.drawn_with_picture()
    assert drawn.svg == b"<svg/>" and drawn.note == "" and image.drawn().svg == b"<svg/>"
    with pytest.raises(ValueError, match="not one"):
        picture()


def _drawn_elements(svg: bytes):
    """Each drawn element in document order with its attributes, text and the groups around it
    that carry more than an id (SVG 1.1, section 5.2: a group without presentation attributes,
    transform or clip applies nothing to its children)."""
    import xml.etree.ElementTree as ElementTree

    namespace = "{http://www.w3.org/2000/svg}"
    found = []

    def walk(node, groups):
        for child in node:
            tag = child.tag.removeprefix(namespace)
            if tag == "metadata":
                continue
            if tag == "g":
                extra = {k: v for k, v in child.attrib.items() if k != "id"}
                walk(child, groups + ((tuple(sorted(extra.items())),) if extra else ()))
                continue
            attributes = {k: " ".join(v.split()) for k, v in child.attrib.items()
                          if not (k == "transform" and v.startswith(("rotate(-0 ", "rotate(0 ")))}
            found.append((tag, tuple(sorted(attributes.items())), (child.text or "").strip(), groups))
            walk(child, groups)

    walk(ElementTree.fromstring(svg), ())
    return found


def test_the_lighter_svg_draws_the_same_elements_in_the_same_order():
    import matplotlib

    figure, _ = _kept(_profile)
    buffer = io.BytesIO()
    with matplotlib.rc_context(figures.RC):
        figure.savefig(buffer, format="svg", metadata={"Date": None})
    original = buffer.getvalue()
    lighter = figures.lighter_svg(original)
    assert len(lighter) < len(original)
    assert _drawn_elements(lighter) == _drawn_elements(original)
    assert b"<metadata" not in lighter and b'rotate(-0 ' not in lighter
