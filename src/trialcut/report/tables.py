"""One table, many renderers: a report table holds the source values once and says how to show them.

A :class:`ReportTable` keeps the columns and rows exactly as results.json has them (the CSV
writer uses these, at full precision) and a list of display columns, each naming the source
column(s) it shows and its kind (see :mod:`trialcut.report.formatting`).  The HTML and PDF
templates read :meth:`ReportTable.header` and :meth:`ReportTable.body` only.
"""
from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import Any, Iterable, Mapping, Sequence

from trialcut.report.formatting import NumberFormat

# Plain-word headings for the column names results.json uses.
COLUMN_LABELS = {
    "arm": "Arm", "reference": "Compared with", "visit": "Visit", "variable": "Variable",
    "n": "n", "mean": "Mean", "sd": "SD", "median": "Median", "q1": "Lower quartile",
    "q3": "Upper quartile", "min": "Minimum", "max": "Maximum", "estimate": "Estimate",
    "se": "Standard error", "std_error": "Standard error", "df": "DF", "t": "t", "p": "p-value",
    "lower": "Lower limit", "upper": "Upper limit", "term": "Effect", "num_df": "Numerator DF",
    "den_df": "Denominator DF", "F": "F", "expected": "Expected", "observed": "Observed",
    "missing": "Missing", "percent_missing": "Missing (%)", "pattern": "Visits observed",
    "count": "Participants", "share": "Share of arm (%)", "monotone": "Monotone",
    "shift": "Shift in active arm", "active_shift": "Shift in active arm", "reference_shift": "Shift in reference arm",
    "significant": "Significant", "population": "Population", "status": "Status", "total": "Total",
    # Pooling over imputations (Rubin's rules; Barnard–Rubin degrees of freedom).
    "imputations": "Imputations", "within_variance": "Within-imputation variance",
    "between_variance": "Between-imputation variance", "total_variance": "Total variance",
    "relative_increase": "Relative increase in variance", "proportion_due_to_missing": "Share due to missing data",
    "fraction_missing_information": "Fraction of missing information", "relative_efficiency": "Relative efficiency",
    "complete_df": "Complete-data DF",
    # Visits due by the cut-off (the participant flow's counts).
    "in_population": "In population", "not_yet_due": "Not yet due", "due": "Due", "set_aside": "Set aside",
}

# Column name -> kind.  Names not listed are "text" when their values are text and
# otherwise shown by the general numeric rule.
COLUMN_KINDS = {
    "estimate": "mean", "mean": "mean", "lower": "mean", "upper": "mean", "median": "mean",
    "q1": "mean", "q3": "mean", "min": "mean", "max": "mean", "difference": "mean",
    "se": "sd", "sd": "sd", "std_error": "sd",
    "p": "p", "p_value": "p", "p_adjusted": "p",
    "df": "df", "den_df": "df", "num_df": "count",
    "t": "statistic", "F": "statistic", "z": "statistic", "statistic": "statistic",
    "n": "count", "count": "count", "expected": "count", "observed": "count", "missing": "count",
    "in_population": "count", "not_yet_due": "count", "due": "count", "set_aside": "count",
    "total": "count", "percent_missing": "percent", "share": "share",
    "monotone": "flag", "significant": "flag", "converged": "flag",
    "shift": "shift", "active_shift": "shift", "reference_shift": "shift",
    "log_likelihood": "criterion", "aic": "criterion", "bic": "criterion",
    "imputations": "count", "within_variance": "general", "between_variance": "general", "total_variance": "general",
    "relative_increase": "correlation", "proportion_due_to_missing": "correlation",
    "fraction_missing_information": "correlation", "relative_efficiency": "correlation", "complete_df": "df",
}


# Characters, for the column widths: a cell's padding is about two.
CELL_PADDING = 2
# Characters of 8.6 pt DejaVu Sans that fit across an A4 page's text block, upright and landscape.
ROOM_PORTRAIT, ROOM_LANDSCAPE = 100, 148


@dataclass(frozen=True)
class ReportColumn:
    sources: tuple[str, ...]      # one source column, or (lower, upper) for an interval
    label: str
    kind: str
    row_header: bool = False      # the cell names the row (<th scope="row">)

    @property
    def numeric(self) -> bool:
        return self.kind not in ("text", "flag", "term", "by_row")


@dataclass(frozen=True)
class ReportTable:
    slug: str                            # file name of its CSV, unique in a report
    title: str
    columns: tuple[str, ...]             # source columns, as in results.json
    rows: tuple[tuple[Any, ...], ...]    # source values, full precision
    display: tuple[ReportColumn, ...]
    number_format: NumberFormat = field(default_factory=NumberFormat)
    note: str = ""
    wide: bool = False                   # set on a landscape page in the PDF
    number: str = ""                     # "Table 14.2.3", given when the document is assembled
    anchor: str = ""
    # What makes a table stand alone when pasted elsewhere: the participants per arm it is
    # about (a header row above the column labels, repeated on every page) and footnotes
    # (model, covariates, degrees of freedom, confidence level, abbreviations, source).
    counts: str = ""
    footnotes: tuple[str, ...] = ()

    def header(self) -> list[ReportColumn]:
        return list(self.display)

    def body(self) -> list[list[tuple[str, ReportColumn]]]:
        """Each row as (text, column) pairs, formatted by the column's kind."""
        index = {name: i for i, name in enumerate(self.columns)}
        out = []
        for row in self.rows:
            cells = []
            for column in self.display:
                values = [row[index[s]] if s in index else None for s in column.sources]
                kind = column.kind
                if kind == "by_row":      # a facts table: each row says how its value is shown
                    kind = row[index["kind"]] if "kind" in index else "general"
                if len(values) == 2:
                    text = self.number_format.interval(values[0], values[1], kind)
                else:
                    text = self.number_format.cell(values[0], kind)
                cells.append((text, column))
            out.append(cells)
        return out

    def column_widths(self, body: Sequence[Sequence[tuple[str, ReportColumn]]]) -> list[str]:
        """Each display column's share of the table's width (CSS percentages), from its text.

        The PDF engine then lays the table out with these widths instead of measuring every
        cell twice (automatic table layout was an eighth of the report's rendering time).
        Widths follow the rule of automatic layout, counted in characters: a column needs at
        least its longest word (numbers never wrap: their longest cell) and at most its longest
        cell; when the page cannot hold every column at its most, each gets its least plus the
        same share of what it would like beyond that.
        """
        room = ROOM_LANDSCAPE if self.wide else ROOM_PORTRAIT
        most, least = [], []
        for position, column in enumerate(self.display):
            cells = [row[position][0] for row in body]
            longest_word = max([len(w) for text in [column.label, *cells] for w in text.split()] or [1])
            longest = max([len(text) for text in cells] + [longest_word, 2])
            most.append(longest + CELL_PADDING)
            least.append((longest if column.numeric else longest_word) + CELL_PADDING)
        if sum(most) > room and sum(most) > sum(least):
            share = max(0.0, room - sum(least)) / (sum(most) - sum(least))
            most = [l + share * (m - l) for m, l in zip(most, least)]
        total = sum(most)
        return [f"{100 * m / total:.2f}%" for m in most]

    def with_number(self, number: str, anchor: str) -> "ReportTable":
        return replace(self, number=number, anchor=anchor)


def column_kind(name: str, values: Iterable[Any]) -> str:
    if name in COLUMN_KINDS:
        return COLUMN_KINDS[name]
    present = [v for v in values if v is not None]
    if present and all(isinstance(v, bool) for v in present):
        return "flag"
    if present and all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in present):
        return "general"
    return "text"


def column_label(name: str) -> str:
    return COLUMN_LABELS.get(name, name.replace("_", " ").strip().capitalize() if name.islower() else name)


def from_results_table(
    source: Mapping[str, Any],
    *,
    slug: str,
    number_format: NumberFormat,
    title: str | None = None,
    hide: Sequence[str] = (),
    kinds: Mapping[str, str] | None = None,
    labels: Mapping[str, str] | None = None,
    intervals: Mapping[str, tuple[str, str]] | None = None,
    note: str = "",
    wide: bool | None = None,
    counts: str = "",
    footnotes: Sequence[str] = (),
) -> ReportTable:
    """A report table from a results.json table, every column shown unless hidden.

    ``intervals`` maps a label to a (lower, upper) pair shown as one "(a, b)" column in
    place of the lower column; the upper column is then not shown on its own.
    """
    columns = tuple(str(c) for c in source.get("columns") or ())
    rows = tuple(tuple(r) for r in source.get("data") or ())
    kinds = dict(kinds or {})
    labels = dict(labels or {})
    intervals = dict(intervals or {})
    paired = {pair[0]: (label, pair) for label, pair in intervals.items() if pair[0] in columns}
    skipped = {pair[1] for _, pair in paired.values()} | set(hide)
    display = []
    for position, name in enumerate(columns):
        if name in skipped:
            continue
        values = [r[position] for r in rows if position < len(r)]
        kind = kinds.get(name) or column_kind(name, values)
        if name in paired:
            label, pair = paired[name]
            display.append(ReportColumn(pair, label, kinds.get(name) or "mean"))
            continue
        display.append(ReportColumn((name,), labels.get(name) or column_label(name), kind))
    if display:
        display[0] = replace(display[0], row_header=True)
    if wide is None:
        wide = len(display) > 9
    return ReportTable(slug=slug, title=title or source.get("title") or slug, columns=columns, rows=rows,
                       display=tuple(display), number_format=number_format, note=note, wide=wide,
                       counts=counts, footnotes=tuple(f for f in footnotes if f))


def from_records(
    records: Sequence[Mapping[str, Any]] | Sequence[Sequence[Any]],
    columns: Sequence[str],
    *,
    slug: str,
    title: str,
    number_format: NumberFormat,
    labels: Mapping[str, str] | None = None,
    kinds: Mapping[str, str] | None = None,
    note: str = "",
    counts: str = "",
    footnotes: Sequence[str] = (),
) -> ReportTable:
    """A report table built by the report itself (facts, checks, summaries)."""
    rows = [
        [r.get(c) for c in columns] if isinstance(r, Mapping) else list(r)
        for r in records
    ]
    return from_results_table({"title": title, "columns": list(columns), "data": rows}, slug=slug,
                              number_format=number_format, labels=labels, kinds=kinds, note=note,
                              counts=counts, footnotes=footnotes)


def rows_as_dicts(source: Mapping[str, Any] | None) -> list[dict[str, Any]]:
    if not source:
        return []
    columns = list(source.get("columns") or ())
    return [dict(zip(columns, row)) for row in source.get("data") or ()]
