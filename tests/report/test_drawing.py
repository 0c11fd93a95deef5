"""The figure child (report/drawing.py): what it hands over equals what this process makes itself.

The reference for every check is the same work done in this process (``TRIALCUT_DRAW_IN_PROCESS``,
the path taken where forking is not safe), so a rendering must not depend on where its figures
were drawn or its files made.  The figures are the invented LVT-201 rendering fixture's
(tests/report/fixtures.py).
"""
from __future__ import annotations

import multiprocessing
import os
import tempfile
from pathlib import Path

import pytest

from trialcut.report import render as render_module
from trialcut.report.document import build_document
from trialcut.report.drawing import FigureDrawing
from trialcut.report.figures import FigureImage
from trialcut.report.render import render_documents

# Run first (conftest.py), while the test process has no other thread: these check a forked child.
pytestmark = pytest.mark.forks

SVG = b"<svg xmlns='http://www.w3.org/2000/svg'>%s</svg>"


@pytest.fixture
def scratch(tmp_path, monkeypatch):
    """A temporary folder of its own for everything tempfile makes, to see what is left in it."""
    folder = tmp_path / "scratch"
    folder.mkdir()
    monkeypatch.setattr(tempfile, "tempdir", str(folder))
    return folder


@pytest.fixture
def forking(monkeypatch):
    """Figures drawn in a forked child; the test fails if no child was ever started (e.g. a
    thread left running by another test makes forking unsafe, and everything is drawn here)."""
    monkeypatch.delenv("TRIALCUT_DRAW_IN_PROCESS", raising=False)
    started, start = [], FigureDrawing._start_child

    def start_child(self):
        start(self)
        started.append(self._child is not None)

    monkeypatch.setattr(FigureDrawing, "_start_child", start_child)
    yield
    assert any(started), "no figure child was forked"


def _fixture_figures(report_fixtures) -> list[FigureImage]:
    return build_document(report_fixtures.build_results(), draw=False).figures


def _everything(drawing: FigureDrawing, figures: list[FigureImage]):
    try:
        return ([drawing.drawn(f) for f in figures], drawing.all_drawn(), drawing.pictures(),
                drawing.files() if drawing._then is not None else None)
    finally:
        drawing.close()


def _files_of(drawn, pictures):
    """A small stand-in for the renderer's files: every SVG and every picture, in order."""
    made = [(f"figures/{slug}.svg", figure.svg) for slug, figure in drawn.items() if figure.svg is not None]
    return made + [(f"pictures/{slug}.png", png) for slug, png in pictures().items()]


def _in_the_child_only(parent: int, action):
    """A drawing job that does ``action`` in a forked child and draws a plain SVG in ``parent``."""
    def job():
        if os.getpid() != parent:
            action()
        return SVG % b"<rect width='1' height='1'/>"
    return job


def test_the_child_hands_over_the_same_figures_pictures_and_files_as_drawing_here(report_fixtures, forking,
                                                                                   monkeypatch, scratch):
    figures = _fixture_figures(report_fixtures)
    assert len([f for f in figures if f.job is not None]) >= 5
    from_child = _everything(FigureDrawing(figures, pictures=True, then=_files_of), figures)
    monkeypatch.setenv("TRIALCUT_DRAW_IN_PROCESS", "1")
    here = _everything(FigureDrawing(figures, pictures=True, then=_files_of), figures)
    assert from_child == here
    drawn, complete, pictures, files = from_child
    assert complete and all(f.svg is not None for f in drawn) and pictures
    assert [name for name, _ in files][:2] == [f"figures/{drawn[0].slug}.svg", f"figures/{drawn[1].slug}.svg"]
    assert list(scratch.iterdir()) == [] and multiprocessing.active_children() == []


def test_the_child_finishes_its_work_while_nobody_reads(forking, scratch, tmp_path):
    # Each figure is far larger than a pipe's buffer (about 64 kB on Linux): sent through the
    # pipe, the child would wait at the first one until the parent asked for it.  Here the
    # parent asks for nothing until the child says (through a file) that `then` has run.
    marker = tmp_path / "then-ran"
    figures = [FigureImage(f"f{i}", f"Figure {i}", "", None, job=lambda i=i: SVG % (b"<g/>" * 50_000 + bytes([65 + i])))
               for i in range(6)]

    def then(drawn, pictures):
        marker.write_text("yes")
        return [(slug, figure.svg) for slug, figure in drawn.items()]

    drawing = FigureDrawing(figures, then=then)
    try:
        child = drawing._child
        assert child is not None, "expected a forked child"
        child.join(timeout=120)     # a guard against a child stuck for ever, not a timing
        assert not child.is_alive() and marker.read_text() == "yes"
        files = drawing.files()
    finally:
        drawing.close()
    assert [name for name, _ in files] == [f"f{i}" for i in range(6)]
    assert all(data == figures[i].job() for i, (_, data) in enumerate(files))
    assert list(scratch.iterdir()) == []


def test_a_child_that_dies_leaves_its_work_to_the_parent(forking, scratch):
    parent = os.getpid()
    figures = [FigureImage("a", "A", "", None, job=lambda: SVG % b"<g/>"),
               FigureImage("b", "B", "", None, job=_in_the_child_only(parent, lambda: os._exit(9))),
               FigureImage("c", "C", "", None, job=lambda: SVG % b"<circle r='1'/>")]
    made_in = []

    def then(drawn, pictures):
        made_in.append(os.getpid())
        return [(slug, figure.svg) for slug, figure in drawn.items()]

    drawing = FigureDrawing(figures, then=then)
    try:
        assert drawing.svg("c") == SVG % b"<circle r='1'/>"
        files = drawing.files()
    finally:
        drawing.close()
    assert files == [("a", SVG % b"<g/>"), ("b", SVG % b"<rect width='1' height='1'/>"), ("c", SVG % b"<circle r='1'/>")]
    assert made_in == [parent]
    assert list(scratch.iterdir()) == [] and multiprocessing.active_children() == []


def test_work_that_fails_in_the_child_is_done_again_here_and_fails_the_same_way(forking, scratch):
    figures = [FigureImage("a", "A", "", None, job=lambda: SVG % b"<g/>")]
    calls = []

    def then(drawn, pictures):
        calls.append(os.getpid())
        raise RuntimeError("no paper")

    drawing = FigureDrawing(figures, then=then)
    try:
        with pytest.raises(RuntimeError, match="no paper"):
            drawing.files()
    finally:
        drawing.close()
    assert calls == [os.getpid()]      # the child's attempt ran in another process
    assert list(scratch.iterdir()) == [] and multiprocessing.active_children() == []


def _folder_contents(folder: Path) -> dict[str, bytes]:
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


def test_a_rendering_whose_figure_child_dies_gives_the_same_bytes(report_fixtures, forking, monkeypatch,
                                                                  scratch, tmp_path):
    from trialcut.report import figures as figures_module

    results = report_fixtures.build_results()
    monkeypatch.setenv("TRIALCUT_DRAW_IN_PROCESS", "1")
    reference = render_documents(results, tmp_path / "here")
    monkeypatch.delenv("TRIALCUT_DRAW_IN_PROCESS")
    parent, forest = os.getpid(), figures_module.forest_chart

    def forest_chart(*args, **kwargs):
        if os.getpid() != parent:
            os._exit(9)
        return forest(*args, **kwargs)

    monkeypatch.setattr(figures_module, "forest_chart", forest_chart)
    again = render_documents(results, tmp_path / "child-died")
    assert list(again) == list(reference)
    assert _folder_contents(tmp_path / "child-died") == _folder_contents(tmp_path / "here")
    assert list(scratch.iterdir()) == [] and multiprocessing.active_children() == []


@pytest.mark.parametrize("failing", ["pdf", "copy"])
def test_a_failed_rendering_ends_the_child_and_leaves_what_drawing_here_leaves(report_fixtures, forking,
                                                                               monkeypatch, scratch, tmp_path, failing):
    # A failure of the PDF engine (the child still working) or of the DOCX copy (made in the
    # child, then again here): the same error and the same files as in one process, no child left.
    from trialcut.report import docx_output

    def broken(*args, **kwargs):
        raise RuntimeError(f"broken {failing}")

    if failing == "pdf":
        monkeypatch.setattr(render_module, "html_to_pdf", broken)
    else:
        monkeypatch.setattr(render_module, "docx_bytes", broken)
        monkeypatch.setattr(docx_output, "docx_bytes", broken)
    results = report_fixtures.build_results()
    left = {}
    for where in ("child", "here"):
        if where == "here":
            monkeypatch.setenv("TRIALCUT_DRAW_IN_PROCESS", "1")
        with pytest.raises(RuntimeError, match=f"broken {failing}"):
            render_documents(results, tmp_path / where)
        left[where] = _folder_contents(tmp_path / where) if (tmp_path / where).exists() else {}
        assert multiprocessing.active_children() == []
    assert left["child"] == left["here"]
    assert not any(name.startswith(("report.html", "report.docx", "tables", "figures")) for name in left["child"])
    assert list(scratch.iterdir()) == []


KILLED_PARENT = """
import os, signal, time
from trialcut.report.drawing import FigureDrawing
from trialcut.report.figures import FigureImage

parent = os.getpid()

def draw_after_the_parent_is_gone():
    while os.getppid() == parent:
        time.sleep(0.01)
    return b"<svg xmlns='http://www.w3.org/2000/svg'/>"

figures = [FigureImage("quick", "Quick", "", None, job=lambda: b"<svg xmlns='http://www.w3.org/2000/svg'/>"),
           FigureImage("slow", "Slow", "", None, job=draw_after_the_parent_is_gone)]
drawing = FigureDrawing(figures, pictures=True, then=lambda drawn, pictures: [])
drawing.svg("quick")
os.kill(parent, signal.SIGKILL)
"""


def test_a_killed_parent_leaves_no_temporary_file_and_no_child(scratch):
    # SIGKILL gives the parent no chance to tidy up: the child's store has no name to leave
    # behind, and the child is killed with the parent (PR_SET_PDEATHSIG; `communicate` returns
    # only once every holder of the stderr pipe, the child too, is gone).
    import signal
    import subprocess
    import sys

    environment = {k: v for k, v in os.environ.items() if k != "TRIALCUT_DRAW_IN_PROCESS"}
    environment["TMPDIR"] = str(scratch)
    child = subprocess.Popen([sys.executable, "-c", KILLED_PARENT], stdout=subprocess.PIPE,
                             stderr=subprocess.PIPE, env=environment)
    _, error = child.communicate(timeout=120)
    assert child.returncode == -signal.SIGKILL, error.decode()
    assert b"Traceback" not in error, error.decode()
    assert list(scratch.iterdir()) == []
