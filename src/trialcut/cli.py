"""The command line: parse arguments, call one command function, map errors to exit codes.

Exit statuses: 0 ok; 1 a verification found a difference; 2 bad input or usage;
3 an internal fault (the traceback goes to a log file whose path is printed);
4 a run was recorded but a primary analysis failed; 130 interrupted.  ``--debug`` shows tracebacks instead.
"""
from __future__ import annotations

import argparse
import contextlib
import gc
import importlib
import os
import signal
import sys
import threading
import tempfile
import time
import traceback
from datetime import date
from pathlib import Path
from typing import NoReturn, Sequence

from trialcut import __version__
from trialcut.commands_bundle import add_bundle_parser
from trialcut.commands_key import add_key_arguments, add_signing_arguments
from trialcut.commands_qc import add_qc_parser
from trialcut.commands_reproduce import add_reproduce_parser
from trialcut.commands_simulate import add_simulate_parser
from trialcut.errors import TrialcutError

OWN_MODULES = {"key": "trialcut.commands_key", "approve": "trialcut.commands_approve",
               "qc": "trialcut.commands_qc", "bundle": "trialcut.commands_bundle",
               "reproduce": "trialcut.commands_reproduce", "simulate": "trialcut.commands_simulate"}


class UsageError(TrialcutError):
    exit_status = 2


class _Parser(argparse.ArgumentParser):
    def error(self, message: str):  # argparse would exit; we want main() to return 2
        raise UsageError(f"{self.prog}: {message} (see '{self.prog} --help')")


def _iso_date(text: str) -> date:
    try:
        return date.fromisoformat(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a date as YYYY-MM-DD, got {text!r}") from None


def _whole_number(least: int, most: int | None = None):
    """An argparse type: a whole number of at least ``least`` (numpy seeds cannot be negative)
    and at most ``most``."""
    def parse(text: str) -> int:
        try:
            value = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
        if value < least:
            raise argparse.ArgumentTypeError(f"expected a whole number of at least {least}, got {value}")
        if most is not None and value > most:
            raise argparse.ArgumentTypeError(f"expected a whole number of at most {most}, got {value}")
        return value

    parse.__name__ = "whole number"
    return parse


MAX_WORKERS = 256


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="trialcut", description="Lock an analysis plan, check a data cut, run and record it.")
    parser.add_argument("--version", action="version", version=f"trialcut {__version__}")
    parser.add_argument("--debug", action="store_true", help="show tracebacks")
    commands = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)

    check = commands.add_parser("check", help="validate an analysis plan and show what it declares")
    check.add_argument("plan", type=Path)

    commands.add_parser("schema", help="print the JSON Schema of plan files (for editors)")

    lock = commands.add_parser("lock", help="freeze a plan (or record an amendment)")
    lock.add_argument("plan", type=Path)
    lock.add_argument("--by", required=True, help="who locks it")
    lock.add_argument("--reason", required=True, help="why (e.g. 'final before unblinding')")
    add_signing_arguments(lock, "sign the lock record with this private key (a .key file or a key name); "
                                "an unchanged plan whose latest lock is unsigned gets that record signed")

    key = commands.add_parser("key", help="make a signing key pair (private key for you, public key for the keyring)")
    key_actions = key.add_subparsers(dest="key_action", metavar="ACTION", parser_class=_Parser, required=True)
    key_new = key_actions.add_parser("new", help="create a key pair")
    key_new.add_argument("--name", required=True, help="the key holder's name as the keyring shows it, e.g. a.smith")
    key_new.add_argument("--role", action="append", metavar="ROLE",
                         help="a role this key may approve in (repeatable; default: any role)")
    key_new.add_argument("--no-passphrase", action="store_true",
                         help="leave the private key unprotected (rehearsals and demos only)")
    add_key_arguments(key_new)

    approve = commands.add_parser("approve", help="record a signed review or approval of a verified run")
    approve.add_argument("run_folder", type=Path)
    add_signing_arguments(approve, "the private key to sign with (a .key file or a key name)", required=True)
    approve.add_argument("--role", required=True, help="in which role, e.g. statistician or reviewer")
    approve.add_argument("--note", help="what was reviewed, or any condition of the approval")
    approve.add_argument("--registry", type=Path, help="registry file (default: the run's output root's)")

    add_qc_parser(commands)
    add_bundle_parser(commands)
    add_reproduce_parser(commands)
    add_simulate_parser(commands)

    run = commands.add_parser("run", help="check a data cut and run the locked plan on it")
    run.add_argument("plan", type=Path)
    run.add_argument("--data", required=True, type=Path, help="data cut: .csv, .parquet or Dataset-JSON .json")
    run.add_argument("--cut", required=True, help="label of the data cut, e.g. 'interim-1'")
    run.add_argument("--out", type=Path, default=Path("outputs"), help="output root (default: outputs)")
    run.add_argument("--unlocked", action="store_true", help="rehearse with a plan that is not locked")
    run.add_argument("--dummy-arms", type=_whole_number(0), metavar="SEED",
                     help="blinded dry run: dummy arms (Arm A, Arm B, ...) allocated at random from SEED, "
                          "a whole number, 0 or more; the treatment column is not read")
    run.add_argument("--cut-off", type=_iso_date, metavar="DATE",
                     help="database cut-off date, YYYY-MM-DD (default: the latest date in the data)")
    # More processes than this machine could ever start would fail deep inside the pool.
    run.add_argument("--workers", type=_whole_number(1, MAX_WORKERS), default=1,
                     help=f"local worker processes for imputation work (1 to {MAX_WORKERS})")
    run.add_argument("--scheduler", metavar="ADDRESS",
                     help="Dask scheduler address, or 'local' for a local cluster")

    history = commands.add_parser("history", help="list recorded runs, comparisons and renderings")
    history.add_argument("--out", type=Path, default=Path("outputs"))
    history.add_argument("--study")
    history.add_argument("--cut")

    verify = commands.add_parser("verify", help="re-hash sealed folders, compare them with their registry rows "
                                                "and walk the registry chain")
    verify.add_argument("run_folder", nargs="?", type=Path,
                        help="one run (or comparison, rendering) folder; default: everything under --out")
    verify.add_argument("--out", type=Path, default=Path("outputs"))
    verify.add_argument("--registry", type=Path,
                        help="registry file (default: registry.sqlite of the folder's output root, or OUT's)")
    verify.add_argument("--head", metavar="HASH",
                        help="a chain head printed by an earlier record: check it is still in the chain")
    verify.add_argument("--without-registry", action="store_true",
                        help="check one folder against its own manifest only (a weaker check, said loudly)")
    verify.add_argument("--keyring", type=Path, metavar="FILE",
                        help="keyring to check signatures against (default: $TRIALCUT_KEYRING or ./keyring.txt)")

    render = commands.add_parser("render", help="rebuild the documents of a verified past run from its results")
    render.add_argument("run_folder", type=Path)
    render.add_argument("--to", type=Path, help="a new or empty folder outside the output folder (not recorded); "
                                                "default: a new recorded folder OUT/STUDY/renderings/ID")
    render.add_argument("--registry", type=Path, help="registry file (default: the run's output root's)")

    compare = commands.add_parser("compare", help="compare two verified runs (plan, data and estimates)")
    compare.add_argument("run_a", type=Path)
    compare.add_argument("run_b", type=Path)
    compare.add_argument("--to", type=Path, help="a new or empty folder outside the output folder (not recorded); "
                                                 "default: a new recorded folder OUT/STUDY/comparisons/ID")
    compare.add_argument("--registry", type=Path, help="registry file (default: the runs' output root's)")

    demo = commands.add_parser("demo", help="invent a trial, lock the demo plan and run two data cuts")
    demo.add_argument("--out", type=Path, default=Path("outputs"))
    demo.add_argument("--seed", type=int, default=20261202)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    debug = "--debug" in argv
    try:
        args = build_parser().parse_args(argv)
        if args.command is None:
            build_parser().print_help()
            return 2
        # One module per newer subcommand; the older ones live in trialcut.commands.
        commands = importlib.import_module(OWN_MODULES.get(args.command, "trialcut.commands"))
        with _terminate_as_interrupt():
            return getattr(commands, f"command_{args.command}")(args)
    except TrialcutError as error:
        if debug:
            traceback.print_exc()
        print(f"error: {error.render()}", file=sys.stderr)
        return error.exit_status
    except KeyboardInterrupt as interrupt:
        print(f"interrupted: {interrupt or 'nothing was recorded'}", file=sys.stderr)
        return 130
    except SystemExit as exit_:  # --help and --version
        return int(exit_.code or 0)
    except Exception:  # an internal fault: keep the traceback, show a short message
        if debug:
            traceback.print_exc()
            return 3
        # The process id keeps two faults of the same second (two runs at once) from sharing a log.
        log = Path(tempfile.gettempdir()) / f"trialcut-fault-{time.strftime('%Y%m%dT%H%M%S')}-{os.getpid()}.log"
        log.write_text(traceback.format_exc(), encoding="utf-8")
        print(f"internal error: this is a fault in trialcut, not in your input; details in {log}",
              file=sys.stderr)
        return 3


@contextlib.contextmanager
def _terminate_as_interrupt():
    """SIGTERM (a scheduler or `kill` stopping us) ends a command the way Ctrl-C does: cleanly."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return

    def interrupt(number, frame):
        raise KeyboardInterrupt("stopped by SIGTERM; nothing was recorded")

    previous = signal.signal(signal.SIGTERM, interrupt)
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, previous)


def entry_point() -> None:
    leave(main())


def leave(status: int) -> NoReturn:
    """End the process with ``status``, leaving its objects to the operating system.

    A run leaves about half a million objects in reference cycles (the PDF engine's box trees);
    the interpreter's last garbage collection walked them for 0.6 s of a 300-participant run's
    11 s.  Frozen objects are never collected, so that pass finds nothing; exit handlers still run
    and buffered output is still written.
    """
    gc.freeze()
    sys.exit(status)
