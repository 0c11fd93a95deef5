"""`trialcut key new`: make a signing key pair, and the helpers every signing command shares.

The private key goes to the user's key folder (never printed); its public line goes into the
project's keyring, which the user commits in a reviewed change.
"""
from __future__ import annotations

import getpass
import os
import sys
from pathlib import Path
from typing import Callable

from trialcut.errors import InputError, Problem

KEY_DIR_VARIABLE = "TRIALCUT_KEY_DIR"


def add_signing_arguments(parser, sign_help: str, required: bool = False) -> None:
    """--sign, --key-dir, --passphrase-env and --keyring, the same on every signing command."""
    parser.add_argument("--sign", metavar="KEY", required=required, help=sign_help)
    add_key_arguments(parser)


def add_key_arguments(parser) -> None:
    parser.add_argument("--key-dir", type=Path, metavar="DIR",
                        help=f"folder of private keys (default: ${KEY_DIR_VARIABLE} or ~/.trialcut/keys)")
    parser.add_argument("--passphrase-env", metavar="VARIABLE",
                        help="name of an environment variable holding the key's passphrase "
                             "(default: ask in a terminal)")
    parser.add_argument("--keyring", type=Path, metavar="FILE",
                        help="the project's keyring (default: $TRIALCUT_KEYRING or ./keyring.txt)")


def key_dir(args) -> Path:
    from trialcut.record.signing import DEFAULT_KEY_DIR

    given = getattr(args, "key_dir", None)
    return Path(given or os.environ.get(KEY_DIR_VARIABLE) or DEFAULT_KEY_DIR)


def passphrase_source(args, confirm: bool = False) -> Callable[[], str | None]:
    """Where a passphrase comes from: the named environment variable, else a terminal prompt."""
    def read() -> str | None:
        variable = getattr(args, "passphrase_env", None)
        if variable:
            if variable not in os.environ:
                raise InputError(f"the environment variable {variable} is not set", [Problem(
                    code="key.passphrase_variable_missing", field="--passphrase-env", got=variable,
                    message="--passphrase-env names a variable that is not set",
                    hint=f"set it first (e.g. read -s {variable}; export {variable})")])
            return os.environ[variable]
        if not sys.stdin.isatty():
            return None
        first = getpass.getpass("passphrase: ")
        if confirm and first != getpass.getpass("passphrase again: "):
            raise InputError("the two passphrases differ", [Problem(
                code="key.passphrase_mismatch", message="the passphrase was typed differently twice",
                hint="run the command again")])
        return first
    return read


def signer_from(args, keyring, role: str | None = None):
    """The signer --sign names, checked against the keyring before anything is written."""
    from trialcut.record.signing import load_signer, private_key_file, require_in_keyring

    signer = load_signer(private_key_file(args.sign, key_dir(args)), passphrase_source(args))
    require_in_keyring(signer, keyring, role=role)
    return signer


def lock_signer(args):
    """lock --sign: the signing function lock_plan calls, or None for an unsigned lock."""
    if not getattr(args, "sign", None):
        return None
    from trialcut.record.registry import utc_now

    signer = signer_from(args, project_keyring(args))
    return lambda purpose, digest: signer.sign(purpose, digest, utc_now())


def project_keyring(args):
    from trialcut.record.signing import keyring_path, read_keyring

    return read_keyring(keyring_path(getattr(args, "keyring", None)))


def command_key(args) -> int:
    from trialcut.commands import console
    from trialcut.record.signing import keyring_path, new_key

    passphrase = None if args.no_passphrase else passphrase_source(args, confirm=True)()
    if not passphrase and not args.no_passphrase:
        raise InputError("a new key needs a passphrase, or --no-passphrase", [Problem(
            code="key.passphrase_needed", field="--passphrase-env",
            message="no passphrase was given and there is no terminal to ask for one",
            hint="pass --passphrase-env VARIABLE, or --no-passphrase for a key kept unprotected "
                 "(for rehearsals and demos only)")])
    created = new_key(args.name, key_dir(args), keyring_path(args.keyring), passphrase,
                      roles=tuple(args.role or ()))
    protection = "protected by a passphrase" if created.protected else "NOT protected by a passphrase"
    console.print(f"[green]created[/green] key {created.name} (fingerprint {created.entry.fingerprint})")
    console.print(f"  private key: {created.private_key_file} ({protection}; keep it to yourself)",
                  markup=False)
    console.print(f"  public key added to the keyring {created.keyring}:", markup=False)
    console.print(f"    {created.entry.line_text().rstrip()}", markup=False)
    console.print("  commit the keyring in a reviewed change before signing with this key")
    return 0
