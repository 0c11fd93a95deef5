"""Multiplicity adjustment against statsmodels and published identities."""
import numpy as np
import pytest
from statsmodels.stats.multitest import multipletests

from trialcut.stats.multiplicity import adjust, graphical_adjusted_p


@pytest.mark.parametrize("seed", range(5))
def test_graphical_holm_graph_equals_holm(seed):
    # Bretz et al. (2009, Stat Med 28:586) show that equal weights with each hypothesis
    # passing its whole level equally to the others is Holm's procedure; statsmodels'
    # multipletests(method="holm") is the independent reference.
    rng = np.random.default_rng(seed)
    m = 4
    p = rng.uniform(0, 0.1, m)
    transitions = (np.ones((m, m)) - np.eye(m)) / (m - 1)
    ours = graphical_adjusted_p(p, np.full(m, 1 / m), transitions)
    np.testing.assert_allclose(ours, multipletests(p, method="holm")[1], rtol=1e-12, err_msg=f"seed {seed}")


def test_fixed_sequence_graph():
    # Fixed-sequence testing as a graph (Bretz et al. 2009, section 2): all weight on H1,
    # H1 passes everything to H2; adjusted p of H2 is max(p1, p2).
    p = np.array([0.03, 0.01])
    adjusted = graphical_adjusted_p(p, np.array([1.0, 0.0]), np.array([[0, 1.0], [0, 0]]))
    np.testing.assert_allclose(adjusted, [0.03, 0.03])


@pytest.mark.parametrize("method,reference", [("holm", "holm"), ("hochberg", "simes-hochberg"),
                                              ("bonferroni", "bonferroni")])
def test_named_methods_match_statsmodels(method, reference):
    p = [0.012, 0.04, 0.003]
    out = adjust(p, method=method, alpha=0.05)
    expected_p = multipletests(p, method=reference)[1]
    np.testing.assert_allclose(out["adjusted_p"], expected_p)
    assert out["rejected"] == [bool(x <= 0.05) for x in expected_p]


def test_missing_p_value_is_not_rejected():
    out = adjust([0.001, None], method="holm", alpha=0.05)
    assert out["adjusted_p"][1] is None and out["rejected"] == [True, False]


def test_weighted_holm_by_hand():
    # Weighted Holm (Holm 1979, Scand J Statist 6:65; as a graph in Bretz et al. 2009):
    # with weights (0.8, 0.2), H1 is tested at 0.8α first; once rejected, H2 gets the full α.
    # Adjusted p-values: q1 = p1/0.8; q2 = max(q1, p2).
    out = adjust([0.03, 0.045], method="holm", alpha=0.05, weights=[0.8, 0.2])
    np.testing.assert_allclose(out["adjusted_p"], [0.03 / 0.8, 0.045])
    assert out["rejected"] == [True, True]
    # H2 first: p2/0.2 = 0.05 < p1/0.8 = 0.0625, so q2 = 0.05 and q1 = max(0.05, p1) = 0.05.
    out = adjust([0.05, 0.01], method="holm", alpha=0.05, weights=[0.8, 0.2])
    np.testing.assert_allclose(out["adjusted_p"], [0.05, 0.05])
