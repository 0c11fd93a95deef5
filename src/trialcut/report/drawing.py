"""Draw the report's figures in a second process while the PDF engine lays out the text.

The PDF engine asks for an image only when it builds that image's box, after it has parsed
the HTML and computed the styles; matplotlib (import and drawing) takes about as long.  So the
PDF's HTML names each figure by a ``trialcut-figure:<slug>`` URL, a forked child draws the
figures in reading order, and the engine's URL fetcher waits for the one it needs.  The child
runs the same drawing calls as the parent would, so the bytes are the same either way.  Asked
for pictures too (the DOCX copy's PNGs), the child keeps each figure it drew and saves it as a
PNG after all the SVGs are drawn (``figures.svg_and_picture``: saved, not drawn again).  Given
``then`` (a call that makes files from the drawn figures and their pictures), the child makes
those files next, still while the engine lays out the text, and the parent only writes them.

The child never waits for the parent: it writes every figure, picture and file into one
anonymous temporary file (created before the fork, with no name in any folder, so nothing is
left behind whatever happens to either process) and sends only a short notice of where the
bytes lie through a pipe.  (Sending the bytes themselves through the pipe, whose buffer holds
about 64 kB, made the child wait at each figure until the engine asked for it: the pictures
were saved only after the PDF was done, and the DOCX copy waited for them.)

Forking is used only where it is safe and cheap (``trialcut.forking.can_fork``, the runner's
rule too).  Otherwise the figures are drawn here, first, and ``then`` runs here.  Whatever the
child fails to deliver (it died, or ``then`` raised there) is done again here, so a failure
ends exactly as it does when everything is done in one process.
"""
from __future__ import annotations

import json
import multiprocessing
import os
import sys
import tempfile
from typing import Callable, Mapping, Sequence

from trialcut.forking import can_fork, leave_stopping_to_the_parent
from trialcut.report.figures import FigureImage, png_of

SCHEME = "trialcut-figure:"

# Makes the files of a rendering from every figure (by slug, drawn or carrying the note of its
# failure) and a call giving their pictures; returns (relative path, bytes) pairs, or None
# when there is nothing to write that way.
Then = Callable[[Mapping[str, FigureImage], Callable[[], Mapping[str, bytes]]], "list[tuple[str, bytes]] | None"]

Span = tuple[int, int]   # (offset, length) of some bytes in the child's store


def link(figure: FigureImage) -> str:
    return f"{SCHEME}{figure.slug}"


class FigureDrawing:
    """SVG bytes of ``figures`` by slug, drawn in a child process when possible.

    ``fetch`` is a WeasyPrint URL fetcher for the figure links; ``drawn()`` gives every figure
    drawn (a failed one carries its note, exactly as drawing it here would); ``files()`` gives
    what ``then`` made.
    """

    def __init__(self, figures: Sequence[FigureImage], *, pictures: bool = False, then: Then | None = None):
        self._waiting = [f for f in figures if f.job is not None]
        self._drawn: dict[str, FigureImage] = {f.slug: f for f in figures if f.job is None}
        self._jobs = {f.slug: f.job for f in self._waiting}
        self._want_pictures = pictures or then is not None
        self._then = then
        self._pictures: dict[str, bytes] = {}
        self._picture_calls: dict[str, Callable[[], bytes]] = {}    # figures drawn here, kept for their PNG
        self._picture_spans: dict[str, Span] = {}                   # pictures the child saved
        self._files: list[tuple[str, Span]] | None = None           # what ``then`` made in the child
        self._child_finished = False      # the child sent everything it will send
        self._child = self._connection = self._store = None
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
        try:
            store = tempfile.TemporaryFile()   # no name: unlinked at once (O_TMPFILE on Linux)
        except OSError:
            self._draw_here()
            return
        receiving, sending = context.Pipe(duplex=False)
        figures, pictures, then, drawn_before = self._waiting, self._want_pictures, self._then, dict(self._drawn)
        parent = os.getpid()

        def work() -> None:
            receiving.close()
            leave_stopping_to_the_parent(parent)
            try:
                _child_work(_Store(store.fileno()), sending, figures, pictures, then, drawn_before)
                sending.close()
            except (BrokenPipeError, ConnectionResetError):
                # The parent stopped reading (it was killed, or gave up on the figures):
                # nobody wants the rest, and a traceback would only alarm whoever reads stderr.
                os._exit(0)
            except Exception:  # noqa: BLE001 - e.g. no room for the store: the parent does the rest itself
                os._exit(1)

        self._child = context.Process(target=work, name="trialcut-figures", daemon=True)
        # Text waiting in our buffers would be copied into the child and written twice.
        sys.stdout.flush()
        sys.stderr.flush()
        try:
            self._child.start()
        except OSError:
            self._child = None
            receiving.close()
            sending.close()
            store.close()
            self._draw_here()
            return
        sending.close()
        self._connection, self._store = receiving, store

    def _receive_until(self, arrived: Callable[[], bool]) -> None:
        """Read the child's notices until ``arrived()`` (or the child is done)."""
        by_slug = {f.slug: f for f in self._waiting}
        while self._connection is not None and not self._child_finished and not arrived():
            try:
                kind, *notice = self._connection.recv()
            except EOFError:      # the child is done (or died: what is missing is done here)
                self._child_finished = True
                break
            if kind == "svg":
                slug, span, note = notice
                self._drawn[slug] = by_slug[slug].as_drawn(None if span is None else self._read(span), note)
            elif kind == "pictures":
                self._picture_spans = {slug: tuple(span) for slug, span in json.loads(self._read(notice[0])).items()}
            elif kind == "files":
                self._files = [(name, tuple(span)) for name, span in json.loads(self._read(notice[0]))]
            elif kind == "done":
                self._child_finished = True
        if self._child_finished:
            self._waiting = [f for f in self._waiting if f.slug not in self._drawn]
            self._draw_here()

    def _receive_all(self) -> None:
        self._receive_until(lambda: False)

    def _read(self, span: Span) -> bytes:
        offset, length = span
        parts, got = [], 0
        while got < length:   # a regular file gives it whole, but a short read is allowed by POSIX
            part = os.pread(self._store.fileno(), length - got, offset + got)
            if not part:
                raise OSError(f"the figure child's store ended early ({got} of {length} bytes)")
            parts.append(part)
            got += len(part)
        return b"".join(parts)

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
        if self._store is not None:
            self._store.close()
            self._store = None

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
        self._receive_until(lambda: slug in self._drawn)
        figure = self._drawn.get(slug)
        if figure is None or figure.svg is None:
            raise ValueError(f"figure {slug} was not drawn")
        return figure.svg

    def drawn(self, figure: FigureImage) -> FigureImage:
        if figure.job is None:
            return figure
        self._receive_until(lambda: figure.slug in self._drawn)
        return self._drawn[figure.slug]

    def pictures(self) -> dict[str, bytes]:
        """PNG of every figure drawn, by slug (for the DOCX copy): the child's, else drawn here."""
        self._receive_all()
        for slug, span in self._picture_spans.items():
            if slug not in self._pictures and self._store is not None:
                self._pictures[slug] = self._read(span)
        for slug, job in self._jobs.items():
            figure = self._drawn.get(slug)
            if slug not in self._pictures and figure is not None and figure.svg is not None:
                picture = _picture(self._picture_calls.pop(slug, None) or (lambda job=job: png_of(job)))
                if picture is not None:
                    self._pictures[slug] = picture
        return dict(self._pictures)

    def all_drawn(self) -> bool:
        """Whether every figure came out; False means one failed and carries a note instead."""
        self._receive_all()
        return all(f.svg is not None for f in self._drawn.values())

    def files(self) -> list[tuple[str, bytes]] | None:
        """What ``then`` made of every figure drawn and its pictures: made by the child while the
        parent did other work, or here if the child could not (it died, or ``then`` raised there:
        here it raises the same way)."""
        if self._then is None:
            raise ValueError("no work was given to do after the drawing")
        self._receive_all()
        if self._files is not None:
            return [(name, self._read(span)) for name, span in self._files]
        return self._then(dict(self._drawn), self.pictures)

    def close(self) -> None:
        """Stop the child; one still working (the PDF failed before it needed the figures) is killed."""
        self._close(wait=0.0 if self._connection is not None and not self._child_finished else 5.0)


class _Store:
    """The child's side of the anonymous file: bytes appended, their place returned."""

    def __init__(self, descriptor: int):
        self._descriptor, self._end = descriptor, 0

    def put(self, data: bytes) -> Span:
        offset, view = self._end, memoryview(data)
        while view:   # a regular file takes it whole, but a short write is allowed by POSIX
            written = os.pwrite(self._descriptor, view, self._end)
            view, self._end = view[written:], self._end + written
        return offset, len(data)


def _child_work(store: _Store, sending, figures: Sequence[FigureImage], pictures: bool, then: Then | None,
                drawn_before: Mapping[str, FigureImage]) -> None:
    """In the child: the SVGs in reading order, then the pictures, then ``then``'s files."""
    drawn, saves = dict(drawn_before), []
    for figure in figures:
        done, picture = figure.drawn_with_picture() if pictures else (figure.drawn(), None)
        drawn[figure.slug] = done
        sending.send(("svg", figure.slug, None if done.svg is None else store.put(done.svg), done.note))
        saves.append((figure.slug, picture))
    saved, spans = {}, {}
    for slug, picture in saves:
        png = _picture(picture) if picture is not None else None
        if png is not None:
            saved[slug], spans[slug] = png, store.put(png)
    # One notice for all the pictures, so the notices waiting in the pipe stay few and short
    # however many figures there are (the parent reads them only at the end).
    sending.send(("pictures", store.put(json.dumps(spans).encode("utf-8"))))
    files = then(drawn, lambda: dict(saved)) if then is not None else None
    if files is not None:
        index = [(name, store.put(data)) for name, data in files]
        sending.send(("files", store.put(json.dumps(index).encode("utf-8"))))
    # A ``then`` that raised never gets here: without the files the parent runs it again itself
    # and meets the same error there.
    sending.send(("done", ))


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
