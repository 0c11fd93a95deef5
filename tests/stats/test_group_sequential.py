"""Unit checks of the alpha-spending boundaries and of the group-sequential graph test.

Provenance: the spending functions' values at t = 1 and the first O'Brien–Fleming-type boundary
are identities of their definitions (Lan & DeMets 1983); the one-look reduction to the
ordinary graphical procedure follows from the definitions (Maurer & Bretz 2013).
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from trialcut.errors import ModelSpecificationError
from trialcut.stats.group_sequential import (
    SPENDING_FUNCTIONS,
    alpha_spent,
    boundaries,
    sequential_graph_test,
)
from trialcut.stats.multiplicity import graphical_adjusted_p, weighted_holm_graph


@pytest.mark.parametrize("spending,parameter", [("obrien_fleming_type", None), ("pocock_type", None),
                                                ("hwang_shih_decani", -4.0), ("hwang_shih_decani", 1.0),
                                                ("hwang_shih_decani", 0.0)])
def test_spending_is_increasing_and_spends_alpha_by_the_end(spending, parameter):
    t = np.linspace(0.05, 1, 20)
    spent = alpha_spent(t, alpha=0.05, spending=spending, parameter=parameter)
    assert np.all(np.diff(spent) > 0)
    assert spent[-1] == pytest.approx(0.05, abs=1e-12)


def test_hwang_shih_decani_tends_to_linear_spending_as_gamma_goes_to_zero():
    t = np.array([0.2, 0.5, 0.8])
    near = alpha_spent(t, alpha=0.05, spending="hwang_shih_decani", parameter=1e-6)
    assert near == pytest.approx(0.05 * t, rel=1e-5)


def test_first_obrien_fleming_type_boundary_is_the_spending_quantile():
    # One look so far: P(|Z_1| >= c) = α(t_1), so c = z_{α/2} / √t_1 exactly.
    for t1 in (0.25, 0.5, 0.7):
        result = boundaries([t1, 1.0], alpha=0.05, spending="obrien_fleming_type")
        assert result.z[0] == pytest.approx(stats.norm.isf(0.025) / np.sqrt(t1), abs=1e-8)


def test_one_look_is_the_fixed_sample_test():
    result = boundaries([1.0], alpha=0.05, spending="pocock_type")
    assert result.z[0] == pytest.approx(stats.norm.isf(0.025), abs=1e-8)
    assert result.nominal_p[0] == pytest.approx(0.05, abs=1e-10)


def test_final_boundary_is_below_the_first_for_obrien_fleming_type():
    result = boundaries([0.3, 0.6, 1.0], alpha=0.05, spending="obrien_fleming_type")
    assert result.z[0] > result.z[1] > result.z[2] > stats.norm.isf(0.025)


@pytest.mark.parametrize("fractions", [[0.0, 1.0], [0.5, 1.2], [0.6, 0.4], [], [float("nan")]])
def test_bad_fractions_are_refused(fractions):
    with pytest.raises(ModelSpecificationError):
        boundaries(fractions, alpha=0.05, spending="obrien_fleming_type")


def test_unknown_spending_function_is_refused():
    with pytest.raises(ModelSpecificationError, match="unknown spending"):
        alpha_spent([0.5], alpha=0.05, spending="linear")
    assert set(SPENDING_FUNCTIONS) == {"obrien_fleming_type", "pocock_type", "hwang_shih_decani"}


@pytest.mark.parametrize("seed", range(20))
def test_one_look_graph_test_rejects_what_the_graphical_procedure_rejects(seed):
    # With a single look each boundary is the local alpha itself, so the group-sequential
    # graph test must reject exactly the hypotheses whose graphical adjusted p is ≤ alpha.
    rng = np.random.default_rng(seed)
    m = int(rng.integers(2, 5))
    p = rng.uniform(0, 0.06, m)
    weights, transitions = weighted_holm_graph(rng.dirichlet(np.ones(m)))
    decision = sequential_graph_test(p, weights=weights, transitions=transitions, alpha=0.05,
                                     nominal_level=lambda i, local: local)
    expected = graphical_adjusted_p(p, weights, transitions) <= 0.05
    assert list(decision.rejected) == list(expected), f"seed {seed}"


def test_alpha_passes_on_after_a_rejection():
    # Holm with two hypotheses: the first is rejected at 0.025 and passes its alpha on, so the
    # second is then tested at 0.05 (its boundary p rises to the full level).
    weights, transitions = weighted_holm_graph(np.array([0.5, 0.5]))
    decision = sequential_graph_test([0.001, 0.04], weights=weights, transitions=transitions, alpha=0.05,
                                     nominal_level=lambda i, local: local)
    assert decision.rejected == (True, True)
    assert decision.crossed_alone == (True, False)
    assert decision.local_alpha == pytest.approx((0.025, 0.05))


def test_missing_p_value_is_never_rejected():
    weights, transitions = weighted_holm_graph(np.array([0.5, 0.5]))
    decision = sequential_graph_test([None, 0.0001], weights=weights, transitions=transitions, alpha=0.05,
                                     nominal_level=lambda i, local: local)
    assert decision.rejected == (False, True)
