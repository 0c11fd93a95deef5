"""Load an analysis plan from YAML and report every problem with its line and column.

The YAML is composed into nodes (which carry their position in the file) and built into
plain data by hand, so that every key and value keeps its line and column and a key that
appears twice is an error (a YAML parser silently keeps the last one, which in a locked
plan would hide a change).  The data is then validated by the schema; each validation
error becomes one :class:`~trialcut.errors.Problem` with the file, the line and column of
the offending key or value, a breadcrumb that names list items by their id, what was
expected, what was found and, where a near miss is likely, "did you mean ...?".
"""
from __future__ import annotations

import re
import types
import typing
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Iterator, Mapping

import yaml
from pydantic import BaseModel, ValidationError
from yaml.nodes import MappingNode, Node, ScalarNode, SequenceNode

from trialcut.errors import PlanError, Problem
from trialcut.plan.canonical import canonical_hash
from trialcut.plan.schema import (
    ANALYSIS_METHODS,
    AnalysisPlan,
    PlanSections,
    RuleIssue,
    cross_reference_issues,
    suggestion,
)

PathKey = tuple[str | int, ...]

# A composed plan never needs more nodes than this; aliases that expand beyond it are an
# attack or an accident ("billion laughs"), not an analysis plan.
MAX_NODES = 100_000
# A plan is a few kilobytes (the starter plan, fully commented, 13 kB); a file of more than
# this is not a plan (composing a 50 MB YAML file took two minutes before any message; a
# file at this limit is read in about a second).
MAX_PLAN_BYTES = 256 << 10
# The YAML tags a plan may carry, explicitly or implicitly (YAML 1.1 core types); any other
# tag ('!thing', '!!python/object', '!!set', '!!binary') would change what a value means.
_STANDARD = "tag:yaml.org,2002:"
ALLOWED_TAGS = {
    "scalar": {_STANDARD + name for name in ("str", "int", "float", "bool", "null", "timestamp")},
    "mapping": {_STANDARD + "map"},
    "sequence": {_STANDARD + "seq"},
}


@dataclass(frozen=True)
class Position:
    line: int      # 1-based
    column: int    # 1-based


@dataclass(frozen=True)
class SourceMap:
    """Where each part of the plan is written: per path, the key and the value."""

    keys: Mapping[PathKey, Position]
    values: Mapping[PathKey, Position]
    scalars: Mapping[PathKey, str]      # the value as typed, e.g. "1.0" for a quoted-less 1.0

    def locate(self, path: PathKey, prefer_key: bool = False) -> Position | None:
        """The position of ``path``, else of its nearest ancestor that is written."""
        for length in range(len(path), -1, -1):
            prefix = path[:length]
            first, second = (self.keys, self.values) if prefer_key else (self.values, self.keys)
            found = first.get(prefix) or second.get(prefix)
            if found is not None:
                return found
        return None


@dataclass(frozen=True)
class LoadedPlan:
    plan: AnalysisPlan
    path: Path
    text: str
    canonical_hash: str
    positions: Mapping[str, tuple[int, int]] = field(compare=False, repr=False)
    """Breadcrumb (e.g. ``endpoints[fbs_change].primary_visit``) -> (line, column) of its key,
    or of the item for list items; for data-layer messages that point back into the plan."""

    def position(self, breadcrumb: str) -> tuple[int, int] | None:
        return self.positions.get(breadcrumb)


# --------------------------------------------------------------------------- entry point
def load_plan(path: str | Path) -> LoadedPlan:
    """Read, parse and validate a plan file; raise :class:`PlanError` listing every problem."""
    path = Path(path)
    file = str(path)
    text = _read_text(path, file)
    data, source, problems = _parse(text, file)
    plan = None
    if isinstance(data, dict):      # duplicate keys do not stop the schema check
        plan, schema_problems = _validate(data, source, file)
        problems = problems + schema_problems
    if problems:
        count = len(problems)
        raise PlanError(f"{file}: the analysis plan has {count} problem{'s' if count != 1 else ''}",
                        _sorted(problems))
    assert plan is not None
    return LoadedPlan(plan=plan, path=path, text=text, canonical_hash=canonical_hash(plan),
                      positions=_breadcrumb_positions(data, source))


def _sorted(problems: list[Problem]) -> list[Problem]:
    unique = list(dict.fromkeys(problems))
    return sorted(unique, key=lambda p: (p.line or 0, p.column or 0))


def _read_text(path: Path, file: str) -> str:
    try:
        size = path.stat().st_size
        if size > MAX_PLAN_BYTES and path.is_file():
            raise PlanError(f"{file}: this file is too large to be an analysis plan", [Problem(
                code="plan.too_large", message="the plan file is larger than a plan can be", file=file,
                expected=f"at most {MAX_PLAN_BYTES // 1024} kB", got=f"{size / 1024:.0f} kB",
                hint="check that this is the plan file (a plan is a few kilobytes of YAML)")])
        raw = path.read_bytes()
    except OSError as error:
        raise PlanError(f"{file}: cannot read the analysis plan", [Problem(
            code="plan.unreadable", message="cannot read the plan file", file=file,
            got=error.strerror or type(error).__name__, hint="check the path and the file's permissions")])
    try:
        return raw.decode("utf-8-sig")
    except UnicodeDecodeError as error:
        line = raw[:error.start].count(b"\n") + 1
        column = error.start - (raw.rfind(b"\n", 0, error.start) + 1) + 1
        raise PlanError(f"{file}: the analysis plan is not UTF-8 text", [Problem(
            code="plan.encoding", message="the plan file is not UTF-8 text", file=file, line=line,
            column=column, expected="UTF-8", got=f"byte 0x{raw[error.start]:02x}",
            hint="save the file as UTF-8")])


# --------------------------------------------------------------------------- YAML with positions
def _position(mark) -> Position:
    return Position(mark.line + 1, mark.column + 1)


class _Builder:
    """Turns composed YAML nodes into plain data, recording positions and duplicate keys."""

    def __init__(self, loader: yaml.SafeLoader, file: str):
        self.loader = loader
        self.file = file
        self.keys: dict[PathKey, Position] = {}
        self.values: dict[PathKey, Position] = {}
        self.scalars: dict[PathKey, str] = {}
        self.problems: list[Problem] = []
        self.duplicates: list[tuple[int, PathKey]] = []     # (problem index, path): named once built
        self.count = 0

    def build(self, node: Node, path: PathKey, active: frozenset[int]) -> Any:
        self.count += 1
        if self.count > MAX_NODES:
            raise _TooLarge()
        if path not in self.values:
            self.values[path] = _position(node.start_mark)
        if not self._tag_allowed(node):
            return None
        if id(node) in active:
            self._problem(node, "plan.recursive_alias", "an alias refers to a mapping or list that contains it",
                          hint="replace the alias (*name) by the values it stands for")
            return None
        if isinstance(node, MappingNode):
            return self._mapping(node, path, active | {id(node)})
        if isinstance(node, SequenceNode):
            return [self.build(item, path + (index,), active | {id(node)})
                    for index, item in enumerate(node.value)]
        self.scalars[path] = node.value
        return self.loader.construct_object(node, deep=True)

    def _tag_allowed(self, node: Node) -> bool:
        kind = "mapping" if isinstance(node, MappingNode) else "sequence" if isinstance(node, SequenceNode) \
            else "scalar"
        if node.tag in ALLOWED_TAGS[kind]:
            return True
        self._problem(node, "plan.yaml_tag", f"the YAML tag {node.tag!r} is not allowed in a plan",
                      expected=f"a plain {kind} without a '!' tag", got=repr(node.tag),
                      hint="remove the tag; plans use plain YAML values only")
        return False

    def _mapping(self, node: MappingNode, path: PathKey, active: frozenset[int]) -> dict[str, Any]:
        self.loader.flatten_mapping(node)      # resolves '<<' merge keys
        result: dict[str, Any] = {}
        first_seen: dict[str, Position] = {}
        for key_node, value_node in node.value:
            if not isinstance(key_node, ScalarNode):
                self._problem(key_node, "plan.complex_key", "a key must be a plain word",
                              got="a list or mapping used as a key")
                continue
            if not self._tag_allowed(key_node):
                continue
            key = key_node.value   # the key as written: 'yes' stays 'yes', '1' stays '1'
            where = _position(key_node.start_mark)
            if key in first_seen:
                earlier = first_seen[key]
                self.duplicates.append((len(self.problems), path + (key,)))
                self._problem(key_node, "plan.duplicate_key", f"key {key!r} appears twice in the same mapping",
                              got=f"a second {key!r}",
                              expected=f"one {key!r} (the first is at line {earlier.line})",
                              hint="YAML would silently keep only the last one; delete one of them")
            first_seen[key] = where
            self.keys[path + (key,)] = where
            result[key] = self.build(value_node, path + (key,), active)
        return result

    def _problem(self, node: Node, code: str, message: str, **details: Any) -> None:
        where = _position(node.start_mark)
        self.problems.append(Problem(code=code, message=message, file=self.file,
                                     line=where.line, column=where.column, **details))


class _TooLarge(Exception):
    pass


def _parse(text: str, file: str) -> tuple[Any, SourceMap, list[Problem]]:
    empty = SourceMap({}, {}, {})
    loader = None
    try:
        loader = yaml.SafeLoader(text)      # checks for forbidden characters already
        builder = _Builder(loader, file)
        node = loader.get_single_node()
        if node is None:
            return None, empty, [Problem(
                code="plan.empty", message="the plan file is empty", file=file, line=1, column=1,
                expected="a mapping of sections (study:, arms:, visits:, ...)", got="nothing",
                hint="start from analysis_plans/starter.yaml")]
        data = builder.build(node, (), frozenset())
    except yaml.MarkedYAMLError as error:
        return None, empty, [_yaml_problem(error, file)]
    except yaml.reader.ReaderError as error:
        return None, empty, [_reader_problem(error, text, file)]
    except yaml.YAMLError as error:
        return None, empty, [Problem(code="plan.yaml", message=f"the file is not valid YAML: {error}", file=file)]
    except RecursionError:
        return None, empty, [Problem(
            code="plan.too_deep", message="the YAML is nested too deeply to be a plan",
            file=file, hint="a plan nests a few levels (section, item, options); write it out plainly")]
    except _TooLarge:
        return None, empty, [Problem(
            code="plan.too_large", message=f"the plan holds more than {MAX_NODES:,} values once its aliases "
            "are expanded", file=file, expected=f"at most {MAX_NODES:,} keys, items and values",
            hint="a plan declares a few dozen visits and analyses; remove the long lists or the chains of aliases")]
    finally:
        if loader is not None:
            loader.dispose()
    source = SourceMap(builder.keys, builder.values, builder.scalars)
    problems = list(builder.problems)
    for index, path in builder.duplicates:
        problems[index] = replace(problems[index], field=breadcrumb(path, data))
    if not problems and not isinstance(data, dict):
        problems.append(Problem(
            code="plan.not_a_mapping", message="the plan must be a mapping of sections", file=file,
            line=1, column=1, expected="keys such as study:, arms:, visits:, endpoints:", got=_kind(data),
            hint="start from analysis_plans/starter.yaml"))
    return data, source, problems


def _yaml_problem(error: yaml.MarkedYAMLError, file: str) -> Problem:
    mark = error.problem_mark or error.context_mark
    reason = error.problem or "the file is not valid YAML"
    hint = None
    if "\t" in reason or "'\\t'" in reason:
        hint = "indent with spaces; YAML does not allow tab characters for indentation"
    elif "expected a single document" in str(error):
        hint = "a plan is one YAML document: remove the extra '---' separator"
    elif "could not determine a constructor" in str(error):
        hint = "remove the '!' tag; plans use plain YAML values only"
    else:
        hint = "check the indentation and the quoting on this line and the one above"
    context = f" ({error.context})" if error.context else ""
    return Problem(code="plan.yaml_syntax", message=f"YAML syntax error: {reason}{context}", file=file,
                   line=mark.line + 1 if mark else None, column=mark.column + 1 if mark else None, hint=hint)


def _reader_problem(error: yaml.reader.ReaderError, text: str, file: str) -> Problem:
    before = text[:error.position]
    line = before.count("\n") + 1
    column = error.position - (before.rfind("\n") + 1) + 1
    return Problem(code="plan.yaml_character", message="the file contains a character YAML does not allow",
                   file=file, line=line, column=column, got=_character(error.character),
                   hint="remove the control character")


def _character(character: Any) -> str | None:
    if isinstance(character, int):
        return f"character U+{character:04X}"
    if isinstance(character, str) and character:
        return f"character U+{ord(character[0]):04X}"
    return None


# --------------------------------------------------------------------------- validation
def _validate(data: Any, source: SourceMap, file: str) -> tuple[AnalysisPlan | None, list[Problem]]:
    try:
        return AnalysisPlan.model_validate(data), []
    except ValidationError as error:
        errors = error.errors(include_url=False)
    problems = list(_problems(errors, data, source, file))
    if not any(error["type"] == "plan_rule" and error["loc"] == () for error in errors):
        # The plan-wide rules never ran; run those whose sections did validate.
        problems += [_rule_problem(issue, (), data, source, file)
                     for issue in cross_reference_issues(PlanSections.from_raw(data))]
    if not problems:    # never swallow an error, even one we have no wording for
        problems = [Problem(code="plan.invalid", message=str(errors[0].get("msg")), file=file)]
    return None, problems


def _problems(errors: list[dict[str, Any]], data: Any, source: SourceMap, file: str) -> Iterator[Problem]:
    union_parts: dict[PathKey, list[dict[str, Any]]] = {}
    for error in errors:
        path, through_union = _clean_path(error["loc"], data, error["type"])
        if error["type"] == "plan_rule":
            for issue in error["ctx"]["issues"]:
                yield _rule_problem(issue, path, data, source, file)
        elif through_union and error["type"] not in ("missing", "extra_forbidden"):
            union_parts.setdefault(path, []).append(error)
        else:
            problem = _schema_problem(error, path, data, source, file)
            if problem is not None:
                yield problem
    for path, parts in union_parts.items():
        yield _union_problem(parts, path, data, source, file)


def _clean_path(loc: tuple[Any, ...], data: Any, error_type: str) -> tuple[PathKey, bool]:
    """Pydantic's location minus the tags it adds for unions (e.g. the 'mmrm' of a
    discriminated analysis), so the path follows the YAML; also says whether a tag was dropped."""
    path: list[str | int] = []
    node, dropped = data, False
    for index, element in enumerate(loc):
        is_last = index == len(loc) - 1
        if isinstance(node, dict) and element in ANALYSIS_METHODS and node.get("method") == element:
            continue    # the discriminator's tag: the YAML has no such level
        elif isinstance(node, dict) and element in node:
            path.append(element)
            node = node[element]
        elif isinstance(node, list) and isinstance(element, int) and 0 <= element < len(node):
            path.append(element)
            node = node[element]
        elif is_last and error_type == "missing":
            path.append(element)
        else:
            dropped = True
    return tuple(path), dropped


def _rule_problem(issue: RuleIssue, base: PathKey, data: Any, source: SourceMap, file: str) -> Problem:
    path = base + issue.path
    where = source.locate(path)
    return Problem(code=issue.code, message=issue.message, file=file,
                   line=where.line if where else None, column=where.column if where else None,
                   field=breadcrumb(path, data), expected=issue.expected, got=issue.got, hint=issue.hint)


def _schema_problem(error: dict[str, Any], path: PathKey, data: Any, source: SourceMap,
                    file: str) -> Problem | None:
    kind = error["type"]
    if kind == "too_short" and _long_enough(error):
        return None    # the items themselves failed and are reported one by one
    if kind == "union_tag_invalid" or kind == "union_tag_not_found":
        path = path + ("method",)
    wording = _wording(kind, error, path, data, source)
    if kind == "missing" and path and isinstance(path[-1], int):
        path = path[:-1]
        kind = "too_few"
    if wording is None:
        message = str(error.get("msg", "invalid value")).removeprefix("Value error, ")
        wording = ("plan.invalid", message, None, _describe(error.get("input"), source.scalars.get(path)), None)
    code, message, expected, got, hint = wording
    where = source.locate(path if kind != "missing" else path[:-1], prefer_key=kind in ("extra_forbidden", "missing"))
    return Problem(code=code, message=message, file=file, line=where.line if where else None,
                   column=where.column if where else None, field=breadcrumb(path, data) or None,
                   expected=expected, got=got, hint=hint)


def _long_enough(error: dict[str, Any]) -> bool:
    value, minimum = error.get("input"), (error.get("ctx") or {}).get("min_length")
    return isinstance(value, (list, tuple)) and minimum is not None and len(value) >= minimum


_TYPE_WORDS = {
    "string_type": "text", "int_type": "a whole number", "int_parsing": "a whole number",
    "int_from_float": "a whole number", "float_type": "a number", "float_parsing": "a number",
    "finite_number": "a finite number", "bool_type": "true or false", "bool_parsing": "true or false",
    "tuple_type": "a list", "list_type": "a list", "model_type": "a mapping (key: value lines)",
    "model_attributes_type": "a mapping (key: value lines)", "dict_type": "a mapping (key: value lines)",
}

_IDENTIFIER = "an identifier: a letter, then letters, digits or '_' (at most 64 characters)"


def _wording(kind: str, error: dict[str, Any], path: PathKey, data: Any, source: SourceMap):
    """(code, message, expected, got, hint) for a pydantic error type, or None if unknown."""
    value, ctx = error.get("input"), error.get("ctx") or {}
    raw = source.scalars.get(path)
    got = _describe(value, raw)
    name = _field_name(path)
    if kind == "missing" and path and isinstance(path[-1], int):     # a fixed-length list, too short
        return ("plan.too_few", f"{_field_name(path[:-1])!r} has too few items", f"{path[-1] + 1} items",
                _count(_child_at(data, path[:-1])), None)
    if kind == "missing":
        return ("plan.missing_key", f"required key {name!r} is missing", f"a value for {name!r}", None, None)
    if kind == "extra_forbidden":
        allowed = _allowed_keys(path[:-1], data)
        return ("plan.unknown_key", f"unknown key {name!r}", _one_of(allowed) if allowed else None, repr(name),
                suggestion(name, allowed) or "remove it; every key of a plan has a meaning")
    if kind in ("literal_error", "enum", "union_tag_invalid"):
        choices = re.findall(r"'([^']*)'", str(ctx.get("expected") or ctx.get("expected_tags") or ""))
        if kind == "union_tag_invalid":
            value, raw = ctx.get("tag"), source.scalars.get(path)
            got = _describe(value, raw)
        return ("plan.not_allowed", f"{name!r} is not one of the allowed values", _one_of(choices), got,
                _choice_hint(value, raw, choices))
    if kind == "union_tag_not_found":
        return ("plan.missing_key", "required key 'method' is missing", _one_of(ANALYSIS_METHODS), None, None)
    if kind in _TYPE_WORDS:
        return ("plan.wrong_type", f"{name!r} has the wrong type", _TYPE_WORDS[kind], got,
                _type_hint(kind, value, raw))
    return _bounds_wording(kind, ctx, name, value, got)


def _bounds_wording(kind: str, ctx: dict[str, Any], name: str, value: Any, got: str | None):
    bounds = {"greater_than": ("more than", "gt"), "greater_than_equal": ("at least", "ge"),
              "less_than": ("less than", "lt"), "less_than_equal": ("at most", "le")}
    if kind in bounds:
        words, key = bounds[kind]
        return ("plan.out_of_range", f"{name!r} is out of range", f"a number {words} {ctx.get(key)}", got, None)
    if kind == "too_short":
        return ("plan.too_few", f"{name!r} has too few items", f"at least {ctx.get('min_length')} item(s)",
                f"{ctx.get('actual_length')} item(s)", None)
    if kind == "too_long":
        return ("plan.too_many", f"{name!r} has too many items", f"at most {ctx.get('max_length')} item(s)",
                f"{ctx.get('actual_length')} item(s)", None)
    if kind == "string_too_short":
        return ("plan.empty_text", f"{name!r} is empty", "some text", "empty text", None)
    if kind == "string_too_long":
        return ("plan.text_too_long", f"{name!r} is too long", f"at most {ctx.get('max_length')} characters",
                f"{len(value)} characters" if isinstance(value, str) else got, None)
    if kind == "string_pattern_mismatch":
        cleaned = re.sub(r"[^A-Za-z0-9_]+", "_", str(value)).strip("_")
        hint = f"e.g. {cleaned!r}" if cleaned and cleaned[0].isalpha() else None
        return ("plan.bad_identifier", f"{name!r} is not a valid identifier", _IDENTIFIER, got, hint)
    return None


def _union_problem(parts: list[dict[str, Any]], path: PathKey, data: Any, source: SourceMap,
                   file: str) -> Problem:
    expected: list[str] = []
    for part in parts:
        wording = _wording(part["type"], part, path, data, source)
        if wording and wording[2] and wording[2] not in expected:
            expected.append(wording[2])
    where = source.locate(path)
    name = _field_name(path)
    return Problem(code="plan.wrong_type", message=f"{name!r} does not have an allowed form", file=file,
                   line=where.line if where else None, column=where.column if where else None,
                   field=breadcrumb(path, data) or None, expected=" or ".join(expected) or None,
                   got=_describe(parts[0].get("input"), source.scalars.get(path)))


# --------------------------------------------------------------------------- wording helpers
def _one_of(choices) -> str:
    return "one of " + ", ".join(str(c) for c in choices)


def _field_name(path: PathKey) -> str:
    if path and isinstance(path[-1], int):
        return f"item {path[-1] + 1} of {_field_name(path[:-1])}"
    return str(path[-1]) if path else "plan"


def _kind(value: Any) -> str:
    if value is None:
        return "nothing"
    if isinstance(value, dict):
        return "a mapping"
    if isinstance(value, list):
        return "a list"
    return f"a single value ({value!r})"[:80]


def _describe(value: Any, raw: str | None) -> str | None:
    if value is None:
        return "nothing (an empty value)"
    if isinstance(value, bool):
        return f"{raw or str(value).lower()} (true/false)"
    if isinstance(value, (dict, list)):
        return _kind(value)
    if isinstance(value, str):
        return _shorten(repr(value))
    return _shorten(raw if raw is not None else repr(value))


def _count(value: Any) -> str:
    return f"{len(value)} item{'s' if len(value) != 1 else ''}" if isinstance(value, list) else _kind(value)


def _shorten(text: str, limit: int = 80) -> str:
    return text if len(text) <= limit else text[: limit - 1] + "…"


def _choice_hint(value: Any, raw: str | None, choices: list[str]) -> str | None:
    if not isinstance(value, str) and raw in choices:
        return f'put it in quotes: "{raw}"'
    return suggestion(value, choices)


def _type_hint(kind: str, value: Any, raw: str | None) -> str | None:
    if raw is not None and raw.lower() in ("yes", "no", "on", "off", "true", "false", "y", "n"):
        return f"YAML reads {raw} as true/false; write a number here"
    if kind == "string_type" and raw is not None and not isinstance(value, (dict, list)):
        return f'put it in quotes: "{raw}"'
    if kind in ("tuple_type", "list_type") and isinstance(value, (str, int, float)):
        return f"write a list, e.g. [{raw or value}]"
    return None


# --------------------------------------------------------------------------- paths
def breadcrumb(path: PathKey, data: Any) -> str:
    """``endpoints[fbs_change].analyses.primary.options.covariance[0]``: list items that
    have an id (or a code, label or event) are named by it, others by position."""
    text, node = "", data
    for element in path:
        if isinstance(element, int):
            item = node[element] if isinstance(node, list) and 0 <= element < len(node) else None
            text += f"[{item_name(item) or element}]"
            node = item
        else:
            text += f".{element}" if text else str(element)
            node = node.get(element) if isinstance(node, dict) else None
    return text


def item_name(item: Any) -> str | None:
    if not isinstance(item, dict):
        return None
    for key in ("id", "code", "label", "event"):
        value = item.get(key)
        if isinstance(value, str) and 0 < len(value) <= 40 and not any(c in value for c in "[]\n"):
            return value
    return None


def _allowed_keys(path: PathKey, data: Any) -> list[str]:
    model = _model_at(path, data)
    return list(model.model_fields) if model is not None else []


def _model_at(path: PathKey, data: Any) -> type[BaseModel] | None:
    """The schema model that describes the mapping at ``path`` (None if there is none)."""
    annotation: Any = AnalysisPlan
    node = data
    for element in path:
        model = _as_model(annotation, node)
        if model is not None:
            field_info = model.model_fields.get(element) if isinstance(element, str) else None
            if field_info is None:
                return None
            annotation = field_info.annotation
        else:
            annotation = _item_type(annotation)
            if annotation is None:
                return None
        node = _child(node, element)
    return _as_model(annotation, node)


def _child_at(data: Any, path: PathKey) -> Any:
    for element in path:
        data = _child(data, element)
    return data


def _child(node: Any, element: str | int) -> Any:
    if isinstance(node, dict):
        return node.get(element)
    if isinstance(node, list) and isinstance(element, int) and 0 <= element < len(node):
        return node[element]
    return None


def _members(annotation: Any) -> list[Any]:
    origin = typing.get_origin(annotation)
    if origin is typing.Annotated:
        return _members(typing.get_args(annotation)[0])
    if origin is typing.Union or origin is types.UnionType:
        return [m for arg in typing.get_args(annotation) for m in _members(arg)]
    return [annotation]


def _as_model(annotation: Any, node: Any) -> type[BaseModel] | None:
    models = [m for m in _members(annotation) if isinstance(m, type) and issubclass(m, BaseModel)]
    if isinstance(node, dict) and node.get("method") in ANALYSIS_METHODS:
        chosen = ANALYSIS_METHODS[node["method"]]
        if chosen in models:
            return chosen
    return models[0] if models else None


def _item_type(annotation: Any) -> Any:
    for member in _members(annotation):
        if typing.get_origin(member) is tuple:
            return typing.get_args(member)[0]
    return None


def _breadcrumb_positions(data: Any, source: SourceMap) -> dict[str, tuple[int, int]]:
    positions: dict[str, tuple[int, int]] = {}
    for path, where in source.values.items():
        if not path:
            continue
        key = source.keys.get(path, where)
        positions[breadcrumb(path, data)] = (key.line, key.column)
    return positions
