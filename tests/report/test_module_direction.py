"""The report layer's own modules import each other in one direction (no circle).

Sections build blocks (report/blocks.py); the document assembles them.  A circle between
document.py and the section modules made every new section a change in two places.
"""
import ast
from pathlib import Path

REPORT = Path(__file__).resolve().parents[2] / "src" / "trialcut" / "report"


def _report_imports(path: Path) -> set[str]:
    """Modules of trialcut.report that ``path`` imports, at run time or for type checking alike."""
    found = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.ImportFrom) and node.module and node.module.startswith("trialcut.report"):
            if node.module == "trialcut.report":
                found.update(alias.name for alias in node.names)
            else:
                found.add(node.module.split(".")[2])
        elif isinstance(node, ast.Import):
            found.update(a.name.split(".")[2] for a in node.names if a.name.startswith("trialcut.report."))
    return found


def _graph() -> dict[str, set[str]]:
    modules = {p.stem: p for p in REPORT.glob("*.py") if p.stem != "__init__"}
    return {name: _report_imports(path) & set(modules) - {name} for name, path in modules.items()}


def test_report_modules_form_no_import_circle():
    graph = _graph()
    state: dict[str, str] = {}

    def visit(name: str, trail: list[str]) -> None:
        state[name] = "open"
        for other in sorted(graph[name]):
            assert state.get(other) != "open", "import circle: " + " -> ".join([*trail, name, other])
            if other not in state:
                visit(other, [*trail, name])
        state[name] = "done"

    for name in sorted(graph):
        if name not in state:
            visit(name, [])


def test_section_modules_never_import_the_document():
    graph = _graph()
    for name, imported in graph.items():
        if name.startswith("sections_") or name == "blocks":
            assert not imported & {"document", "render", "compare"}, f"{name} imports {imported}"
