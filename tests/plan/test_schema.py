"""The JSON Schema for editors agrees with the pydantic schema on real and broken plans.

``jsonschema`` is not installed in this project, so a small checker below covers the
keywords pydantic emits (JSON Schema 2020-12, https://json-schema.org/draft/2020-12:
$ref, type, enum, const, properties, required, additionalProperties, items, prefixItems,
min/maxItems, min/maxLength, pattern, numeric bounds, anyOf, oneOf).  It fails on any
keyword it does not know, so a schema change cannot slip past it unchecked.
"""
from __future__ import annotations

import re

import pytest
import yaml

from trialcut.plan.schema import AnalysisPlan, json_schema
from tests.plan.helpers import BASE_PLAN, DEMO_PLAN, STARTER_PLAN

KNOWN = {"$ref", "$defs", "$schema", "type", "enum", "const", "properties", "required",
         "additionalProperties", "items", "prefixItems", "minItems", "maxItems", "minLength", "maxLength",
         "pattern", "minimum", "maximum", "exclusiveMinimum", "exclusiveMaximum", "anyOf", "oneOf",
         "title", "description", "default", "discriminator"}
TYPES = {"object": dict, "array": list, "string": str, "null": type(None), "boolean": bool}


def violations(schema, value, root, where="$"):
    unknown = set(schema) - KNOWN
    assert not unknown, f"checker does not know {unknown} at {where}"
    if "$ref" in schema:
        target = root
        for part in schema["$ref"].removeprefix("#/").split("/"):
            target = target[part]
        return violations(target, value, root, where)
    for keyword in ("anyOf", "oneOf"):
        if keyword in schema:
            fits = sum(not violations(option, value, root, where) for option in schema[keyword])
            if fits == 0 or (keyword == "oneOf" and fits > 1):
                return [f"{where}: {fits} of the {keyword} options fit"]
    found = _type_violations(schema, value, where)
    if found:
        return found
    return _value_violations(schema, value, where) + _container_violations(schema, value, root, where)


def _type_violations(schema, value, where):
    kind = schema.get("type")
    if kind is None:
        return []
    if kind == "integer":
        ok = isinstance(value, int) and not isinstance(value, bool)
    elif kind == "number":
        ok = isinstance(value, (int, float)) and not isinstance(value, bool)
    else:
        ok = isinstance(value, TYPES[kind])
    return [] if ok else [f"{where}: not {kind}"]


def _value_violations(schema, value, where):
    found = []
    if "enum" in schema and value not in schema["enum"]:
        found.append(f"{where}: not in enum")
    if "const" in schema and value != schema["const"]:
        found.append(f"{where}: not the constant")
    if isinstance(value, str):
        if len(value) < schema.get("minLength", 0) or len(value) > schema.get("maxLength", len(value)):
            found.append(f"{where}: length")
        if "pattern" in schema and not re.search(schema["pattern"], value):
            found.append(f"{where}: pattern")
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        bounds = [("minimum", lambda b: value >= b), ("maximum", lambda b: value <= b),
                  ("exclusiveMinimum", lambda b: value > b), ("exclusiveMaximum", lambda b: value < b)]
        found += [f"{where}: {name}" for name, test in bounds if name in schema and not test(schema[name])]
    return found


def _container_violations(schema, value, root, where):
    found = []
    if isinstance(value, dict):
        properties = schema.get("properties", {})
        found += [f"{where}.{key}: required" for key in schema.get("required", []) if key not in value]
        if schema.get("additionalProperties") is False:
            found += [f"{where}.{key}: not allowed" for key in value if key not in properties]
        for key, item in value.items():
            if key in properties:
                found += violations(properties[key], item, root, f"{where}.{key}")
    if isinstance(value, list):
        if not schema.get("minItems", 0) <= len(value) <= schema.get("maxItems", len(value)):
            found.append(f"{where}: number of items")
        prefix = schema.get("prefixItems", [])
        for index, item in enumerate(value):
            item_schema = prefix[index] if index < len(prefix) else schema.get("items")
            if item_schema is not None:
                found += violations(item_schema, item, root, f"{where}[{index}]")
    return found


@pytest.fixture(scope="module")
def schema():
    return json_schema()


@pytest.mark.parametrize("path", [DEMO_PLAN, STARTER_PLAN, BASE_PLAN], ids=["demo", "starter", "base"])
def test_the_repository_plans_fit_the_json_schema(schema, path):
    data = yaml.safe_load(path.read_text(encoding="utf-8"))
    assert violations(schema, data, schema) == []


@pytest.mark.parametrize("edit, fragment", [
    (lambda d: d["study"].update(colour="red"), "$.study.colour: not allowed"),
    (lambda d: d["arms"].pop("reference"), "$.arms.reference: required"),
    (lambda d: d["endpoints"][0]["analyses"]["primary"]["options"].update(covariance=["unstructred"]),
     "$.endpoints[0].analyses.primary"),
    (lambda d: d.update(seed=-1), "$.seed: minimum"),
    (lambda d: d["populations"][0].update(id="9lives"), "$.populations[0].id: pattern"),
])
def test_the_json_schema_refuses_what_pydantic_refuses(schema, edit, fragment):
    data = yaml.safe_load(DEMO_PLAN.read_text(encoding="utf-8"))
    edit(data)
    with pytest.raises(Exception):
        AnalysisPlan.model_validate(data)
    assert any(v.startswith(fragment) for v in violations(schema, data, schema)), violations(schema, data, schema)


def test_the_json_schema_takes_one_covariance_name_as_the_loader_does(schema):
    data = yaml.safe_load(BASE_PLAN.read_text(encoding="utf-8"))
    data["endpoints"][0]["analyses"]["primary"]["options"]["covariance"] = "ar1"
    assert AnalysisPlan.model_validate(data).endpoints[0].analyses.primary.options.covariance == ("ar1",)
    assert violations(schema, data, schema) == []


def test_the_json_schema_declares_itself(schema):
    assert schema["$schema"] == "https://json-schema.org/draft/2020-12/schema"
    assert schema["additionalProperties"] is False
    assert set(schema["required"]) == {"study", "arms", "visits", "populations", "estimands", "endpoints"}
