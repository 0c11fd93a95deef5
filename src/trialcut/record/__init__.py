"""Record layer: atomic run folders, the hash-chained registry, verification, environment."""
from __future__ import annotations

from trialcut.record.environment import capture_environment
from trialcut.record.manifest import MANIFEST_NAME, parse_manifest, sha256_file, write_manifest
from trialcut.record.registry import (RecordedRun, RegistryRow, append_run, find_run, list_runs,
                                     record_run, verify_chain)
from trialcut.record.runfolder import (list_run_folders, new_run_id, safe_folder_name,
                                       write_run_folder)
from trialcut.record.verify import VerificationReport, verify_all, verify_run

__all__ = [
    "MANIFEST_NAME", "RecordedRun", "RegistryRow", "VerificationReport", "append_run",
    "capture_environment", "find_run", "list_run_folders", "list_runs", "new_run_id",
    "parse_manifest", "record_run", "safe_folder_name", "sha256_file", "verify_all",
    "verify_chain", "verify_run", "write_manifest", "write_run_folder",
]
