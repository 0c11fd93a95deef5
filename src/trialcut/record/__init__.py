"""Record layer: sealed folders (runs, comparisons, renderings…), the hash-chained registry,
verification, environment."""
from __future__ import annotations

from trialcut.record.environment import capture_environment
from trialcut.record.manifest import MANIFEST_NAME, parse_manifest, sha256_file, write_manifest
from trialcut.record.registry import (RECORD_KINDS, ChainPosition, RegistryBusy, RegistryRow,
                                     append_run, chain_head, check_writable, find_record,
                                     find_run, list_records, list_runs, verify_chain)
from trialcut.record.runfolder import (list_run_folders, new_run_id, safe_folder_name,
                                       write_run_folder)
from trialcut.record.seal import (RecordedFolder, RecordedRun, find_leftovers, record_folder,
                                  record_run)
from trialcut.record.verify import (VerificationReport, registry_beside, verify_all,
                                    verify_folder, verify_run)

__all__ = [
    "MANIFEST_NAME", "RECORD_KINDS", "ChainPosition", "RecordedFolder", "RecordedRun",
    "RegistryBusy", "RegistryRow", "VerificationReport", "append_run", "capture_environment",
    "chain_head", "check_writable", "find_leftovers", "find_record", "find_run",
    "list_records", "list_run_folders", "list_runs", "new_run_id", "parse_manifest",
    "record_folder", "record_run", "registry_beside", "safe_folder_name", "sha256_file",
    "verify_all", "verify_chain", "verify_folder", "verify_run", "write_manifest",
    "write_run_folder",
]
