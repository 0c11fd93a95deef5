"""Lock records: who froze which plan, when and why, as a hash chain beside the plan.

``<plan file name>.lock.json`` holds every lock of a plan as a list of records, oldest
first.  A record stores the plan's canonical content and its SHA-256, the time (UTC), who
locked it and why, the trialcut version, and ``previous``, the hash of the record before
it; its own ``record_sha256`` is taken over all of that.  Editing any earlier record, or
dropping one, breaks the chain and is reported.  Keeping the canonical content lets a
changed plan be explained field by field instead of with a bare "hash mismatch".

A record may carry ``signature``: an Ed25519 signature over its ``record_sha256`` (made by
the record layer's signing module and handed in as ``sign``; this layer only stores it).
The signature is outside the hashed fields, so signing an existing record later leaves the
chain intact, and removing a signature is not tampering but makes the record unsigned,
which ``trialcut verify`` names and a plan's ``sign_off.signed_locks`` refuses.
"""
from __future__ import annotations

import json
import os
import tempfile
from dataclasses import asdict, dataclass, replace
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Callable, Iterator

import trialcut
from trialcut.errors import LockError, Problem
from trialcut.plan.canonical import canonical_json, plan_content, sha256_text
from trialcut.plan.load import LoadedPlan, item_name

LOCK_FORMAT = 1
LOCK_SUFFIX = ".lock.json"
MAX_CHANGES_SHOWN = 20
SIGNATURE_PURPOSE = "plan lock"
# Fields a record's own hash leaves out: the hash itself and the signature over it.
_UNHASHED = ("record_sha256", "signature")

_RECORD_TYPES: dict[str, tuple[type, ...]] = {
    "plan_file": (str,), "plan_version": (str,), "plan_sha256": (str,), "locked_utc": (str,), "by": (str,), "reason": (str,),
    "tool_version": (str,), "previous": (str, type(None)), "plan": (dict,), "record_sha256": (str,),
}
_OPTIONAL_FIELDS: dict[str, tuple[type, ...]] = {"signature": (dict,)}


@dataclass(frozen=True)
class LockRecord:
    plan_file: str          # the plan's file name when it was locked
    plan_version: str       # the plan's own version label (plan.version), e.g. "1.0"
    plan_sha256: str        # hash of the canonical plan (trialcut.plan.canonical)
    locked_utc: str         # ISO 8601, UTC, e.g. 2026-12-01T09:30:00Z
    by: str
    reason: str
    tool_version: str
    previous: str | None    # record_sha256 of the record before this one (amendments)
    plan: dict[str, Any]    # the canonical content itself, to explain later changes
    record_sha256: str      # hash of every field above
    signature: dict[str, Any] | None = None   # over record_sha256; see the module note

    def to_dict(self, include_plan: bool = False) -> dict[str, Any]:
        """Plain data; the stored plan is left out unless asked for, because a run's
        results already carry the current canonical plan and one copy per amendment
        would swell every results file."""
        data = asdict(self)
        if not include_plan:
            del data["plan"]
        if data["signature"] is None:
            del data["signature"]
        return data


@dataclass(frozen=True)
class LockStatus:
    locked: bool
    record: LockRecord | None       # the latest record, which the plan matches
    chain: tuple[LockRecord, ...]   # every record, oldest first

    @classmethod
    def unlocked(cls) -> "LockStatus":
        """For a rehearsal run (``--unlocked``): no lock is claimed."""
        return cls(locked=False, record=None, chain=())

    def summary(self) -> dict[str, Any] | None:
        """The lock as a run's results carry it (``plan.lock``): the latest record and
        the history of every lock, oldest first; None when the run is not locked."""
        if not self.locked or self.record is None:
            return None
        latest = self.record
        return {
            "sha256": latest.plan_sha256, "record_sha256": latest.record_sha256, "plan_version": latest.plan_version,
            "locked_by": latest.by, "locked_utc": latest.locked_utc, "reason": latest.reason,
            "tool_version": latest.tool_version,
            "amendments": [{"version": r.plan_version, "sha256": r.plan_sha256, "locked_utc": r.locked_utc,
                            "by": r.by, "reason": r.reason, "record_sha256": r.record_sha256,
                            "previous": r.previous, "signed_by": _signed_by(r),
                            "changes": amendment_changes(self.chain[index - 1], r) if index else []}
                           for index, r in enumerate(self.chain)],
        }


def amendment_changes(before: LockRecord, after: LockRecord) -> list[dict[str, str]]:
    """What an amendment changed, by plan item ids and field: [{item, old, new}], old -> new.

    Values are shown as short JSON text; "(absent)" marks an item added or removed."""
    return [{"item": where or "plan", "old": _show(old), "new": _show(new)}
            for where, old, new in _differences(before.plan, after.plan, "")]


def _signed_by(record: LockRecord) -> dict[str, Any] | None:
    """Who claims to have signed (checked against the keyring only by verify)."""
    block = record.signature
    if not isinstance(block, dict):
        return None
    return {key: block.get(key) for key in ("key", "fingerprint", "signed_utc")}


def lock_file_for(plan_path: str | Path) -> Path:
    plan_path = Path(plan_path)
    return plan_path.with_name(plan_path.name + LOCK_SUFFIX)


def record_hash(fields: dict[str, Any]) -> str:
    content = {key: value for key, value in fields.items() if key not in _UNHASHED}
    return sha256_text(canonical_json(content))


# --------------------------------------------------------------------------- locking
Sign = Callable[[str, str], dict]   # (purpose, record_sha256) -> signature block


def lock_plan(loaded: LoadedPlan, by: str, reason: str, now: datetime | None = None,
              sign: Sign | None = None) -> LockRecord:
    """Append a lock record for the plan as it is now; the first lock or an amendment.

    With ``sign``, the new record is signed; if the plan is already locked unchanged and its
    latest record is unsigned, that record is signed instead (nothing else changes).
    """
    _require_words(loaded, by=by, reason=reason)
    lock_file = lock_file_for(loaded.path)
    chain = read_chain(lock_file) if lock_file.exists() else ()
    if chain and chain[-1].plan_sha256 == loaded.canonical_hash and sign is not None \
            and chain[-1].signature is None:
        signed = replace(chain[-1], signature=sign(SIGNATURE_PURPOSE, chain[-1].record_sha256))
        _write_chain(lock_file, (*chain[:-1], signed))
        return signed
    if chain and chain[-1].plan_sha256 == loaded.canonical_hash:
        latest = chain[-1]
        raise LockError(
            f"{loaded.path}: the plan is already locked at {latest.locked_utc} by {latest.by}, unchanged",
            [Problem(code="lock.already_locked", message="this exact plan is already locked", file=str(lock_file),
                     field=f"records[{len(chain) - 1}]", got=f"sha256 {latest.plan_sha256[:12]}…",
                     hint="edit the plan first; a lock records a change of meaning, not a repeat")])
    _require_new_version(loaded, chain, lock_file)
    fields = {
        "plan_file": loaded.path.name,
        "plan_version": loaded.plan.version,
        "plan_sha256": loaded.canonical_hash,
        "locked_utc": _utc_text(now),
        "by": by.strip(),
        "reason": reason.strip(),
        "tool_version": trialcut.__version__,
        "previous": chain[-1].record_sha256 if chain else None,
        "plan": plan_content(loaded.plan),
    }
    record = LockRecord(**fields, record_sha256=record_hash(fields))
    if sign is not None:
        record = replace(record, signature=sign(SIGNATURE_PURPOSE, record.record_sha256))
    _write_chain(lock_file, (*chain, record))
    return record


def _require_new_version(loaded: LoadedPlan, chain: tuple, lock_file: Path) -> None:
    """An amendment carries a version of its own: two locked plans with different content under
    one version number leave a reader unable to say which plan a report ran (common practice:
    a protocol or plan amendment gets a new version)."""
    same = [record for record in chain if record.plan_version == loaded.plan.version]
    if same:
        record = same[-1]
        raise LockError(
            f"{loaded.path}: version {loaded.plan.version} was already locked at {record.locked_utc} "
            f"with other content",
            [Problem(code="lock.version_not_changed", message="an amendment needs a new plan version",
                     file=str(loaded.path), field="version", line=(loaded.position("version") or (None,))[0],
                     got=repr(loaded.plan.version),
                     expected=f"a version other than {', '.join(sorted({r.plan_version for r in chain}))}",
                     hint="raise 'version:' in the plan (e.g. 1.0 -> 1.1), then lock again with the "
                          "amendment's reason")])


def _require_words(loaded: LoadedPlan, **words: str) -> None:
    problems = [Problem(code="lock.missing_detail", message=f"a lock needs '{name}'", field=name,
                        expected="some text", got=repr(value) if value is not None else "nothing",
                        hint=f"pass --{name} TEXT")
                for name, value in words.items() if not isinstance(value, str) or not value.strip()]
    if problems:
        raise LockError(f"{loaded.path}: cannot lock the plan without who and why", problems)


def _utc_text(now: datetime | None) -> str:
    moment = now or datetime.now(timezone.utc)
    if moment.tzinfo is None:      # a naive time is taken to be UTC already
        moment = moment.replace(tzinfo=timezone.utc)
    return moment.astimezone(timezone.utc).isoformat(timespec="seconds").replace("+00:00", "Z")


def _write_chain(lock_file: Path, chain: tuple[LockRecord, ...]) -> None:
    # Written to a sibling and renamed, so a crash never leaves half a lock file.
    content = {"format": LOCK_FORMAT, "records": [record.to_dict(include_plan=True) for record in chain]}
    text = json.dumps(content, indent=2, ensure_ascii=False, sort_keys=False) + "\n"
    handle, temporary = tempfile.mkstemp(dir=lock_file.parent, prefix=lock_file.name, suffix=".tmp")
    try:
        with os.fdopen(handle, "w", encoding="utf-8") as stream:
            stream.write(text)
        os.replace(temporary, lock_file)
    except BaseException:
        Path(temporary).unlink(missing_ok=True)
        raise


# --------------------------------------------------------------------------- checking
def check_lock(loaded: LoadedPlan) -> LockStatus:
    """The lock the plan matches; :class:`LockError` if it has none or has changed since."""
    lock_file = lock_file_for(loaded.path)
    if not lock_file.exists():
        raise LockError(
            f"{loaded.path}: the plan is not locked (no {lock_file.name} beside it); lock it with "
            f"`trialcut lock {loaded.path} --by NAME --reason TEXT`, or run with --unlocked for a rehearsal",
            [Problem(code="lock.missing", message="no lock record", file=str(lock_file),
                     hint="lock the plan before a run that counts")])
    chain = read_chain(lock_file)
    latest = chain[-1]
    if latest.plan_sha256 != loaded.canonical_hash:
        raise _changed_error(loaded, latest, lock_file)
    return LockStatus(locked=True, record=latest, chain=chain)


def _changed_error(loaded: LoadedPlan, latest: LockRecord, lock_file: Path) -> LockError:
    changes = list(_differences(latest.plan, plan_content(loaded.plan), ""))
    problems = [_change_problem(loaded, where, before, after) for where, before, after in changes[:MAX_CHANGES_SHOWN]]
    if len(changes) > MAX_CHANGES_SHOWN:
        problems.append(Problem(code="lock.changed", message=f"and {len(changes) - MAX_CHANGES_SHOWN} more changes",
                                file=str(loaded.path)))
    names = ", ".join(where for where, _, _ in changes[:5]) + (", …" if len(changes) > 5 else "")
    return LockError(
        f"{loaded.path}: the plan has changed since it was locked at {latest.locked_utc} by {latest.by} "
        f"(changed: {names}); to record the change as an amendment run "
        f"`trialcut lock {loaded.path} --by NAME --reason TEXT`, or run with --unlocked for a rehearsal",
        problems)


def _change_problem(loaded: LoadedPlan, where: str, before: Any, after: Any) -> Problem:
    position = loaded.position(where)
    return Problem(code="lock.changed", message="changed since the lock", file=str(loaded.path),
                   line=position[0] if position else None, column=position[1] if position else None,
                   field=where or "plan",
                   expected="no such entry (it was added after the lock)" if before is _ABSENT
                   else f"{_show(before)} (the locked value)",
                   got="nothing (it was removed after the lock)" if after is _ABSENT else _show(after))


_ABSENT = object()


def _show(value: Any) -> str:
    if value is _ABSENT:
        return "(absent)"
    text = json.dumps(value, ensure_ascii=False)
    return text if len(text) <= 80 else text[:79] + "…"


def _differences(before: Any, after: Any, where: str) -> Iterator[tuple[str, Any, Any]]:
    """(breadcrumb, locked value, current value) for every leaf that differs."""
    if isinstance(before, dict) and isinstance(after, dict):
        for key in sorted(before.keys() | after.keys()):
            yield from _differences(before.get(key, _ABSENT), after.get(key, _ABSENT),
                                    f"{where}.{key}" if where else key)
    elif isinstance(before, list) and isinstance(after, list) and _named(before) and _named(after):
        yield from _named_differences(before, after, where)
    elif isinstance(before, list) and isinstance(after, list) and len(before) == len(after):
        for index, (old, new) in enumerate(zip(before, after)):
            yield from _differences(old, new, f"{where}[{item_name(new) or index}]")
    elif before != after:
        yield where, before, after


def _named(items: list[Any]) -> bool:
    names = [item_name(item) for item in items]
    return all(names) and len(set(names)) == len(names)


def _named_differences(before: list[Any], after: list[Any], where: str) -> Iterator[tuple[str, Any, Any]]:
    old = {item_name(item): item for item in before}
    new = {item_name(item): item for item in after}
    for name in list(old) + [n for n in new if n not in old]:
        yield from _differences(old.get(name, _ABSENT), new.get(name, _ABSENT), f"{where}[{name}]")
    common_old = [n for n in old if n in new]
    common_new = [n for n in new if n in old]
    if common_old != common_new:
        yield f"{where} (order)", common_old, common_new


# --------------------------------------------------------------------------- reading
def read_chain(lock_file: str | Path) -> tuple[LockRecord, ...]:
    """Every record of a lock file, oldest first, after checking each hash and link."""
    lock_file = Path(lock_file)
    content = _read_json(lock_file)
    records_data = _records_data(content, lock_file)
    problems = [p for index, data in enumerate(records_data) for p in _record_shape(data, index, lock_file)]
    if problems:
        raise LockError(f"{lock_file}: the lock file is not valid", problems)
    records = tuple(LockRecord(**data) for data in records_data)
    problems = list(_chain_problems(records, lock_file))
    if problems:
        raise LockError(f"{lock_file}: the lock file has been altered; its hashes do not match its content",
                        problems)
    return records


def _read_json(lock_file: Path) -> Any:
    def fail(message: str, **details: Any) -> LockError:
        return LockError(f"{lock_file}: cannot read the lock file",
                         [Problem(code="lock.unreadable", message=message, file=str(lock_file), **details)])
    try:
        text = lock_file.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as error:
        raise fail("cannot read the lock file", got=str(error)) from None
    try:
        return json.loads(text)
    except json.JSONDecodeError as error:
        raise fail(f"the lock file is not valid JSON: {error.msg}", line=error.lineno,
                   column=error.colno, hint="a lock file is written by `trialcut lock`; never edit it") from None


def _records_data(content: Any, lock_file: Path) -> list[dict[str, Any]]:
    def fail(field: str, expected: str, got: str) -> LockError:
        return LockError(f"{lock_file}: the lock file is not valid", [Problem(
            code="lock.invalid", message="the lock file does not have the expected shape", file=str(lock_file),
            field=field, expected=expected, got=got, hint="a lock file is written by `trialcut lock`; never edit it")])
    if not isinstance(content, dict):
        raise fail("(top level)", "an object with 'format' and 'records'", type(content).__name__)
    if content.get("format") != LOCK_FORMAT:
        raise fail("format", str(LOCK_FORMAT), repr(content.get("format")))
    unknown = sorted(set(content) - {"format", "records"})
    if unknown:
        raise fail(unknown[0], "only 'format' and 'records'", repr(unknown[0]))
    records = content.get("records")
    if not isinstance(records, list) or not records:
        raise fail("records", "a non-empty list of lock records", repr(records)[:40])
    return records


def _record_shape(data: Any, index: int, lock_file: Path) -> Iterator[Problem]:
    where = f"records[{index}]"
    if not isinstance(data, dict):
        yield Problem(code="lock.invalid", message="a lock record must be an object", file=str(lock_file),
                      field=where, got=type(data).__name__)
        return
    for key in sorted(set(_RECORD_TYPES) | set(data)):
        allowed = _RECORD_TYPES.get(key) or _OPTIONAL_FIELDS.get(key)
        if key in _OPTIONAL_FIELDS and key not in data:
            continue
        if allowed is None:
            yield Problem(code="lock.invalid", message=f"unknown field {key!r}", file=str(lock_file),
                          field=f"{where}.{key}", expected="only the fields trialcut writes")
        elif key not in data:
            yield Problem(code="lock.invalid", message=f"field {key!r} is missing", file=str(lock_file),
                          field=f"{where}.{key}")
        elif not isinstance(data[key], allowed):
            yield Problem(code="lock.invalid", message=f"field {key!r} has the wrong type", file=str(lock_file),
                          field=f"{where}.{key}", expected=" or ".join(t.__name__ for t in allowed),
                          got=type(data[key]).__name__)


def _chain_problems(records: tuple[LockRecord, ...], lock_file: Path) -> Iterator[Problem]:
    hint = "restore the lock file from version control; never edit it by hand"
    for index, record in enumerate(records):
        where = f"records[{index}]"
        try:
            content_hash = sha256_text(canonical_json(record.plan))
        except ValueError:      # NaN or infinity cannot come from a valid plan
            content_hash = ""
        if content_hash != record.plan_sha256:
            yield Problem(code="lock.tampered", message="the stored plan does not match its hash",
                          file=str(lock_file), field=f"{where}.plan_sha256", hint=hint)
        if record_hash(asdict(record)) != record.record_sha256:
            yield Problem(code="lock.tampered", message="the record does not match its own hash",
                          file=str(lock_file), field=f"{where}.record_sha256", hint=hint)
        expected_previous = records[index - 1].record_sha256 if index else None
        if record.previous != expected_previous:
            yield Problem(code="lock.broken_chain", message="the link to the record before is broken",
                          file=str(lock_file), field=f"{where}.previous",
                          expected=expected_previous or "null (the first record)", got=str(record.previous),
                          hint=hint)
