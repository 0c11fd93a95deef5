"""Time and memory of a whole ``trialcut run`` of the demo plan as the trial grows (issue 13).

The demo simulator's final cut (invented data, fixed seed) is generated at 300, 3,000 and
30,000 participants; each size is run by the command line in a fresh process (``trialcut run
--unlocked`` into a temporary output root), so every size pays the same imports and its peak
memory is its own.  Figures per size: wall time, CPU time, peak memory (the run and its forked helpers), and the time
outside PDF layout (wall time minus the time spent in WeasyPrint reading the HTML and in its
``write_pdf``, which also waits for figures drawn beside it; importing WeasyPrint counts as
outside).  Then the ratios the issue sets: 10x the participants at
most 2.5x the time of the demo-size run, 3,000 -> 30,000 at most 12x, 30,000 under 120 s and
under 3 GiB.

Choosing sizes: ``TRIALCUT_BENCH_SIZES=300,3000`` leaves out the largest size (generating
the 30,000-participant demo cut takes about a minute and running them one to two minutes on the
2-core machine; the whole module about 3-4 minutes with it, under a minute without).
"""
from __future__ import annotations

import json
import os
import resource
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
DEFAULT_SIZES = (300, 3000, 30000)
SEED = 20261202
GIB = 1024 ** 3

# Generate the cut in a process of its own, so that the run's peak memory is the run's alone
# (drawing 30,000 invented participants takes more memory than some runs).
_GENERATE = r"""
import sys
from pathlib import Path
from trialcut.data.simulate import demo_cuts, write_csv
write_csv(demo_cuts(%(seed)d, int(sys.argv[1]))["final"], Path(sys.argv[2]) / "cut.csv")   # every endpoint
""" % {"seed": SEED}

# Run in the child: the same imports as before the clock starts, then the CLI in-process with write_pdf timed.
_CHILD = r"""
import json, sys, time
from pathlib import Path
size, folder, plan = int(sys.argv[1]), Path(sys.argv[2]), sys.argv[3]
from trialcut.data.simulate import demo_cut_offs, demo_cuts, write_csv
print("READY", flush=True)
sys.stdin.readline()          # the parent starts its clock now
import resource
import weasyprint
before = resource.getrusage(resource.RUSAGE_SELF)
pdf_seconds = [0.0]
def timed(original):
    def engine(self, *args, **kwargs):
        started = time.perf_counter()
        try:
            return original(self, *args, **kwargs)
        finally:
            pdf_seconds[0] += time.perf_counter() - started
    return engine
# The engine's work: reading the HTML (the constructor parses it) and laying it out.
weasyprint.HTML.__init__ = timed(weasyprint.HTML.__init__)
weasyprint.HTML.write_pdf = timed(weasyprint.HTML.write_pdf)
from trialcut.cli import main
status = main(["run", plan, "--data", str(folder / "cut.csv"), "--cut", "bench", "--out", str(folder / "out"),
               "--unlocked", "--cut-off", demo_cut_offs()["final"].isoformat()])
after, helpers = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
cpu = (after.ru_utime + after.ru_stime - before.ru_utime - before.ru_stime) + helpers.ru_utime + helpers.ru_stime
(folder / "pdf_seconds.json").write_text(json.dumps({"status": status, "pdf": pdf_seconds[0], "cpu": cpu}))
from trialcut.cli import leave
leave(status)   # how the command line ends its process (the wall time runs until the process is gone)
""" % {"seed": SEED}


def sizes() -> tuple[int, ...]:
    chosen = os.environ.get("TRIALCUT_BENCH_SIZES")
    return tuple(int(text) for text in chosen.split(",")) if chosen else DEFAULT_SIZES


def measure(size: int) -> dict:
    """Wall, CPU and peak memory of one whole run of ``size`` participants, in a child process."""
    with tempfile.TemporaryDirectory() as scratch:
        folder = Path(scratch)
        made = subprocess.run([sys.executable, "-c", _GENERATE, str(size), str(folder)], capture_output=True, text=True)
        if made.returncode != 0:
            raise RuntimeError(f"the {size}-participant cut was not generated: {made.stderr[-2000:]}")
        child = subprocess.Popen([sys.executable, "-c", _CHILD, str(size), str(folder),
                                  str(ROOT / "analysis_plans" / "demo.yaml")],
                                 stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        if child.stdout.readline().strip() != "READY":
            raise RuntimeError(f"the {size}-participant cut was not generated: {child.stderr.read()[-2000:]}")
        started = time.perf_counter()
        child.stdin.write("\n")
        child.stdin.flush()
        status, usage, held = _wait_sampling_memory(child.pid)
        wall = time.perf_counter() - started
        child.returncode = os.waitstatus_to_exitcode(status)
        error = child.stderr.read()
        if child.returncode != 0:
            raise RuntimeError(f"the {size}-participant run failed ({child.returncode}): {error[-2000:]}")
        measured = json.loads((folder / "pdf_seconds.json").read_text())
        if measured["status"] != 0:   # a run that stopped early would look fast: never report it as a time
            raise RuntimeError(f"the {size}-participant run exited {measured['status']}: {error[-2000:]}")
        pdf, cpu = measured["pdf"], measured["cpu"]
    # CPU is the run's own (its process after the cut was written, and the processes it forked:
    # endpoints, figures).  Memory: the run forks helpers that share most of its pages, so adding
    # their resident sets would count those pages twice; the figure is the largest proportional set
    # size (PSS: a shared page split among its sharers) of the run and its helpers together, sampled
    # while it ran.  ru_maxrss (KiB on Linux) is the run process's own peak, exact, for comparison.
    return {"size": size, "wall": wall, "cpu": cpu, "peak": held, "run_peak": usage.ru_maxrss * 1024,
            "pdf": pdf, "outside_pdf": wall - pdf}


SAMPLE_SECONDS = 0.2    # memory sampling interval (reading a large process's page tables costs a little)


def _wait_sampling_memory(pid: int) -> tuple[int, "resource.struct_rusage", int]:
    """Wait for ``pid`` (exit status, its resource usage) and the largest PSS its process tree held.

    A thread samples; this one blocks in wait4, so the end of the run is seen at once and no
    polling loop takes CPU from the run."""
    held, ended = [0], threading.Event()

    def sample() -> None:
        while not ended.wait(SAMPLE_SECONDS):
            held[0] = max(held[0], _tree_pss(pid))

    sampler = threading.Thread(target=sample, daemon=True)
    sampler.start()
    try:
        _, status, usage = os.wait4(pid, 0)
    finally:
        ended.set()
        sampler.join()
    return status, usage, held[0]


def _tree_pss(pid: int) -> int:
    """Bytes of proportional set size of ``pid`` and its descendants now (Linux /proc)."""
    total, waiting = 0, [pid]
    while waiting:
        current = waiting.pop()
        try:
            for line in Path(f"/proc/{current}/smaps_rollup").read_text().splitlines():
                if line.startswith("Pss:"):
                    total += int(line.split()[1]) * 1024
                    break
            waiting += [int(c) for c in Path(f"/proc/{current}/task/{current}/children").read_text().split()]
        except (OSError, ValueError):   # it ended between the two reads
            continue
    return total


def run() -> list[dict]:
    measured = {}
    for size in sizes():
        measured[size] = measure(size)
        print(f"bench_scale: {size} participants: " + ", ".join(f"{key} {value:.4g}" for key, value in
                                                              measured[size].items() if key != "size"),
              file=sys.stderr, flush=True)   # the large size takes minutes: show each size when done
    rows = []
    for size, m in measured.items():
        rows.append({"figure": f"run the demo plan, {size} participants: wall time", "value": round(m["wall"], 1),
                     "unit": "s", "target": "< 120" if size >= 30000 else "report only",
                     "passed": m["wall"] < 120 or size < 30000,
                     "detail": f"outside PDF layout {m['outside_pdf']:.1f} s; PDF {m['pdf']:.1f} s; "
                               f"CPU {m['cpu']:.1f} s"})
        if size == 300:   # the demo's size: issue 13 asks for everything but PDF layout under 3 s
            rows.append({"figure": "run the demo plan, 300 participants: time outside PDF layout",
                         "value": round(m["outside_pdf"], 2), "unit": "s", "target": "< 3",
                         "passed": m["outside_pdf"] < 3})
        rows.append({"figure": f"run the demo plan, {size} participants: peak memory", "value": round(m["peak"] / GIB, 2),
                     "unit": "GiB", "target": "< 3" if size >= 30000 else "report only",
                     "passed": m["peak"] < 3 * GIB or size < 30000,
                     "detail": f"the run and its forked helpers together (PSS, sampled every {SAMPLE_SECONDS} s); "
                               f"the run process alone peaked at {m['run_peak'] / GIB:.2f} GiB resident"})
    rows += _ratios(measured)
    return rows


def _ratios(measured: dict[int, dict]) -> list[dict]:
    rows = []
    for small, large, limit in ((300, 3000, 2.5), (3000, 30000, 12.0)):
        if small in measured and large in measured:
            # CPU time too: on a shared machine the wall-time ratio moves with the neighbours' load.
            for key, what in (("wall", "wall time"), ("outside_pdf", "time outside PDF layout"), ("cpu", "CPU time")):
                ratio = measured[large][key] / measured[small][key]
                rows.append({"figure": f"{what}, {large} / {small} participants", "value": round(ratio, 2),
                             "unit": "ratio", "target": f"<= {limit}", "passed": ratio <= limit})
    return rows


if __name__ == "__main__":
    for row in run():
        print(row)
