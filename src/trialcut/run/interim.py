"""Tests of the plan's hypotheses at a cut when the plan spends alpha over planned looks.

Which look a cut is comes from its label (``trialcut run --cut``) matched against the plan's
``multiplicity.alpha_spending.looks``.  At a planned look the information fraction reached is
measured on the data, the boundaries are recomputed for it (earlier looks enter at the
fractions they reached, as the registry recorded them in ``run.earlier_looks``, else at their
planned fractions; the final look spends whatever alpha is left, so it uses fraction 1),
and the hypotheses go through the plan's multiplicity procedure as a graph whose local tests
are group-sequential (Maurer & Bretz 2013; Holm and Bonferroni are graphs, Hochberg is run as
Holm, which rejects no more than Hochberg and stays valid under any dependence).  A cut that
is not a planned look gets nominal p-values only and a caution: no decision at all.
"""
from __future__ import annotations

from functools import lru_cache
from typing import Any

import numpy as np
import pandas as pd

from trialcut.run.tables import table
from trialcut.stats.group_sequential import boundaries

NOT_A_LOOK = ("This cut is not one of the plan's planned looks: the p-values below are nominal, "
              "no alpha is spent and no hypothesis may be judged on them.")


def interim_multiplicity(plan, cut, results: dict[str, Any], hypotheses: list[dict[str, Any]]) -> dict[str, Any]:
    """The ``multiplicity`` block of Results for a plan that declares alpha spending."""
    declared = plan.multiplicity
    spending = declared.alpha_spending
    cut_label = str((results.get("run") or {}).get("cut") or "")
    looks = [look.cut for look in spending.looks]
    information = information_reached(plan, cut, results)
    facts: dict[str, Any] = {
        "cut": cut_label, "looks": len(looks), "look": None, "planned_look": False,
        "spending": spending.spending, "parameter": spending.parameter,
        "information_by": spending.information_by, "planned_information": [l.information for l in spending.looks],
        "information_reached": information["fraction"], "information_basis": information["basis"],
        "information_count": information.get("count"), "fractions_used": None, "boundaries": None,
        "tested_at_this_look": [], "cautions": list(information["cautions"]),
    }
    base = {"method": declared.method, "alpha": declared.alpha, "sequential": facts}
    if cut_label not in looks:
        facts["cautions"].insert(0, NOT_A_LOOK)
        return base | {"hypotheses": _nominal_table(hypotheses)}
    index = looks.index(cut_label)
    facts.update(look=index + 1, planned_look=True)
    earlier = _earlier_reached(spending, index, (results.get("run") or {}).get("earlier_looks"))
    fractions = _fractions_used(spending, index, information["fraction"], facts["cautions"], earlier)
    if fractions is None:
        facts["cautions"].insert(0, "The boundaries for this look could not be computed; the p-values below "
                                    "are nominal and no hypothesis may be judged on them.")
        return base | {"hypotheses": _nominal_table(hypotheses)}
    facts["fractions_used"] = fractions
    overall = boundaries(fractions, alpha=declared.alpha, spending=spending.spending, parameter=spending.parameter)
    facts["boundaries"] = table(overall.to_frame(), "Boundaries at the full alpha, at the information fractions used")
    final = index == len(looks) - 1
    tested = _tested(spending, hypotheses, final)
    facts["tested_at_this_look"] = [h["id"] for h, t in zip(hypotheses, tested) if t]
    decision = _decide(declared, hypotheses, tested, fractions, index)
    for h, position in zip(hypotheses, range(len(hypotheses))):
        h.update(tested=tested[position], local_alpha=decision.local_alpha[position],
                 boundary_z=decision.boundary_z[position] if np.isfinite(decision.boundary_z[position]) else None,
                 boundary_p=decision.boundary_p[position], crossed_alone=decision.crossed_alone[position],
                 crossed_adjusted=decision.rejected[position])
    if declared.method == "hochberg":
        facts["cautions"].append("Hochberg's step-up procedure has no group-sequential form here; the looks use "
                                 "Holm's procedure, which rejects no more than Hochberg's.")
    if index > 0:
        # The runner sees one cut: decisions of earlier looks are not carried in.
        facts["cautions"].append("This table judges each hypothesis on this cut's p-values alone. A hypothesis "
                                 "rejected at an earlier look stays rejected, and the alpha it held passes on "
                                 "along the graph: take earlier decisions from the earlier looks' reports and "
                                 "have a statistician apply them before reading this look.")
    if not final:
        facts["cautions"].append(f"Interim look {index + 1} of {len(looks)}: a crossed boundary allows stopping for "
                                 "efficacy; it is not the final analysis, and the data monitoring committee decides.")
    title = (f"Group-sequential tests at look {index + 1} of {len(looks)} "
             f"({'final analysis' if final else 'interim'})")
    return base | {"hypotheses": table(pd.DataFrame(hypotheses), title)}


def _nominal_table(hypotheses: list[dict[str, Any]]) -> dict[str, Any] | None:
    if not hypotheses:
        return None
    rows = [{k: h[k] for k in ("id", "analysis", "arm", "visit", "weight", "p")} for h in hypotheses]
    return table(pd.DataFrame(rows), "Nominal p-values (not a planned look: no decision)")


def _earlier_reached(spending, index: int, recorded) -> list[tuple[float, str] | None]:
    """Per earlier look, (fraction reached, run id) as the registry recorded it, or None.

    ``run.earlier_looks`` is filled by the command layer from the earlier runs of the study; a
    fraction that is not a number in (0, 1) is not used.
    """
    by_cut = {str(e.get("cut")): e for e in recorded or [] if isinstance(e, dict)}
    found = []
    for look in spending.looks[:index]:
        entry = by_cut.get(str(look.cut)) or {}
        value = entry.get("information_reached")
        usable = isinstance(value, (int, float)) and 0 < value < 1
        found.append((float(value), str(entry.get("run_id") or "?")) if usable else None)
    return found


def _earlier_fractions(spending, index: int, earlier, cautions: list[str]) -> list[float]:
    """The fractions of the earlier looks: the ones they reached when recorded, else planned; said plainly."""
    planned = [look.information for look in spending.looks[:index]]
    used = [e[0] if e else p for e, p in zip(earlier, planned)]
    if any(b <= a for a, b in zip(used, used[1:])):   # out of order: the spending needs increasing fractions
        used, earlier = planned, [None] * len(planned)
    if planned:
        said = [f"look {n} ({look.cut}) at {t:.3f}, " + (f"the fraction it reached (run {e[1]})" if e else
                                                         "its planned fraction (no earlier run of that cut "
                                                         "recorded in the registry)")
                for n, (look, t, e) in enumerate(zip(spending.looks, used, earlier), start=1)]
        cautions.append("Earlier looks enter the boundaries at " + "; ".join(said) + ".")
    return used


def _fractions_used(spending, index: int, reached: float | None, cautions: list[str],
                    earlier=None) -> list[float] | None:
    planned = _earlier_fractions(spending, index, earlier or [None] * index, cautions)
    if index == len(spending.looks) - 1:
        # The final analysis spends what is left of alpha, whatever information it reached.
        return planned + [1.0]
    if reached is None or not np.isfinite(reached) or reached <= 0:
        cautions.append("The information fraction reached could not be measured at this cut.")
        return None
    if reached >= 1:
        cautions.append(f"The information fraction reached ({reached:.3f}) is at or above 1: this interim "
                        "spends all of alpha.")
        reached = 1.0
    if planned and reached <= planned[-1]:
        which = "planned fraction" if planned[-1] == spending.looks[index - 1].information else "fraction reached"
        cautions.append(f"The information fraction reached ({reached:.3f}) is not beyond the {which} "
                        f"of the previous look ({planned[-1]:.3f}).")
        return None
    return planned + [reached]


def _tested(spending, hypotheses, final: bool) -> list[bool]:
    if final or spending.tested_at_interims is None:
        return [True] * len(hypotheses)
    chosen = set(spending.tested_at_interims)
    return [h["id"] in chosen for h in hypotheses]


def _graph(declared, hypotheses) -> tuple[np.ndarray, np.ndarray]:
    """The plan's procedure as weights and transitions (Bretz et al. 2009)."""
    from trialcut.stats.multiplicity import weighted_holm_graph

    m = len(hypotheses)
    raw = np.array([h["weight"] for h in hypotheses], dtype=float)
    if declared.method == "graphical":
        return raw, np.array([list(row) for row in declared.transitions], dtype=float).reshape(m, m)
    if declared.method == "none":
        return np.ones(m), np.zeros((m, m))
    weights = raw / raw.sum() if raw.sum() > 0 else np.full(m, 1 / m)
    if declared.method == "bonferroni":
        return weights, np.zeros((m, m))
    return weighted_holm_graph(weights)   # holm, and hochberg run as holm


def _decide(declared, hypotheses, tested: list[bool], fractions: list[float], index: int):
    from trialcut.stats.group_sequential import sequential_graph_test

    spending = declared.alpha_spending
    interim_tested = [spending.tested_at_interims is None or h["id"] in set(spending.tested_at_interims)
                      for h in hypotheses]

    @lru_cache(maxsize=None)
    def level(tested_at_interims: bool, local_alpha: float) -> float:
        if local_alpha <= 0:
            return 0.0
        # A hypothesis not tested at interims spends nothing there: its only look is the final.
        own = fractions if tested_at_interims else fractions[-1:]
        return boundaries(own, alpha=local_alpha, spending=spending.spending,
                          parameter=spending.parameter).nominal_p[-1]

    def nominal_level(i: int, local_alpha: float) -> float:
        if not tested[i]:
            return 0.0
        return level(interim_tested[i], round(float(local_alpha), 14))

    weights, transitions = _graph(declared, hypotheses)
    return sequential_graph_test([h["p"] for h in hypotheses], weights=weights, transitions=transitions,
                                 alpha=declared.alpha, nominal_level=nominal_level)


# --------------------------------------------------------------------------- information reached
def information_reached(plan, cut, results: dict[str, Any]) -> dict[str, Any]:
    spending = plan.multiplicity.alpha_spending
    if spending.information_by == "calendar":
        return _calendar_information(spending, cut)
    return _participant_information(plan, cut, spending)


def _participant_information(plan, cut, spending) -> dict[str, Any]:
    endpoint = plan.endpoints[0]
    primary = endpoint.analyses.primary
    population = primary.population or plan.estimand(primary.estimand).population
    # Strategies change values, never rows or due-ness: the primary analysis' data (built already)
    # serve for counting due visits; counting observed values needs the values as recorded.
    data = cut.analysis_data(endpoint.id, estimand_id=primary.estimand, population_id=population)
    if not getattr(data, "due_judged", False):
        data = cut.analysis_data(endpoint.id, population_id=population)
    frame = data.frame[data.frame[data.visit].astype(str) == str(data.primary_visit)]
    cautions = []
    counted_in = plan.population(population).label.lower() if population else "analysis population"
    if "due" in frame.columns and getattr(data, "due_judged", False):
        counted = frame.loc[frame["due"].fillna(False).astype(bool), data.subject]
        basis = (f"participants in the {counted_in} whose {data.primary_visit} visit is due at the "
                 f"cut-off, over the {spending.planned_participants} planned")
    else:
        counted = frame.loc[frame[data.outcome].notna(), data.subject]
        basis = (f"participants in the {counted_in} with an observed {data.primary_visit} value, over "
                 f"the {spending.planned_participants} planned")
        cautions.append("The data carry no due dates, so information is counted by participants observed at the "
                        "primary visit; participants whose visit was due but missed are not counted.")
    count = int(counted.nunique())
    return {"fraction": count / spending.planned_participants, "basis": basis, "count": count, "cautions": cautions}


def _calendar_information(spending, cut) -> dict[str, Any]:
    cut_off = getattr(getattr(cut, "cut_off", None), "date", None)
    basis = f"days from {spending.calendar_start} to the cut-off over the days to {spending.calendar_end}"
    if cut_off is None:
        return {"fraction": None, "basis": basis, "cautions": ["The run has no cut-off date to measure calendar "
                                                                "information by."]}
    days = (cut_off - spending.calendar_start).days / (spending.calendar_end - spending.calendar_start).days
    return {"fraction": float(days), "basis": basis + f" (cut-off {cut_off.isoformat()})", "cautions": []}
