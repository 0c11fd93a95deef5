"""Ed25519 keys, the project's keyring, and signatures over hashed records.

A signature says "the holder of this private key vouched for the record whose SHA-256 is
this", nothing more.  What is signed is the canonical JSON of

    {"purpose": "plan lock" | "approval" | ..., "sha256": <record hash>,
     "key": <key name>, "fingerprint": <key fingerprint>, "signed_utc": <time>}

so a signature cannot be moved to another record, another purpose or another name.  The
signature block stored beside a record repeats every field but the hash (which the reader
recomputes from the record itself) and adds ``signature`` (base64).

Private key files (``<name>.key``, mode 0600) are JSON: format, name, fingerprint and the
key as PKCS #8 PEM, encrypted with the passphrase when one is given.  They stay with their
owner.

The keyring is a plain text file, kept in the project and reviewed like code::

    # trialcut keyring: <name> ed25519 <public key, base64 of 32 bytes> [roles, comma separated]
    alice ed25519 9t1F...Qk= statistician,reviewer

Blank lines and ``#`` comments are ignored.  A key's fingerprint is the first 16 hex digits
of the SHA-256 of its 32 public bytes.  Roles, when listed, are the roles the key may
approve in; no roles means any role.  Who may edit the keyring is the project's decision:
trialcut trusts whatever keyring it is given, so the keyring's own history (git log) is
part of the trust chain.
"""
from __future__ import annotations

import base64
import binascii
import hashlib
import json
import os
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

from cryptography.exceptions import InvalidSignature
from cryptography.hazmat.primitives import serialization
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey, Ed25519PublicKey

from trialcut.errors import InputError, Problem

ALGORITHM = "ed25519"
KEY_FILE_FORMAT = 1
KEY_SUFFIX = ".key"
KEYRING_HEADER = ("# trialcut keyring: one public key per line, reviewed like code.\n"
                  "# <name> ed25519 <public key, base64 of 32 bytes> [roles, comma separated]\n")
DEFAULT_KEYRING = "keyring.txt"
KEYRING_VARIABLE = "TRIALCUT_KEYRING"
DEFAULT_KEY_DIR = Path.home() / ".trialcut" / "keys"
NAME_RULE = "letters, digits, '.', '_', '@' or '-', starting with a letter or digit"
_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9._@-]{0,63}")
_ROLE = re.compile(r"[a-z][a-z0-9_-]{0,31}")
SIGNATURE_FIELDS = ("algorithm", "key", "fingerprint", "signed_utc", "signature")

# Signature statuses, as verify names them.
VALID, UNSIGNED, UNKNOWN_KEY, BAD_SIGNATURE = "valid", "unsigned", "unknown key", "bad signature"
NOT_CHECKED = "not checked"   # no keyring was given: nothing can be said about the signer


class SigningError(InputError):
    """A key or keyring that cannot be used (exit 2)."""


def fingerprint(public_bytes: bytes) -> str:
    return hashlib.sha256(public_bytes).hexdigest()[:16]


def checked_name(name: str, what: str = "key name") -> str:
    if isinstance(name, str) and _NAME.fullmatch(name):
        return name
    raise SigningError(f"{name!r} cannot be a {what}", [Problem(
        code="key.bad_name", field=what, message=f"a {what} is one word", expected=NAME_RULE,
        got=repr(name), hint="choose a name such as 'alice' or 'a.smith'")])


def checked_role(role: str) -> str:
    if isinstance(role, str) and _ROLE.fullmatch(role):
        return role
    raise SigningError(f"{role!r} cannot be a role", [Problem(
        code="key.bad_role", field="role", message="a role is one lower-case word",
        expected="e.g. statistician, reviewer, programmer", got=repr(role),
        hint="pass --role statistician (or another lower-case word)")])


# --------------------------------------------------------------------------- keyring
@dataclass(frozen=True)
class KeyringEntry:
    name: str
    public_key: str          # base64 of the 32 public bytes
    roles: tuple[str, ...]   # empty: any role
    line: int

    @property
    def fingerprint(self) -> str:
        return fingerprint(base64.b64decode(self.public_key))

    def line_text(self) -> str:
        roles = f" {','.join(self.roles)}" if self.roles else ""
        return f"{self.name} {ALGORITHM} {self.public_key}{roles}\n"

    def verifier(self) -> Ed25519PublicKey:
        return Ed25519PublicKey.from_public_bytes(base64.b64decode(self.public_key))


@dataclass(frozen=True)
class Keyring:
    path: Path | None
    entries: tuple[KeyringEntry, ...]

    def by_fingerprint(self, value: str) -> KeyringEntry | None:
        return next((entry for entry in self.entries if entry.fingerprint == value), None)

    def by_name(self, name: str) -> KeyringEntry | None:
        return next((entry for entry in self.entries if entry.name == name), None)


def keyring_path(given: Path | None) -> Path:
    """--keyring, else $TRIALCUT_KEYRING, else keyring.txt in the current folder."""
    if given is not None:
        return Path(given)
    return Path(os.environ.get(KEYRING_VARIABLE) or DEFAULT_KEYRING)


def read_keyring(path: Path, required: bool = True) -> Keyring:
    """Every entry of a keyring file; any malformed line is an InputError naming it."""
    path = Path(path)
    if not path.is_file():
        if not required:
            return Keyring(path=None, entries=())
        raise SigningError(f"no keyring at {path}", [Problem(
            code="key.no_keyring", file=str(path), message="the keyring file does not exist",
            expected="a keyring written by 'trialcut key new'", got="no such file",
            hint=f"pass --keyring FILE (or set {KEYRING_VARIABLE}); create keys with "
                 "'trialcut key new --name NAME --keyring FILE'")])
    entries, problems = [], []
    for number, raw in enumerate(path.read_text(encoding="utf-8").splitlines(), start=1):
        text = raw.split("#", 1)[0].strip()
        if text:
            entry, problem = _entry(text, number, path)
            entries.append(entry) if entry else problems.append(problem)
    problems += _duplicate_problems(entries, path)
    if problems:
        raise SigningError(f"{path}: the keyring is not valid", problems)
    return Keyring(path=path, entries=tuple(entries))


def _entry(text: str, number: int, path: Path) -> tuple[KeyringEntry | None, Problem | None]:
    parts = text.split()
    problem = Problem(code="key.bad_keyring_line", file=str(path), line=number,
                      message="this keyring line is not '<name> ed25519 <public key> [roles]'",
                      got=repr(text[:80]), hint="restore the line from the keyring's history")
    if len(parts) not in (3, 4) or parts[1] != ALGORITHM or not _NAME.fullmatch(parts[0]):
        return None, problem
    try:
        raw = base64.b64decode(parts[2], validate=True)
    except (binascii.Error, ValueError):
        return None, problem
    roles = tuple(parts[3].split(",")) if len(parts) == 4 else ()
    if len(raw) != 32 or not all(_ROLE.fullmatch(role) for role in roles):
        return None, problem
    return KeyringEntry(name=parts[0], public_key=parts[2], roles=roles, line=number), None


def _duplicate_problems(entries: list[KeyringEntry], path: Path) -> list[Problem]:
    problems, names, prints = [], set(), set()
    for entry in entries:
        if entry.name in names or entry.fingerprint in prints:
            problems.append(Problem(
                code="key.duplicate", file=str(path), line=entry.line, field=entry.name,
                message="a name or public key appears twice in the keyring",
                hint="keep one line per person and key"))
        names.add(entry.name)
        prints.add(entry.fingerprint)
    return problems


# --------------------------------------------------------------------------- key creation
@dataclass(frozen=True)
class NewKey:
    name: str
    private_key_file: Path
    entry: KeyringEntry
    keyring: Path
    protected: bool


def new_key(name: str, key_dir: Path, keyring: Path, passphrase: str | None,
            roles: tuple[str, ...] = ()) -> NewKey:
    """Create a key pair: the private key file in ``key_dir``, its public line in the keyring.

    Refuses to overwrite a private key or to reuse a name already in the keyring.
    """
    name = checked_name(name)
    roles = tuple(checked_role(role) for role in roles)
    existing = read_keyring(keyring, required=False)
    target = Path(key_dir) / f"{name}{KEY_SUFFIX}"
    _refuse_existing_key(name, target, existing, keyring)
    private = Ed25519PrivateKey.generate()
    public_bytes = private.public_key().public_bytes(serialization.Encoding.Raw,
                                                     serialization.PublicFormat.Raw)
    entry = KeyringEntry(name=name, public_key=base64.b64encode(public_bytes).decode("ascii"),
                         roles=roles, line=len(existing.entries) + 1)
    _write_private_key(target, name, private, passphrase, entry.fingerprint)
    _append_to_keyring(Path(keyring), entry)
    return NewKey(name=name, private_key_file=target, entry=entry, keyring=Path(keyring),
                  protected=bool(passphrase))


def _refuse_existing_key(name: str, target: Path, existing: Keyring, keyring: Path) -> None:
    if target.exists():
        raise SigningError(f"a private key {target} already exists", [Problem(
            code="key.exists", file=str(target), message="a private key is never overwritten",
            hint="choose another --name, or another --key-dir")])
    if existing.by_name(name) is not None:
        raise SigningError(f"the keyring {keyring} already has a key named {name!r}", [Problem(
            code="key.exists", file=str(keyring), field=name,
            message="a name appears once in the keyring",
            hint="choose another --name; to replace a lost key, remove its line from the "
                 "keyring in a reviewed change first")])


def _write_private_key(target: Path, name: str, private: Ed25519PrivateKey,
                       passphrase: str | None, print_: str) -> None:
    encryption = (serialization.BestAvailableEncryption(passphrase.encode("utf-8")) if passphrase
                  else serialization.NoEncryption())
    pem = private.private_bytes(serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8,
                                encryption).decode("ascii")
    content = {"format": KEY_FILE_FORMAT, "kind": "trialcut private key", "name": name,
               "algorithm": ALGORITHM, "fingerprint": print_, "protected": bool(passphrase),
               "pem": pem}
    target.parent.mkdir(parents=True, exist_ok=True)
    # Created with owner-only permissions from the start, never readable by others.
    descriptor = os.open(target, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    with os.fdopen(descriptor, "w", encoding="utf-8") as stream:
        stream.write(json.dumps(content, indent=1) + "\n")


def _append_to_keyring(keyring: Path, entry: KeyringEntry) -> None:
    keyring.parent.mkdir(parents=True, exist_ok=True)
    text = keyring.read_text(encoding="utf-8") if keyring.exists() else KEYRING_HEADER
    if text and not text.endswith("\n"):
        text += "\n"
    temporary = keyring.with_name(keyring.name + ".tmp")
    temporary.write_text(text + entry.line_text(), encoding="utf-8")
    os.replace(temporary, keyring)


# --------------------------------------------------------------------------- signing
@dataclass(frozen=True)
class Signer:
    name: str
    fingerprint: str
    private_key: Ed25519PrivateKey

    def sign(self, purpose: str, sha256: str, signed_utc: str) -> dict[str, Any]:
        block = {"algorithm": ALGORITHM, "key": self.name, "fingerprint": self.fingerprint,
                 "signed_utc": signed_utc}
        signature = self.private_key.sign(_message(purpose, sha256, block))
        return {**block, "signature": base64.b64encode(signature).decode("ascii")}


def _message(purpose: str, sha256: str, block: dict[str, Any]) -> bytes:
    content = {"purpose": purpose, "sha256": sha256, "key": block.get("key"),
               "fingerprint": block.get("fingerprint"), "signed_utc": block.get("signed_utc")}
    return json.dumps(content, sort_keys=True, separators=(",", ":")).encode("utf-8")


def private_key_file(spec: str | Path, key_dir: Path) -> Path:
    """--sign takes a path to a key file, or the name of a key in the key folder."""
    given = Path(spec)
    if given.is_file():
        return given
    named = Path(key_dir) / f"{spec}{KEY_SUFFIX}"
    if named.is_file():
        return named
    raise SigningError(f"unknown key {str(spec)!r}", [Problem(
        code="key.unknown", field="--sign", message="no private key file by that path or name",
        expected=f"a key file, or a name with a file {named}", got=str(spec),
        hint="create a key with 'trialcut key new --name NAME', or pass --key-dir with the "
             "folder that holds it")])


def load_signer(path: Path, passphrase: Callable[[], str | None]) -> Signer:
    """Read a private key file; ``passphrase`` is asked only when the key is protected."""
    content = _key_file_content(path)
    secret = passphrase() if content["protected"] else None
    if content["protected"] and not secret:
        raise SigningError(f"the key {path} is protected by a passphrase", [Problem(
            code="key.passphrase_needed", file=str(path), message="no passphrase was given",
            hint="pass --passphrase-env VARIABLE (the name of an environment variable that "
                 "holds it), or run in a terminal to be asked for it")])
    try:
        private = serialization.load_pem_private_key(
            content["pem"].encode("ascii"), password=secret.encode("utf-8") if secret else None)
    except (ValueError, TypeError) as error:
        raise _wrong_passphrase(path, content) from error
    if not isinstance(private, Ed25519PrivateKey):
        raise _not_a_key(path, "a PEM key that is not Ed25519")
    public = private.public_key().public_bytes(serialization.Encoding.Raw,
                                               serialization.PublicFormat.Raw)
    if fingerprint(public) != content["fingerprint"]:
        raise _not_a_key(path, "a key whose fingerprint does not match the one recorded beside it")
    return Signer(name=content["name"], fingerprint=content["fingerprint"], private_key=private)


def _wrong_passphrase(path: Path, content: dict[str, Any]) -> SigningError:
    if content["protected"]:
        return SigningError(f"wrong passphrase for the key {path}", [Problem(
            code="key.wrong_passphrase", file=str(path),
            message="the passphrase does not open this key",
            hint="check the environment variable named by --passphrase-env; nothing was signed")])
    return _not_a_key(path, "a key file whose key cannot be read")


def _key_file_content(path: Path) -> dict[str, Any]:
    try:
        content = json.loads(Path(path).read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError):
        raise _not_a_key(path, "a file that is not a trialcut key file") from None
    expected = {"format": int, "kind": str, "name": str, "fingerprint": str, "protected": bool,
                "pem": str}
    if not isinstance(content, dict) or content.get("kind") != "trialcut private key" or any(
            not isinstance(content.get(key), kind) for key, kind in expected.items()):
        raise _not_a_key(path, "a file that is not a trialcut key file")
    return content


def _not_a_key(path: Path, got: str) -> SigningError:
    return SigningError(f"{path} is not a usable private key", [Problem(
        code="key.unreadable", file=str(path), message="the private key file cannot be used",
        expected="a key file written by 'trialcut key new'", got=got,
        hint="pass the .key file 'trialcut key new' wrote")])


def require_in_keyring(signer: Signer, keyring: Keyring, role: str | None = None) -> KeyringEntry:
    """Refuse to sign with a key the keyring does not hold (or for a role it does not allow):
    such a signature could never be verified."""
    entry = keyring.by_fingerprint(signer.fingerprint)
    if entry is None or entry.name != signer.name:
        raise SigningError(f"the key {signer.name!r} ({signer.fingerprint}) is not in the keyring "
                        f"{keyring.path}", [Problem(
                            code="key.not_in_keyring", file=str(keyring.path), field=signer.name,
                            message="a signature by a key not in the keyring cannot be verified",
                            hint="add the key's public line to the keyring in a reviewed change "
                                 "(trialcut key new prints it), or pass --keyring with the "
                                 "project's keyring; nothing was signed")])
    if role is not None and entry.roles and role not in entry.roles:
        raise SigningError(f"the keyring allows {signer.name!r} the roles {', '.join(entry.roles)}",
                        [Problem(code="key.role_not_allowed", file=str(keyring.path),
                                 line=entry.line, field="--role", got=role,
                                 expected=" or ".join(entry.roles),
                                 message="the keyring does not allow this key this role",
                                 hint="sign in one of the allowed roles, or have the keyring "
                                      "changed in a reviewed change")])
    return entry


# --------------------------------------------------------------------------- checking
@dataclass(frozen=True)
class SignatureCheck:
    status: str                  # valid | unsigned | unknown key | bad signature
    key: str | None
    fingerprint: str | None
    signed_utc: str | None

    def to_dict(self) -> dict[str, Any]:
        return {"status": self.status, "key": self.key, "fingerprint": self.fingerprint,
                "signed_utc": self.signed_utc}


def check_signature(block: Any, purpose: str, sha256: str, keyring: Keyring) -> SignatureCheck:
    if block is None:
        return SignatureCheck(UNSIGNED, None, None, None)
    if not isinstance(block, dict) or any(not isinstance(block.get(key), str)
                                          for key in SIGNATURE_FIELDS):
        return SignatureCheck(BAD_SIGNATURE, None, None, None)
    found = SignatureCheck(VALID, block["key"], block["fingerprint"], block["signed_utc"])
    entry = keyring.by_fingerprint(block["fingerprint"])
    if block["algorithm"] != ALGORITHM or entry is None or entry.name != block["key"]:
        return SignatureCheck(UNKNOWN_KEY, *_details(found))
    try:
        entry.verifier().verify(base64.b64decode(block["signature"], validate=True),
                                _message(purpose, sha256, block))
    except (InvalidSignature, binascii.Error, ValueError):
        return SignatureCheck(BAD_SIGNATURE, *_details(found))
    return found


def _details(check: SignatureCheck) -> tuple[str | None, str | None, str | None]:
    return check.key, check.fingerprint, check.signed_utc
