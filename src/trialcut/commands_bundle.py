"""`trialcut bundle RUN [--include-data]`: one archive to hand to a reviewer, holding the run,
its plan and lock chain with signatures, approvals, QC records, the keyring, the environment
lock and optionally the data; `trialcut verify BUNDLE` checks it without any registry."""
from __future__ import annotations

import hashlib
import json
from pathlib import Path

from trialcut.errors import InputError, Problem


def add_bundle_parser(commands) -> None:
    bundle = commands.add_parser("bundle", help="write one archive holding a run and everything needed to check it")
    bundle.add_argument("run_folder", type=Path)
    bundle.add_argument("--include-data", action="store_true", help="put the data cut itself in the archive")
    bundle.add_argument("--data", type=Path, metavar="FILE",
                        help="where the data cut is now (default: the path the run recorded)")
    bundle.add_argument("--keyring", type=Path, metavar="FILE",
                        help="keyring to include (default: $TRIALCUT_KEYRING or ./keyring.txt, if present)")
    bundle.add_argument("--registry", type=Path, help="registry file (default: the run's output root's)")


def data_file_of(run_folder: Path, given: Path | None) -> Path:
    """The run's data cut, found by the path given or recorded and checked by its SHA-256."""
    results = json.loads((Path(run_folder) / "results.json").read_text(encoding="utf-8"))
    data = results.get("data") or {}
    candidate = Path(given) if given is not None else Path(str(data.get("file") or ""))
    if not candidate.is_file():
        raise InputError(f"the data cut of {run_folder} is not at {candidate}", [Problem(
            code="data.cut_not_found", file=str(candidate), field="--data",
            message="the data cut the run analysed cannot be found",
            expected=f"a file with SHA-256 {data.get('sha256')}", got="no such file",
            hint="pass --data FILE with the data cut (or use the bundle that includes it)")])
    found = hashlib.sha256(candidate.read_bytes()).hexdigest()
    if found != data.get("sha256"):
        raise InputError(f"{candidate} is not the data cut {run_folder} analysed", [Problem(
            code="data.cut_changed", file=str(candidate), field="--data",
            message="the file's SHA-256 differs from the one the run recorded",
            expected=str(data.get("sha256")), got=found,
            hint="pass --data FILE with the data cut exactly as the run read it")])
    return candidate


def command_bundle(args) -> int:
    from trialcut.commands import console, verified_run
    from trialcut.record.bundle import build_bundle
    from trialcut.record.signing import keyring_path

    registry, row = verified_run(args.run_folder, args.registry, "bundle", "bundle")
    data = data_file_of(args.run_folder, args.data) if args.include_data else None
    keyring = keyring_path(args.keyring)
    if args.keyring is not None and not keyring.is_file():
        raise InputError(f"no keyring at {keyring}", [Problem(
            code="key.no_keyring", file=str(keyring), message="the keyring file does not exist",
            hint="pass the project's keyring with --keyring, or leave it out")])
    recorded = build_bundle(args.run_folder, row, registry, keyring if keyring.is_file() else None, data)
    details = recorded.row.details_dict()
    console.print("[green]bundled[/green] run " + row.record_id + ": "
                  + str(recorded.folder / details["archive"]).replace("[", "\\["))
    console.print(f"  archive SHA-256: {details['archive_sha256']} (give it to the recipient separately)")
    console.print(f"  data: {'included' if data else 'named by its SHA-256 only'}; keyring: "
                  f"{'included' if keyring.is_file() else 'none found (signatures cannot be checked from the bundle)'}")
    console.print(f"  chain head: {recorded.head}", markup=False)
    return 0


def verify_bundle_command(args) -> int:
    """verify BUNDLE: the archive against its own manifest and signatures, no registry needed."""
    from trialcut.commands import console
    from trialcut.record.bundle import verify_bundle

    report = verify_bundle(args.run_folder, keyring_file=args.keyring)
    console.print("[green]verified[/green] " + report.summary.replace("[", "\\["))
    if args.keyring is None:
        console.print("  the signatures were checked against the keyring inside the bundle, which shows only "
                      "that the bundle agrees with itself; pass --keyring with your own copy of the project's keyring")
    return 0
