"""Double-programming quality control: a second programmer's numbers against a run's.

The QC file is a CSV in a long layout, one number per row, with exactly these columns (any
order, a header row first):

    analysis_id, table, arm, visit, statistic, value

``analysis_id`` is an analysis id of the plan (e.g. ``ancova_observed``), ``table`` one of
that analysis' tables that has an ``arm`` and a ``visit`` column (``differences``,
``marginal_means``, ``adjusted_means``), ``statistic`` one of estimate, se, df, t, p, lower,
upper, and ``value`` a number (empty or ``NA`` when the second programmer has no value).

What is compared: every (analysis, table, statistic) the QC file mentions, over every arm and
visit either side has; a row only one side has is reported as missing on the other side.
Two values agree when they differ by at most the statistic's tolerance (absolute; defaults
in the plan schema's ``QcTolerances``, settable under ``qc: tolerances:`` in the plan).

A QC file that names an analysis, table or statistic the run does not have, has a row
twice, or has a value that is not a number is bad input: nothing is written.  Otherwise a
QC record is sealed and registered (kind ``qc``) whatever the outcome; differences then
make the command exit 1.
"""
from __future__ import annotations

import csv
import hashlib
import html
import io
import json
import math
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any, Iterator

from trialcut.errors import InputError, Problem
from trialcut.plan.schema import QcTolerances
from trialcut.record.manifest import sha256_file
from trialcut.record.registry import RegistryRow, utc_now
from trialcut.record.runfolder import new_run_id
from trialcut.record.seal import RecordedFolder, record_folder

QC_COLUMNS = ("analysis_id", "table", "arm", "visit", "statistic", "value")
STATISTICS = tuple(QcTolerances.model_fields)
MISSING_WORDS = ("", "na", "nan", ".")
QC_GROUP = "qc"
MATCH, MISMATCH, MISSING_IN_RUN, MISSING_IN_QC = "match", "mismatch", "missing in run", "missing in QC file"

Key = tuple[str, str, str, str, str]   # analysis, table, arm, visit, statistic


@dataclass(frozen=True)
class Comparison:
    analysis_id: str
    table: str
    arm: str
    visit: str
    statistic: str
    run_value: float | None
    qc_value: float | None
    difference: float | None
    tolerance: float
    outcome: str

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


@dataclass(frozen=True)
class QcOutcome:
    comparisons: tuple[Comparison, ...]
    tolerances: dict[str, float]

    def count(self, outcome: str) -> int:
        return sum(item.outcome == outcome for item in self.comparisons)

    @property
    def passed(self) -> bool:
        return self.count(MATCH) == len(self.comparisons) and bool(self.comparisons)

    @property
    def summary(self) -> str:
        return (f"{len(self.comparisons)} value(s) compared: {self.count(MATCH)} match, "
                f"{self.count(MISMATCH)} mismatch, {self.count(MISSING_IN_RUN)} missing in the run, "
                f"{self.count(MISSING_IN_QC)} missing in the QC file")


# --------------------------------------------------------------------------- reading
def read_qc_file(path: Path, run_values: dict[Key, float | None]) -> dict[Key, float | None]:
    """The QC file's values by key; every problem of the file raised at once (exit 2)."""
    path = Path(path)
    rows, problems = _rows(path)
    known = _known_parts(run_values)
    values: dict[Key, float | None] = {}
    first_line: dict[Key, int] = {}
    for line, row in rows:
        key = tuple(row[column].strip() for column in QC_COLUMNS[:5])
        found = _row_problems(path, line, key, row["value"], known)
        if key in first_line:
            found.append(_problem(path, line, "qc.duplicate_row", "this row repeats an earlier one",
                                  got=", ".join(key), hint=f"keep one value per row; the first is on "
                                                           f"line {first_line[key]}"))
        problems += found
        if not found:
            first_line[key] = line
            values[key] = _number(row["value"])
    if not rows and not problems:
        problems.append(_problem(path, 1, "qc.empty", "the QC file has no rows",
                                 hint="add one row per compared number"))
    if problems:
        raise InputError(f"{path}: the QC file cannot be compared; nothing was written", problems)
    return values


def _rows(path: Path) -> tuple[list[tuple[int, dict[str, str]]], list[Problem]]:
    try:
        text = path.read_text(encoding="utf-8-sig")
    except (OSError, UnicodeDecodeError) as error:
        raise InputError(f"cannot read the QC file {path}", [_problem(
            path, None, "qc.unreadable", "the QC file cannot be read as UTF-8 text", got=str(error),
            hint="pass a CSV file written as UTF-8")]) from None
    reader = csv.DictReader(io.StringIO(text))
    header = [name.strip() for name in reader.fieldnames or []]
    if sorted(header) != sorted(QC_COLUMNS):
        raise InputError(f"{path}: the QC file does not have the QC columns", [_problem(
            path, 1, "qc.columns", "the header row must name exactly the QC columns",
            expected=", ".join(QC_COLUMNS), got=", ".join(header) or "no header",
            hint="see 'trialcut qc --help' for the layout")])
    reader.fieldnames = header
    rows, problems = [], []
    for row in reader:
        line = reader.line_num
        if None in row or any(value is None for value in row.values()):
            problems.append(_problem(path, line, "qc.ragged_row", "this row does not have six fields",
                                     hint="quote fields that contain commas"))
            continue
        rows.append((line, row))
    return rows, problems


def _known_parts(run_values: dict[Key, float | None]) -> dict[str, set]:
    return {"analysis": {key[0] for key in run_values},
            "table": {key[:2] for key in run_values}}


def _row_problems(path: Path, line: int, key: Key, value: str, known: dict[str, set]) -> list[Problem]:
    analysis, table, arm, visit, statistic = key
    problems = []
    if analysis not in known["analysis"]:
        problems.append(_problem(path, line, "qc.unknown_analysis",
                                 f"the run has no comparable analysis {analysis!r}",
                                 expected=", ".join(sorted(known["analysis"])), got=repr(analysis),
                                 hint="use the analysis ids of the run's plan"))
    elif (analysis, table) not in known["table"]:
        tables = sorted(name for part, name in known["table"] if part == analysis)
        problems.append(_problem(path, line, "qc.unknown_table",
                                 f"analysis {analysis!r} has no comparable table {table!r}",
                                 expected=", ".join(tables), got=repr(table)))
    if statistic not in STATISTICS:
        problems.append(_problem(path, line, "qc.unknown_statistic", f"unknown statistic {statistic!r}",
                                 expected=", ".join(STATISTICS), got=repr(statistic)))
    if not arm or not visit:
        problems.append(_problem(path, line, "qc.missing_label", "arm and visit must be filled",
                                 got=f"arm {arm!r}, visit {visit!r}"))
    if value.strip().lower() not in MISSING_WORDS and _number(value) is None:
        problems.append(_problem(path, line, "qc.not_a_number", "the value is not a number",
                                 got=repr(value), hint="write a number, or leave it empty"))
    return problems


def _number(text: str) -> float | None:
    try:
        number = float(text)
    except (TypeError, ValueError):
        return None
    return number if math.isfinite(number) else None


def _problem(path: Path, line: int | None, code: str, message: str, **details: Any) -> Problem:
    return Problem(code=code, message=message, file=str(path), line=line, **details)


# --------------------------------------------------------------------------- the run's side
def run_values(results: dict[str, Any]) -> dict[Key, float | None]:
    """Every number of every arm-by-visit table of every analysis of a run."""
    values: dict[Key, float | None] = {}
    for endpoint in results.get("endpoints") or []:
        for analysis in endpoint.get("analyses") or []:
            for name, table in (analysis.get("tables") or {}).items():
                values.update(_table_values(str(analysis.get("id")), name, table))
    return values


def _table_values(analysis: str, name: str, table: Any) -> Iterator[tuple[Key, float | None]]:
    if not isinstance(table, dict):
        return
    columns = table.get("columns") or []
    if "arm" not in columns or "visit" not in columns:
        return
    statistics = [column for column in columns if column in STATISTICS]
    for row in table.get("data") or []:
        record = dict(zip(columns, row))
        for statistic in statistics:
            value = record[statistic]
            number = float(value) if isinstance(value, (int, float)) and not isinstance(value, bool) else None
            yield (analysis, name, str(record["arm"]), str(record["visit"]), statistic), number


# --------------------------------------------------------------------------- comparing
def tolerances_of(results: dict[str, Any]) -> dict[str, float]:
    """The plan's QC tolerances (results keep the canonical plan), else the defaults."""
    defaults = QcTolerances().model_dump()
    try:
        given = results["plan"]["canonical"]["qc"]["tolerances"]
    except (KeyError, TypeError):
        return defaults
    return {**defaults, **{key: float(value) for key, value in given.items() if key in defaults}}


def compare(run: dict[Key, float | None], qc: dict[Key, float | None],
            tolerances: dict[str, float]) -> QcOutcome:
    scope = {(key[0], key[1], key[4]) for key in qc}
    keys = sorted({key for key in run if (key[0], key[1], key[4]) in scope} | set(qc))
    comparisons = tuple(_compare_one(key, run.get(key), qc.get(key), key in run, key in qc, tolerances)
                        for key in keys)
    return QcOutcome(comparisons=comparisons, tolerances=dict(tolerances))


def _compare_one(key: Key, run_value, qc_value, in_run: bool, in_qc: bool,
                 tolerances: dict[str, float]) -> Comparison:
    tolerance = tolerances[key[4]]
    difference = None
    if not in_run:
        outcome = MISSING_IN_RUN          # an arm or visit the run does not have
    elif run_value is None:
        # Both sides without a value (e.g. no test for the reference arm) agree.
        outcome = MATCH if qc_value is None else MISSING_IN_RUN
    elif qc_value is None:
        outcome = MISSING_IN_QC
    else:
        difference = run_value - qc_value
        outcome = MATCH if abs(difference) <= tolerance else MISMATCH
    return Comparison(*key, run_value=run_value, qc_value=qc_value, difference=difference,
                      tolerance=tolerance, outcome=outcome)


# --------------------------------------------------------------------------- recording
def record_qc(run_folder: Path, run_row: RegistryRow, registry_path: Path, qc_file: Path,
              outcome: QcOutcome) -> RecordedFolder:
    """Seal and register the QC record: the QC file as given, every comparison, a report."""
    qc_bytes = Path(qc_file).read_bytes()
    summary = {"run": run_row.record_id, "compared": len(outcome.comparisons),
               **{word.replace(" ", "_"): outcome.count(word)
                  for word in (MATCH, MISMATCH, MISSING_IN_RUN, MISSING_IN_QC)},
               "passed": outcome.passed, "qc_file_sha256": hashlib.sha256(qc_bytes).hexdigest(),
               "results_sha256": sha256_file(Path(run_folder) / "results.json"),
               "tolerances": outcome.tolerances}

    def write(folder: Path, position: Any) -> None:
        (folder / "qc_input.csv").write_bytes(qc_bytes)
        (folder / "qc.json").write_text(json.dumps(
            {**summary, "comparisons": [item.to_dict() for item in outcome.comparisons]},
            indent=1, ensure_ascii=False, allow_nan=False) + "\n", encoding="utf-8")
        (folder / "qc.csv").write_text(_comparisons_csv(outcome), encoding="utf-8")
        (folder / "qc.html").write_text(_html(run_row, outcome, summary), encoding="utf-8")

    details = {**{key: value for key, value in summary.items() if key != "tolerances"},
               "sources": [{"record_id": run_row.record_id, "manifest_sha256": run_row.manifest_sha256}]}
    return record_folder(Path(registry_path).parent, kind="qc", study_id=run_row.study_id,
                         group=QC_GROUP, record_id=new_run_id(), write=write,
                         entry={"cut": run_row.cut, "details": details, "created_utc": utc_now()},
                         registry_path=registry_path)


def _comparisons_csv(outcome: QcOutcome) -> str:
    stream = io.StringIO()
    writer = csv.writer(stream, lineterminator="\n")
    fields = list(Comparison.__dataclass_fields__)
    writer.writerow(fields)
    for item in outcome.comparisons:
        writer.writerow(["" if value is None else value for value in asdict(item).values()])
    return stream.getvalue()


_OUTCOME_ORDER = (MISMATCH, MISSING_IN_RUN, MISSING_IN_QC, MATCH)


def _html(run_row: RegistryRow, outcome: QcOutcome, summary: dict[str, Any]) -> str:
    verdict = "All compared values agree." if outcome.passed else "Some values differ or are missing."
    rows = sorted(outcome.comparisons, key=lambda item: (_OUTCOME_ORDER.index(item.outcome),
                                                         item.analysis_id, item.table, item.arm,
                                                         item.visit, item.statistic))
    body = "".join(
        "<tr class='{cls}'><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td>"
        "<td class='n'>{}</td><td class='n'>{}</td><td class='n'>{}</td><td class='n'>{}</td>"
        "<td>{}</td></tr>".format(*(html.escape(str(part)) for part in (
            item.analysis_id, item.table, item.arm, item.visit, item.statistic,
            _show(item.run_value), _show(item.qc_value), _show(item.difference), _show(item.tolerance),
            item.outcome)), cls="ok" if item.outcome == MATCH else "bad")
        for item in rows)
    tolerances = ", ".join(f"{name} {value:g}" for name, value in outcome.tolerances.items())
    return f"""<!doctype html>
<html lang="en"><head><meta charset="utf-8"><title>Double-programming check of run {html.escape(run_row.record_id)}</title>
<style>body{{font-family:'DejaVu Sans',sans-serif;margin:2em}}table{{border-collapse:collapse}}
td,th{{border-bottom:1px solid #ccc;padding:2px 8px;text-align:left}}td.n{{text-align:right;font-variant-numeric:tabular-nums}}
tr.bad td{{background:#fde8e8}}</style></head><body>
<h1>Double-programming check</h1>
<p>Run {html.escape(run_row.record_id)} (study {html.escape(run_row.study_id)}, cut {html.escape(run_row.cut)})
against an independently programmed QC file (SHA-256 {summary['qc_file_sha256']}).</p>
<p><strong>{verdict}</strong> {html.escape(outcome.summary)}.</p>
<p>Two values agree when their absolute difference is at most the tolerance of their statistic:
{html.escape(tolerances)}.</p>
<p>Agreement shows that two programs gave the same numbers from the same data; it does not show
that the analysis suits the trial. Results need review by a qualified statistician and do not
replace regulatory or local review.</p>
<table><thead><tr><th>Analysis</th><th>Table</th><th>Arm</th><th>Visit</th><th>Statistic</th>
<th>Run</th><th>QC file</th><th>Difference</th><th>Tolerance</th><th>Outcome</th></tr></thead>
<tbody>{body}</tbody></table></body></html>
"""


def _show(value: float | None) -> str:
    return "" if value is None else f"{value:.10g}"
