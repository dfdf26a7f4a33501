"""The import graph of the package: no cycle, and no arrow from a renderer or the worker pool
into loading targets (renderers only read the report; workers are handed what to load)."""

from __future__ import annotations

import ast
from pathlib import Path

import gradprobe

ROOT = Path(gradprobe.__file__).parent
LOADING = {"gradprobe.targets.loading", "gradprobe.targets.target", "gradprobe.targets.stack", "gradprobe.targets.stack_split"}


def _graph() -> dict[str, set[str]]:
    modules = {}
    for path in ROOT.rglob("*.py"):
        parts = path.relative_to(ROOT.parent).with_suffix("").parts
        name = ".".join(parts[:-1] if parts[-1] == "__init__" else parts)
        modules[name] = path
    graph: dict[str, set[str]] = {m: set() for m in modules}
    for name, path in modules.items():
        package = name if path.name == "__init__.py" else name.rpartition(".")[0]
        for node in ast.walk(ast.parse(path.read_text())):  # deferred imports included
            if isinstance(node, ast.ImportFrom):
                base = package.split(".")[: len(package.split(".")) - node.level + 1] if node.level else []
                module = ".".join(base + ([node.module] if node.module else []))
                for candidate in [module] + [f"{module}.{a.name}" for a in node.names]:
                    if candidate in modules and candidate != name:
                        graph[name].add(candidate)
            elif isinstance(node, ast.Import):
                graph[name] |= {a.name for a in node.names if a.name in modules}
    return graph


def _cycle(graph: dict[str, set[str]]) -> list[str] | None:
    state: dict[str, int] = {}
    path: list[str] = []

    def visit(m: str) -> list[str] | None:
        state[m] = 1
        path.append(m)
        for n in sorted(graph[m]):
            if state.get(n) == 1:
                return path[path.index(n):] + [n]
            if n not in state and (found := visit(n)):
                return found
        state[m] = 2
        path.pop()
        return None

    for m in sorted(graph):
        if m not in state and (found := visit(m)):
            return found
    return None


def test_the_package_has_no_import_cycle():
    assert _cycle(_graph()) is None


def test_the_cycle_finder_finds_one():
    assert _cycle({"a": {"b"}, "b": {"c"}, "c": {"a"}}) == ["a", "b", "c", "a"]


def test_renderers_and_the_worker_pool_do_not_import_loading():
    graph = _graph()
    readers = [m for m in graph if m.startswith("gradprobe.render") or m == "gradprobe.engine.parallel"]
    assert readers and {m: graph[m] & LOADING for m in readers if graph[m] & LOADING} == {}


# The rooms, lowest first: a package imports only packages listed before it (the front doors,
# api, cli, fixture and pytest_plugin, sit above them all).
ROOMS = ("common", "settings", "report", "targets", "hints", "engine", "render")


def _room(module: str) -> str:
    return module.split(".")[1] if module.count(".") else "gradprobe"


def test_each_room_imports_only_the_rooms_below_it():
    graph = _graph()
    upward = sorted(f"{a} -> {b}" for a, targets in graph.items() for b in targets
                    if _room(a) in ROOMS and _room(b) != _room(a)
                    and (_room(b) not in ROOMS or ROOMS.index(_room(b)) > ROOMS.index(_room(a))))
    assert upward == []


def test_the_top_level_holds_only_the_front_doors_and_the_rooms():
    top = {p.stem for p in ROOT.glob("*.py")} | {p.name for p in ROOT.iterdir() if (p / "__init__.py").exists()}
    assert top == {"__init__", "__main__", "api", "cli", "fixture", "pytest_plugin", *ROOMS}
