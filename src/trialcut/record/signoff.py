"""Signed approvals of runs, and the sign-off state of every run: who vouched for what.

``approve`` writes an approval as a sealed record of its own kind
(``<out>/<study>/approvals/<id>/approval.json``, registered with kind ``approval``): the
run it concerns (id, manifest hash, results hash, plan hash), the role, a note, the time
and the signer's key name, hashed into ``record_sha256`` and signed over that hash.

``check_signoff`` reads every run and approval in a registry and checks every signature
(the lock records a run's folder carries, and every approval) against the keyring.  It
names each record as signed (valid), unsigned, signed by an unknown key, or carrying a bad
signature, and says for each run whether it is final under its plan's ``sign_off``
settings.  Unknown keys and bad signatures are findings (exit 1); unsigned records are
allowed (rehearsals) and shown as such.

What a valid signature proves: the holder of a private key whose public half is in the
keyring signed exactly this record.  It cannot prove that the keyring itself is the one the
project reviewed (check its history), that the private key was not shared or stolen, or
that the approver read the report.
"""
from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from trialcut.errors import InputError, Problem
from trialcut.plan.lock import SIGNATURE_PURPOSE as LOCK_PURPOSE
from trialcut.plan.lock import LockRecord, read_chain
from trialcut.record.manifest import sha256_file
from trialcut.record.registry import RegistryRow, list_records, utc_now
from trialcut.record.runfolder import new_run_id
from trialcut.record.seal import RecordedFolder, record_folder
from trialcut.record.signing import (BAD_SIGNATURE, NOT_CHECKED, UNKNOWN_KEY, UNSIGNED, VALID, Keyring,
                                     SignatureCheck, Signer, check_signature, checked_role,
                                     require_in_keyring)

APPROVAL_PURPOSE = "approval"
APPROVAL_FILE = "approval.json"
APPROVAL_FORMAT = 1
APPROVALS_GROUP = "approvals"
_UNHASHED = ("record_sha256", "signature")


def content_hash(content: dict[str, Any]) -> str:
    hashed = {key: value for key, value in content.items() if key not in _UNHASHED}
    text = json.dumps(hashed, sort_keys=True, separators=(",", ":"), ensure_ascii=False)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


# --------------------------------------------------------------------------- approving
def approve_run(run_folder: Path, run_row: RegistryRow, registry_path: Path, signer: Signer,
                keyring: Keyring, role: str, note: str | None) -> RecordedFolder:
    """Seal and register a signed approval of a verified, registered run."""
    role = checked_role(role)
    require_in_keyring(signer, keyring, role=role)
    results = json.loads((Path(run_folder) / "results.json").read_text(encoding="utf-8"))
    content = {
        "format": APPROVAL_FORMAT, "run_id": run_row.record_id, "study_id": run_row.study_id,
        "cut": run_row.cut, "run_manifest_sha256": run_row.manifest_sha256,
        "results_sha256": sha256_file(Path(run_folder) / "results.json"),
        "plan_sha256": (results.get("plan") or {}).get("sha256"), "role": role,
        "note": (note or "").strip(), "approved_utc": utc_now(), "key": signer.name,
    }
    content["record_sha256"] = content_hash(content)
    content["signature"] = signer.sign(APPROVAL_PURPOSE, content["record_sha256"],
                                       content["approved_utc"])

    def write(folder: Path, position: Any) -> None:
        (folder / APPROVAL_FILE).write_text(json.dumps(content, indent=1, ensure_ascii=False) + "\n",
                                            encoding="utf-8")

    details = {"run": run_row.record_id, "role": role, "key": signer.name,
               "fingerprint": signer.fingerprint, "approval_sha256": content["record_sha256"],
               "sources": [{"record_id": run_row.record_id,
                            "manifest_sha256": run_row.manifest_sha256}]}
    return record_folder(Path(registry_path).parent, kind="approval", study_id=run_row.study_id,
                         group=APPROVALS_GROUP, record_id=new_run_id(), write=write,
                         entry={"cut": run_row.cut, "details": details,
                                "created_utc": content["approved_utc"]},
                         registry_path=registry_path)


# --------------------------------------------------------------------------- checking
@dataclass(frozen=True)
class SignedItem:
    """One signable record and what its signature turned out to be."""

    what: str            # "lock record 0 of plan.yaml" / "approval 2026…"
    run_id: str
    check: SignatureCheck
    role: str | None = None

    def to_dict(self) -> dict[str, Any]:
        return {"what": self.what, "run_id": self.run_id, "role": self.role, **self.check.to_dict()}


@dataclass(frozen=True)
class RunSignOff:
    run_id: str
    cut: str
    state: str                      # "final", "not final", "rehearsal"
    lacking: tuple[str, ...] = ()   # what a final run still needs, in words

    def to_dict(self) -> dict[str, Any]:
        return {"run_id": self.run_id, "cut": self.cut, "state": self.state,
                "lacking": list(self.lacking)}


@dataclass(frozen=True)
class SignOffReport:
    items: tuple[SignedItem, ...]
    runs: tuple[RunSignOff, ...]
    problems: tuple[Problem, ...] = field(default=())

    def count(self, status: str) -> int:
        return sum(item.check.status == status for item in self.items)

    @property
    def summary(self) -> str:
        counts = ", ".join(f"{self.count(status)} {status}"
                           for status in (VALID, UNSIGNED, UNKNOWN_KEY, BAD_SIGNATURE, NOT_CHECKED)
                           if status != NOT_CHECKED or self.count(status))
        final = sum(run.state == "final" for run in self.runs)
        return (f"{len(self.items)} signable record(s): {counts}; "
                f"{final} of {len(self.runs)} run(s) final")

    def to_dict(self) -> dict[str, Any]:
        return {"items": [item.to_dict() for item in self.items],
                "runs": [run.to_dict() for run in self.runs],
                "problems": [problem.to_dict() for problem in self.problems]}


def check_signoff(registry_path: Path, keyring: Keyring, run_id: str | None = None) -> SignOffReport:
    """Every signature in the registry's runs and approvals (or of one run) and each run's state."""
    rows = [row for row in list_records(registry_path)
            if run_id is None or row.record_id == run_id
            or (row.kind == "approval" and row.details_dict().get("run") == run_id)]
    items: list[SignedItem] = []
    problems: list[Problem] = []
    approvals = [row for row in rows if row.kind == "approval"]
    approval_items = {}
    for row in approvals:
        item, found = _approval_item(row, Path(registry_path), keyring)
        approval_items[row.record_id] = (row, item)
        items.append(item)
        problems += found
    runs = []
    for row in (row for row in rows if row.kind == "run"):
        lock_items, found = _lock_items(row.folder_path(Path(registry_path)), row.record_id, keyring)
        items += lock_items
        problems += found
        granted = [item for approval_row, item in approval_items.values()
                   if item.run_id == row.record_id]
        runs.append(_run_state(row, Path(registry_path), lock_items, granted))
    problems += [_signature_problem(item, keyring) for item in items
                 if item.check.status in (UNKNOWN_KEY, BAD_SIGNATURE)]
    return SignOffReport(items=tuple(items), runs=tuple(runs), problems=tuple(problems))


def _signature_problem(item: SignedItem, keyring: Keyring) -> Problem:
    if item.check.status == UNKNOWN_KEY:
        return Problem(code="signature.unknown_key", file=str(keyring.path), field=item.what,
                       message=f"signed by a key that is not in the keyring "
                               f"({item.check.key}, fingerprint {item.check.fingerprint})",
                       hint="if the key is genuine, add its public line to the keyring in a "
                            "reviewed change; otherwise treat the record as forged")
    return Problem(code="signature.bad", field=item.what,
                   message=f"the signature by {item.check.key} does not match the record: the "
                           "record or its signature was changed after signing",
                   hint="restore the record from a trusted copy; do not rely on it")


def _lock_items(folder: Path, run_id: str, keyring: Keyring) -> tuple[list[SignedItem], list[Problem]]:
    lock_files = sorted((folder / "plan").glob("*.lock.json")) if (folder / "plan").is_dir() else []
    items, problems = [], []
    for lock_file in lock_files:
        try:
            chain = read_chain(lock_file)
        except InputError as error:
            problems += list(error.problems)
            continue
        items += [_lock_item(record, index, lock_file, run_id, keyring)
                  for index, record in enumerate(chain)]
    return items, problems


def _lock_item(record: LockRecord, index: int, lock_file: Path, run_id: str,
               keyring: Keyring) -> SignedItem:
    check = _checked(record.signature, LOCK_PURPOSE, record.record_sha256, keyring)
    return SignedItem(what=f"{lock_file.parent.parent.name}/plan/{lock_file.name} records[{index}] "
                           f"(plan version {record.plan_version})", run_id=run_id, check=check)


def _approval_item(row: RegistryRow, registry_path: Path,
                   keyring: Keyring) -> tuple[SignedItem, list[Problem]]:
    folder = row.folder_path(registry_path)
    path = folder / APPROVAL_FILE
    what = f"approval {row.record_id}"
    run_id = str(row.details_dict().get("run"))
    try:
        content = json.loads(path.read_text(encoding="utf-8"))
        digest = content_hash(content)
    except (OSError, ValueError, AttributeError) as error:
        unreadable = SignatureCheck(BAD_SIGNATURE, None, None, None)
        return SignedItem(what, run_id, unreadable), [Problem(
            code="signature.approval_unreadable", file=str(path), message="the approval cannot be read",
            got=f"{type(error).__name__}: {error}", hint="restore the approval folder from a trusted copy")]
    if digest != content.get("record_sha256") or content.get("run_id") != run_id:
        # A changed approval keeps no valid signature, whatever its signature block says.
        check = SignatureCheck(BAD_SIGNATURE, content.get("key"), None, None)
    else:
        check = _checked(content.get("signature"), APPROVAL_PURPOSE, digest, keyring)
    problems = []
    entry = keyring.by_fingerprint(check.fingerprint or "")
    role = content.get("role")
    if check.status == VALID and entry is not None and entry.roles and role not in entry.roles:
        problems.append(Problem(code="signature.role_not_allowed", file=str(path), field="role",
                                message=f"the keyring does not allow {entry.name} to approve as {role}",
                                expected=" or ".join(entry.roles), got=str(role),
                                hint="the approval does not count; approve again in an allowed role"))
    return SignedItem(what, run_id, check, role=role if isinstance(role, str) else None), problems


def _checked(block: Any, purpose: str, sha256: str, keyring: Keyring) -> SignatureCheck:
    """Without any keyring a signature cannot be judged: said as 'not checked', not as forged."""
    if block is not None and keyring.path is None:
        found = check_signature(block, purpose, sha256, keyring)
        return SignatureCheck(NOT_CHECKED, found.key, found.fingerprint, found.signed_utc)
    return check_signature(block, purpose, sha256, keyring)


def _run_state(row: RegistryRow, registry_path: Path, lock_items: list[SignedItem],
               approvals: list[SignedItem]) -> RunSignOff:
    settings = _sign_off_settings(row.folder_path(registry_path))
    if row.lock_status != "locked":
        return RunSignOff(row.record_id, row.cut, "rehearsal", ("a locked plan (the run was unlocked)",))
    lacking = []
    unsigned = [item for item in lock_items if item.check.status != VALID]
    if settings.get("signed_locks") and (unsigned or not lock_items):
        lacking.append(f"valid signatures on every lock record ({len(unsigned)} lack one)")
    valid = [item for item in approvals if item.check.status == VALID]
    keys = {item.check.fingerprint for item in valid}
    needed = int(settings.get("approvals") or 0)
    if len(keys) < needed:
        lacking.append(f"{needed - len(keys)} more signed approval(s) by different keys "
                       f"(has {len(keys)} of {needed})")
    roles_present = {item.role for item in valid}
    lacking += [f"an approval in the role {role!r}" for role in settings.get("roles") or ()
                if role not in roles_present]
    if lacking:
        return RunSignOff(row.record_id, row.cut, "not final", tuple(lacking))
    if not settings.get("signed_locks") and unsigned:
        # No sign-off asked for and none given: usable, but marked as unsigned.
        return RunSignOff(row.record_id, row.cut, "rehearsal", ("signed lock records",))
    return RunSignOff(row.record_id, row.cut, "final")


def _sign_off_settings(folder: Path) -> dict[str, Any]:
    try:
        results = json.loads((folder / "results.json").read_text(encoding="utf-8"))
        settings = results["plan"]["canonical"].get("sign_off") or {}
    except (OSError, ValueError, KeyError, TypeError, AttributeError):
        return {}
    return settings if isinstance(settings, dict) else {}
