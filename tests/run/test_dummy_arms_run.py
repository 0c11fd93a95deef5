"""A blinded dry run (issue 8 item 7): a data cut without its treatment column runs with
``--dummy-arms SEED``, shows "Arm A/B/C", and no output file of the run names a real arm.

Every file of the run folder is searched: text files as they are, the PDF through its
extracted text and metadata (pypdf), the editable copy through the XML parts of its ZIP
container, the Parquet analysis data through its values.  The plan copy is left out of a dry
run (a note stands in its place), so there is no exception to the search.
"""
from __future__ import annotations

import io
import json
import zipfile
from pathlib import Path

import pandas as pd
import pytest

from trialcut.cli import main

BASE = Path(__file__).resolve().parents[1] / "cases" / "_base"
REAL_LABELS = ("Placebo", "Lorvatide 10 mg", "Lorvatide 20 mg")


def _texts(path: Path) -> list[str]:
    data = path.read_bytes()
    texts = [data.decode("latin-1")]
    if path.suffix == ".pdf":
        from pypdf import PdfReader

        reader = PdfReader(io.BytesIO(data))
        texts += [page.extract_text() or "" for page in reader.pages] + [str(reader.metadata)]
    elif path.suffix == ".docx":
        with zipfile.ZipFile(io.BytesIO(data)) as archive:
            texts += [archive.read(name).decode("utf-8", "replace") for name in archive.namelist()]
    elif path.suffix == ".parquet":
        texts.append(pd.read_parquet(path).to_csv())
    return texts


@pytest.fixture(scope="module")
def dry_run(tmp_path_factory):
    work = tmp_path_factory.mktemp("dry")
    blinded = work / "blinded.csv"
    pd.read_csv(BASE / "data.csv").drop(columns="TRT01P").to_csv(blinded, index=False)
    out = work / "out"
    status = main(["run", str(BASE / "plan.yaml"), "--data", str(blinded), "--cut", "dry", "--out", str(out),
                   "--unlocked", "--dummy-arms", "5"])
    assert status == 0
    return next(p for p in out.glob("*/dry/*") if (p / "results.json").exists())


def test_no_output_file_names_a_real_arm(dry_run):
    hits = sorted({(str(path.relative_to(dry_run)), label)
                   for path in dry_run.rglob("*") if path.is_file()
                   for text in _texts(path) for label in REAL_LABELS if label.lower() in text.lower()})
    assert hits == []


def test_the_dummy_arms_are_shown_and_the_plan_copy_is_left_out(dry_run):
    results = json.loads((dry_run / "results.json").read_text(encoding="utf-8"))
    assert results["run"]["dummy_arms_seed"] == 5
    assert [a["code"] for a in results["plan"]["arms"]["list"]] == ["Arm A", "Arm B", "Arm C"]
    assert results["plan"]["arms"]["reference"] == "Arm A"
    counts = results["populations"]
    assert counts["columns"][1:4] == ["Arm A", "Arm B", "Arm C"]
    assert sorted(p.name for p in (dry_run / "plan").iterdir()) == ["LEFT_OUT.txt"]
    assert "Arm B" in (dry_run / "report.html").read_text(encoding="utf-8")
    frame = pd.read_parquet(dry_run / "analysis_data" / "fbs_change.parquet")
    assert set(frame["ARM"]) == {"Arm A", "Arm B", "Arm C"}
