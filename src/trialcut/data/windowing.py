"""Assigning post-baseline records to analysis visits from the study day.

The rule (common practice for visit windows in trial analysis datasets; our statement of it):

1. A record belongs to a visit when its study day lies inside ``planned day ± window``.
   If windows overlap, the visit whose planned day is closest wins; a tie goes to the
   later visit.  A record inside no window is left unassigned and logged.
2. When several records of one participant fall to the same visit, the one closest to the
   planned day is analysed; a tie goes to the later record (the later measurement is the
   more complete picture of the period).  Every such choice is logged with the rejected days.

Two records of one participant on the same study day cannot be chosen between by this
rule; the conformance checks report them as an error before windowing runs.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np
import pandas as pd


@dataclass(frozen=True)
class Window:
    label: str
    day: float
    half_width: float


@dataclass(frozen=True)
class WindowAssignment:
    """``visit``: the assigned label per record (None when unassigned), aligned with the input;
    ``chosen``: True for the one record analysed per participant and visit;
    ``log``: one entry per choice or unassigned record."""

    visit: pd.Series
    chosen: pd.Series
    log: tuple[dict[str, Any], ...]


def windows_from_schedule(schedule: Sequence[Any]) -> tuple[Window, ...]:
    """Plan visits (with ``label``, ``day``, ``window``) -> windows."""
    return tuple(Window(v.label, float(v.day), float(v.window)) for v in schedule)


def assign_visits(days: pd.Series, participants: pd.Series, windows: Sequence[Window],
                  parameters: pd.Series | None = None) -> WindowAssignment:
    """Assign each record (one study day each) to a visit and choose one record per visit."""
    labels = _windows_of(days.to_numpy(dtype=float), windows)
    visit = pd.Series(labels, index=days.index, dtype=object)
    keys = _group_keys(participants, parameters)
    # Over the plain list: a pandas lookup per record cost more than the assignment itself.
    log = [_entry(keys[position], None, None, [day], _unassigned_reason(day))
           for position, (day, label) in enumerate(zip(days.to_numpy(dtype=float), labels)) if label is None]
    if not _any_visit_repeated(participants, parameters, labels):
        # One record per participant and visit (the usual case): nothing to choose, nothing to log.
        return WindowAssignment(visit, pd.Series(visit.notna().to_numpy(), index=days.index), tuple(log))
    planned = {w.label: w.day for w in windows}
    frame = pd.DataFrame({"key": pd.Series(keys, index=days.index, dtype=object), "visit": visit,
                          "day": days.astype(float), "position": np.arange(len(days))}, index=days.index)
    frame = frame[frame["visit"].notna()]
    frame["distance"] = (frame["day"] - frame["visit"].map(planned).astype(float)).abs()
    # Closest first; among equally close, the later day, then the later row.
    ranked = frame.sort_values(["distance", "day", "position"], ascending=[True, False, False], kind="stable")
    winners = ranked.groupby(["key", "visit"], sort=False).head(1)
    chosen = pd.Series(False, index=days.index)
    chosen[winners.index] = True
    sizes = frame.groupby(["key", "visit"], sort=False)["day"].transform("size")
    contested = frame[sizes > 1]
    # One pass over plain arrays (a groupby loop cost seconds on a large cut with many repeats).
    groups: dict[tuple[Any, str], list[tuple[float, bool, float]]] = {}
    for key, label, day, won, distance in zip(contested["key"].tolist(), contested["visit"].tolist(),
                                              contested["day"].tolist(), chosen[contested.index].tolist(),
                                              contested["distance"].tolist()):
        groups.setdefault((key, label), []).append((day, won, distance))
    for key, label in sorted(groups):
        members = groups[(key, label)]
        winner = next(position for position, member in enumerate(members) if member[1])
        ties = sum(1 for member in members if member[2] == members[winner][2])
        log.append(_entry(key, label, float(members[winner][0]),
                          sorted(float(m[0]) for position, m in enumerate(members) if position != winner),
                          _reason_text(ties, planned[label])))
    return WindowAssignment(visit, chosen, tuple(log))


def _any_visit_repeated(participants: pd.Series, parameters: pd.Series | None, labels: list) -> bool:
    """Whether two assigned records share participant, parameter and visit, on integer codes.
    A gap in an id gives True: the general route keeps its own handling of gaps."""
    columns = [participants] + ([parameters] if parameters is not None else []) + [pd.Series(labels, dtype=object)]
    codes = [pd.factorize(column.to_numpy(dtype=object))[0] for column in columns]
    if any((code < 0).any() for code in codes[:-1]):
        return True
    assigned = codes[-1] >= 0
    frame = pd.DataFrame({str(i): code[assigned] for i, code in enumerate(codes)})
    return bool(frame.duplicated().any())


def _windows_of(days: np.ndarray, windows: Sequence[Window]) -> list[str | None]:
    """:func:`_window_of` for every day at once."""
    if not len(windows):
        return [None] * len(days)
    # Later planned days first, so that the first of equally close windows is the later visit.
    ordered = sorted(windows, key=lambda w: w.day, reverse=True)
    planned = np.array([w.day for w in ordered])
    half = np.array([w.half_width for w in ordered])
    with np.errstate(invalid="ignore"):
        distance = np.abs(days[:, None] - planned[None, :])
        inside = (distance <= half[None, :]) & np.isfinite(days)[:, None]
    best = np.argmin(np.where(inside, distance, np.inf), axis=1)
    labels = np.array([w.label for w in ordered] + [None], dtype=object)
    return labels[np.where(inside.any(axis=1), best, len(ordered))].tolist()


def _window_of(day: float, windows: Sequence[Window]) -> str | None:
    if not np.isfinite(day):
        return None
    inside = [w for w in windows if abs(day - w.day) <= w.half_width]
    if not inside:
        return None
    # Closest planned day; on a tie the later visit (max of (-distance, planned day)).
    return max(inside, key=lambda w: (-abs(day - w.day), w.day)).label


def _reason(group: pd.DataFrame, winner: Any, planned: float) -> str:
    return _reason_text((group["distance"] == group.at[winner, "distance"]).sum(), planned)


def _reason_text(ties: int, planned: float) -> str:
    if ties == 1:
        return f"closest to planned day {planned:g}"
    return f"equally close to planned day {planned:g}; the later record wins"


def _unassigned_reason(day: float) -> str:
    if not np.isfinite(day):
        return "no study day, so the record cannot be placed in a visit window"
    return f"day {day:g} is outside every visit window"


def _group_keys(participants: pd.Series, parameters: pd.Series | None) -> list[tuple[Any, Any]]:
    subjects = participants.to_numpy(dtype=object)
    params = parameters.to_numpy(dtype=object) if parameters is not None else [None] * len(subjects)
    return list(zip(subjects, params))


def _entry(key: tuple[Any, Any], visit: str | None, chosen_day: float | None,
           rejected: list[float], reason: str) -> dict[str, Any]:
    participant, parameter = key
    entry = {"step": "visit_window", "participant": participant, "visit": visit,
             "chosen_day": chosen_day, "rejected_days": [_plain(d) for d in rejected], "reason": reason}
    if parameter is not None:
        entry["parameter"] = parameter
    return entry


def _plain(day: float) -> float | None:
    return float(day) if np.isfinite(day) else None
