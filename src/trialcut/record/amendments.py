"""Amendments locked after a data cut was already analysed with an earlier plan version.

Such an amendment is not wrong in itself (a plan may be amended between an interim and the
final analysis), but a reviewer must see it: the change could have been made knowing results.
For every lock record after the first, ``flag_late_amendments`` lists the registered runs of
the same study that used an earlier version of the plan (by plan hash) and were recorded before
the amendment was locked.
"""
from __future__ import annotations

from pathlib import Path
from typing import Any

from trialcut.record.registry import list_records


def flag_late_amendments(amendments: list[dict[str, Any]], registry_path: Path,
                         study_id: str) -> list[dict[str, Any]]:
    """The chain's entries (oldest first), each with ``runs_before`` (empty when none)."""
    runs = (list_records(registry_path, study=study_id, kind="run")
            if Path(registry_path).is_file() else [])
    flagged = []
    for index, entry in enumerate(amendments):
        earlier = {item.get("sha256"): item.get("version") for item in amendments[:index]}
        before = [{"run_id": row.record_id, "cut": row.cut, "created_utc": row.created_utc,
                   "plan_version": earlier[row.plan_sha256]}
                  for row in runs if row.plan_sha256 in earlier
                  and row.created_utc < str(entry.get("locked_utc") or "")]
        flagged.append({**entry, "runs_before": before})
    return flagged


def flag_lock_state(lock: dict[str, Any], out_root: Path, study_id: str) -> dict[str, Any]:
    """A run's lock state (as commands build it) with every chain entry flagged."""
    if lock.get("status") != "locked" or not lock.get("record"):
        return lock
    chain = flag_late_amendments(lock["record"].get("amendments") or [],
                                 Path(out_root) / "registry.sqlite", study_id)
    return {**lock, "record": {**lock["record"], "amendments": chain}, "chain": chain}
