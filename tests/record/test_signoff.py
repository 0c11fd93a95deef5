"""Signed locks and approvals through the command line: a run becomes final only when its plan's
sign-off settings are met, and verify names every record's signature state."""
from __future__ import annotations

from pathlib import Path

from trialcut.cli import main

BASE = Path(__file__).resolve().parents[1] / "cases" / "_base"
SIGN_OFF = "sign_off:\n  signed_locks: true\n  approvals: 1\n  roles: [reviewer]\n"


def _project(tmp_path: Path) -> dict[str, str]:
    plan = tmp_path / "plan.yaml"
    plan.write_text(BASE.joinpath("plan.yaml").read_text(encoding="utf-8") + SIGN_OFF, encoding="utf-8")
    keys = {"--key-dir": str(tmp_path / "keys"), "--keyring": str(tmp_path / "keyring.txt")}
    flags = [item for pair in keys.items() for item in pair]
    assert main(["key", "new", "--name", "stat", "--no-passphrase", "--role", "statistician", *flags]) == 0
    assert main(["key", "new", "--name", "rev", "--no-passphrase", "--role", "reviewer", *flags]) == 0
    return {"plan": str(plan), "out": str(tmp_path / "out"), "flags": flags}


def _run(project) -> Path:
    assert main(["run", project["plan"], "--data", str(BASE / "data.csv"), "--cut", "c1",
                 "--out", project["out"]]) == 0
    return next(Path(project["out"]).glob("LVT-201/c1/*"))


def test_a_run_is_final_only_after_a_signed_lock_and_the_approvals_its_plan_asks_for(tmp_path, capsys):
    project = _project(tmp_path)
    flags = project["flags"]
    assert main(["lock", project["plan"], "--by", "stat", "--reason", "final", "--sign", "stat", *flags]) == 0
    run = _run(project)
    capsys.readouterr()
    assert main(["verify", "--out", project["out"], "--keyring", flags[3]]) == 0
    shown = capsys.readouterr().out
    assert "not final" in shown and "1 more signed approval" in shown and "'reviewer'" in shown
    # The statistician's key may not approve as a reviewer: refused, nothing written.
    assert main(["approve", str(run), "--sign", "stat", "--role", "reviewer", *flags]) == 2
    assert not list(Path(project["out"]).glob("LVT-201/approvals/*"))
    assert main(["approve", str(run), "--sign", "rev", "--role", "reviewer", "--note", "read", *flags]) == 0
    assert len(list(Path(project["out"]).glob("LVT-201/approvals/*"))) == 1
    capsys.readouterr()
    assert main(["verify", "--out", project["out"], "--keyring", flags[3]]) == 0
    shown = capsys.readouterr().out
    assert "2 valid" in shown and "): final" in shown


def test_an_unsigned_lock_is_a_rehearsal_and_a_foreign_keyring_fails_verify(tmp_path, capsys):
    project = _project(tmp_path)
    flags = project["flags"]
    assert main(["lock", project["plan"], "--by", "stat", "--reason", "rehearsal"]) == 0
    _run(project)
    capsys.readouterr()
    assert main(["verify", "--out", project["out"], "--keyring", flags[3]]) == 0
    assert "1 unsigned" in capsys.readouterr().out

    # Sign the (unchanged) lock, run again, then check against a keyring that lacks the key.
    assert main(["lock", project["plan"], "--by", "stat", "--reason", "sign it", "--sign", "stat", *flags]) == 0
    _run(project)
    foreign = tmp_path / "foreign-keyring.txt"
    assert main(["key", "new", "--name", "other", "--no-passphrase", "--key-dir", str(tmp_path / "k2"),
                 "--keyring", str(foreign)]) == 0
    capsys.readouterr()
    assert main(["verify", "--out", project["out"], "--keyring", str(foreign)]) == 1
    error = capsys.readouterr().err
    assert "not in the keyring" in error and "stat" in error


def test_the_report_says_whether_the_lock_was_signed():
    from trialcut.report.sections_front import lock_signature

    def results(signed_by):
        entry = {"version": "1.0", "sha256": "a" * 64, "signed_by": signed_by}
        return {"run": {"unlocked": False}, "plan": {"lock_status": "locked", "lock": {
            "sha256": "a" * 64, "reason": "final", "amendments": [entry]}}}

    assert lock_signature(results(None)).startswith("unsigned")
    signed = lock_signature(results({"key": "a.smith", "fingerprint": "0123456789abcdef",
                                     "signed_utc": "2026-12-02T10:00:00Z"}))
    assert "signed by a.smith" in signed and "0123456789abcdef" in signed
