"""The layers import only downwards (DEVELOPERS.md): checked by parsing every module's imports."""
import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "src" / "trialcut"
ORDER = ["errors", "stats", "plan", "data", "run", "report", "record", "cli"]
# Top-level modules that belong to the command-line layer.
CLI_MODULES = {"cli", "commands", "__init__", "__main__"}
# Leaves beside errors.py, importable from every layer (the standard library only).
LEAVES = {"forking"}


def _layer(module: str) -> str | None:
    parts = module.split(".")
    if parts[0] != "trialcut":
        return None
    if len(parts) == 1 or parts[1] in LEAVES:
        return "errors"  # the package root only carries __version__ and a lazy fit_mmrm
    name = parts[1]
    # One module per newer subcommand (commands_*.py) and the demo's helpers sit with the cli.
    if name in CLI_MODULES or name.startswith(("commands_", "demo_")):
        return "cli"
    return name if name in ORDER else None


def _imports(path: Path):
    tree = ast.parse(path.read_text(encoding="utf-8"))
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            yield from (alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            yield node.module


MODULES = sorted(PACKAGE.rglob("*.py"))


@pytest.mark.parametrize("path", MODULES, ids=[str(p.relative_to(PACKAGE)) for p in MODULES])
def test_imports_go_only_downwards(path):
    module = "trialcut." + ".".join(path.relative_to(PACKAGE).with_suffix("").parts)
    own = _layer(module)
    for imported in _imports(path):
        other = _layer(imported)
        if other is None or own is None or other == "errors":
            continue
        assert ORDER.index(other) <= ORDER.index(own), f"{module} ({own}) imports {imported} ({other})"


def test_statistics_layer_reads_no_plan_and_no_file():
    # DESIGN.md: the statistics layer knows numpy, scipy, pandas and statsmodels only.
    forbidden = {"yaml", "pydantic", "jinja2", "weasyprint", "matplotlib", "sqlite3", "pathlib", "pyarrow",
                 "rich", "json", "io", "shutil", "tempfile", "dask"}
    for path in (PACKAGE / "stats").rglob("*.py"):
        for imported in _imports(path):
            assert imported.split(".")[0] not in forbidden, f"{path.name} imports {imported}"
