"""Canonical hash and lock records: what changes the hash, the amendment chain, tampering."""
from __future__ import annotations

import hashlib
import json
from datetime import datetime, timedelta, timezone

import pytest
import yaml

import trialcut
from trialcut.errors import LockError
from trialcut.plan.load import load_plan
from trialcut.plan.lock import check_lock, lock_file_for, lock_plan, read_chain
from tests.plan.helpers import replace_once

NOON = datetime(2026, 11, 30, 12, 0, 0, tzinfo=timezone.utc)


def reordered(text: str) -> str:
    """The same plan with its top-level sections in reverse order, no comments, flow style."""
    data = yaml.safe_load(text)
    return yaml.safe_dump(dict(reversed(list(data.items()))), sort_keys=False, default_flow_style=True)


# --------------------------------------------------------------------------- canonical hash
def test_hash_is_sha256_of_sorted_compact_json_of_the_plan_with_defaults(base_text, write_plan):
    # Checked against the standard library directly (hashlib, json), not our helpers.
    loaded = load_plan(write_plan(base_text))
    expected = hashlib.sha256(json.dumps(
        loaded.plan.model_dump(mode="json"), sort_keys=True, separators=(",", ":"), ensure_ascii=False,
    ).encode("utf-8")).hexdigest()
    assert loaded.canonical_hash == expected


def test_hash_ignores_comments_whitespace_key_order_and_shorthands(base_text, write_plan):
    original = load_plan(write_plan(base_text, "a.yaml")).canonical_hash
    commented = "# a new comment\n\n" + base_text.replace("seed: 7", "seed:    7   # fixed")
    assert load_plan(write_plan(commented, "b.yaml")).canonical_hash == original
    assert load_plan(write_plan(reordered(base_text), "c.yaml")).canonical_hash == original
    # A default written out, a number written as a float, a one-name list written as a name.
    spelled = replace_once(base_text, "decimals: 0", "decimals: 0\n    type: continuous")
    spelled = replace_once(spelled, "day: 15,", "day: 15.0,")
    assert load_plan(write_plan(spelled, "d.yaml")).canonical_hash == original
    one = replace_once(base_text, "covariance: [unstructured, ar1]", "covariance: [ar1]")
    bare = replace_once(base_text, "covariance: [unstructured, ar1]", "covariance: ar1")
    assert load_plan(write_plan(one, "e.yaml")).canonical_hash == load_plan(write_plan(bare, "f.yaml")).canonical_hash


@pytest.mark.parametrize("old, new", [
    ("seed: 7", "seed: 8"),
    ("covariance: [unstructured, ar1]", "covariance: [ar1, unstructured]"),  # order of fallbacks matters
    ("window: 10}\n    - {label: Week 12", "window: 11}\n    - {label: Week 12"),
    ("label: Full analysis set", "label: 'Full analysis set '"),              # even a space inside quotes
])
def test_hash_changes_with_any_change_of_meaning(base_text, write_plan, old, new):
    original = load_plan(write_plan(base_text, "a.yaml")).canonical_hash
    assert load_plan(write_plan(replace_once(base_text, old, new), "b.yaml")).canonical_hash != original


# --------------------------------------------------------------------------- locking
def test_lock_writes_a_record_beside_the_plan(base_text, write_plan):
    path = write_plan(base_text)
    loaded = load_plan(path)
    record = lock_plan(loaded, by="A. Statistician", reason="final before unblinding", now=NOON)
    assert lock_file_for(path) == path.with_name("plan.yaml.lock.json")
    stored = json.loads(lock_file_for(path).read_text(encoding="utf-8"))
    assert stored["records"] == [record.to_dict(include_plan=True)]
    assert "plan" not in record.to_dict() and stored["records"][0]["plan"] == loaded.plan.model_dump(mode="json")
    assert (record.plan_sha256, record.locked_utc, record.by, record.previous, record.tool_version,
            record.plan_file) == (loaded.canonical_hash, "2026-11-30T12:00:00Z", "A. Statistician", None,
                                  trialcut.__version__, "plan.yaml")
    status = check_lock(loaded)
    assert status.locked and status.record == record and status.chain == (record,)


def test_locking_an_unchanged_plan_again_is_refused(base_text, write_plan):
    loaded = load_plan(write_plan(base_text))
    lock_plan(loaded, by="A", reason="first", now=NOON)
    with pytest.raises(LockError, match="already locked at 2026-11-30T12:00:00Z"):
        lock_plan(load_plan(loaded.path), by="A", reason="again", now=NOON + timedelta(hours=1))


@pytest.mark.parametrize("by, reason", [("", "why"), ("who", "   ")])
def test_a_lock_needs_who_and_why(base_text, write_plan, by, reason):
    with pytest.raises(LockError) as caught:
        lock_plan(load_plan(write_plan(base_text)), by=by, reason=reason)
    assert caught.value.exit_status == 2


def test_amendments_form_a_chain(base_text, write_plan):
    path = write_plan(base_text)
    first = lock_plan(load_plan(path), by="A", reason="first", now=NOON)
    path.write_text(amended(base_text, "seed: 8", "1.1"), encoding="utf-8")
    second = lock_plan(load_plan(path), by="B", reason="amendment 1: new seed", now=NOON + timedelta(days=1))
    path.write_text(amended(base_text, "seed: 9", "1.2"), encoding="utf-8")
    third = lock_plan(load_plan(path), by="C", reason="amendment 2", now=NOON + timedelta(days=2))
    chain = read_chain(lock_file_for(path))
    assert chain == (first, second, third)
    assert [r.previous for r in chain] == [None, first.record_sha256, second.record_sha256]
    assert len({r.record_sha256 for r in chain}) == 3
    status = check_lock(load_plan(path))
    assert status.record == third
    summary = status.summary()
    assert (summary["sha256"], summary["locked_by"], summary["reason"]) == (third.plan_sha256, "C", "amendment 2")
    assert [a["reason"] for a in summary["amendments"]] == ["first", "amendment 1: new seed", "amendment 2"]
    assert [a["version"] for a in summary["amendments"]] == ["1.0", "1.1", "1.2"]
    json.dumps(summary)     # results are plain JSON


def amended(base_text: str, seed_line: str, version: str) -> str:
    """The base plan with another seed under a new version, as an amendment is written."""
    return replace_once(replace_once(base_text, "seed: 7", seed_line), 'version: "1.0"', f'version: "{version}"')


def test_an_amendment_under_the_same_version_is_refused_with_the_version_line(base_text, write_plan):
    # Common practice: an amended plan carries a new version, so each version names one content.
    path = write_plan(base_text)
    lock_plan(load_plan(path), by="A", reason="first", now=NOON)
    path.write_text(replace_once(base_text, "seed: 7", "seed: 8"), encoding="utf-8")
    with pytest.raises(LockError) as caught:
        lock_plan(load_plan(path), by="B", reason="same version", now=NOON + timedelta(days=1))
    (problem,) = caught.value.problems
    assert (problem.code, problem.field, caught.value.exit_status) == ("lock.version_not_changed", "version", 2)
    assert problem.line == base_text.splitlines().index('version: "1.0"') + 1
    assert len(read_chain(lock_file_for(path))) == 1     # nothing appended


def test_an_edited_plan_names_the_changed_fields_and_the_remedy(base_text, write_plan):
    path = write_plan(base_text)
    lock_plan(load_plan(path), by="A", reason="first", now=NOON)
    edited = replace_once(base_text, "covariance: [unstructured, ar1]", "covariance: [ar1]")
    edited = replace_once(edited, "seed: 7", "seed: 8")
    path.write_text(edited, encoding="utf-8")
    with pytest.raises(LockError) as caught:
        check_lock(load_plan(path))
    message = str(caught.value)
    assert "changed since it was locked at 2026-11-30T12:00:00Z" in message
    assert "--reason" in message and "--unlocked" in message
    fields = {p.field: p for p in caught.value.problems}
    # A list of another length is reported whole; items are compared only when lengths match.
    assert set(fields) == {"endpoints[fbs_change].analyses.primary.options.covariance", "seed"}
    assert fields["seed"].got == "8" and fields["seed"].expected.startswith("7")
    assert fields["seed"].line == edited.splitlines().index("seed: 8") + 1


def test_an_unlocked_plan_is_refused(base_text, write_plan):
    with pytest.raises(LockError, match="not locked"):
        check_lock(load_plan(write_plan(base_text)))


# --------------------------------------------------------------------------- tampering
def locked_twice(base_text, write_plan):
    path = write_plan(base_text)
    lock_plan(load_plan(path), by="A", reason="first", now=NOON)
    path.write_text(amended(base_text, "seed: 8", "1.1"), encoding="utf-8")
    lock_plan(load_plan(path), by="B", reason="second", now=NOON + timedelta(days=1))
    lock_file = lock_file_for(path)
    return path, lock_file, json.loads(lock_file.read_text(encoding="utf-8"))


def tamper_fields(error: LockError) -> set[str]:
    return {p.field for p in error.problems}


def test_an_edited_record_is_detected(base_text, write_plan):
    path, lock_file, content = locked_twice(base_text, write_plan)
    content["records"][0]["by"] = "someone else"
    lock_file.write_text(json.dumps(content), encoding="utf-8")
    with pytest.raises(LockError) as caught:
        check_lock(load_plan(path))
    assert tamper_fields(caught.value) == {"records[0].record_sha256"}


def test_a_rehashed_record_still_breaks_the_chain(base_text, write_plan):
    # Someone edits the stored plan and recomputes both of its hashes: the next record's
    # link still points at the original.
    from trialcut.plan.canonical import canonical_json, sha256_text
    from trialcut.plan.lock import record_hash

    path, lock_file, content = locked_twice(base_text, write_plan)
    record = content["records"][0]
    record["plan"]["seed"] = 99
    record["plan_sha256"] = sha256_text(canonical_json(record["plan"]))
    record["record_sha256"] = record_hash(record)
    lock_file.write_text(json.dumps(content), encoding="utf-8")
    with pytest.raises(LockError) as caught:
        read_chain(lock_file)
    assert tamper_fields(caught.value) == {"records[1].previous"}


def test_a_dropped_record_breaks_the_chain(base_text, write_plan):
    _, lock_file, content = locked_twice(base_text, write_plan)
    del content["records"][0]
    lock_file.write_text(json.dumps(content), encoding="utf-8")
    with pytest.raises(LockError) as caught:
        read_chain(lock_file)
    assert tamper_fields(caught.value) == {"records[0].previous"}


def test_an_edited_plan_hash_is_detected(base_text, write_plan):
    path, lock_file, content = locked_twice(base_text, write_plan)
    content["records"][1]["plan_sha256"] = "0" * 64
    lock_file.write_text(json.dumps(content), encoding="utf-8")
    with pytest.raises(LockError) as caught:
        check_lock(load_plan(path))
    assert tamper_fields(caught.value) == {"records[1].plan_sha256", "records[1].record_sha256"}


@pytest.mark.parametrize("text, field", [
    ('{"format": 1, "records": [', None),
    ('[]', "(top level)"),
    ('{"format": 2, "records": []}', "format"),
    ('{"format": 1, "records": []}', "records"),
    ('{"format": 1, "records": [{"by": 3}]}', "records[0].by"),
])
def test_an_invalid_lock_file_names_the_field(base_text, write_plan, text, field):
    path = write_plan(base_text)
    lock_file_for(path).write_text(text, encoding="utf-8")
    with pytest.raises(LockError) as caught:
        check_lock(load_plan(path))
    problems = caught.value.problems
    assert all(p.file == str(lock_file_for(path)) for p in problems)
    if field is None:
        assert problems[0].line == 1 and problems[0].column is not None
    else:
        assert field in {p.field for p in problems}


def test_a_rehearsal_claims_no_lock():
    from trialcut.plan.lock import LockStatus

    status = LockStatus.unlocked()
    assert (status.locked, status.record, status.chain, status.summary()) == (False, None, (), None)


def test_lock_times_are_utc(base_text, write_plan):
    path = write_plan(base_text)
    eastern = timezone(timedelta(hours=-5))
    record = lock_plan(load_plan(path), by="A", reason="first", now=datetime(2026, 11, 30, 7, 0, 0, tzinfo=eastern))
    assert record.locked_utc == "2026-11-30T12:00:00Z"
    path.write_text(amended(base_text, "seed: 8", "1.1"), encoding="utf-8")
    naive = lock_plan(load_plan(path), by="A", reason="second", now=datetime(2026, 12, 1, 8, 30, 0))
    assert naive.locked_utc == "2026-12-01T08:30:00Z"      # a time without a zone is taken as UTC
    assert sorted(p.name for p in path.parent.iterdir()) == ["plan.yaml", "plan.yaml.lock.json"]
