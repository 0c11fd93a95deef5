"""Multiplicity adjustment of a family of hypothesis tests.

Bonferroni, Holm and Hochberg go through statsmodels' ``multipletests`` (unweighted; Holm
with unequal weights is run as its graph, the weighted Holm procedure).  The graphical
approach follows Bretz, Maurer, Brannath & Posch (2009), "A graphical approach to
sequentially rejective multiple test procedures", Statistics in Medicine 28:586–604:
weights w and a transition matrix G; the adjusted p-value of the hypothesis removed at
each step is max(p_j / w_j, previous adjusted p), capped at 1 (their Algorithm 2 for
adjusted p-values).  Hypotheses without a p-value are carried as NaN and never rejected.
"""
from __future__ import annotations

from typing import Sequence

import numpy as np
from statsmodels.stats.multitest import multipletests

from trialcut.errors import ModelSpecificationError

_STATSMODELS_NAME = {"bonferroni": "bonferroni", "holm": "holm", "hochberg": "simes-hochberg"}


def adjust(p_values: Sequence[float | None], *, method: str, alpha: float,
           weights: Sequence[float] | None = None,
           transitions: Sequence[Sequence[float]] | None = None) -> dict[str, list]:
    p = np.array([np.nan if v is None else float(v) for v in p_values])
    known = ~np.isnan(p)
    adjusted = np.full(p.shape, np.nan)
    if method == "none":
        adjusted[known] = p[known]
    elif method == "holm" and weights is not None and known.all() and len(set(weights)) > 1:
        adjusted = graphical_adjusted_p(p, *weighted_holm_graph(np.asarray(weights, float)))
    elif method in _STATSMODELS_NAME:
        if known.any():
            adjusted[known] = multipletests(p[known], alpha=alpha, method=_STATSMODELS_NAME[method])[1]
    elif method == "graphical":
        if not known.all():
            raise ModelSpecificationError(
                "the graphical approach needs a p-value for every hypothesis; some analyses gave none")
        adjusted = graphical_adjusted_p(p, np.asarray(weights, float), np.asarray(transitions, float))
    else:
        raise ModelSpecificationError(f"unknown multiplicity method {method!r}")
    rejected = [bool(a <= alpha) if not np.isnan(a) else False for a in adjusted]
    return {"adjusted_p": [None if np.isnan(a) else float(a) for a in adjusted], "rejected": rejected}


def weighted_holm_graph(weights: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Weighted Holm as a graph: each hypothesis passes its level to the others in
    proportion to their weights (Bretz et al. 2009, section 3)."""
    w = weights / weights.sum()
    transitions = np.tile(w, (len(w), 1))
    np.fill_diagonal(transitions, 0.0)
    row_sums = transitions.sum(axis=1, keepdims=True)
    return w, np.divide(transitions, row_sums, out=np.zeros_like(transitions), where=row_sums > 0)


def graphical_adjusted_p(p: np.ndarray, weights: np.ndarray, transitions: np.ndarray) -> np.ndarray:
    m = len(p)
    if weights.shape != (m,) or transitions.shape != (m, m):
        raise ModelSpecificationError(f"graphical approach: need {m} weights and a {m}×{m} transition matrix")
    w, g = weights.astype(float).copy(), transitions.astype(float).copy()
    remaining = list(range(m))
    adjusted = np.ones(m)
    running_max = 0.0
    while remaining:
        ratios = [p[i] / w[i] if w[i] > 0 else np.inf for i in remaining]
        j = remaining[int(np.argmin(ratios))]
        running_max = max(running_max, min(1.0, ratios[remaining.index(j)]))
        adjusted[j] = running_max
        remaining.remove(j)
        w, g = remove_node(w, g, j, remaining)
    return adjusted


def remove_node(w: np.ndarray, g: np.ndarray, j: int, remaining: list[int]):
    """Pass j's weight along its edges and reconnect the graph around j (Bretz et al. 2009, Algorithm 1)."""
    new_w, new_g = w.copy(), np.zeros_like(g)
    for l in remaining:
        new_w[l] = w[l] + w[j] * g[j, l]
        for k in remaining:
            if k == l:
                continue
            denominator = 1.0 - g[l, j] * g[j, l]
            new_g[l, k] = (g[l, k] + g[l, j] * g[j, k]) / denominator if denominator > 0 else 0.0
    new_w[j] = 0.0
    return new_w, new_g
