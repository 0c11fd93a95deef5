"""The reference-based assumptions: how each builds an affected participant's mean and covariance.

Carpenter, Roger & Kenward (2013, J Biopharm Stat 23:1352–1371): with μₐ the participant's mean
vector in their own arm, μᵣ in the reference arm and d the first visit affected by an
intercurrent event, each assumption gives the joint mean m* (MAR, jump to reference, copy
reference, copy increments in reference); every reference-based one shares the joint covariance
Σ* (:func:`reference_based_covariance`).  A δ shift is added later, to the imputed values
(:func:`trialcut.stats.imputation_analysis.shift_matrix`).  Each assumption is a small object
behind the :class:`Assumption` protocol; :data:`ASSUMPTIONS` is the registry by name.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Protocol, Sequence

import numpy as np

from trialcut.errors import ModelSpecificationError, Problem

if TYPE_CHECKING:
    from trialcut.stats.imputation_data import ImputationData

class Assumption(Protocol):
    """How the mean vector of a participant affected from visit index d is built."""

    name: str
    reference_based: bool

    def joint_mean(self, own: np.ndarray, reference: np.ndarray, deviation: int) -> np.ndarray:
        """own, reference: (rows, T) mean vectors; returns m* of the same shape."""


@dataclass(frozen=True)
class MissingAtRandom:
    name: str = "mar"
    reference_based: bool = False

    def joint_mean(self, own, reference, deviation):
        return own


@dataclass(frozen=True)
class JumpToReference:
    name: str = "jump_to_reference"
    reference_based: bool = True

    def joint_mean(self, own, reference, deviation):
        return np.concatenate([own[:, :deviation], reference[:, deviation:]], axis=1)


@dataclass(frozen=True)
class CopyReference:
    name: str = "copy_reference"
    reference_based: bool = True

    def joint_mean(self, own, reference, deviation):
        return reference


@dataclass(frozen=True)
class CopyIncrementsInReference:
    name: str = "copy_increments_in_reference"
    reference_based: bool = True

    def joint_mean(self, own, reference, deviation):
        if deviation == 0:
            return reference   # no visit before the event: nothing of the own arm to carry
        last = deviation - 1
        later = own[:, last:last + 1] + reference[:, deviation:] - reference[:, last:last + 1]
        return np.concatenate([own[:, :deviation], later], axis=1)


ASSUMPTIONS: dict[str, Assumption] = {
    a.name: a for a in (MissingAtRandom(), JumpToReference(), CopyReference(), CopyIncrementsInReference())
}


def reference_based_covariance(own: np.ndarray, reference: np.ndarray, deviation: int) -> np.ndarray:
    """Σ* of Carpenter, Roger & Kenward (2013): own block before d, reference conditional after."""
    d = deviation
    if d == 0:
        return reference.copy()
    if d >= own.shape[0]:
        return own.copy()
    r11, r12, r22 = reference[:d, :d], reference[:d, d:], reference[d:, d:]
    a11 = own[:d, :d]
    regression = np.linalg.solve(r11, r12).T          # Σᵣ₂₁Σᵣ₁₁⁻¹
    joint = np.empty_like(own)
    joint[:d, :d] = a11
    joint[d:, :d] = regression @ a11
    joint[:d, d:] = joint[d:, :d].T
    joint[d:, d:] = r22 - regression @ (r11 - a11) @ regression.T
    return joint

def participant_rules(data: ImputationData, assumption: str | Assumption | Sequence[str]) -> tuple[Assumption, ...]:
    """One assumption per participant: the same for all, or one name per participant (in
    ``data.subjects`` order), e.g. chosen by the reason for an intercurrent event."""
    if isinstance(assumption, (str, MissingAtRandom, JumpToReference, CopyReference, CopyIncrementsInReference)):
        return (_rule(assumption),) * len(data.subjects)
    names = tuple(assumption)
    if len(names) != len(data.subjects):
        raise ModelSpecificationError("one imputation assumption per participant is needed", [Problem(
            code="stats.assumption_count", message="the per-participant assumptions do not match the participants",
            expected=f"{len(data.subjects)} assumptions", got=str(len(names)))])
    return tuple(_rule(name) for name in names)

def _rule(assumption: str | Assumption) -> Assumption:
    return ASSUMPTIONS[assumption] if isinstance(assumption, str) else assumption
