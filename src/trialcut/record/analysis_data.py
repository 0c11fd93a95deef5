"""Write the derived analysis datasets into a run folder: Parquet, CDISC Dataset-JSON v1.1
(with a label per variable) and a plain-text account of each derivation rule.

The files go under ``analysis_data/`` of the folder being built, so the manifest hashes
them like every other file of the run.
"""
from __future__ import annotations

from pathlib import Path
from typing import Sequence

from trialcut.data.readers import write_dataset_json

FOLDER = "analysis_data"


def write_analysis_data(folder: Path, datasets: Sequence, *, study_id: str, created: str) -> list[Path]:
    """Write each dataset (``endpoint``, ``frame``, ``labels``, ``rules``); returns the paths written.

    ``created`` (ISO 8601, the run's start) stamps the Dataset-JSON files, so a re-run of the
    same inputs writes the same bytes apart from it.
    """
    target = Path(folder) / FOLDER
    target.mkdir()
    written = []
    for dataset in datasets:
        stem = target / dataset.endpoint
        dataset.frame.to_parquet(stem.with_suffix(".parquet"), index=False)
        written.append(stem.with_suffix(".parquet"))
        written.append(write_dataset_json(
            dataset.frame, stem.with_suffix(".json"), name=_dataset_name(dataset.endpoint),
            label=f"Derived analysis data of endpoint {dataset.endpoint}", study_oid=study_id,
            labels=dataset.labels, created=created))
    written.append(_write_rules(target, datasets))
    return written


def _dataset_name(endpoint: str) -> str:
    # Dataset-JSON names are short upper-case words (the standard's own convention).
    return ("AD" + "".join(ch for ch in endpoint.upper() if ch.isalnum()))[:8]


def _write_rules(target: Path, datasets: Sequence) -> Path:
    lines = ["How the analysis datasets in this folder were derived", ""]
    rules = datasets[0].rules if datasets else ()
    lines += [f"{number}. {rule}" for number, rule in enumerate(rules, start=1)]
    for dataset in datasets:
        lines += ["", f"Variables of {dataset.endpoint} ({dataset.endpoint}.parquet, {dataset.endpoint}.json):"]
        lines += [f"  {name}: {dataset.labels.get(name, name)}" for name in dataset.frame.columns]
    path = target / "derivations.txt"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path
