"""The code's layout: dependencies point one way and no import cycle exists anywhere.

Every import counts, including those inside functions and under ``TYPE_CHECKING``: a cycle that
only shows up when a function runs is still a cycle. DEVELOPERS.md ("Layout") draws the rooms
and the direction; these tests keep the drawing true.
"""

from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PACKAGES = ("pipeline", "connectors")

# The layers of DEVELOPERS.md, lowest first. A module may import from its own room (its
# sub-package, or its own module) and from any room of a lower layer, never from above.
LAYERS: list[tuple[str, ...]] = [
    (
        "pipeline.errors",
        "pipeline.records",
        "pipeline.hashing",
        "pipeline.units",
        "pipeline.progress",
        "pipeline.locations",
        "pipeline.defaults",
    ),
    ("pipeline.tokens", "pipeline.locking"),
    ("pipeline.formats", "pipeline.chunking", "pipeline.embedding"),
    ("connectors", "pipeline.store"),
    ("pipeline.history", "pipeline.config"),
    ("pipeline.engine", "pipeline.status", "pipeline.retrieval"),
    ("pipeline.index",),
    ("pipeline.verify", "pipeline.console"),
    ("pipeline.service",),
    ("pipeline.cli", "pipeline"),
]


def module_name(path: Path) -> str:
    parts = list(path.relative_to(ROOT).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def all_modules() -> dict[str, Path]:
    return {
        module_name(p): p for package in PACKAGES for p in sorted((ROOT / package).rglob("*.py"))
    }


def import_graph() -> dict[str, set[str]]:
    """module -> the project modules it imports, resolved to the most specific module."""
    modules = all_modules()
    graph: dict[str, set[str]] = {m: set() for m in modules}
    for name, path in modules.items():
        is_package = path.name == "__init__.py"
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            targets: list[str] = []
            if isinstance(node, ast.Import):
                targets = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom):
                if node.level:
                    base = name.split(".")
                    base = base if is_package else base[:-1]
                    base = base[: len(base) - (node.level - 1)]
                    module = ".".join(base + ([node.module] if node.module else []))
                else:
                    module = node.module or ""
                for alias in node.names:
                    sub = f"{module}.{alias.name}"
                    targets.append(sub if sub in modules else module)
            for target in targets:
                if target in modules and target != name:
                    graph[name].add(target)
        # The package facade's lazily imported names are edges too.
        if name == "pipeline":
            for value in _lazy_table(path):
                graph[name].add(value)
    return graph


def _lazy_table(path: Path) -> list[str]:
    tree = ast.parse(path.read_text(encoding="utf-8"))
    for node in tree.body:
        if isinstance(node, ast.AnnAssign | ast.Assign) and isinstance(node.value, ast.Dict):
            return [v.value for v in node.value.values if isinstance(v, ast.Constant)]
    return []


def find_cycle(graph: dict[str, set[str]]) -> list[str] | None:
    """One import cycle as a list of modules (first == last), or None."""
    state: dict[str, int] = {}
    stack: list[str] = []

    def visit(node: str) -> list[str] | None:
        state[node] = 1
        stack.append(node)
        for nxt in sorted(graph[node]):
            if state.get(nxt) == 1:
                return stack[stack.index(nxt) :] + [nxt]
            if nxt not in state and (found := visit(nxt)):
                return found
        stack.pop()
        state[node] = 2
        return None

    for node in sorted(graph):
        if node not in state and (found := visit(node)):
            return found
    return None


def room_of(module: str) -> tuple[int, str]:
    best: tuple[int, str] | None = None
    for layer, rooms in enumerate(LAYERS):
        for room in rooms:
            if module == room or module.startswith(room + "."):
                if best is None or len(room) > len(best[1]):
                    best = (layer, room)
    assert best is not None, f"{module} is in no layer of this test (add it to LAYERS)"
    return best


def test_the_cycle_finder_finds_a_cycle_and_passes_a_tree():
    # A check that cannot fail proves nothing: the finder must see a planted cycle.
    assert find_cycle({"a": {"b"}, "b": {"c"}, "c": {"a"}}) == ["a", "b", "c", "a"]
    assert find_cycle({"a": {"b", "c"}, "b": {"c"}, "c": set()}) is None


def test_no_import_cycle_anywhere():
    cycle = find_cycle(import_graph())
    assert cycle is None, "import cycle: " + " -> ".join(cycle or [])


def test_dependencies_point_down_the_layers():
    wrong = []
    for module, imports in sorted(import_graph().items()):
        layer, room = room_of(module)
        for target in sorted(imports):
            t_layer, t_room = room_of(target)
            if t_room != room and t_layer >= layer:
                wrong.append(f"{module} (layer {layer}) imports {target} (layer {t_layer})")
    assert not wrong, "\n".join(wrong)


@pytest.mark.parametrize(
    "entry", ["connectors.folder", "connectors.http", "pipeline.errors", "pipeline.cli"]
)
def test_any_module_can_be_imported_first(entry):
    # A fresh interpreter per entry point: a cycle through a package's __init__ shows only
    # when that package is not yet loaded.
    done = subprocess.run(
        [sys.executable, "-c", f"import {entry}"], cwd=ROOT, capture_output=True, text=True
    )
    assert done.returncode == 0, done.stderr


def test_the_public_api_is_importable_from_the_package():
    done = subprocess.run(
        [
            sys.executable,
            "-c",
            "import pipeline; from pipeline import Index, Hit, SyncReport, load_config, "
            "UpwellError; print(sorted(pipeline.__all__))",
        ],
        cwd=ROOT,
        capture_output=True,
        text=True,
    )
    assert done.returncode == 0, done.stderr
    assert "Index" in done.stdout and "load_config" in done.stdout


def test_every_logger_is_under_the_upwell_namespace():
    # JSON logging configures the "upwell" logger; a module logging elsewhere would bypass it.
    for name, path in all_modules().items():
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if (
                isinstance(node, ast.Call)
                and isinstance(node.func, ast.Attribute)
                and node.func.attr == "getLogger"
            ):
                arg = node.args[0] if node.args else None
                assert isinstance(arg, ast.Constant) and str(arg.value).startswith("upwell"), (
                    f"{name}: getLogger must name a logger under 'upwell'"
                )


def test_commands_print_only_to_the_streams_they_are_given():
    # A write command may run inside the service for a caller at the other end of the control
    # socket; a bare print() there would land in the service's own stdout.
    bare = []
    for path in sorted((ROOT / "pipeline" / "cli").glob("*.py")):
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.Call) and getattr(node.func, "id", None) in ("print",):
                if not any(k.arg == "file" for k in node.keywords):
                    bare.append(f"{path.name}:{node.lineno}")
            if isinstance(node, ast.Attribute) and node.attr in ("stdout", "stderr"):
                if getattr(node.value, "id", None) == "sys" and path.name not in (
                    "__init__.py",
                    "common.py",
                ):
                    bare.append(f"{path.name}:{node.lineno} sys.{node.attr}")
    assert bare == []
