"""The canonical form of a plan: what its hash, and therefore its lock, are taken over.

The canonical form is the validated plan with every default filled in, as compact JSON with
sorted keys.  Comments, whitespace, key order, quoting and shorthands (``covariance: ar1``
for ``[ar1]``, ``day: 15`` for ``15.0``) do not change it; any change of meaning does, and
so does a change of a default in a later trialcut version (the lock then asks for an
amendment, which is what a reviewer would want).
"""
from __future__ import annotations

import hashlib
import json
from typing import Any

from trialcut.plan.schema import AnalysisPlan


def plan_content(plan: AnalysisPlan) -> dict[str, Any]:
    """The plan as plain JSON data with defaults applied."""
    return plan.model_dump(mode="json")


def canonical_json(content: Any) -> str:
    return json.dumps(content, sort_keys=True, separators=(",", ":"), ensure_ascii=False,
                      allow_nan=False)


def sha256_text(text: str) -> str:
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def canonical_hash(plan: AnalysisPlan) -> str:
    """SHA-256 (hex) of the plan's canonical JSON."""
    return sha256_text(canonical_json(plan_content(plan)))
