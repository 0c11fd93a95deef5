"""The JSON Schema of results.json, shipped inside the package."""
from __future__ import annotations

import json
from functools import lru_cache
from importlib import resources
from typing import Any


@lru_cache(maxsize=1)
def results_schema() -> dict[str, Any]:
    text = resources.files("trialcut").joinpath("schemas/results.schema.json").read_text(encoding="utf-8")
    return json.loads(text)
