"""Keys, keyring and signatures: checked against RFC 8032 and the documented message format."""
from __future__ import annotations

import base64
import hashlib
import json
import stat
from pathlib import Path

import pytest
from cryptography.hazmat.primitives import serialization
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

from trialcut.plan.load import load_plan
from trialcut.plan.lock import lock_file_for, lock_plan, read_chain
from trialcut.record.signing import (BAD_SIGNATURE, UNKNOWN_KEY, UNSIGNED, VALID, Keyring,
                                     KeyringEntry, Signer, SigningError, check_signature,
                                     load_signer, new_key, read_keyring)

# RFC 8032, section 7.1, "TEST 1": an Ed25519 key pair and its signature of the empty message.
RFC_SECRET = "9d61b19deffd5a60ba844af492ec2cc44449c5697b326919703bac031cae7f60"
RFC_PUBLIC = "d75a980182b10ab7d54bfed3c964073a0ee172f3daa62325af021a68f707511a"
RFC_EMPTY_SIGNATURE = ("e5564300c360ac729086e2cc806e828a84877f1eb8e5d974d873e065224901555fb8821590a3"
                       "3bacc61e39701cf9b46bd25bf5f0595bbe24655141438e7a100b")
BASE_PLAN = Path(__file__).resolve().parents[1] / "cases" / "_base" / "plan.yaml"


def _rfc_signer() -> tuple[Signer, Keyring]:
    private = Ed25519PrivateKey.from_private_bytes(bytes.fromhex(RFC_SECRET))
    public = base64.b64encode(bytes.fromhex(RFC_PUBLIC)).decode()
    entry = KeyringEntry(name="rfc", public_key=public, roles=(), line=1)
    return Signer(name="rfc", fingerprint=entry.fingerprint, private_key=private), Keyring(None, (entry,))


def test_the_rfc_key_pair_signs_as_the_rfc_says():
    signer, keyring = _rfc_signer()
    public = signer.private_key.public_key().public_bytes(serialization.Encoding.Raw,
                                                          serialization.PublicFormat.Raw)
    assert public.hex() == RFC_PUBLIC
    assert signer.private_key.sign(b"").hex() == RFC_EMPTY_SIGNATURE
    # The fingerprint is documented as the first 16 hex digits of SHA-256 of the public bytes.
    assert keyring.entries[0].fingerprint == hashlib.sha256(bytes.fromhex(RFC_PUBLIC)).hexdigest()[:16]


def _documented_message(sha256: str, purpose: str, key: str, fingerprint: str, signed_utc: str) -> bytes:
    # The message format as the module note of record/signing.py documents it, built by hand.
    return json.dumps({"purpose": purpose, "sha256": sha256, "key": key, "fingerprint": fingerprint,
                       "signed_utc": signed_utc}, sort_keys=True, separators=(",", ":")).encode()


def test_a_signature_made_by_hand_over_the_documented_message_is_valid():
    signer, keyring = _rfc_signer()
    digest = hashlib.sha256(b"some record").hexdigest()
    when = "2026-12-02T10:00:00Z"
    raw = signer.private_key.sign(_documented_message(digest, "approval", "rfc", signer.fingerprint, when))
    block = {"algorithm": "ed25519", "key": "rfc", "fingerprint": signer.fingerprint,
             "signed_utc": when, "signature": base64.b64encode(raw).decode()}
    assert check_signature(block, "approval", digest, keyring).status == VALID
    assert signer.sign("approval", digest, when) == block   # Ed25519 signatures are deterministic


def test_each_way_a_signature_can_fail_is_named():
    signer, keyring = _rfc_signer()
    digest = hashlib.sha256(b"record").hexdigest()
    block = signer.sign("plan lock", digest, "2026-12-02T10:00:00Z")
    assert check_signature(None, "plan lock", digest, keyring).status == UNSIGNED
    other = hashlib.sha256(b"another record").hexdigest()
    assert check_signature(block, "plan lock", other, keyring).status == BAD_SIGNATURE
    assert check_signature(block, "approval", digest, keyring).status == BAD_SIGNATURE
    renamed = {**block, "signed_utc": "2026-12-03T10:00:00Z"}
    assert check_signature(renamed, "plan lock", digest, keyring).status == BAD_SIGNATURE
    assert check_signature(block, "plan lock", digest, Keyring(None, ())).status == UNKNOWN_KEY
    claimed = {**block, "key": "someone-else"}   # right key, another name: not the keyring's key
    assert check_signature(claimed, "plan lock", digest, keyring).status == UNKNOWN_KEY


def test_new_keys_are_private_protected_and_open_only_with_their_passphrase(tmp_path):
    created = new_key("alice", tmp_path / "keys", tmp_path / "keyring.txt", "correct horse",
                      roles=("statistician",))
    mode = stat.S_IMODE(created.private_key_file.stat().st_mode)
    assert mode == 0o600
    text = created.private_key_file.read_text()
    assert "BEGIN ENCRYPTED PRIVATE KEY" in text and "correct horse" not in text
    signer = load_signer(created.private_key_file, lambda: "correct horse")
    assert signer.fingerprint == created.entry.fingerprint
    with pytest.raises(SigningError, match="wrong passphrase") as failure:
        load_signer(created.private_key_file, lambda: "wrong")
    assert failure.value.exit_status == 2
    keyring = read_keyring(tmp_path / "keyring.txt")
    assert keyring.by_name("alice").roles == ("statistician",)
    with pytest.raises(SigningError, match="already"):
        new_key("alice", tmp_path / "other", tmp_path / "keyring.txt", None)


def test_a_malformed_keyring_line_is_named_by_its_line(tmp_path):
    keyring = tmp_path / "keyring.txt"
    keyring.write_text("# comment\n\nbob ed25519 not-base64!\n", encoding="utf-8")
    with pytest.raises(SigningError) as failure:
        read_keyring(keyring)
    assert failure.value.problems[0].line == 3


def test_signed_locks_keep_their_chain_and_a_stripped_signature_leaves_an_unsigned_record(tmp_path):
    plan = tmp_path / "plan.yaml"
    plan.write_text(BASE_PLAN.read_text(encoding="utf-8"), encoding="utf-8")
    signer, keyring = _rfc_signer()
    first = lock_plan(load_plan(plan), by="tester", reason="first",
                      sign=lambda purpose, digest: signer.sign(purpose, digest, "2026-12-02T10:00:00Z"))
    (record,) = read_chain(lock_file_for(plan))
    assert record.signature == first.signature
    assert check_signature(record.signature, "plan lock", record.record_sha256, keyring).status == VALID
    content = json.loads(lock_file_for(plan).read_text())
    del content["records"][0]["signature"]
    lock_file_for(plan).write_text(json.dumps(content))
    (stripped,) = read_chain(lock_file_for(plan))   # still a valid chain …
    assert stripped.signature is None               # … of an unsigned record


def test_signing_an_unchanged_locked_plan_signs_its_latest_record(tmp_path):
    plan = tmp_path / "plan.yaml"
    plan.write_text(BASE_PLAN.read_text(encoding="utf-8"), encoding="utf-8")
    unsigned = lock_plan(load_plan(plan), by="tester", reason="rehearsal lock")
    signer, keyring = _rfc_signer()
    signed = lock_plan(load_plan(plan), by="ignored", reason="ignored",
                       sign=lambda purpose, digest: signer.sign(purpose, digest, "2026-12-02T10:00:00Z"))
    assert signed.record_sha256 == unsigned.record_sha256 and signed.by == "tester"
    assert len(read_chain(lock_file_for(plan))) == 1
