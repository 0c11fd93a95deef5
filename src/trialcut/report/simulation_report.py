"""The operating-characteristics report of a simulation: HTML, PDF, CSV tables and SVG figures.

It reads the simulation summary (plain JSON data from ``run.simulate.summarise``) only.
"""
from __future__ import annotations

import base64
import csv
import html
import math
from pathlib import Path
from typing import Any, Mapping, Sequence

from trialcut.report.figures import ARM_COLOURS, INK, _draw

CAUTIONS = (
    "These operating characteristics come from simulated trials under the stated scenarios only. They "
    "require review by a qualified statistician before anyone relies on them.",
    "They do not replace regulatory, ethics committee or local review of the plan.",
    "Every figure carries Monte Carlo error: its standard error (MC SE) is shown beside it; more trials make it smaller.",
)

ANALYSIS_COLUMNS = (
    ("scenario", "Scenario"), ("analysis", "Analysis"), ("arm", "Arm"), ("true_difference", "True difference"),
    ("trials_estimated", "Trials estimated"), ("fits_failed", "Fits failed"),
    ("mean_estimate", "Mean estimate"), ("bias", "Bias"), ("empirical_se", "Empirical SE"),
    ("model_se", "Model SE"), ("rmse", "RMSE"), ("coverage", "Coverage"),
    ("rejection_rate_unadjusted", "Rejected at alpha, unadjusted"), ("covariance_structures", "Covariance used"),
)
# The scenarios file's mechanism codes, in words for the reader (the CSV keeps the codes).
MECHANISM_WORDS = {"completely_at_random": "completely at random",
                   "at_random_last_value": "at random, on the last observed value",
                   "not_at_random_shift": "not at random (values after leaving shifted)", "none": "none"}
TRUTH_NOTE = ("In a scenario whose values are shifted after leaving (not at random), the true difference is the "
              "declared difference plus the shift times the difference between the arms in the share of "
              "participants who left by the primary visit, averaged over the trials: the difference over everyone "
              "randomised, what a treatment-policy estimand targets. Elsewhere it is the declared difference.")
HYPOTHESIS_COLUMNS = (("scenario", "Scenario"), ("hypothesis", "Hypothesis"), ("arm", "Arm"), ("visit", "Visit"),
                      ("trials_decided", "Trials"), ("rejection_rate", "Rejection rate after multiplicity"))


def render_simulation(summary: Mapping[str, Any], folder: Path, *, title: str, facts: Sequence[tuple[str, str]],
                      pdf: bool = True) -> dict[str, Path]:
    """Write simulation.html, simulation.pdf, tables/*.csv and figures/*.svg into ``folder``."""
    written: dict[str, Path] = {}
    (folder / "tables").mkdir(parents=True, exist_ok=True)
    (folder / "figures").mkdir(parents=True, exist_ok=True)
    for name, rows in (("analyses", summary["analyses"]), ("hypotheses", summary["hypotheses"])):
        path = folder / "tables" / f"{name}.csv"
        _write_csv(rows, path)
        written[f"tables/{name}.csv"] = path
    figures = {"power": power_chart(summary), "coverage": coverage_chart(summary)}
    for name, svg in figures.items():
        path = folder / "figures" / f"{name}.svg"
        path.write_bytes(svg)
        written[f"figures/{name}.svg"] = path
    page = _html(summary, title, facts, figures)
    (folder / "simulation.html").write_text(page, encoding="utf-8")
    written["simulation.html"] = folder / "simulation.html"
    if pdf:
        from trialcut.report.render import html_to_pdf

        written["simulation.pdf"] = html_to_pdf(page, folder / "simulation.pdf")
    return written


def _write_csv(rows: list[dict[str, Any]], path: Path) -> None:
    columns = list(rows[0]) if rows else []
    with path.open("w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle, lineterminator="\n")
        writer.writerow(columns)
        for row in rows:
            writer.writerow(["" if row.get(c) is None else row.get(c) for c in columns])


# --------------------------------------------------------------------------- figures
def power_chart(summary: Mapping[str, Any]) -> bytes:
    """Rejection rate of each hypothesis after multiplicity, per scenario, with 95% MC error bars."""
    rows = summary["hypotheses"] or [dict(r, hypothesis=f"{r['analysis']}: {r['arm']}",
                                          rejection_rate=r["rejection_rate_unadjusted"],
                                          rejection_rate_mc_se=r["rejection_rate_unadjusted_mc_se"])
                                     for r in summary["analyses"]]
    scenarios = [s["id"] for s in summary["scenarios"]]
    names = list(dict.fromkeys(r["hypothesis"] for r in rows))

    def draw(figure):
        axes = figure.subplots()
        width = 0.8 / max(len(names), 1)
        for position, name in enumerate(names):
            found = {r["scenario"]: r for r in rows if r["hypothesis"] == name}
            xs = [i + (position - (len(names) - 1) / 2) * width for i in range(len(scenarios))]
            rates = [_number(found.get(s, {}).get("rejection_rate")) for s in scenarios]
            bars = [1.96 * _number(found.get(s, {}).get("rejection_rate_mc_se"), 0.0) for s in scenarios]
            axes.bar(xs, rates, width=width * 0.92, color=ARM_COLOURS[(position + 1) % len(ARM_COLOURS)], label=name,
                     yerr=bars, ecolor=INK, capsize=2)
        axes.axhline(summary["alpha"], color=INK, linewidth=0.8, linestyle="--")
        axes.set_xticks(range(len(scenarios)), scenarios)
        axes.set_ylim(0, 1.05)
        axes.set_ylabel("Share of trials rejecting")
        axes.legend(fontsize=7.5, frameon=False)

    return _draw(draw)


def coverage_chart(summary: Mapping[str, Any]) -> bytes:
    """Coverage of every analysis and arm, with the band nominal ± 1.96 MC SE of that many trials."""
    rows = [r for r in summary["analyses"] if r.get("coverage") is not None]

    def draw(figure):
        axes = figure.subplots()
        labels = [f"{r['scenario']} · {r['analysis']} · {r['arm']}" for r in rows]
        for y, row in enumerate(rows):
            nominal, n = row["confidence_level"], max(row["trials_estimated"], 1)
            half = 1.96 * math.sqrt(nominal * (1 - nominal) / n)
            axes.plot([nominal - half, nominal + half], [y, y], color="#cfd6dc", linewidth=6, solid_capstyle="butt")
            axes.plot([row["coverage"]], [y], "o", color=ARM_COLOURS[1], markersize=4)
        if rows:
            axes.axvline(rows[0]["confidence_level"], color=INK, linewidth=0.8, linestyle="--")
        axes.set_yticks(range(len(rows)), labels, fontsize=7)
        axes.set_ylim(len(rows) - 0.5, -0.5)
        axes.set_xlabel("Coverage of the confidence interval")

    return _draw(draw, height=max(2.4, 0.22 * len(rows) + 1.2))


def _number(value: Any, default: float = float("nan")) -> float:
    return float(value) if isinstance(value, (int, float)) else default


# --------------------------------------------------------------------------- page
def _html(summary: Mapping[str, Any], title: str, facts: Sequence[tuple[str, str]], figures: dict[str, bytes]) -> str:
    escape = html.escape
    parts = [f"<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'><title>{escape(title)}</title>",
             f"<style>{_STYLE}</style></head><body>", f"<h1>{escape(title)}</h1>",
             "<div class='cautions'>" + "".join(f"<p>{escape(c)}</p>" for c in CAUTIONS) + "</div>",
             "<table class='facts'>" + "".join(f"<tr><th>{escape(k)}</th><td>{escape(v)}</td></tr>" for k, v in facts)
             + "</table>", f"<p>{escape(summary['multiplicity_note'])}</p>",
             "<h2>Scenarios</h2>", _table([{"Scenario": s["id"], "Description": s["label"],
                                            "Participants": s["participants"],
                                            "Dropout": MECHANISM_WORDS.get(s["mechanism"], s["mechanism"]),
                                            "Trials refused by the data checks": s["data_errors"]}
                                           for s in summary["scenarios"]]),
             "<h2>Rejection rates after the plan's multiplicity procedure</h2>",
             _image(figures["power"], "Rejection rate by scenario"),
             _table(_shown(summary["hypotheses"], HYPOTHESIS_COLUMNS)),
             f"<h2>Estimates at {escape(summary['primary_visit'])}, each arm minus {escape(summary['reference'])}</h2>",
             "<p>Bias is the mean estimate minus the true difference; the empirical SE is the standard deviation of "
             "the estimates across trials, the model SE the root mean square of the standard errors the analysis "
             "reported; MC SE in brackets.</p>",
             f"<p>{escape(TRUTH_NOTE)}</p>" if any(s["mechanism"] == "not_at_random_shift"
                                                   for s in summary["scenarios"]) else "",
             _table(_shown(summary["analyses"], ANALYSIS_COLUMNS)),
             "<h2>Coverage of the confidence intervals</h2>", _image(figures["coverage"], "Coverage"),
             "<p>Dot: the share of trials whose interval held the true difference. Grey band: the nominal level "
             "± 1.96 Monte Carlo SE for that many trials; dashed line: the nominal level.</p>",
             "</body></html>"]
    return "\n".join(parts)


def _shown(rows: list[dict[str, Any]], columns) -> list[dict[str, Any]]:
    shown = []
    for row in rows:
        out = {}
        for key, heading in columns:
            value = row.get(key)
            error = row.get(f"{key}_mc_se")
            out[heading] = _format(value) + (f" ({_format(error)})" if error is not None else "")
        shown.append(out)
    return shown


def _format(value: Any) -> str:
    if value is None:
        return "–"
    if isinstance(value, float):
        return f"{value:.3f}"
    return str(value)


def _table(rows: list[dict[str, Any]]) -> str:
    if not rows:
        return "<p>None.</p>"
    head = "".join(f"<th>{html.escape(str(c))}</th>" for c in rows[0])
    body = "".join("<tr>" + "".join(f"<td>{html.escape(str(v))}</td>" for v in row.values()) + "</tr>" for row in rows)
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def _image(svg: bytes, alt: str) -> str:
    return (f"<figure><img alt='{html.escape(alt)}' style='width:100%' "
            f"src='data:image/svg+xml;base64,{base64.b64encode(svg).decode('ascii')}'></figure>")


_STYLE = """
@page { size: A4 landscape; margin: 14mm; @bottom-right { content: counter(page) " / " counter(pages); font-size: 8pt; } }
body { font-family: 'DejaVu Sans', sans-serif; font-size: 9pt; color: #1f2a33; }
h1 { font-size: 15pt; } h2 { font-size: 11.5pt; margin-top: 1.2em; }
table { border-collapse: collapse; margin: 0.4em 0 0.8em; }
th, td { border-bottom: 1px solid #cfd6dc; padding: 2px 6px; text-align: left; font-size: 8pt; }
thead { display: table-header-group; }
.cautions { border-left: 3px solid #c4621d; padding-left: 8px; background: #fbf3ec; }
.facts th { width: 14em; }
figure { margin: 0.5em 0; }
"""
