"""Handover bundles: checkable with coreutils alone and with trialcut, and a bundle whose
files were changed (even with a rewritten manifest) is caught."""
from __future__ import annotations

import hashlib
import json
import shutil
import subprocess
import zipfile
from pathlib import Path

import pytest

from trialcut.cli import main

BASE = Path(__file__).resolve().parents[1] / "cases" / "_base"


@pytest.fixture(scope="module")
def bundled(tmp_path_factory):
    work = tmp_path_factory.mktemp("bundle")
    plan = work / "plan.yaml"
    shutil.copyfile(BASE / "plan.yaml", plan)
    keys = ["--key-dir", str(work / "keys"), "--keyring", str(work / "keyring.txt")]
    assert main(["key", "new", "--name", "stat", "--no-passphrase", *keys]) == 0
    assert main(["lock", str(plan), "--by", "stat", "--reason", "final", "--sign", "stat", *keys]) == 0
    out = work / "out"
    assert main(["run", str(plan), "--data", str(BASE / "data.csv"), "--cut", "c1", "--out", str(out)]) == 0
    run = next(out.glob("LVT-201/c1/*"))
    assert main(["approve", str(run), "--sign", "stat", "--role", "reviewer", *keys]) == 0
    assert main(["bundle", str(run), "--include-data", "--keyring", str(work / "keyring.txt")]) == 0
    archive = next(out.glob("LVT-201/bundles/*/bundle-*.zip"))
    return {"work": work, "archive": archive, "keyring": work / "keyring.txt", "run": run}


def test_a_bundle_checks_with_sha256sum_alone(bundled, tmp_path):
    if shutil.which("sha256sum") is None:
        pytest.skip("coreutils sha256sum is not installed")
    with zipfile.ZipFile(bundled["archive"]) as archive:
        archive.extractall(tmp_path)
    (top,) = tmp_path.iterdir()
    # Outside reference: GNU coreutils checks the bundle's and the run's manifests.
    assert subprocess.run(["sha256sum", "-c", "--strict", "--quiet", "MANIFEST.sha256"], cwd=top).returncode == 0
    (run,) = (top / "run").iterdir()
    assert subprocess.run(["sha256sum", "-c", "--strict", "--quiet", "MANIFEST.sha256"], cwd=run).returncode == 0
    data = next((top / "data").iterdir())
    facts = json.loads((top / "bundle.json").read_text())
    assert hashlib.sha256(data.read_bytes()).hexdigest() == facts["data"]["sha256"]
    assert (top / "environment" / "lock.txt").is_file() and (top / "keyring.txt").is_file()


def test_verify_accepts_the_bundle_and_names_its_signatures(bundled, capsys):
    capsys.readouterr()
    assert main(["verify", str(bundled["archive"]), "--keyring", str(bundled["keyring"])]) == 0
    assert "2 valid" in capsys.readouterr().out


def _rewritten(archive: Path, target: Path, edit) -> Path:
    """A copy of the bundle with one file edited and the top manifest recomputed to match."""
    with zipfile.ZipFile(archive) as source:
        files = {info.filename: source.read(info) for info in source.infolist()}
    top = next(iter(files)).split("/")[0]
    edit(files, top)
    inner = {name[len(top) + 1:]: content for name, content in files.items()
             if name != f"{top}/MANIFEST.sha256"}
    files[f"{top}/MANIFEST.sha256"] = "".join(
        f"{hashlib.sha256(inner[name]).hexdigest()}  {name}\n" for name in sorted(inner)).encode()
    with zipfile.ZipFile(target, "w") as copy:
        for name, content in files.items():
            copy.writestr(name, content)
    return target


def test_an_edited_approval_fails_even_with_a_rewritten_manifest(bundled, tmp_path, capsys):
    def edit(files, top):
        name = next(n for n in files if n.endswith("approval.json"))
        content = json.loads(files[name])
        content["role"] = "statistician"
        files[name] = json.dumps(content).encode()

    forged = _rewritten(bundled["archive"], tmp_path / "forged.zip", edit)
    capsys.readouterr()
    assert main(["verify", str(forged), "--keyring", str(bundled["keyring"])]) == 1
    error = capsys.readouterr().err
    assert "the signature does not match the record" in error


def test_signatures_by_keys_outside_the_recipients_keyring_fail(bundled, tmp_path, capsys):
    other = tmp_path / "keyring.txt"
    assert main(["key", "new", "--name", "someone", "--no-passphrase", "--key-dir", str(tmp_path / "k"),
                 "--keyring", str(other)]) == 0
    capsys.readouterr()
    assert main(["verify", str(bundled["archive"]), "--keyring", str(other)]) == 1
    assert "not in the keyring" in capsys.readouterr().err
