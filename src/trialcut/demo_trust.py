"""The demo's trust chain: demo keys made in the demo's own folder, a signed lock, a signed
approval of the final run, and a double-programming check of it by an independent script.

The keys are DEMO keys: unprotected, made by the demo, in ``<out>/demo/keys/`` beside a keyring
that says so in its first line.  They show the commands in order; they prove nothing about
any person.
"""
from __future__ import annotations

import json
from pathlib import Path

from trialcut.errors import InputError, VerificationFailed

STATISTICIAN, REVIEWER = "demo-statistician", "demo-reviewer"
DEMO_HEADER = "# DEMO KEYS made by 'trialcut demo' for the invented study only: never use them for real work.\n"


def key_folder(out: Path) -> Path:
    return Path(out) / "demo" / "keys"


def keyring_file(out: Path) -> Path:
    return key_folder(out) / "keyring.txt"


def ensure_demo_keys(out: Path) -> None:
    from trialcut.record.signing import KEYRING_HEADER, new_key

    keyring = keyring_file(out)
    if not keyring.exists():
        keyring.parent.mkdir(parents=True, exist_ok=True)
        keyring.write_text(DEMO_HEADER + KEYRING_HEADER, encoding="utf-8")
    for name, role in ((STATISTICIAN, "statistician"), (REVIEWER, "reviewer")):
        if not (key_folder(out) / f"{name}.key").exists():
            new_key(name, key_folder(out), keyring, passphrase=None, roles=(role,))


def _signer(out: Path, name: str):
    from trialcut.record.signing import load_signer

    return load_signer(key_folder(out) / f"{name}.key", lambda: None)


def lock_demo_plan(loaded, out: Path) -> str:
    """Lock the demo plan signed by the demo statistician (or sign an unsigned lock)."""
    from trialcut.plan.lock import check_lock, lock_plan
    from trialcut.record.registry import utc_now

    ensure_demo_keys(out)
    signer = _signer(out, STATISTICIAN)

    def sign(purpose: str, digest: str) -> dict:
        return signer.sign(purpose, digest, utc_now())

    try:
        status = check_lock(loaded)
    except InputError:
        lock_plan(loaded, by=STATISTICIAN, reason="demo: plan frozen before the first data cut", sign=sign)
        return "locked the plan, signed with the demo statistician's key"
    if status.record.signature is None:
        lock_plan(loaded, by=STATISTICIAN, reason="demo: sign the lock", sign=sign)
        return "signed the plan's existing lock with the demo statistician's key"
    return "the plan is locked and signed already"


def approve_and_check_final(out: Path, final_folder: Path, final_data: Path) -> list[str]:
    """Approve the final run (demo reviewer), QC it against the second programmer's numbers,
    bundle it with its data, and say whether it is final.  A QC difference stops the demo (exit 1)."""
    from trialcut.demo_qc import write_qc_file
    from trialcut.record.bundle import build_bundle
    from trialcut.record.qc import compare, read_qc_file, record_qc, run_values, tolerances_of
    from trialcut.record.registry import find_record
    from trialcut.record.signing import read_keyring
    from trialcut.record.signoff import approve_run, check_signoff

    registry = Path(out) / "registry.sqlite"
    keyring = read_keyring(keyring_file(out))
    row = find_record(registry, final_folder.name)
    approval = approve_run(final_folder, row, registry, _signer(out, REVIEWER), keyring, "reviewer",
                           "demo: report read; an invented approval by a demo key")
    qc_file = write_qc_file(final_data, _fresh_qc_path(out))
    results = json.loads((final_folder / "results.json").read_text(encoding="utf-8"))
    values = run_values(results)
    outcome = compare(values, read_qc_file(qc_file, values), tolerances_of(results))
    qc = record_qc(final_folder, row, registry, qc_file, outcome)
    if not outcome.passed:
        raise VerificationFailed(f"demo QC of the final run found differences: {outcome.summary}; "
                                 f"see {qc.folder / 'qc.html'}")
    state = next(run for run in check_signoff(registry, keyring, run_id=row.record_id).runs)
    bundle = build_bundle(final_folder, row, registry, keyring_file(out), final_data)
    archive = bundle.folder / bundle.row.details_dict()["archive"]
    return [f"approval:         {approval.folder} (demo reviewer, signed)",
            f"QC (double programming): {outcome.summary}: {qc.folder / 'qc.html'}",
            f"handover bundle:  {archive} (check: trialcut verify {archive} --keyring {keyring_file(out)})",
            f"final run is:     {state.state}" + (f" (lacks {'; '.join(state.lacking)})" if state.lacking else ""),
            f"check signatures: trialcut verify --out {out} --keyring {keyring_file(out)}",
            f"run it again:     trialcut reproduce {final_folder}  (compares every number)"]


def _fresh_qc_path(out: Path) -> Path:
    folder = Path(out) / "demo" / "qc"
    folder.mkdir(parents=True, exist_ok=True)
    return folder / "final-second-programmer.csv"
