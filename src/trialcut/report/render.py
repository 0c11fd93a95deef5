"""Write the rendered report: report.html, report.pdf, tables/*.csv and figures/*.svg.

The HTML is one self-contained file (stylesheet and figures inline as data URIs) so a
reviewer can read it offline; the PDF is made by WeasyPrint from the same HTML, with the
stylesheet's print rules.  Output depends only on the results (and audit record) given:
rendering the same input twice gives the same bytes.
"""
from __future__ import annotations

import base64
import contextlib
import gc
import json
import os
import shutil
import tempfile
from dataclasses import replace
from importlib import resources
from pathlib import Path
from typing import Any, Callable, Mapping

from trialcut.errors import InputError, Problem, TrialcutError
from trialcut.report.csv_output import table_csv_text
from trialcut.report.document import Document, build_document, map_figures
from trialcut.report.docx_output import docx_bytes
from trialcut.report.drawing import FigureDrawing, link as figure_link
from trialcut.report.figures import FigureImage

TEMPLATES_ENVIRONMENT_VARIABLE = "TRIALCUT_TEMPLATES"
STYLESHEET = "report.css"


class ReportError(TrialcutError):
    """The report could not be rendered (templates missing, PDF engine failure)."""


def templates_folder() -> Path:
    """Where the templates are: an explicit override, the repository's templates/, or package data.

    With an editable install the package runs from src/trialcut, so the repository's
    top-level templates/ is three levels above this file.  An installed wheel carries a
    copy under trialcut/templates (package data).
    """
    candidates = []
    if os.environ.get(TEMPLATES_ENVIRONMENT_VARIABLE):
        candidates.append(Path(os.environ[TEMPLATES_ENVIRONMENT_VARIABLE]))
    candidates.append(Path(__file__).resolve().parents[3] / "templates")
    try:
        candidates.append(Path(str(resources.files("trialcut") / "templates")))
    except (ModuleNotFoundError, TypeError):  # pragma: no cover - namespace oddities
        pass
    for folder in candidates:
        if (folder / "report.html.j2").is_file() and (folder / STYLESHEET).is_file():
            return folder
    raise ReportError("report templates not found", [Problem(
        code="report.templates_missing", message="no folder holds report.html.j2 and report.css",
        expected="templates/ beside src/ (editable install) or trialcut/templates (package data)",
        got=", ".join(str(c) for c in candidates),
        hint=f"set {TEMPLATES_ENVIRONMENT_VARIABLE} to the templates folder")])


def _environment():
    from jinja2 import Environment, FileSystemLoader, StrictUndefined, select_autoescape

    environment = Environment(
        loader=FileSystemLoader(str(templates_folder())),
        autoescape=select_autoescape(enabled_extensions=("html", "j2"), default=True),
        undefined=StrictUndefined, trim_blocks=True, lstrip_blocks=True, keep_trailing_newline=True,
    )
    environment.filters["data_uri"] = data_uri
    return environment


def data_uri(data: bytes, mime: str) -> str:
    return f"data:{mime};base64,{base64.b64encode(data).decode('ascii')}"


def stylesheet_text() -> str:
    return (templates_folder() / STYLESHEET).read_text(encoding="utf-8")


def render_html(document: Document, template: str = "report.html.j2", **extra: Any) -> str:
    environment = _environment()
    return environment.get_template(template).render(document=document, stylesheet=stylesheet_text(), **extra)


def html_to_pdf(html: str, target: Path, url_fetcher=None) -> Path:
    try:
        from weasyprint import HTML
    except ImportError as error:  # pragma: no cover - weasyprint is a dependency
        raise ReportError("WeasyPrint is not installed", [Problem(code="report.pdf_engine_missing",
                                                                  message=str(error))]) from error
    HTML(string=html, base_url=str(target.parent), url_fetcher=url_fetcher).write_pdf(target)
    return target


def write_outputs(document: Document, html: str, out_folder: Path, stem: str = "report", *,
                  pdf_html: str | None = None, url_fetcher=None) -> dict[str, Path]:
    """The HTML, the PDF, every table as CSV and every figure as SVG; keys are relative paths.

    ``pdf_html`` (default ``html``) is what the PDF engine reads, with ``url_fetcher``.
    """
    out_folder.mkdir(parents=True, exist_ok=True)
    written = write_files([(f"{stem}.html", html.encode("utf-8"))], out_folder)
    written[f"{stem}.pdf"] = out_folder / f"{stem}.pdf"
    if pdf_html is None:
        html_to_pdf(html, out_folder / f"{stem}.pdf", url_fetcher)
    return {**written, **write_files(table_and_figure_files(document), out_folder)}


def table_and_figure_files(document: Document) -> list[tuple[str, bytes]]:
    """Every table as CSV and every figure as SVG: (relative path, bytes)."""
    files = [(f"tables/{table.slug}.csv", table_csv_text(table).encode("utf-8"))
             for table in [*document.tables, *document.csv_tables]]
    return files + [(f"figures/{figure.slug}.svg", figure.svg) for figure in document.figures]


def write_files(files: list[tuple[str, bytes]], folder: Path) -> dict[str, Path]:
    """Write each (relative path, bytes) under ``folder``; keys are the relative paths, in order."""
    written: dict[str, Path] = {}
    for name, data in files:
        path = folder / name
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(data)
        written[name] = path
    return written


def render_documents(results: Mapping[str, Any], run_folder: Path, *,
                     audit: Mapping[str, Any] | None = None) -> dict[str, Path]:
    """Render ``results`` (and ``audit``) into ``run_folder``; returns {relative path: path}.

    Keys: "report.html", "report.pdf", "report.docx" (the editable copy), "tables/<name>.csv",
    "figures/<name>.svg".

    The figures are drawn while the PDF engine works (see drawing.py).  If one cannot be
    drawn, the report is built again the plain way, so its place shows the reason instead.
    """
    with _older_objects_left_alone():
        return _render_documents(results, Path(run_folder), audit)


@contextlib.contextmanager
def _older_objects_left_alone():
    """Keep the garbage collector's full passes off the objects that existed before rendering.

    Rendering allocates millions of small objects, so the collector runs full passes; in a
    process that already holds a finished run (results, models, libraries) each pass walked
    every one of those objects too: a second or more of the demo's rendering.  ``gc.freeze``
    sets them aside until the rendering ends (they are alive anyway); objects made while
    rendering are collected as usual.  Left alone if the caller already froze objects.
    """
    if gc.get_freeze_count():
        yield
        return
    gc.freeze()
    try:
        yield
    finally:
        gc.unfreeze()


def _render_documents(results: Mapping[str, Any], run_folder: Path,
                      audit: Mapping[str, Any] | None) -> dict[str, Path]:
    document = build_document(results, audit, draw=False)
    pdf_html = render_html(map_figures(document, lambda f: replace(f, link=figure_link(f))))
    # While the PDF engine lays out the text, the figure child draws the figures (the engine
    # waits for each one it reaches), saves their pictures and then makes every other file:
    # the reader's HTML, the DOCX copy, the CSV tables and the SVG files.  Only the PDF is left
    # on this side; the files are written here once it is done.
    drawing = FigureDrawing(document.figures, pictures=True,
                            then=lambda drawn, pictures: _other_files(document, pdf_html, results, drawn, pictures))
    try:
        run_folder.mkdir(parents=True, exist_ok=True)
        html_to_pdf(pdf_html, run_folder / "report.pdf", drawing.fetcher())
        files = drawing.files()
        pictures = drawing.pictures() if files is None else {}
    finally:
        drawing.close()
    if files is None:
        document = build_document(results, audit)
        html = render_html(document)
        return _with_docx(write_outputs(document, html, run_folder), document, results, run_folder, pictures)
    written = write_files(files, run_folder)
    # The keys in the order of the plain way: the HTML, the PDF, tables, figures, the copy.
    return {"report.html": written.pop("report.html"), "report.pdf": run_folder / "report.pdf", **written}


def _other_files(document: Document, pdf_html: str, results: Mapping[str, Any], drawn: Mapping[str, FigureImage],
                 pictures: Callable[[], Mapping[str, bytes]]) -> list[tuple[str, bytes]] | None:
    """Every file but the PDF, once ``drawn`` holds every figure (by slug) of ``document``, whose
    figures still wait to be drawn and are linked from ``pdf_html``; ``pictures`` gives their PNGs.
    None if a figure could not be drawn: the report is then built again the plain way, so its
    place shows the reason instead."""
    if not all(figure.svg is not None for figure in drawn.values()):
        return None
    # The copy is made from the document as the PDF's HTML was (figures by link, pictures by slug).
    copy = _docx_copy(document, results, pictures)
    links = {f.link: f for f in document.figures}
    map_figures(document, lambda f: _drawn_figure(f, drawn))
    # The reader's HTML is the PDF's with each figure inlined (the template's own data URI).
    html = pdf_html
    for link, figure in links.items():
        html = html.replace(f'src="{link}"', f'src="{data_uri(drawn[figure.slug].svg, "image/svg+xml")}"')
    return [("report.html", html.encode("utf-8")), *table_and_figure_files(document), ("report.docx", copy)]


def _drawn_figure(figure: FigureImage, drawn: Mapping[str, FigureImage]) -> FigureImage:
    """``figure`` as drawn, without its link (the note of a figure drawn is its own)."""
    if figure.job is None:
        return replace(figure, link="")
    done = drawn[figure.slug]
    return figure.as_drawn(done.svg, done.note)


def _with_docx(written: dict[str, Path], document: Document, results: Mapping[str, Any], folder: Path,
               pictures: Mapping[str, bytes] | Callable[[], Mapping[str, bytes]]) -> dict[str, Path]:
    """The editable copy (report.docx) beside the PDF."""
    written.update(write_files([("report.docx", _docx_copy(document, results, pictures))], folder))
    return written


def _docx_copy(document: Document, results: Mapping[str, Any],
               pictures: Mapping[str, bytes] | Callable[[], Mapping[str, bytes]]) -> bytes:
    """The editable copy's bytes, dated by the run so a re-render gives the same bytes (``pictures``:
    see docx_bytes)."""
    run = results.get("run") or {}
    return docx_bytes(document, pictures=pictures, created=run.get("started_utc"), modified=run.get("finished_utc"))


def render_run(run_folder: Path, out: Path | None = None) -> dict[str, Path]:
    """Re-render a past run from its results.json (and audit.json) alone, into ``out``.

    ``out`` must be a new or an empty folder outside the run folder (a sealed folder is never
    written into, a non-empty folder never mixed with); ``None`` means a new temporary folder
    (its path is under the "folder" key of the answer).  Byte copies of results.json and
    audit.json go beside the documents, so the rendering shows what it was made from, and
    rendering the same run twice gives the same results.json, tables and HTML.
    """
    run_folder = Path(run_folder)
    results = read_json(run_folder / "results.json", required=True)
    audit = read_json(run_folder / "audit.json", required=False)
    if out is None:
        out = Path(tempfile.mkdtemp(prefix=f"trialcut-render-{run_folder.name}-"))
    out = Path(out)
    _refuse_target(out, run_folder)
    written = render_documents(results, out, audit=audit)
    for name in ("results.json", "audit.json"):
        if (run_folder / name).is_file():
            shutil.copyfile(run_folder / name, out / name)
            written[name] = out / name
    written["folder"] = out
    return written


def _refuse_target(out: Path, run_folder: Path) -> None:
    if out.resolve() == run_folder.resolve() or run_folder.resolve() in out.resolve().parents:
        raise InputError("refusing to write into a sealed run folder", [Problem(
            code="report.sealed_run_folder", message="the output folder is inside the run folder",
            field="out", got=str(out), hint="choose a folder outside the run folder")])
    if out.exists() and (not out.is_dir() or any(out.iterdir())):
        raise InputError(f"refusing to write into {out}: it is not a new, empty folder", [Problem(
            code="report.target_not_empty", file=str(out), field="out",
            message="a rendering never mixes its files with others or replaces them",
            expected="a folder that does not exist yet, or an empty one",
            got="a file" if not out.is_dir() else "a folder with files in it",
            hint="choose a new folder")])


def read_json(path: Path, *, required: bool) -> dict[str, Any] | None:
    if not path.is_file():
        if not required:
            return None
        raise InputError(f"{path} not found", [Problem(
            code="report.results_missing", message="the run folder has no results.json", file=str(path),
            hint="pass the folder of a finished run")])
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except json.JSONDecodeError as error:
        raise InputError(f"{path} is not valid JSON", [Problem(
            code="report.results_unreadable", message=error.msg, file=str(path), line=error.lineno,
            column=error.colno)]) from error
