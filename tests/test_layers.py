"""The package's import graph: layers in one order, no circles, a torch-free library.

The layer order is written down here and in DEVELOPERS.md ("Layers"). A module may import from its own layer
or any layer below it, never from one above. Imports inside functions count, and so do the modules named in
strings that are imported dynamically (the sub-command table, the bench targets, the baseline families).
"""
from __future__ import annotations

import ast
from collections import defaultdict
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
FOLDERS = {"inference": "grainwright.inference", "models": "grainwright.models", "trainer": "grainwright.trainer",
           "benchmarks": "grainwright.benchmarks", "console": "grainwright.console",
           "configs": "grainwright.configs"}

# Ground floor first. The first seven are the torch-free library a plant machine installs.
LAYERS = [
    "grainwright.inference.common",
    "grainwright.inference.images",
    "grainwright.inference.noise",
    "grainwright.inference.synthetic",
    "grainwright.inference.runtime",
    "grainwright.inference.baselines",
    "grainwright.inference.evaluation",
    "grainwright.models",
    "grainwright.trainer",
    "grainwright.benchmarks",
    "grainwright.console",
]
LIBRARY = LAYERS[:7]
TORCH_HALF = ("grainwright.models", "grainwright.trainer")


def _modules() -> dict[str, Path]:
    found = {}
    for folder, package in FOLDERS.items():
        for path in (ROOT / folder).rglob("*.py"):
            parts = [p for p in path.relative_to(ROOT / folder).with_suffix("").parts if p != "__init__"]
            found[".".join([package, *parts])] = path
    return found


MODULES = _modules()


def _resolve(name: str) -> str | None:
    """The project module that an imported dotted name lands in (a name inside a module -> the module)."""
    while name:
        if name in MODULES:
            return name
        name = name.rpartition(".")[0]
    return None


def _imports(module: str, path: Path) -> set[str]:
    targets: set[str] = set()
    prefixes: list[str] = []
    tree = ast.parse(path.read_text(), filename=str(path))
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            targets.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module:
            base = node.module
            if node.level:  # relative import
                base = ".".join(module.split(".")[: -node.level] + [node.module])
            targets.add(base)
            targets.update(f"{base}.{alias.name}" for alias in node.names)
        elif isinstance(node, ast.Constant) and isinstance(node.value, str) and node.value.startswith("grainwright."):
            targets.add(node.value)  # dynamic imports: sub-command and bench tables
        elif isinstance(node, ast.JoinedStr):  # f"grainwright.inference.baselines.{family}"
            head = node.values[0] if node.values else None
            if isinstance(head, ast.Constant) and str(head.value).startswith("grainwright."):
                prefixes.append(str(head.value))
    # an f-string prefix is completed by the module's own tables of names (FAMILIES = ("local", ...))
    names = {n.value for n in ast.walk(tree) if isinstance(n, ast.Constant) and isinstance(n.value, str)}
    targets.update(prefix + name for prefix in prefixes for name in names if prefix + name in MODULES)
    return targets


def _graph() -> dict[str, set[str]]:
    graph: dict[str, set[str]] = defaultdict(set)
    for module, path in MODULES.items():
        for target in _imports(module, path):
            if target.split(".")[0] == "torch" and module.startswith("grainwright.inference"):
                graph[module].add("torch")
            resolved = _resolve(target)
            if resolved and resolved != module:
                graph[module].add(resolved)
    return graph


def _layer(module: str) -> int:
    for index, layer in enumerate(LAYERS):
        if module == layer or module.startswith(layer + "."):
            return index
    return -1  # package roots (grainwright.inference itself) and configs: the ground


def test_every_module_has_a_layer():
    loose = [m for m in MODULES if _layer(m) < 0 and m not in ("grainwright.inference", "grainwright.configs")]
    assert not loose, f"modules outside every layer: {loose}"


def test_no_import_goes_upwards():
    upward = [f"{m} -> {t}" for m, targets in _graph().items() for t in targets
              if t != "torch" and _layer(t) > _layer(m)]
    assert not upward, "imports from a higher layer:\n" + "\n".join(sorted(upward))


def test_library_never_imports_torch_or_the_torch_half():
    bad = [f"{m} -> {t}" for m, targets in _graph().items() if _layer(m) < len(LIBRARY) for t in targets
           if t == "torch" or t.startswith(TORCH_HALF)]
    assert not bad, "the torch-free library reaches torch:\n" + "\n".join(sorted(bad))


def test_no_import_circles():
    graph = _graph()
    state: dict[str, int] = {}
    circles: list[str] = []

    def visit(node: str, trail: list[str]) -> None:
        state[node] = 1
        for nxt in sorted(graph.get(node, ())):
            if nxt == "torch":
                continue
            if state.get(nxt) == 1:
                circles.append(" -> ".join(trail[trail.index(nxt):] + [nxt]))
            elif nxt not in state:
                visit(nxt, trail + [nxt])
        state[node] = 2

    for module in sorted(MODULES):
        if module not in state:
            visit(module, [module])
    assert not circles, "import circles:\n" + "\n".join(circles)


@pytest.mark.parametrize("name", ["grainwright.console.commands.denoise", "grainwright.inference.baselines.bm3d"])
def test_dynamic_imports_are_seen(name):
    # the sub-command table and the baseline families are strings; the walk must still see them
    sources = {"grainwright.console.commands.denoise": "grainwright.console.cli",
               "grainwright.inference.baselines.bm3d": "grainwright.inference.baselines.registry"}
    assert name in _graph()[sources[name]]
