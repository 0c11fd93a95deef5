"""The report's figures, drawn with matplotlib into SVG bytes that do not change between runs.

Determinism: SVG ids come from ``svg.hashsalt`` (fixed here) and the date is left out of the
metadata.  Text stays text (``svg.fonttype`` "none", font DejaVu Sans, which the PDF engine and
chromium both have): outlined glyphs made the SVGs twice as large and twice as slow to draw in
the PDF.  ``text.parse_math`` is off so a label with "$" is shown, not parsed.  Figures are
built on ``matplotlib.figure.Figure`` directly (no pyplot state shared between calls).  The SVG
is made lighter for the PDF engine (``lighter_svg``: no id-only groups, no zero rotations, no
metadata block), and the DOCX picture is saved from the same drawing (``svg_and_picture``).
"""
from __future__ import annotations

import contextvars
import io
import math
import re
from dataclasses import dataclass, field, replace
from typing import Any, Callable, Mapping, Sequence

import numpy as np

# Colours of our own: a muted reference grey, then distinguishable hues (also in grey print).
ARM_COLOURS = ("#5d6670", "#0f7c78", "#c4621d", "#6d4a92", "#a23b52", "#3d6fb0", "#7c8a1f")
ARM_MARKERS = ("o", "s", "^", "D", "v", "P", "X")
INK = "#1f2a33"
GRID = "#d9dee2"

RC = {
    "svg.hashsalt": "trialcut-report",
    "savefig.dpi": 200,          # only rasterised layers (dense scatter points) use it
    "svg.fonttype": "none",
    "text.parse_math": False,
    "font.family": "DejaVu Sans",
    "font.size": 8.5,
    "axes.edgecolor": INK,
    "axes.labelcolor": INK,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": True,
    "grid.color": GRID,
    "grid.linewidth": 0.6,
    "xtick.color": INK,
    "ytick.color": INK,
    "legend.frameon": False,
}


@dataclass(frozen=True)
class FigureImage:
    slug: str
    title: str
    alt: str
    svg: bytes | None       # None: not drawn (yet, when ``job`` is set; else ``note`` says why)
    note: str = ""
    number: str = ""
    anchor: str = ""
    # How to draw it (a call returning SVG bytes), kept until it is drawn: the renderer may
    # draw every figure in a second process while the PDF engine lays out the text.
    job: Callable[[], bytes] | None = field(default=None, compare=False, repr=False)
    link: str = ""          # set: the PDF's HTML names the image by this URL instead of inlining it

    @property
    def shown(self) -> bool:
        """Drawn, or waiting to be drawn: it takes a number and a place in the report."""
        return self.svg is not None or self.job is not None

    def drawn(self) -> "FigureImage":
        """This figure drawn here and now; a drawing failure becomes a note, not a failed report."""
        return self.drawn_with_picture()[0] if self.job is not None else self

    def as_drawn(self, svg: bytes | None, note: str = "") -> "FigureImage":
        """This figure as drawn elsewhere (another process): its SVG, or None with the note of the
        failure; no longer waiting to be drawn, nor linked."""
        return replace(self, svg=svg, job=None, link="", note=note or self.note)

    def drawn_with_picture(self) -> tuple["FigureImage", Callable[[], bytes] | None]:
        """This figure drawn here and now, and a call that saves the same drawing as PNG (see
        svg_and_picture); None when there is nothing to save (already drawn, or it failed)."""
        if self.job is None:
            return self, None
        try:
            svg, picture = svg_and_picture(self.job)
        except Exception as error:  # noqa: BLE001 - one bad figure must not hide the rest of the report
            return replace(self, svg=None, job=None, note=f"Not drawn: {type(error).__name__}: {error}"), None
        return replace(self, svg=svg, job=None), picture


def _new_figure(width: float, height: float, layout: str | None):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    # 72 dots per inch, the SVG's own unit: make_room and clipped_texts then measure the texts
    # at the size the SVG lays them out (matplotlib rounds glyph widths to whole pixels, so
    # a label measured at another resolution can be several points shorter than in the SVG).
    figure = Figure(figsize=(width, height), dpi=SVG_DPI, layout=layout)
    # A canvas of its own keeps one renderer for every layout pass and measurement (make_room,
    # text_extents), so text sizes measured once are reused; without one, matplotlib makes a
    # new renderer, and measures every text again, on each pass.
    FigureCanvasAgg(figure)
    return figure


def _svg(figure) -> bytes:
    """The figure as SVG.  A figure with fixed margins (no layout engine) is checked after
    saving: while a text of the saved drawing sticks out, its margins are widened and it is
    saved again.  Measuring the drawing just saved spares a layout pass of its own (most
    figures fit at once), and it measures the texts where the SVG has them."""
    saved = _save_svg(figure)
    if figure.get_layout_engine() is None:
        for _ in range(3):
            if not make_room(figure):
                break
            saved = _save_svg(figure)
    kept = _KEPT.get()
    if kept is not None:
        kept.append(figure)
    return saved


def _save_svg(figure) -> bytes:
    import matplotlib

    buffer = io.BytesIO()
    with matplotlib.rc_context(RC):
        figure.savefig(buffer, format="svg", metadata={"Date": None})
    return lighter_svg(buffer.getvalue())


SVG_NAMESPACE, XLINK_NAMESPACE = "http://www.w3.org/2000/svg", "http://www.w3.org/1999/xlink"


def lighter_svg(data: bytes) -> bytes:
    """The same picture in fewer elements, for the PDF engine and the browser.

    matplotlib wraps every artist in a group that carries only an id (no style, transform or
    clip), writes a rotation of zero on every text and adds a block of metadata; the PDF engine
    cascades styles and draws each element, so these cost about a quarter of its time on the
    figures.  Children of such groups move up into their place; nothing else changes (the ids
    of groups are never referenced, only those of definitions and clip paths, which stay)."""
    import xml.etree.ElementTree as ElementTree

    ElementTree.register_namespace("", SVG_NAMESPACE)
    ElementTree.register_namespace("xlink", XLINK_NAMESPACE)
    root = ElementTree.fromstring(data)
    for metadata in root.findall(f"{{{SVG_NAMESPACE}}}metadata"):
        root.remove(metadata)
    _unwrap_plain_groups(root)
    for text in root.iter(f"{{{SVG_NAMESPACE}}}text"):
        if _NO_ROTATION.fullmatch(text.get("transform", "")):
            del text.attrib["transform"]
    return ElementTree.tostring(root, encoding="utf-8", xml_declaration=True)


_NO_ROTATION = re.compile(r"rotate\(-?0 \S+ \S+\)")


def _unwrap_plain_groups(parent) -> None:
    group_tag = f"{{{SVG_NAMESPACE}}}g"
    children = []
    for child in list(parent):
        _unwrap_plain_groups(child)
        if child.tag == group_tag and set(child.attrib) <= {"id"} and not (child.text or "").strip():
            children.extend(child)
        else:
            children.append(child)
    parent[:] = children


def _png(figure) -> bytes:
    # The editable copy (DOCX) takes pictures; PNG from the Agg renderer carries no date, so
    # the same drawing gives the same bytes.  Compression level 3 instead of the default 6:
    # a fifth of the picture's time saved for files about a tenth larger (the DOCX about 5%).
    import matplotlib

    buffer = io.BytesIO()
    with matplotlib.rc_context(RC):
        figure.savefig(buffer, format="png", dpi=RASTER_DPI, metadata={"Software": None},
                       pil_kwargs={"compress_level": PNG_COMPRESSION})
    return buffer.getvalue()


PNG_COMPRESSION = 3


# A list while svg_and_picture draws: the figure saved as SVG is kept for its picture.
_KEPT: contextvars.ContextVar[list | None] = contextvars.ContextVar("trialcut_figure_kept", default=None)
RASTER_DPI = 200
SVG_DPI = 72


def png_of(job: Callable[[], bytes]) -> bytes:
    """The PNG of a figure's drawing job: the drawing of its SVG, saved as a picture."""
    return svg_and_picture(job)[1]()


def svg_and_picture(job: Callable[[], bytes]) -> tuple[bytes, Callable[[], bytes]]:
    """A figure's SVG now, and a call that saves the same drawing as PNG later.

    Drawing a figure (its artists and the margins fitted to its texts) costs more than saving
    it, so the picture for the DOCX copy is saved from the figure already drawn for the SVG
    instead of drawing it again.  The figure is kept until the call is made (once)."""
    kept: list = []
    token = _KEPT.set(kept)
    try:
        svg = job()
    finally:
        _KEPT.reset(token)

    def picture() -> bytes:
        if len(kept) != 1:   # a job that made its SVG some other way has no drawing to save
            raise ValueError(f"the figure's drawing job saved {len(kept)} matplotlib figures, not one")
        return _png(kept.pop())

    return svg, picture


def _draw(draw, *args, width=6.4, height=3.4, layout="constrained", **kwargs) -> bytes:
    """Draw and save one figure.  ``layout=None`` uses fixed margins (fitted to the texts by
    _svg): the constrained layout costs an extra drawing pass, worth it only where long tick
    labels need room."""
    import matplotlib

    with matplotlib.rc_context(RC):
        figure = _new_figure(width, height, layout)
        if layout is None:
            figure.subplots_adjust(left=0.1, right=0.97, top=0.9, bottom=0.2, wspace=0.28)
        if layout == "constrained":   # a little more room than the default, so descenders stay inside
            figure.get_layout_engine().set(w_pad=6 / 72, h_pad=6 / 72)
        draw(figure, *args, **kwargs)
        return _svg(figure)


def axis_title(text: str, width: int = 34) -> str:
    """A y-axis title wrapped onto lines short enough to fit beside a 3-inch-high axis."""
    import textwrap

    return textwrap.fill(text, width)


def text_extents(figure) -> list[tuple[str, tuple[float, float, float, float]]]:
    """Every visible text of ``figure`` (axis titles, tick labels, titles, legends, annotations)
    with its drawn extent in figure pixels (x0, y0, x1, y1), from matplotlib's renderer."""
    renderer = figure._get_renderer()   # the figure's own (Agg) renderer, as savefig would use
    found, undrawn = [], _ticks_outside_view(figure)
    for artist in figure.findobj(lambda a: hasattr(a, "get_text") and hasattr(a, "get_window_extent")):
        if not artist.get_visible() or not str(artist.get_text()).strip() or id(artist) in undrawn:
            continue
        box = artist.get_window_extent(renderer)
        found.append((str(artist.get_text()), (box.x0, box.y0, box.x1, box.y1)))
    return found


def _ticks_outside_view(figure) -> set[int]:
    """Tick labels matplotlib keeps but does not draw (their tick lies outside the axis' limits)."""
    hidden = set()
    for axes in figure.axes:
        for axis in (axes.xaxis, axes.yaxis):
            low, high = sorted(axis.get_view_interval())
            margin = 1e-9 * max(1.0, abs(high - low))
            for tick in [*axis.get_major_ticks(), *axis.get_minor_ticks()]:
                if not low - margin <= tick.get_loc() <= high + margin:
                    hidden.update({id(tick.label1), id(tick.label2)})
    return hidden


def clipped_texts(figure, tolerance: float = 0.5) -> list[str]:
    """The texts whose drawn extent leaves the figure: a clipped axis title, a cut tick label.

    The figure is laid out again at its own size first: matplotlib places axis titles and
    legends while drawing, so after a save (an SVG is drawn at 72 dots per inch) their
    positions are those of that drawing, not of the figure's pixels measured here.  The layout
    uses the settings the figure is saved with (a tick label's size, so the ticks chosen)."""
    import matplotlib

    with matplotlib.rc_context(RC):
        figure.draw_without_rendering()
        width, height = figure.bbox.width, figure.bbox.height
        return [text for text, (x0, y0, x1, y1) in text_extents(figure)
                if x0 < -tolerance or y0 < -tolerance or x1 > width + tolerance or y1 > height + tolerance]


def make_room(figure, pad: float = 4.0) -> bool:
    """Widen the margins of a fixed-margin figure where a text sticks out; whether they moved.

    Call it on a figure just drawn at its own size (saved as SVG: its dots per inch are the
    SVG's): matplotlib places axis titles and legends while drawing, so before a drawing they
    sit at the figure's edge (measuring them there widened every margin three times over and
    left wide empty bands).  A long axis title or tick label drawn with fixed margins runs past
    the figure's edge and is cut off in the SVG (and so in the PDF and the HTML): move the axes
    in by what sticks out plus ``pad``; the caller draws and measures again (a moved axis moves
    its labels)."""
    width, height = figure.bbox.width, figure.bbox.height
    extents = [box for _, box in text_extents(figure)]
    if not extents:
        return False
    # How far the texts stick out on each side (0 when inside); move the axes in by that plus a pad.
    left = max(0.0, max(-x0 for x0, _, _, _ in extents))
    bottom = max(0.0, max(-y0 for _, y0, _, _ in extents))
    right = max(0.0, max(x1 - width for _, _, x1, _ in extents))
    top = max(0.0, max(y1 - height for _, _, _, y1 in extents))
    if not (left or bottom or right or top):
        return False
    params = figure.subplotpars
    figure.subplots_adjust(left=min(0.45, params.left + (left + pad if left else 0) / width),
                           bottom=min(0.45, params.bottom + (bottom + pad if bottom else 0) / height),
                           right=max(0.55, params.right - (right + pad if right else 0) / width),
                           top=max(0.55, params.top - (top + pad if top else 0) / height))
    return True


def arm_style(arms: Sequence[str], arm: str) -> dict[str, Any]:
    position = list(arms).index(arm) if arm in arms else len(arms)
    return {"color": ARM_COLOURS[position % len(ARM_COLOURS)], "marker": ARM_MARKERS[position % len(ARM_MARKERS)]}


def _dodge(arms: Sequence[str], arm: str, spacing: float) -> float:
    centre = (len(arms) - 1) / 2
    return (list(arms).index(arm) - centre) * spacing


def _visit_axis(axes, visits: Sequence[str], positions: Sequence[float], label: str):
    axes.set_xticks(list(positions), list(visits))
    axes.set_xlabel(label)


def _positions(visits: Sequence[str], visit_days: Mapping[str, float] | None) -> list[float]:
    if visit_days and all(visit_days.get(v) is not None for v in visits):
        return [float(visit_days[v]) for v in visits]
    return [float(i + 1) for i in range(len(visits))]


# --------------------------------------------------------------------------- profiles
def profile_chart(points: Sequence[Mapping[str, Any]], *, arms, visits, visit_days, y_label: str,
                  reference_line: bool = True) -> bytes:
    """Points {arm, visit, centre, lower, upper} as lines with vertical interval bars."""
    positions = _positions(visits, visit_days)
    spacing = (max(positions) - min(positions) or 1) * 0.012

    def draw(figure):
        axes = figure.subplots()
        for arm in arms:
            style = arm_style(arms, arm)
            mine = {p["visit"]: p for p in points if p["arm"] == arm}
            xs, ys, low, high = [], [], [], []
            for visit, x in zip(visits, positions):
                point = mine.get(visit)
                if point is None or point.get("centre") is None:
                    continue
                xs.append(x + _dodge(arms, arm, spacing))
                ys.append(point["centre"])
                low.append(point["centre"] - (point.get("lower") if point.get("lower") is not None else point["centre"]))
                high.append((point.get("upper") if point.get("upper") is not None else point["centre"]) - point["centre"])
            axes.errorbar(xs, ys, yerr=[low, high], color=style["color"], marker=style["marker"],
                          markersize=4.5, linewidth=1.4, capsize=2.5, elinewidth=1.0, label=arm)
        if reference_line:
            axes.axhline(0, color=INK, linewidth=0.7, linestyle=(0, (4, 3)))
        _visit_axis(axes, visits, positions, "Visit")
        axes.set_ylabel(axis_title(y_label))
        axes.legend(loc="best", fontsize=8)

    return _draw(draw, layout=None)


def trajectories_chart(series: Mapping[str, Mapping[str, list[tuple[str, float]]]], *, arms, visits,
                       visit_days, y_label: str) -> bytes:
    """One panel per arm; ``series[arm][subject]`` is that participant's (visit, value) list."""
    positions = dict(zip(visits, _positions(visits, visit_days)))

    def draw(figure):
        panels = figure.subplots(1, len(arms), sharey=True, squeeze=False)[0]
        for axes, arm in zip(panels, arms):
            colour = arm_style(arms, arm)["color"]
            for subject in sorted(series.get(arm, {})):
                values = [(positions[v], y) for v, y in series[arm][subject] if v in positions and y is not None]
                values.sort()
                if values:
                    xs, ys = zip(*values)
                    # Lines only: a marker per visit multiplies the SVG's elements and its drawing time.
                    axes.plot(xs, ys, color=colour, linewidth=0.7, alpha=0.55)
            # The count on a line of its own: side by side, long arm names ran into each other.
            axes.set_title(f"{arm}\n(n = {len(series.get(arm, {}))})", fontsize=8.5, color=INK)
            axes.set_xticks(list(positions.values()), list(positions), rotation=45, ha="right")
        panels[0].set_ylabel(axis_title(y_label))

    return _draw(draw, height=3.0, layout=None)


# --------------------------------------------------------------------------- missing data
NOT_YET_DUE_MARK, NOT_YET_DUE_COLOUR = "-", "#dddddd"


PATTERNS_PER_ARM = 15


def pattern_chart(rows: Sequence[Mapping[str, Any]], *, arms, visits) -> bytes:
    """Tiles: one row per arm and pattern, a filled tile per observed visit, the count beside it.

    An arm with more than PATTERNS_PER_ARM patterns (many visits in a large trial can give
    hundreds) shows its most frequent ones and one row for the rest, with their number and
    participants: the chart stays readable, and its table lists every pattern."""
    ordered = [r for arm in arms for r in _most_frequent_patterns([r for r in rows if r.get("arm") == arm])]
    height = max(2.2, 0.22 * len(ordered) + 1.0)

    def draw(figure):
        axes = figure.subplots()
        axes.grid(False)
        for y, row in enumerate(ordered):
            style = arm_style(arms, row.get("arm"))
            if row.get("others"):
                axes.text(-0.42, y, f"{row['others']} other patterns", va="center", fontsize=7.5, color=INK)
            pattern = str(row.get("pattern") or "")
            for x, mark in enumerate(pattern[: len(visits)]):
                if mark == NOT_YET_DUE_MARK:   # neither observed nor missing: a category of its own
                    axes.add_patch(_tile(x, y, NOT_YET_DUE_COLOUR, True))
                    continue
                observed = mark not in (".", " ", "0")
                axes.add_patch(_tile(x, y, style["color"] if observed else "#ffffff", observed))
            axes.text(len(visits) + 0.15, y, f"{row.get('count', '')}", va="center", fontsize=8, color=INK)
        axes.set_xlim(-0.6, len(visits) + 0.9)
        axes.set_ylim(len(ordered) - 0.5, -0.5)
        axes.set_xticks(range(len(visits)), list(visits))
        axes.set_yticks(range(len(ordered)), [f"{r.get('arm')}" for r in ordered], fontsize=7.5)
        axes.xaxis.tick_top()
        axes.spines[:].set_visible(False)
        axes.tick_params(length=0)
        not_due = any(NOT_YET_DUE_MARK in str(r.get("pattern") or "") for r in ordered)
        # Short words and a smaller size: with the not-yet-due tile the key ran past the figure's right edge.
        axes.set_xlabel("Filled: observed; open: missing" + ("; light grey: not yet due at the cut-off"
                        if not_due else "") + ".\nNumber at right: participants.", fontsize=8)
        # Margins in inches (the visit names above, the two-line key below): as fractions of a
        # figure that grows with its rows they left an empty band under the key of a large cut.
        figure.subplots_adjust(top=1 - 0.3 / height, bottom=0.45 / height)

    return _draw(draw, height=height, layout=None)     # fixed margins, widened by make_room until the key fits


def _most_frequent_patterns(rows: Sequence[Mapping[str, Any]]) -> list[Mapping[str, Any]]:
    """One arm's pattern rows, or its PATTERNS_PER_ARM - 1 most frequent (in their order) and a
    row {arm, others: how many patterns, count: their participants} for the rest."""
    if len(rows) <= PATTERNS_PER_ARM:
        return list(rows)
    counts = [row.get("count") if isinstance(row.get("count"), (int, float)) else 0 for row in rows]
    ranked = sorted(range(len(rows)), key=lambda position: -counts[position])     # stable: ties keep their order
    kept = sorted(ranked[: PATTERNS_PER_ARM - 1])
    rest = ranked[PATTERNS_PER_ARM - 1:]
    total = sum(counts[position] for position in rest)
    return [*(rows[position] for position in kept),
            {"arm": rows[0].get("arm"), "others": len(rest), "count": int(total) if total == int(total) else total}]


def _tile(x: float, y: float, colour: str, filled: bool):
    from matplotlib.patches import Rectangle

    return Rectangle((x - 0.42, y - 0.38), 0.84, 0.76, facecolor=colour,
                     edgecolor=INK if not filled else colour, linewidth=0.6)


# --------------------------------------------------------------------------- diagnostics
RESIDUAL_POINTS = 4000


def residual_chart(fitted: Sequence[float], residuals: Sequence[float], *, residual_label: str) -> bytes:
    """Normal quantile plot (Blom plotting positions) and residuals against fitted values."""
    from statistics import NormalDist   # the standard library's inverse normal: no scipy import here

    values = np.asarray(residuals, dtype=float)
    order = np.sort(values)
    n = order.size
    inverse = NormalDist().inv_cdf
    # A large cut has hundreds of thousands of residuals: each plot draws at most
    # RESIDUAL_POINTS, evenly spaced (order statistics keep the quantile plot's shape and both
    # tails; every k-th pair keeps the scatter's spread), so drawing time does not grow with the cut.
    shown = np.unique(np.linspace(0, n - 1, min(n, RESIDUAL_POINTS)).round().astype(int)) if n else np.arange(0)
    theoretical = np.array([inverse((i + 1 - 0.375) / (n + 0.25)) for i in shown])
    order = order[shown]
    fitted = np.asarray(fitted, dtype=float)[shown]
    scattered = values[shown]

    def draw(figure):
        left, right = figure.subplots(1, 2)
        left.scatter(theoretical, order, s=6, color=ARM_COLOURS[1], alpha=0.7, linewidths=0, rasterized=True)
        slope, intercept = np.std(values, ddof=1), np.mean(values)
        line = np.array([theoretical.min(), theoretical.max()])
        left.plot(line, intercept + slope * line, color=INK, linewidth=0.9)
        left.set_xlabel("Normal quantile")
        left.set_ylabel(residual_label)
        left.set_title("Normal quantile plot", fontsize=8.5, color=INK)
        right.scatter(fitted, scattered, s=6, color=ARM_COLOURS[2], alpha=0.6, linewidths=0, rasterized=True)
        right.axhline(0, color=INK, linewidth=0.8)
        right.set_xlabel("Fitted value")
        right.set_ylabel(residual_label)
        right.set_title("Residuals against fitted values" + (f" ({len(shown):,} of {n:,} drawn)" if len(shown) < n else ""),
                        fontsize=8.5, color=INK)

    return _draw(draw, height=3.0, layout=None)


# --------------------------------------------------------------------------- sensitivity
def tipping_chart(cells: Sequence[Mapping[str, Any]], *, arms: Sequence[str], alpha: float,
                  label=lambda value: f"{value:.2f}", shift_label=lambda value: f"{value:g}") -> bytes:
    """One panel per arm: a tile per (active-arm shift, reference-arm shift), teal while the
    difference stays significant at ``alpha`` and amber once it does not; text: the estimate."""
    from matplotlib.patches import Patch

    panel_arms = [a for a in arms if any(c["arm"] == a for c in cells)]
    significant, lost, unknown = "#7fb8b4", "#f0b27a", "#ffffff"
    n_rows = len({c.get("reference_shift") or 0.0 for c in cells})
    height = max(2.2, 1.5 + 0.55 * n_rows)

    def draw(figure):
        panels = figure.subplots(1, len(panel_arms), squeeze=False)[0]
        for axes, arm in zip(panels, panel_arms):
            mine = [c for c in cells if c["arm"] == arm]
            shifts = sorted({c["shift"] for c in mine})
            reference_shifts = sorted({c.get("reference_shift") or 0.0 for c in mine}, reverse=True)
            for c in mine:
                row = reference_shifts.index(c.get("reference_shift") or 0.0)
                column = shifts.index(c["shift"])
                p = c.get("p")
                colour = unknown if p is None else (significant if p < alpha else lost)
                axes.add_patch(_tile(column, row, colour, True))
                if c.get("estimate") is not None:
                    axes.text(column, row, label(c["estimate"]), ha="center", va="center", fontsize=6.5, color=INK)
            axes.grid(False)
            axes.set_xlim(-0.5, len(shifts) - 0.5)
            axes.set_ylim(len(reference_shifts) - 0.5, -0.5)
            # Shifts as the text and tables print them (-5.0, not -5), so a tile can be found from a table row.
            axes.set_xticks(range(len(shifts)), [shift_label(s) for s in shifts])
            axes.set_yticks(range(len(reference_shifts)), [shift_label(s) for s in reference_shifts])
            axes.set_xlabel("Shift added in the active arm")
            axes.set_title(arm, fontsize=8.5, color=INK)
            axes.spines[:].set_visible(False)
        panels[0].set_ylabel("Shift added in the reference arm")
        figure.legend(handles=[Patch(color=significant, label=f"p < {alpha:g} (two-sided, nominal)"),
                               Patch(color=lost, label=f"p ≥ {alpha:g}")],
                      loc="lower center", ncols=2, fontsize=8, bbox_to_anchor=(0.5, 0.0))
        figure.subplots_adjust(bottom=0.8 / height, top=1 - 0.35 / height, left=0.12)

    return _draw(draw, height=height, layout=None)


def forest_chart(rows: Sequence[Mapping[str, Any]], *, arms: Sequence[str], x_label: str,
                 favours: tuple[str, str] | None = None, label=lambda value: f"{value:.1f}",
                 no_effect: float | None = 0.0) -> bytes:
    """One band per analysis, one line per arm inside it: the estimate and its confidence interval,
    the numbers at the right, the primary analysis in bold and the side each arm is favoured on."""
    import textwrap

    labels = list(dict.fromkeys(r["label"] for r in rows))
    primary = {r["label"] for r in rows if r.get("primary")}
    shown_arms = [a for a in arms if any(_arm_of(r) == a for r in rows)] or list(dict.fromkeys(_arm_of(r) for r in rows))
    wrapped = {l: textwrap.fill(("Primary: " if l in primary else "") + str(l), 40) for l in labels}
    # Each band is as tall as its label's lines (or its arms' lines, if more), plus a gap, in
    # units of one text line: a long label never runs into the next one.
    lines = [max(wrapped[l].count("\n") + 1, len(shown_arms)) + 0.8 for l in labels]
    centres = [sum(lines[:i]) + lines[i] / 2 for i in range(len(labels))]
    step = 0.9      # text lines between the arms' lines inside a band
    height = max(2.4, 0.17 * sum(lines) + 1.3)     # about 0.15 inch per line of 7.5-point text

    def draw(figure):
        axes = figure.subplots()
        for row in rows:
            arm = _arm_of(row)
            style = arm_style(arms, arm)
            offset = (shown_arms.index(arm) - (len(shown_arms) - 1) / 2) * step if arm in shown_arms else 0
            y = centres[labels.index(row["label"])] + offset
            if row.get("lower") is not None and row.get("upper") is not None:
                axes.plot([row["lower"], row["upper"]], [y, y], color=style["color"], linewidth=1.6)
            axes.plot([row["estimate"]], [y], marker=style["marker"], color=style["color"], markersize=5,
                      linestyle="none", label=arm)
            numbers = f"{label(row['estimate'])} ({label(row.get('lower'))}, {label(row.get('upper'))})" \
                if row.get("lower") is not None else label(row["estimate"])
            axes.text(1.02, y, numbers, transform=axes.get_yaxis_transform(), va="center", ha="left",
                      fontsize=7, color=style["color"], fontweight="bold" if row["label"] in primary else "normal")
        if no_effect is not None:     # 0 for a difference, 1 for a ratio, none for a rate itself
            axes.axvline(no_effect, color=INK, linewidth=0.8, linestyle=(0, (4, 3)))
        axes.set_yticks(centres, [wrapped[l] for l in labels], fontsize=7.5)
        for tick, text in zip(axes.get_yticklabels(), labels):
            if text in primary:
                tick.set_fontweight("bold")
        axes.set_ylim(sum(lines), 0)
        axes.set_xlabel(x_label)
        if favours:     # under the axis title, one at each end of the axis
            for x, text, align in ((0.0, f"← {favours[0]}", "left"), (1.0, f"{favours[1]} →", "right")):
                axes.annotate(text, xy=(x, 0), xycoords="axes fraction", xytext=(0, -34),
                              textcoords="offset points", ha=align, va="top", fontsize=7.5, color=INK)
        axes.grid(axis="y", visible=False)
        handles, names = axes.get_legend_handles_labels()
        unique = dict(zip(names, handles))
        axes.legend(unique.values(), unique.keys(), loc="lower center", bbox_to_anchor=(0.5, 1.0),
                    ncols=len(unique), fontsize=8)
        figure.subplots_adjust(left=0.4, right=0.76, top=1 - 0.45 / height, bottom=0.85 / height)

    return _draw(draw, height=height, layout=None)


def _arm_of(row: Mapping[str, Any]) -> str:
    return row.get("arm_code") or row["arm"]


def finite(values: Sequence[Any]) -> bool:
    return all(isinstance(v, (int, float)) and math.isfinite(v) for v in values)
