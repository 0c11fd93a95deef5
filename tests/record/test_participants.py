"""Per-participant hashes: the same bytes as one pandas CSV per participant, and tamper-evident.

Reference: each participant's rows sorted by every column and written by pandas'
``DataFrame.to_csv`` (pandas documentation: minimal quoting, ``na_rep=''``), hashed with
``hashlib`` — the straightforward computation the vectorised pass replaces.
"""
from __future__ import annotations

import hashlib

import numpy as np
import pandas as pd

from trialcut.record.participants import participant_hashes
from tests.open_data import beat_the_blues_long


def pandas_reference(frame: pd.DataFrame, subject: str) -> dict[str, str]:
    text = frame.astype(str)
    return {str(subject_id): hashlib.sha256(rows.sort_values(list(rows.columns))
                                            .to_csv(index=False, lineterminator="\n")
                                            .encode("utf-8")).hexdigest()
            for subject_id, rows in text.groupby(subject, sort=True)}


def awkward(frame: pd.DataFrame) -> pd.DataFrame:
    """Beat the Blues with values CSV must quote, missing values and repeated rows."""
    frame = frame.copy()
    notes = ["", "a,b", 'said "no"', "two\nlines", "caf\u00e9"]
    frame["NOTE"] = [notes[index % len(notes)] for index in range(len(frame))]
    frame.loc[frame.index[::9], "NOTE"] = np.nan
    return pd.concat([frame, frame.iloc[:5]], ignore_index=True)


def test_hashes_equal_one_pandas_csv_per_participant():
    frame = awkward(beat_the_blues_long())
    assert participant_hashes(frame, "USUBJID") == pandas_reference(frame, "USUBJID")


def test_row_order_does_not_matter_and_one_edit_changes_one_participant():
    frame = awkward(beat_the_blues_long())
    before = participant_hashes(frame, "USUBJID")
    shuffled = frame.sample(frac=1.0, random_state=3)
    assert participant_hashes(shuffled, "USUBJID") == before
    edited = frame.copy()
    row = edited.index[edited["AVAL"].notna()][10]
    edited.loc[row, "AVAL"] = edited.loc[row, "AVAL"] + 1
    after = participant_hashes(edited, "USUBJID")
    changed = [key for key in before if before[key] != after[key]]
    assert changed == [str(edited.loc[row, "USUBJID"])]
    removed = participant_hashes(frame.drop(index=row), "USUBJID")
    assert [key for key in before if before[key] != removed[key]] == changed
