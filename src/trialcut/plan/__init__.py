"""The analysis plan: its schema, loading with located errors, canonical hash and locks."""
from trialcut.plan.canonical import canonical_hash, canonical_json, plan_content
from trialcut.plan.load import LoadedPlan, load_plan
from trialcut.plan.lock import LockRecord, LockStatus, check_lock, lock_file_for, lock_plan, read_chain
from trialcut.plan.schema import AnalysisPlan, json_schema

__all__ = [
    "AnalysisPlan", "LoadedPlan", "LockRecord", "LockStatus", "canonical_hash", "canonical_json",
    "check_lock", "json_schema", "load_plan", "lock_file_for", "lock_plan", "plan_content", "read_chain",
]
