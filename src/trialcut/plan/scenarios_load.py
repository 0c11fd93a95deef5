"""Load a scenarios file: the plan loader's YAML machinery (line and column of every key and
value, duplicate keys refused), the scenarios schema, then every name checked against the plan."""
from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterator

from pydantic import ValidationError

from trialcut.errors import PlanError, Problem
from trialcut.plan import load as plan_load
from trialcut.plan.canonical import canonical_hash
from trialcut.plan.scenarios import ScenariosFile
from trialcut.plan.schema import suggestion


class ScenariosError(PlanError):
    """A scenarios file that cannot be simulated (exit 2)."""


@dataclass(frozen=True)
class LoadedScenarios:
    scenarios: ScenariosFile
    path: Path
    text: str
    canonical_hash: str


def scenarios_json_schema() -> dict[str, Any]:
    return ScenariosFile.model_json_schema()


def load_scenarios(path: str | Path, plan) -> LoadedScenarios:
    """Read, parse, validate and check ``path`` against ``plan``; raise listing every problem."""
    path = Path(path)
    file = str(path)
    text = plan_load._read_text(path, file)
    data, source, problems = plan_load._parse(text, file)
    loaded = None
    if isinstance(data, dict) and not problems:
        try:
            loaded = ScenariosFile.model_validate(data)
        except ValidationError as error:
            problems += list(plan_load._problems(error.errors(include_url=False), data, source, file))
            if not problems:
                problems = [Problem(code="scenarios.invalid", message=str(error), file=file)]
    if loaded is not None:
        problems += list(_against_plan(loaded, plan, data, source, file))
    if problems:
        count = len(problems)
        raise ScenariosError(f"{file}: the scenarios file has {count} problem{'s' if count != 1 else ''}",
                             [_renamed(p) for p in problems])
    return LoadedScenarios(scenarios=loaded, path=path, text=text, canonical_hash=canonical_hash(loaded))


def _renamed(problem: Problem) -> Problem:
    """The plan loader's codes and hints speak of a plan; these are a scenarios file's problems."""
    from dataclasses import replace

    code = problem.code.replace("plan.", "scenarios.", 1) if problem.code.startswith("plan.") else problem.code
    hint = problem.hint
    if hint and "every key of a plan" in hint:
        hint = hint.replace("every key of a plan", "every key of a scenarios file")
    return replace(problem, code=code, hint=hint)


def _against_plan(loaded: ScenariosFile, plan, data, source, file) -> Iterator[Problem]:
    arms = list(plan.arms.codes)
    visits = [v.label for v in plan.visits.schedule]
    endpoint = plan.endpoints[0]
    sensitivity = [a.id for a in endpoint.analyses.sensitivity]
    events = [e.id for e in plan.intercurrent_events]

    def problem(path, message, expected=None, got=None, hint=None, code="scenarios.unknown_name"):
        where = source.locate(path, prefer_key=True)
        return Problem(code=code, message=message, file=file, line=where.line if where else None,
                       column=where.column if where else None, field=plan_load.breadcrumb(path, data),
                       expected=expected, got=got, hint=hint)

    def names(mapping, path, allowed, what, complete=False):
        for key in mapping:
            if key not in allowed:
                yield problem(path + (key,), f"{what} {key!r} is not in the plan", _one_of(allowed), repr(key),
                              suggestion(key, allowed) or f"use the plan's {what}s")
        if complete:
            for key in allowed:
                if key not in mapping:
                    yield problem(path, f"{what} {key!r} of the plan is missing here", f"every {what} of the plan",
                                  code="scenarios.incomplete")

    for index, scenario in enumerate(loaded.scenarios):
        base = ("scenarios", index)
        yield from names(scenario.participants_per_arm, base + ("participants_per_arm",), arms, "arm", True)
        yield from names(scenario.mean_change, base + ("mean_change",), arms, "arm", True)
        for arm, by_visit in scenario.mean_change.items():
            yield from names(by_visit, base + ("mean_change", arm), visits, "visit", True)
        yield from names(scenario.sd, base + ("sd",), visits, "visit", True)
        rate_sets = [(("dropout", "rates"), scenario.dropout.rates)] if scenario.dropout else []
        for number, event in enumerate(scenario.intercurrent_events):
            if event.event not in events:
                yield problem(base + ("intercurrent_events", number, "event"),
                              f"intercurrent event {event.event!r} is not in the plan", _one_of(events),
                              repr(event.event), suggestion(event.event, events))
            rate_sets.append((("intercurrent_events", number, "rates"), event.rates))
        for path, rates in rate_sets:
            yield from names(rates, base + path, arms, "arm")
            for arm, by_visit in rates.items():
                yield from names(by_visit, base + path + (arm,), visits, "visit")
        for number, analysis in enumerate(scenario.analyses):
            if analysis not in sensitivity:
                yield problem(base + ("analyses", number), f"analysis {analysis!r} is not a sensitivity analysis "
                              "of the plan's first endpoint", _one_of(sensitivity), repr(analysis),
                              suggestion(analysis, sensitivity))


def _one_of(choices) -> str:
    return "one of " + ", ".join(repr(c) for c in choices) if choices else "none declared"


def schema_text() -> str:
    return json.dumps(scenarios_json_schema(), indent=2) + "\n"
