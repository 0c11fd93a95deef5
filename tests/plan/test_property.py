"""Whatever a plan file holds, loading it either succeeds or raises PlanError with located,
readable problems; never another exception (which the command line would report as an
internal fault).  Mutations start from the repository's valid plans."""
from __future__ import annotations

import tempfile
from pathlib import Path
from typing import Any

import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from trialcut.errors import PlanError
from trialcut.plan.load import load_plan
from tests.plan.helpers import BASE_PLAN, DEMO_PLAN

PLANS = [yaml.safe_load(path.read_text(encoding="utf-8")) for path in (BASE_PLAN, DEMO_PLAN)]
TEXTS = [path.read_text(encoding="utf-8") for path in (BASE_PLAN, DEMO_PLAN)]

JUNK = st.one_of(
    st.none(), st.booleans(), st.integers(min_value=-(2**70), max_value=2**70),
    st.floats(allow_nan=True, allow_infinity=True), st.text(max_size=20),
    st.sampled_from(["", "unstructred", "Week 13", "Placbo", "while_on_treatment", "kenward_roger", "ml",
                     "composite", "binary", "1e400", ".nan", "yes", "~"]),
    st.lists(st.integers(), max_size=3), st.dictionaries(st.text(max_size=5), st.integers(), max_size=2),
)


def paths_of(data: Any, prefix=()) -> list[tuple]:
    found = [prefix]
    if isinstance(data, dict):
        for key, value in data.items():
            found += paths_of(value, prefix + (key,))
    elif isinstance(data, list):
        for index, value in enumerate(data):
            found += paths_of(value, prefix + (index,))
    return found


def get(data, path):
    for part in path:
        data = data[part]
    return data


def mutate(data: Any, draw) -> Any:
    paths = [p for p in paths_of(data) if p]
    path = draw(st.sampled_from(paths))
    parent, last = get(data, path[:-1]), path[-1]
    action = draw(st.sampled_from(["delete", "replace", "junk_key", "swap"]))
    if action == "delete":
        del parent[last]
    elif action == "replace":
        parent[last] = draw(JUNK)
    elif action == "junk_key" and isinstance(get(data, path), dict):
        get(data, path)[draw(st.text(min_size=1, max_size=12))] = draw(JUNK)
    elif action == "swap":
        other = draw(st.sampled_from(paths))
        if other[: len(path)] != path and path[: len(other)] != other:     # neither contains the other
            other_parent = get(data, other[:-1])
            parent[last], other_parent[other[-1]] = other_parent[other[-1]], parent[last]
    return data


@st.composite
def mutated_plan_texts(draw) -> str:
    data = yaml.safe_load(yaml.safe_dump(draw(st.sampled_from(PLANS))))     # a deep copy
    for _ in range(draw(st.integers(min_value=1, max_value=4))):
        data = mutate(data, draw)
    return yaml.safe_dump(data, allow_unicode=True, sort_keys=False)


@st.composite
def damaged_texts(draw) -> str:
    text = draw(st.sampled_from(TEXTS))
    position = draw(st.integers(min_value=0, max_value=len(text)))
    junk = draw(st.one_of(st.text(max_size=12), st.sampled_from(["\t", ": ", "- ", "&a ", "*a", "[", "{", "\x00",
                                                                 "!!int ", "<<: ", "\n  - x\n"])))
    cut = draw(st.integers(min_value=0, max_value=10))
    return text[:position] + junk + text[position + cut:]


def assert_only_plan_errors(text: str) -> None:
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "plan.yaml"
        path.write_text(text, encoding="utf-8", errors="surrogatepass")
        try:
            load_plan(path)
        except PlanError as error:
            assert error.problems, "a PlanError must carry its problems"
            rendered = error.render()
            assert "pydantic" not in rendered and "Input should be" not in rendered, rendered
            for problem in error.problems:
                assert problem.file == str(path) and problem.message


SETTINGS = settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])


@SETTINGS
@given(mutated_plan_texts())
def test_mutated_plans_raise_only_plan_errors(text):
    assert_only_plan_errors(text)


@SETTINGS
@given(damaged_texts())
def test_damaged_yaml_raises_only_plan_errors(text):
    assert_only_plan_errors(text)
