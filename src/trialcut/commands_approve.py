"""`trialcut approve RUN --sign KEY --role ROLE`: a signed review or approval of a verified run,
sealed and registered as a record of its own kind; says whether the run is now final."""
from __future__ import annotations

from pathlib import Path

from trialcut.commands_key import project_keyring, signer_from


def command_approve(args) -> int:
    from trialcut.commands import console, verified_run
    from trialcut.record.signing import checked_role
    from trialcut.record.signoff import approve_run, check_signoff

    role = checked_role(args.role)
    keyring = project_keyring(args)
    signer = signer_from(args, keyring, role=role)   # a bad key writes nothing
    registry, row = verified_run(args.run_folder, args.registry, "approve", "approve")
    recorded = approve_run(args.run_folder, row, registry, signer, keyring, role, args.note)
    console.print(f"[green]approved[/green] run {row.record_id} as {role}, signed by {signer.name}")
    console.print(f"  approval record: {recorded.folder}", markup=False)
    console.print(f"  chain head: {recorded.head}", markup=False)
    state = next(run for run in check_signoff(registry, keyring).runs if run.run_id == row.record_id)
    console.print(f"  the run is now: {describe(state)}", markup=False)
    return 0


def describe(state) -> str:
    if state.state == "final":
        return "final (every sign-off its plan asks for is in place)"
    return f"{state.state} — lacks {'; '.join(state.lacking)}"


def signoff_lines(report) -> list[str]:
    """verify's words for every signable record and every run's sign-off state."""
    lines = [f"signatures: {report.summary}"]
    lines += [f"  {item.check.status:13s} {item.what}"
              + (f" by {item.check.key}" if item.check.key else "")
              + (f" as {item.role}" if item.role else "") for item in report.items]
    lines += [f"  run {run.run_id} ({run.cut}): {describe(run)}" for run in report.runs]
    return lines


def verify_signoff(args, registry: Path, run_id: str | None = None) -> None:
    """The signature part of `trialcut verify`: prints every record's state; unknown keys and
    bad signatures fail (exit 1)."""
    from trialcut.commands import console
    from trialcut.errors import VerificationFailed
    from trialcut.record.signing import NOT_CHECKED, keyring_path, read_keyring
    from trialcut.record.signoff import check_signoff

    keyring = read_keyring(keyring_path(args.keyring), required=args.keyring is not None)
    report = check_signoff(registry, keyring, run_id=run_id)
    for line in signoff_lines(report):
        console.print(line, markup=False)
    if keyring.path is None and report.count(NOT_CHECKED):
        console.print(f"[bold red]SIGNATURES NOT CHECKED[/bold red]: no keyring at {keyring_path(args.keyring)}; "
                      "pass --keyring FILE (the project's reviewed keyring) to check who signed")
    if report.problems:
        raise VerificationFailed(f"signatures: {report.summary}", report.problems)
