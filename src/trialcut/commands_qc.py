"""`trialcut qc RUN --against FILE`: compare a second programmer's numbers with a verified run's,
seal the comparison as a QC record, and exit 1 when anything differs or is missing."""
from __future__ import annotations

import json
from pathlib import Path

from trialcut.errors import InputError, Problem, VerificationFailed

QC_HELP = ("compare an independent programmer's numbers with a run's. The QC file is a CSV with "
           "the columns analysis_id, table, arm, visit, statistic, value (one number per row; "
           "statistic: estimate, se, df, t, p, lower or upper; tables: differences, "
           "marginal_means, adjusted_means)")
MAX_SHOWN = 20


def add_qc_parser(commands) -> None:
    qc = commands.add_parser("qc", help="double-programming check of a run against a QC file",
                             description=QC_HELP)
    qc.add_argument("run_folder", type=Path)
    qc.add_argument("--against", required=True, type=Path, metavar="FILE", help="the QC file (CSV)")
    qc.add_argument("--registry", type=Path, help="registry file (default: the run's output root's)")


def command_qc(args) -> int:
    from trialcut.commands import console, verified_run
    from trialcut.record.qc import MATCH, compare, read_qc_file, record_qc, run_values, tolerances_of

    if not Path(args.against).is_file():
        raise InputError(f"no QC file at {args.against}", [Problem(
            code="qc.missing_file", file=str(args.against), message="the QC file does not exist",
            hint="pass the second programmer's CSV with --against")])
    registry, row = verified_run(args.run_folder, args.registry, "qc", "check")
    results = json.loads((Path(args.run_folder) / "results.json").read_text(encoding="utf-8"))
    values = run_values(results)
    outcome = compare(values, read_qc_file(args.against, values), tolerances_of(results))
    recorded = record_qc(args.run_folder, row, registry, args.against, outcome)
    console.print(f"QC of run {row.record_id}: {outcome.summary}", markup=False)
    console.print(f"  QC record: {recorded.folder} (report: qc.html)", markup=False)
    console.print(f"  chain head: {recorded.head}", markup=False)
    differing = [item for item in outcome.comparisons if item.outcome != MATCH]
    if not differing:
        console.print("[green]passed[/green]: every compared value agrees within its tolerance")
        return 0
    raise VerificationFailed(
        f"QC of run {row.record_id} found {len(differing)} difference(s); see {recorded.folder / 'qc.html'}",
        [Problem(code="qc.difference", field=f"{item.analysis_id}.{item.table}[{item.arm}, {item.visit}]."
                                             f"{item.statistic}",
                 message=item.outcome, expected=_show(item.qc_value) + " (QC file)",
                 got=_show(item.run_value) + f" (run; tolerance {item.tolerance:g})")
         for item in differing[:MAX_SHOWN]])


def _show(value) -> str:
    return "no value" if value is None else f"{value:.10g}"
