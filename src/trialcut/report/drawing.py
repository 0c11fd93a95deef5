"""Draw the report's figures in a second process while the PDF engine lays out the text.

The PDF engine asks for an image only when it builds that image's box, after it has parsed
the HTML and computed the styles; matplotlib (import and drawing) takes about as long.  So the
PDF's HTML names each figure by a ``trialcut-figure:<slug>`` URL, a forked child draws the
figures in reading order, and the engine's URL fetcher waits for the one it needs.  The child
runs the same drawing calls as the parent would, so the bytes are the same either way.  Asked
for pictures too (the DOCX copy's PNGs), the child keeps each figure it drew and saves it as a
PNG after all the SVGs are sent (``figures.svg_and_picture``: saved, not drawn again), still
while the engine lays out the text.

Forking is used only where it is safe and cheap (``trialcut.forking.can_fork``, the runner's
rule too).  Otherwise the figures are drawn here, first.
"""
from __future__ import annotations

import multiprocessing
import os
import sys
from typing import Callable, Sequence

from trialcut.forking import can_fork, leave_stopping_to_the_parent
from trialcut.report.figures import FigureImage, png_of

SCHEME = "trialcut-figure:"


def link(figure: FigureImage) -> str:
    return f"{SCHEME}{figure.slug}"


class FigureDrawing:
    """SVG bytes of ``figures`` by slug, drawn in a child process when possible.

    ``fetch`` is a WeasyPrint URL fetcher for the figure links; ``drawn()`` gives every figure
    drawn (a failed one carries its note, exactly as drawing it here would).
    """

    def __init__(self, figures: Sequence[FigureImage], *, pictures: bool = False):
        self._waiting = [f for f in figures if f.job is not None]
        self._drawn: dict[str, FigureImage] = {f.slug: f for f in figures if f.job is None}
        self._jobs = {f.slug: f.job for f in self._waiting}
        self._want_pictures = pictures
        self._pictures: dict[str, bytes] = {}
        self._picture_calls: dict[str, Callable[[], bytes]] = {}    # figures drawn here, kept for their PNG
        self._child = self._connection = None
        if self._waiting and _can_fork():
            self._start_child()
        else:
            self._draw_here()

    # ------------------------------------------------------------------ drawing
    def _draw_here(self) -> None:
        for figure in self._waiting:
            if self._want_pictures:
                self._drawn[figure.slug], picture = figure.drawn_with_picture()
                if picture is not None:
                    self._picture_calls[figure.slug] = picture
            else:
                self._drawn[figure.slug] = figure.drawn()
        self._waiting = []

    def _start_child(self) -> None:
        context = multiprocessing.get_context("fork")
        receiving, sending = context.Pipe(duplex=False)
        figures, pictures = self._waiting, self._want_pictures
        parent = os.getpid()

        def draw_all() -> None:
            receiving.close()
            leave_stopping_to_the_parent(parent)
            drawn = []
            try:
                for figure in figures:
                    done, picture = figure.drawn_with_picture() if pictures else (figure.drawn(), None)
                    sending.send(("svg", figure.slug, done.svg, done.note))
                    drawn.append((figure, picture))
                for figure, picture in drawn:
                    sending.send(("png", figure.slug, _picture(picture) if picture is not None else None))
                sending.close()
            except (BrokenPipeError, ConnectionResetError):
                # The parent stopped reading (it was killed, or gave up on the figures):
                # nobody wants the rest, and a traceback would only alarm whoever reads stderr.
                os._exit(0)

        self._child = context.Process(target=draw_all, name="trialcut-figures", daemon=True)
        # Text waiting in our buffers would be copied into the child and written twice.
        sys.stdout.flush()
        sys.stderr.flush()
        self._child.start()
        sending.close()
        self._connection = receiving

    def _receive_until(self, slug: str | None) -> None:
        """Read the child's answers until ``slug`` has arrived (None: all of them)."""
        by_slug = {f.slug: f for f in self._waiting}
        while self._connection is not None and (slug is None or slug not in self._drawn):
            try:
                kind, got, *answer = self._connection.recv()
            except EOFError:      # the child is done (or died: draw what is missing here)
                self._close()
                self._waiting = [f for f in self._waiting if f.slug not in self._drawn]
                self._draw_here()
                return
            if kind == "png":
                if answer[0] is not None:
                    self._pictures[got] = answer[0]
                continue
            svg, note = answer
            waiting = by_slug[got]
            self._drawn[got] = FigureImage(waiting.slug, waiting.title, waiting.alt, svg, note=note or waiting.note,
                                           number=waiting.number, anchor=waiting.anchor)
        if self._connection is not None and not self._want_pictures and all(f.slug in self._drawn
                                                                             for f in self._waiting):
            self._close()

    def _close(self, wait: float = 5.0) -> None:
        if self._connection is not None:
            self._connection.close()
            self._connection = None
        if self._child is not None:
            self._child.join(timeout=wait)
            if self._child.is_alive():
                self._child.kill()
                self._child.join()
            self._child = None

    # ------------------------------------------------------------------ answers
    def fetcher(self):
        """A WeasyPrint URL fetcher that answers the figure links and passes other URLs on."""
        from weasyprint.urls import URLFetcher, URLFetcherResponse

        drawing = self

        class FigureFetcher(URLFetcher):
            def fetch(self, url, headers=None):
                if not url.startswith(SCHEME):
                    return super().fetch(url, headers)
                svg = drawing.svg(url[len(SCHEME):])
                return URLFetcherResponse(url, svg, {"Content-Type": "image/svg+xml"})

        return FigureFetcher()

    def svg(self, slug: str) -> bytes:
        self._receive_until(slug)
        figure = self._drawn.get(slug)
        if figure is None or figure.svg is None:
            raise ValueError(f"figure {slug} was not drawn")
        return figure.svg

    def drawn(self, figure: FigureImage) -> FigureImage:
        if figure.job is None:
            return figure
        self._receive_until(figure.slug)
        return self._drawn[figure.slug]

    def pictures(self) -> dict[str, bytes]:
        """PNG of every figure drawn, by slug (for the DOCX copy): the child's, else drawn here."""
        self._receive_until(None)
        for slug, job in self._jobs.items():
            figure = self._drawn.get(slug)
            if slug not in self._pictures and figure is not None and figure.svg is not None:
                picture = _picture(self._picture_calls.pop(slug, None) or (lambda job=job: png_of(job)))
                if picture is not None:
                    self._pictures[slug] = picture
        return dict(self._pictures)

    def all_drawn(self) -> bool:
        """Whether every figure came out; False means one failed and carries a note instead."""
        self._receive_until(None)
        return all(f.svg is not None for f in self._drawn.values())

    def close(self) -> None:
        """Stop the child; one still drawing (the PDF failed before it needed the figures) is killed."""
        self._close(wait=0.0 if self._connection is not None else 5.0)


def _picture(save: Callable[[], bytes]) -> bytes | None:
    """The PNG of a figure whose SVG was drawn; None if the picture fails (the copy then names
    the figure in words instead of failing the whole rendering)."""
    try:
        return save()
    except Exception:  # noqa: BLE001 - a picture is a copy of an SVG already drawn
        return None


def _can_fork() -> bool:
    if os.environ.get("TRIALCUT_DRAW_IN_PROCESS"):
        return False
    return can_fork()
