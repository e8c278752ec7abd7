"""The shape of the package: stages import only earlier stages, no import loops.

The import graph is read from the source with Python's own parser (``ast``), every import
counted, those inside functions too.  Each module belongs to a stage, the folder it sits in
(DEVELOPERS.md, "Architecture"); the table below lists, for every stage, the stages it may
import.  The command line, the benchmark and the dashboard (``app``) are thin layers: no
part of the library imports them.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "src" / "modemap"

INFRA = {"_exceptions", "_params", "_progress", "_atomic", "_version", "engine"}
#: stage -> the stages (besides itself and the shared infrastructure) it may import
ALLOWED: dict[str, set[str]] = {
    "_exceptions": set(),
    "_version": set(),
    "_progress": {"_exceptions"},
    "_atomic": {"_exceptions"},
    "_params": {"_exceptions"},
    "engine": {"_exceptions"},
    "data": INFRA,
    "terms": INFRA,
    "fit": INFRA | {"terms"},
    "regimes": INFRA | {"data", "terms", "fit"},
    "model": INFRA | {"terms", "fit"},
    "simulation": INFRA | {"data", "terms", "model"},
    "report": INFRA | {"data", "terms", "model"},
    "identify": INFRA | {"data", "terms", "fit", "regimes", "model", "simulation"},
    "demos": INFRA,
    "app": INFRA
    | {"(root)", "data", "terms", "fit", "regimes", "model", "simulation", "report", "identify"},
    # the package's front door: its public names (lazily) and the command-line entry point
    "(root)": INFRA | {"data", "model"},
    "__main__": {"app"},
}


def _module_name(path: Path) -> str:
    parts = list(path.relative_to(PACKAGE.parent).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(parts)


def _graph() -> dict[str, set[str]]:
    modules = {_module_name(p): p for p in PACKAGE.rglob("*.py")}
    graph: dict[str, set[str]] = {m: set() for m in modules}
    for name, path in modules.items():
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            targets: list[str] = []
            if isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
                if node.module.split(".")[0] == "modemap":
                    for alias in node.names:
                        full = f"{node.module}.{alias.name}"
                        targets.append(full if full in modules else node.module)
            elif isinstance(node, ast.Import):
                targets += [a.name for a in node.names if a.name.split(".")[0] == "modemap"]
            graph[name] |= {t for t in targets if t in modules and t != name}
    return graph


def _stage(module: str) -> str:
    parts = module.split(".")
    return parts[1] if len(parts) > 1 else "(root)"


GRAPH = _graph()


def test_the_graph_was_read() -> None:
    # the reader found the stages and their imports (a test that cannot pass on an empty graph)
    assert {_stage(m) for m in GRAPH} >= set(ALLOWED) - {"(root)"}
    assert "modemap.regimes.refine" in GRAPH["modemap.regimes.finder"]


@pytest.mark.parametrize("module", sorted(GRAPH))
def test_each_stage_imports_only_earlier_stages(module: str) -> None:
    stage = _stage(module)
    assert stage in ALLOWED, f"{module}: stage {stage!r} is not in the table"
    wrong = sorted(t for t in GRAPH[module] if _stage(t) not in ALLOWED[stage] | {stage})
    assert not wrong, f"{module} imports {wrong}"


def test_the_library_never_imports_the_app_layer() -> None:
    wrong = sorted(
        f"{m} -> {t}"
        for m, targets in GRAPH.items()
        if _stage(m) not in ("app", "__main__")
        for t in targets
        if _stage(t) == "app"
    )
    assert not wrong


def test_no_import_loops() -> None:
    # depth-first search for a back edge (a cycle of any length)
    colour: dict[str, int] = dict.fromkeys(GRAPH, 0)
    stack: list[str] = []

    def visit(node: str) -> list[str] | None:
        colour[node] = 1
        stack.append(node)
        for nxt in sorted(GRAPH[node]):
            if colour[nxt] == 1:
                return [*stack[stack.index(nxt) :], nxt]
            if colour[nxt] == 0 and (loop := visit(nxt)):
                return loop
        stack.pop()
        colour[node] = 2
        return None

    for start in sorted(GRAPH):
        if colour[start] == 0:
            loop = visit(start)
            assert loop is None, " -> ".join(loop)
