"""Handover bundles: one ZIP archive that holds a run and everything needed to check it.

``bundle-<run id>.zip`` unpacks to one folder ``bundle-<run id>/`` holding

- ``README.txt``: for the recipient: what is inside and how to check it;
- ``bundle.json``: the top-level manifest: the run's registry row (with the registry's chain
  head when the bundle was made), the lock chain's record hashes, the approvals and QC records
  included, the environment lock's hash, and the data file (included, or named by its SHA-256);
- ``MANIFEST.sha256``: every other file with its SHA-256, in the format of coreutils
  ``sha256sum`` (so ``cd bundle-<run id> && sha256sum -c MANIFEST.sha256`` checks it alone);
- ``run/<run id>/``: the sealed run folder as it is (report, results, audit, plan and its lock
  chain with signatures, its own MANIFEST.sha256);
- ``approvals/<id>/``, ``qc/<id>/``: the sealed approvals and QC records of the run;
- ``keyring.txt``: the keyring the signatures were checked against when bundling;
- ``environment/lock.txt``: the pinned environment (requirements/lock.txt);
- ``data/<file>`` with ``--include-data``.

The archive is itself kept as a sealed record (kind ``bundle``) in the registry, whose row
carries the archive's SHA-256: a recipient can compare it with the sender's.

``verify_bundle`` checks an archive without any registry: every file against the manifest,
nothing added or missing, the run folder against its own manifest and against the manifest
hash bundle.json records, the data file (if included) against the run's data hash, and every
signature against a keyring (the recipient's own with ``--keyring``; else the bundled one, which
shows only that the bundle is consistent with itself).
"""
from __future__ import annotations

import hashlib
import io
import json
import tempfile
import zipfile
from dataclasses import dataclass
from pathlib import Path, PurePosixPath
from typing import Any

import trialcut
from trialcut.errors import InputError, Problem, VerificationFailed
from trialcut.plan.lock import SIGNATURE_PURPOSE as LOCK_PURPOSE
from trialcut.plan.lock import read_chain
from trialcut.record.manifest import MANIFEST_NAME, manifest_text, parse_manifest
from trialcut.record.pinned import find_pins_file
from trialcut.record.registry import RegistryRow, chain_head, list_records, utc_now
from trialcut.record.runfolder import new_run_id
from trialcut.record.seal import RecordedFolder, record_folder
from trialcut.record.signing import (BAD_SIGNATURE, UNKNOWN_KEY, UNSIGNED, VALID, Keyring,
                                     check_signature, read_keyring)
from trialcut.record.signoff import APPROVAL_FILE, APPROVAL_PURPOSE, content_hash

BUNDLE_FORMAT = 1
BUNDLE_GROUP = "bundles"
# Fixed member times: the same content gives the same archive bytes.
_ZIP_TIME = (2000, 1, 1, 0, 0, 0)
_GROUPS = {"approval": "approvals", "qc": "qc"}


def bundle_name(run_id: str) -> str:
    return f"bundle-{run_id}"


# --------------------------------------------------------------------------- building
def build_bundle(run_folder: Path, run_row: RegistryRow, registry_path: Path,
                 keyring_file: Path | None, data_file: Path | None) -> RecordedFolder:
    """Write the archive into a new sealed ``bundle`` record and return it."""
    registry_path = Path(registry_path)
    related = [row for row in list_records(registry_path)
               if row.kind in _GROUPS and row.details_dict().get("run") == run_row.record_id]
    files: dict[str, bytes] = {}
    _add_folder(files, Path(run_folder), f"run/{run_row.record_id}")
    for row in related:
        _add_folder(files, row.folder_path(registry_path), f"{_GROUPS[row.kind]}/{row.record_id}")
    if keyring_file is not None:
        files["keyring.txt"] = Path(keyring_file).read_bytes()
    pins = find_pins_file()
    if pins is not None:
        files["environment/lock.txt"] = pins.read_bytes()
    results = json.loads(files[f"run/{run_row.record_id}/results.json"])
    if data_file is not None:
        files[f"data/{Path(data_file).name}"] = Path(data_file).read_bytes()
    files["bundle.json"] = _bundle_json(run_row, registry_path, related, results, files, data_file)
    files["README.txt"] = _readme(run_row, data_file is not None).encode("utf-8")
    hashes = {name: hashlib.sha256(content).hexdigest() for name, content in files.items()}
    files[MANIFEST_NAME] = manifest_text(hashes).encode("utf-8")
    archive = _zip(files, bundle_name(run_row.record_id))
    archive_name = f"{bundle_name(run_row.record_id)}.zip"

    def write(folder: Path, position: Any) -> None:
        (folder / archive_name).write_bytes(archive)

    details = {"run": run_row.record_id, "archive": archive_name,
               "archive_sha256": hashlib.sha256(archive).hexdigest(),
               "includes_data": data_file is not None,
               "sources": [{"record_id": row.record_id, "manifest_sha256": row.manifest_sha256}
                           for row in (run_row, *related)]}
    return record_folder(registry_path.parent, kind="bundle", study_id=run_row.study_id,
                         group=BUNDLE_GROUP, record_id=new_run_id(), write=write,
                         entry={"cut": run_row.cut, "details": details, "created_utc": utc_now()},
                         registry_path=registry_path)


def _add_folder(files: dict[str, bytes], folder: Path, prefix: str) -> None:
    for path in sorted(p for p in folder.rglob("*") if p.is_file()):
        files[f"{prefix}/{path.relative_to(folder).as_posix()}"] = path.read_bytes()


def _bundle_json(run_row: RegistryRow, registry_path: Path, related: list[RegistryRow],
                 results: dict[str, Any], files: dict[str, bytes], data_file: Path | None) -> bytes:
    data = results.get("data") or {}
    content = {
        "format": BUNDLE_FORMAT, "made_utc": utc_now(), "tool_version": trialcut.__version__,
        "run": run_row.to_dict(), "registry_chain_head": chain_head(registry_path).previous_hash,
        "records": [{"kind": row.kind, "record_id": row.record_id,
                     "manifest_sha256": row.manifest_sha256} for row in related],
        "plan": {"sha256": (results.get("plan") or {}).get("sha256"),
                 "lock_chain": [entry.get("record_sha256") for entry in
                                ((results.get("plan") or {}).get("lock_chain") or [])]},
        "environment_lock_sha256": _sha(files.get("environment/lock.txt")),
        "keyring_sha256": _sha(files.get("keyring.txt")),
        "data": {"file": data.get("file"), "sha256": data.get("sha256"), "size": data.get("size"),
                 "included": f"data/{Path(data_file).name}" if data_file is not None else None},
    }
    return (json.dumps(content, indent=1, ensure_ascii=False) + "\n").encode("utf-8")


def _sha(content: bytes | None) -> str | None:
    return hashlib.sha256(content).hexdigest() if content is not None else None


def _zip(files: dict[str, bytes], top: str) -> bytes:
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", compression=zipfile.ZIP_DEFLATED) as archive:
        for name in sorted(files):
            info = zipfile.ZipInfo(f"{top}/{name}", date_time=_ZIP_TIME)
            info.compress_type = zipfile.ZIP_DEFLATED
            info.external_attr = 0o644 << 16
            archive.writestr(info, files[name])
    return buffer.getvalue()


def _readme(run_row: RegistryRow, with_data: bool) -> str:
    top = bundle_name(run_row.record_id)
    data_line = ("data/ holds the data cut itself (its SHA-256 is in bundle.json and in the run's "
                 "results.json)." if with_data else
                 "The data cut is not included: bundle.json names it by file name and SHA-256; "
                 "compare `sha256sum <your copy>` with that value.")
    return f"""Handover bundle of trialcut run {run_row.record_id}
(study {run_row.study_id}, data cut {run_row.cut}).

What is inside
- run/{run_row.record_id}/: the sealed run folder: report.html, report.pdf, report.docx,
  results.json (every number), audit.json (command, times, seeds, software environment),
  plan/ (the analysis plan and its lock chain, with signatures), tables/, figures/,
  and its own MANIFEST.sha256.
- approvals/ and qc/: the signed approvals and double-programming checks of the run.
- keyring.txt: the public keys the signatures were checked against when the bundle was made.
- environment/lock.txt: the exact versions (with hashes) of every package of the environment.
- bundle.json: what the bundle holds, the run's registry row and the registry's chain head.
- {data_line}

How to check it without trialcut
    unzip {top}.zip && cd {top} && sha256sum -c MANIFEST.sha256
    (cd run/{run_row.record_id} && sha256sum -c MANIFEST.sha256)
Every line must say OK.

How to check it with trialcut (also checks every signature)
    trialcut verify {top}.zip --keyring <your copy of the project's keyring>

What a passing check proves: the files are the ones the sender bundled, unchanged, and the
signatures were made by the keys in the keyring used. It cannot prove that the sender's
registry still holds this run (ask for the chain head in bundle.json to be checked with
'trialcut verify --head'), nor that the keyring is the project's reviewed one unless you pass
your own copy. Results need review by a qualified statistician and do not replace regulatory
or local review.
"""


# --------------------------------------------------------------------------- checking
@dataclass(frozen=True)
class BundleReport:
    archive: str
    files_checked: int
    signatures: dict[str, int]
    keyring: str
    problems: tuple[Problem, ...] = ()

    @property
    def summary(self) -> str:
        signed = ", ".join(f"{count} {status}" for status, count in self.signatures.items())
        return (f"{self.archive}: {self.files_checked} file(s) match the bundle's manifest; "
                f"signatures ({self.keyring}): {signed or 'none'}")


def verify_bundle(archive_path: Path, keyring_file: Path | None = None) -> BundleReport:
    archive_path = Path(archive_path)
    members = _read_archive(archive_path)
    top = _top_folder(members, archive_path)
    files = {name[len(top) + 1:]: content for name, content in members.items()}
    problems = _manifest_problems(files, archive_path)
    facts = _bundle_facts(files, archive_path, problems)
    run_id = ((facts.get("run") or {}).get("record_id")) if facts else None
    if run_id:
        problems += _run_problems(files, run_id, facts, archive_path)
        problems += _data_problems(files, facts, archive_path)
    keyring, keyring_words = _keyring(files, keyring_file, archive_path)
    counts, signature_problems = _signatures(files, keyring, archive_path)
    problems += signature_problems
    report = BundleReport(archive=str(archive_path), files_checked=len(files) - 1, signatures=counts,
                          keyring=keyring_words, problems=tuple(problems))
    if problems:
        raise VerificationFailed(f"the bundle {archive_path} does not match its records: "
                                 f"{len(problems)} problem(s)", problems)
    return report


def _read_archive(path: Path) -> dict[str, bytes]:
    try:
        with zipfile.ZipFile(path) as archive:
            return {info.filename: archive.read(info) for info in archive.infolist() if not info.is_dir()}
    except (OSError, zipfile.BadZipFile, zipfile.LargeZipFile, ValueError) as error:
        raise InputError(f"{path} is not a readable bundle", [Problem(
            code="bundle.unreadable", file=str(path), message="the file cannot be read as a ZIP archive",
            got=f"{type(error).__name__}: {error}",
            hint="pass the bundle-<run id>.zip written by 'trialcut bundle'")]) from None


def _top_folder(members: dict[str, bytes], path: Path) -> str:
    tops = {PurePosixPath(name).parts[0] for name in members}
    unsafe = [name for name in members if PurePosixPath(name).is_absolute() or ".." in PurePosixPath(name).parts]
    if len(tops) != 1 or unsafe or not next(iter(tops)).startswith("bundle-"):
        raise InputError(f"{path} is not a trialcut bundle", [Problem(
            code="bundle.layout", file=str(path), message="a bundle holds one folder bundle-<run id>/",
            got=", ".join(sorted(tops))[:120] or "no files",
            hint="pass the bundle-<run id>.zip written by 'trialcut bundle'")])
    return next(iter(tops))


def _problem(path: Path, code: str, field: str, message: str, **details: Any) -> Problem:
    return Problem(code=code, file=str(path), field=field, message=message,
                   hint=details.pop("hint", "do not use this bundle; ask the sender for a new copy "
                                            "and compare its SHA-256 with their registry"), **details)


def _manifest_problems(files: dict[str, bytes], path: Path) -> list[Problem]:
    if MANIFEST_NAME not in files:
        return [_problem(path, "bundle.manifest_missing", MANIFEST_NAME, "the bundle's manifest is missing")]
    recorded, problems = parse_manifest(files[MANIFEST_NAME].decode("utf-8", errors="replace"),
                                        source=f"{path}:{MANIFEST_NAME}")
    for name in sorted(set(recorded) | set(files) - {MANIFEST_NAME}):
        if name not in files:
            problems.append(_problem(path, "bundle.file_missing", name, "listed in the manifest but missing"))
        elif name not in recorded:
            problems.append(_problem(path, "bundle.file_added", name, "in the bundle but not in its manifest"))
        elif hashlib.sha256(files[name]).hexdigest() != recorded[name]:
            problems.append(_problem(path, "bundle.file_changed", name, "changed since the bundle was made",
                                     expected=f"SHA-256 {recorded[name]}",
                                     got=f"SHA-256 {hashlib.sha256(files[name]).hexdigest()}"))
    return problems


def _bundle_facts(files: dict[str, bytes], path: Path, problems: list[Problem]) -> dict[str, Any]:
    try:
        return json.loads(files["bundle.json"])
    except (KeyError, ValueError):
        problems.append(_problem(path, "bundle.facts_unreadable", "bundle.json", "bundle.json is missing or not JSON"))
        return {}


def _run_problems(files: dict[str, bytes], run_id: str, facts: dict[str, Any], path: Path) -> list[Problem]:
    prefix = f"run/{run_id}/"
    inner = files.get(prefix + MANIFEST_NAME)
    if inner is None:
        return [_problem(path, "bundle.run_missing", prefix, "the run folder or its manifest is missing")]
    problems = []
    if hashlib.sha256(inner).hexdigest() != (facts.get("run") or {}).get("manifest_sha256"):
        problems.append(_problem(path, "bundle.run_manifest_changed", prefix + MANIFEST_NAME,
                                 "the run's manifest is not the one its registry row records"))
    recorded, found = parse_manifest(inner.decode("utf-8", errors="replace"), source=prefix + MANIFEST_NAME)
    problems += found
    present = {name[len(prefix):] for name in files if name.startswith(prefix)} - {MANIFEST_NAME}
    for name in sorted(set(recorded) | present):
        content = files.get(prefix + name)
        if content is None or name not in recorded or hashlib.sha256(content).hexdigest() != recorded[name]:
            problems.append(_problem(path, "bundle.run_file_changed", prefix + name,
                                     "does not match the run folder's own manifest"))
    return problems


def _data_problems(files: dict[str, bytes], facts: dict[str, Any], path: Path) -> list[Problem]:
    data = facts.get("data") or {}
    included = data.get("included")
    if not included:
        return []
    content = files.get(included)
    if content is None or hashlib.sha256(content).hexdigest() != data.get("sha256"):
        return [_problem(path, "bundle.data_changed", str(included),
                         "the included data cut is not the one the run analysed",
                         expected=f"SHA-256 {data.get('sha256')}")]
    return []


def _keyring(files: dict[str, bytes], keyring_file: Path | None, path: Path) -> tuple[Keyring, str]:
    if keyring_file is not None:
        return read_keyring(keyring_file), f"your keyring {keyring_file}"
    if "keyring.txt" not in files:
        return Keyring(None, ()), "no keyring"
    with tempfile.TemporaryDirectory() as folder:
        copy = Path(folder) / "keyring.txt"
        copy.write_bytes(files["keyring.txt"])
        keyring = read_keyring(copy)
    return Keyring(path=Path("keyring.txt"), entries=keyring.entries), "the bundled keyring (self-consistency only)"


def _signatures(files: dict[str, bytes], keyring: Keyring, path: Path) -> tuple[dict[str, int], list[Problem]]:
    counts = {VALID: 0, UNSIGNED: 0, UNKNOWN_KEY: 0, BAD_SIGNATURE: 0}
    problems: list[Problem] = []
    for name in sorted(n for n in files if n.startswith("run/") and n.endswith(".lock.json")):
        for index, block, digest in _lock_signatures(files[name], name, path, problems):
            status = check_signature(block, LOCK_PURPOSE, digest, keyring).status
            counts[status] += 1
            problems += _status_problem(path, f"{name} records[{index}]", status)
    for name in sorted(n for n in files if n.startswith("approvals/") and n.endswith(APPROVAL_FILE)):
        content = json.loads(files[name])
        digest = content_hash(content)
        status = (check_signature(content.get("signature"), APPROVAL_PURPOSE, digest, keyring).status
                  if digest == content.get("record_sha256") else BAD_SIGNATURE)
        counts[status] += 1
        problems += _status_problem(path, name, status)
    return {status: count for status, count in counts.items() if count}, problems


def _lock_signatures(content: bytes, name: str, path: Path, problems: list[Problem]):
    with tempfile.TemporaryDirectory() as folder:
        copy = Path(folder) / PurePosixPath(name).name
        copy.write_bytes(content)
        try:
            chain = read_chain(copy)
        except InputError as error:
            problems += [_problem(path, "bundle.lock_chain", name, problem.message) for problem in error.problems]
            return []
    return [(index, record.signature, record.record_sha256) for index, record in enumerate(chain)]


def _status_problem(path: Path, where: str, status: str) -> list[Problem]:
    if status == UNKNOWN_KEY:
        return [_problem(path, "bundle.unknown_key", where, "signed by a key that is not in the keyring",
                         hint="check with the project's keyring (--keyring); if the key is not there, "
                              "do not trust this signature")]
    if status == BAD_SIGNATURE:
        return [_problem(path, "bundle.bad_signature", where, "the signature does not match the record")]
    return []
