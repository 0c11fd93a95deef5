"""Run every benchmark module in this folder and record the figures.

A benchmark is a module ``benchmarks/bench_<name>.py`` with ``run() -> list[dict]``; each
dict has ``figure, value, unit, target, passed`` and optionally ``detail``.  All figures are
printed as one table and written to ``outputs/bench/bench-<UTC time>.json`` with the machine
and library versions, because timings mean little without them.

Usage: ``python benchmarks/run_all.py [--only NAME ...] [--strict]``.  Exit status 0, or 1
with ``--strict`` when a target is missed (timings on a shared machine are noisy, so missing
a target is reported, not fatal, by default).
"""
from __future__ import annotations

import argparse
import datetime as dt
import json
import os
import platform
import subprocess
import sys
import tempfile
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent


def discover(only: list[str] | None = None) -> dict[str, Path]:
    """The benchmark modules by name (bench_<name>.py)."""
    return {path.stem.removeprefix("bench_"): path for path in sorted(HERE.glob("bench_*.py"))
            if not only or path.stem.removeprefix("bench_") in only}


# Each module runs in a fresh interpreter: a library that keeps a thread once used (Dask's
# offload thread) would stop a later module's process from forking the helpers a run uses
# (figures, endpoints), and what one module imported or cached would flatter the next.
_ONE_MODULE = r"""
import importlib.util, json, sys
sys.path.insert(0, sys.argv[3])
spec = importlib.util.spec_from_file_location(sys.argv[1], sys.argv[2])
module = importlib.util.module_from_spec(spec)
spec.loader.exec_module(module)
rows = module.run() if callable(getattr(module, "run", None)) else []
with open(sys.argv[4], "w", encoding="utf-8") as answer:
    json.dump(rows, answer)
"""


def run_module(path: Path) -> list[dict]:
    """The rows of one benchmark module, run in a process of its own (its progress goes to stderr)."""
    with tempfile.TemporaryDirectory() as scratch:
        answer = Path(scratch) / "rows.json"
        sys.stdout.flush()
        done = subprocess.run([sys.executable, "-c", _ONE_MODULE, path.stem, str(path), str(HERE), str(answer)],
                              stdout=sys.stderr)
        if done.returncode != 0:
            raise RuntimeError(f"exit status {done.returncode} (its messages are above)")
        return json.loads(answer.read_text(encoding="utf-8"))


def machine() -> dict:
    import numpy
    import pandas
    import scipy
    import statsmodels

    try:
        commit = subprocess.run(["git", "rev-parse", "HEAD"], cwd=ROOT, capture_output=True,
                                text=True, check=True).stdout.strip()
    except (OSError, subprocess.CalledProcessError):
        commit = None
    return {"python": platform.python_version(), "platform": platform.platform(),
            "cpu_count": os.cpu_count(), "load_average": list(os.getloadavg()),
            "numpy": numpy.__version__, "scipy": scipy.__version__, "pandas": pandas.__version__,
            "statsmodels": statsmodels.__version__, "git_commit": commit}


def show(rows: list[dict]) -> None:
    from rich.console import Console
    from rich.table import Table

    table = Table(title="trialcut benchmarks")
    for heading in ("benchmark", "figure", "value", "target", "met", "detail"):
        table.add_column(heading, overflow="fold")
    for row in rows:
        value = row["value"]
        shown = f"{value:.4g} {row['unit']}" if isinstance(value, (int, float)) else str(value)
        met = "[green]yes[/green]" if row["passed"] else "[red]no[/red]"
        table.add_row(row["benchmark"], row["figure"], shown, f"{row['target']} {row['unit']}",
                      met, row.get("detail", ""))
    console = Console()
    if not console.is_terminal:  # piped output (make bench | tee) would wrap every cell
        console = Console(width=160)
    console.print(table)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--only", nargs="*", help="benchmark names (bench_<name>.py) to run")
    parser.add_argument("--strict", action="store_true", help="exit 1 when a target is missed")
    options = parser.parse_args(argv)
    started = dt.datetime.now(dt.timezone.utc)
    rows, failures = [], []
    for name, path in discover(options.only).items():
        try:
            # Each row names its benchmark, so a module need not repeat its own name.
            rows += [{"benchmark": name} | row for row in run_module(path)]
        except Exception as error:  # one broken benchmark must not hide the others' figures
            failures.append({"benchmark": name, "error": f"{type(error).__name__}: {error}"})
    show(rows)
    for failure in failures:
        print(f"benchmark {failure['benchmark']} failed: {failure['error']}", file=sys.stderr)
    record = {"started_utc": started.isoformat(), "finished_utc": dt.datetime.now(dt.timezone.utc).isoformat(),
              "machine": machine(), "figures": rows, "errors": failures}
    folder = ROOT / "outputs" / "bench"
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / f"bench-{started.strftime('%Y%m%dT%H%M%SZ')}.json"
    path.write_text(json.dumps(record, indent=2) + "\n")
    print(f"written {path.relative_to(ROOT)}")
    if failures:
        return 3
    return 1 if options.strict and any(not row["passed"] for row in rows) else 0


if __name__ == "__main__":
    sys.exit(main())
