"""Registry format 2 beside format 1, and `history` in an 80-column terminal.

A format-1 registry (table ``runs``, written by trialcut before records had kinds) is built
here with plain sqlite3 and hashlib, by the format-1 rule: SHA-256 of the canonical JSON of
every column except row_hash.  It must read as it is, upgrade in place on the next write
with every old hash still checking, and keep showing a deleted last row.
"""
from __future__ import annotations

import hashlib
import io
import json
import sqlite3
from pathlib import Path

import pytest
from rich.console import Console

import trialcut.commands as commands
from trialcut.cli import main
from trialcut.record.registry import list_records, verify_chain
from tests.record.sealing import ENTRY, record_small_run

FORMAT_1 = """CREATE TABLE runs (
    seq INTEGER PRIMARY KEY AUTOINCREMENT, run_id TEXT NOT NULL UNIQUE, study_id TEXT NOT NULL,
    cut TEXT NOT NULL, created_utc TEXT NOT NULL, folder TEXT NOT NULL, plan_sha256 TEXT NOT NULL,
    lock_status TEXT NOT NULL, dummy_arms INTEGER NOT NULL, data_sha256 TEXT NOT NULL,
    manifest_sha256 TEXT NOT NULL, previous_hash TEXT NOT NULL, row_hash TEXT NOT NULL)"""


def format_1_registry(path: Path, count: int) -> list[str]:
    """A format-1 registry of ``count`` rows; returns their row hashes."""
    connection = sqlite3.connect(path)
    hashes, previous = [], "0" * 64
    with connection:
        connection.execute(FORMAT_1)
        connection.execute("PRAGMA user_version = 1")
        for seq in range(1, count + 1):
            row = {"seq": seq, "run_id": f"old{seq}", "study_id": "S", "cut": "c0",
                   "created_utc": "2026-11-01T09:00:00Z", "folder": f"S/c0/old{seq}",
                   "plan_sha256": "a" * 64, "lock_status": "locked", "dummy_arms": 0,
                   "data_sha256": "b" * 64, "manifest_sha256": "c" * 64, "previous_hash": previous}
            text = json.dumps(row, sort_keys=True, separators=(",", ":"), ensure_ascii=False)
            previous = hashlib.sha256(text.encode("utf-8")).hexdigest()
            connection.execute(f"INSERT INTO runs ({', '.join(row)}, row_hash) "
                               f"VALUES ({', '.join('?' * (len(row) + 1))})", [*row.values(), previous])
            hashes.append(previous)
    connection.close()
    return hashes


def test_a_format_1_registry_reads_as_it_is_and_upgrades_keeping_every_hash(tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    registry = out / "registry.sqlite"
    hashes = format_1_registry(registry, 3)
    assert verify_chain(registry) == []
    assert [row.row_hash for row in list_records(registry)] == hashes
    recorded = record_small_run(out, "r1")
    rows = list_records(registry)
    assert [row.row_format for row in rows] == [1, 1, 1, 2]
    assert [row.row_hash for row in rows[:3]] == hashes
    assert recorded.row.previous_hash == hashes[-1] and recorded.row.seq == 4
    assert verify_chain(registry) == []
    with sqlite3.connect(registry) as connection:
        assert connection.execute("PRAGMA user_version").fetchone()[0] == 2


def test_a_last_row_deleted_before_the_upgrade_still_shows(tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    registry = out / "registry.sqlite"
    format_1_registry(registry, 3)
    with sqlite3.connect(registry) as connection:
        connection.execute("DELETE FROM runs WHERE seq = 3")
    assert [p.code for p in verify_chain(registry)] == ["registry.rows_removed_at_end"]
    record_small_run(out, "r1")
    assert "registry.rows_missing" in [p.code for p in verify_chain(registry)]


def test_an_edited_format_1_row_is_still_caught_after_the_upgrade(tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    registry = out / "registry.sqlite"
    format_1_registry(registry, 2)
    record_small_run(out, "r1")
    with sqlite3.connect(registry) as connection:
        connection.execute("UPDATE records SET lock_status = 'unlocked' WHERE seq = 1")
    assert [p.code for p in verify_chain(registry)] == ["registry.row_changed"]


def test_a_registry_from_a_newer_trialcut_is_refused_with_exit_2(tmp_path, capsys):
    out = tmp_path / "out"
    record_small_run(out, "r1")
    with sqlite3.connect(out / "registry.sqlite") as connection:
        connection.execute("PRAGMA user_version = 9")
    assert main(["history", "--out", str(out)]) == 2
    assert "written by a newer trialcut" in capsys.readouterr().err


def test_history_shows_every_id_whole_in_80_columns(tmp_path, monkeypatch):
    out = tmp_path / "out"
    for number, cut in enumerate(("interim-analysis-1", "final-database-lock")):
        record_small_run(out, f"20261202T10301{number}Z-7f3{number}", study="LVT-201-EXTENSION",
                         cut=cut, entry={**ENTRY, "dummy_arms": bool(number)})
    screen = io.StringIO()
    monkeypatch.setattr(commands, "console", Console(file=screen, width=80, highlight=False,
                                                     soft_wrap=True))
    assert main(["history", "--out", str(out)]) == 0
    lines = screen.getvalue().splitlines()
    for run_id in ("20261202T103010Z-7f30", "20261202T103011Z-7f31"):
        assert any(run_id in line for line in lines), screen.getvalue()
    record_lines = [line for line in lines if not line.startswith("Records in")]
    assert max(len(line) for line in record_lines) <= 80, screen.getvalue()
    assert "dummy treatment codes" in screen.getvalue() and "locked plan" in screen.getvalue()


def test_an_unsealed_comparison_from_before_format_2_is_named_as_such(tmp_path, capsys):
    out = tmp_path / "out"
    record_small_run(out, "r1")
    old = out / "S" / "comparisons" / "interim-vs-final"
    old.mkdir(parents=True)
    (old / "comparison.html").write_text("<html></html>\n")
    assert main(["verify", "--out", str(out)]) == 1
    assert "an unsealed comparison (no manifest)" in capsys.readouterr().err
