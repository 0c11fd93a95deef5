"""A blinded dry run: dummy arms "Arm A", "Arm B", ... allocated at random, and no real arm label anywhere.

The data cut may lack the treatment column (a blinded export); when it has one, its values
are discarded before anything reads them.  Each participant gets a dummy arm from permuted
blocks (two of each arm per block) within the randomisation strata, participants taken in
order of their identifier within each stratum, so the allocation depends on the seed and the
participants only (common practice for a stratified block randomisation list).

The plan's arm codes and labels become the dummy names everywhere the plan says them (arm
list, reference, hypotheses, free text such as an estimand's treatment), so that a run's
outputs carry no real arm label.  The i-th arm of the plan becomes the i-th dummy name; the
allocation, not the name, is what is random.
"""
from __future__ import annotations

import re
import string
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from trialcut.data.readers import RawCut

SHORTEST_FREE_TEXT_MATCH = 4   # shorter codes are replaced only where they are a whole value


@dataclass(frozen=True)
class ArmBlinding:
    """Real arm code or label -> dummy name; ``names`` in the plan's arm order."""

    mapping: dict[str, str]
    names: tuple[str, ...]

    def text(self, value: str) -> str:
        """``value`` with every real arm code or label replaced by its dummy name."""
        for real in sorted(self.mapping, key=len, reverse=True):
            if value == real:
                return self.mapping[real]
            if len(real) >= SHORTEST_FREE_TEXT_MATCH:
                pattern = re.compile(rf"(?<![A-Za-z0-9]){re.escape(real)}(?![A-Za-z0-9])", re.IGNORECASE)
                value = pattern.sub(self.mapping[real], value)
        return value

    def deep(self, value: Any) -> Any:
        """Every string inside ``value`` (dicts, lists, tuples) blinded; keys too."""
        if isinstance(value, str):
            return self.text(value)
        if isinstance(value, dict):
            return {self.deep(k) if isinstance(k, str) else k: self.deep(v) for k, v in value.items()}
        if isinstance(value, (list, tuple)):
            return type(value)(self.deep(v) for v in value)
        return value

    def plan(self, plan):
        """The plan with every arm code and label replaced (same class, validated again)."""
        dumped = self.deep(plan.model_dump(mode="json"))
        return type(plan).model_validate(dumped)


def dummy_name(position: int) -> str:
    letters = string.ascii_uppercase
    return f"Arm {letters[position]}" if position < len(letters) else f"Arm {position + 1}"


def blinding_for(plan) -> ArmBlinding:
    names = tuple(dummy_name(i) for i in range(len(plan.arms.list)))
    mapping: dict[str, str] = {}
    for arm, name in zip(plan.arms.list, names):
        mapping[arm.code] = name
        if arm.label:
            mapping[arm.label] = name
    return ArmBlinding(mapping, names)


def blind_raw(raw: RawCut, arm_column: str, placeholder: str) -> RawCut:
    """The cut with its treatment column (if any) replaced by ``placeholder`` before anything reads it."""
    frame = raw.frame.copy()
    frame[arm_column] = placeholder
    return RawCut(frame, dict(raw.manifest), raw.first_row, raw.row_word, raw.typed)


def allocate(subjects: pd.DataFrame, subject: str, strata: list[str], names: tuple[str, ...],
             seed: int) -> pd.Series:
    """A dummy arm per participant (indexed like ``subjects``): permuted blocks within strata."""
    generator = np.random.default_rng(np.random.SeedSequence(seed))
    ordered = subjects.sort_values(subject, kind="stable")
    groups = [g.index for _, g in ordered.groupby(strata, sort=True, dropna=False)] if strata else [ordered.index]
    block = np.repeat(np.array(names, dtype=object), 2)
    arms = pd.Series(None, index=subjects.index, dtype=object)
    for members in groups:
        blocks = int(np.ceil(len(members) / len(block)))
        sequence = np.concatenate([generator.permutation(block) for _ in range(blocks)]) if blocks else block[:0]
        arms.loc[members] = sequence[:len(members)]
    return arms
