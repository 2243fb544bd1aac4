"""The package's import layering, read from the source with ``ast``.

Every ``import`` and ``from ... import`` of every module counts, including the ones
inside functions (a lazy import is still an arrow). The constants below mirror the
layering table in DEVELOPERS.md ("Layers"); change both together.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = "shortcut_audit"
SOURCE = Path(__file__).resolve().parents[1] / PACKAGE

#: The layers, lowest first: a module may import its own layer and the layers below,
#: never one above. A package name (``report``, ``demo``) covers its modules.
LAYERS = {
    "foundation": {"errors", "_version", "store"},
    # the computation (numpy, scipy, scikit-image) and the two input edges
    "core": {"occlusion", "engine", "maps", "sensitivity", "adaptive", "regions", "classes", "findings",
             "motifs", "outcomes", "probes", "imagewide", "sufficiency", "confirm", "cost", "intervals", "options", "listing", "dataset",
             "model"},
    # runs that return a result and keep their JSON through store.py; they draw nothing
    "pipeline": {"perimage", "scan", "cluster", "comparison", "compare", "heatmap"},
    "writers": {"report", "pack"},
    "front": {"cli", "showcase", "demo", ""},          # "" is the package's __init__ (the facade)
}
CORE = LAYERS["core"] - {"dataset", "listing", "model"}
PIPELINE = LAYERS["pipeline"]
#: What neither the core nor the pipeline may import, lazily or not.
FORBIDDEN_BELOW = {"report", "cli", "showcase", "rich", "typer", "matplotlib", "jinja2"}
#: Third-party packages allowed only in the listed modules (a package ``p/`` covers its modules).
ONLY_IN = {
    "onnxruntime": {"model"},
    "onnx": {"model", "demo"},
    "typer": {"cli"},
    "rich": {"cli"},
    "matplotlib": {"report"},
    "jinja2": {"report"},
    "PIL": {"dataset", "report", "pack", "demo"},
    "torch": {"demo.train"},
}
#: Data-only packages an installed wheel carries beside the code (no module to read).
DATA_PACKAGES = {f"{PACKAGE}.demo_images"}


def package_modules() -> dict[str, Path]:
    """Dotted name -> file, for every module of the package (``__init__`` is the package)."""
    found = {}
    for path in sorted(SOURCE.rglob("*.py")):
        parts = list(path.relative_to(SOURCE.parent).with_suffix("").parts)
        if parts[-1] == "__init__":
            parts.pop()
        found[".".join(parts)] = path
    return found


MODULES = package_modules()


def imports_of(name: str, path: Path) -> list[tuple[str, int]]:
    """``(imported module, line)`` for every import statement anywhere in the file.

    ``from X import y`` is an arrow to ``X.y`` when that is a module of the package, else
    to ``X``; relative imports are resolved against the module's package.
    """
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    package = name if path.name == "__init__.py" else name.rpartition(".")[0]
    out = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            out.extend((alias.name, node.lineno) for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[:len(base) - (node.level - 1)]
                full = ".".join(base + ([node.module] if node.module else []))
            else:
                full = node.module or ""
            for alias in node.names:
                sub = f"{full}.{alias.name}"
                out.append((sub if sub in MODULES or sub in DATA_PACKAGES else full, node.lineno))
    return out


def internal_graph() -> dict[str, set[str]]:
    graph: dict[str, set[str]] = {m: set() for m in MODULES}
    for name, path in MODULES.items():
        for target, _ in imports_of(name, path):
            if target in MODULES and target != name:
                graph[name].add(target)
    return graph


def cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    """The strongly connected components with more than one module (Tarjan's algorithm)."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    found = []

    def visit(v: str) -> None:
        index[v] = low[v] = len(index)
        stack.append(v)
        on_stack.add(v)
        for w in sorted(graph[v]):
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on_stack:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            component = []
            while True:
                w = stack.pop()
                on_stack.discard(w)
                component.append(w)
                if w == v:
                    break
            if len(component) > 1:
                found.append(sorted(component))

    for v in sorted(graph):
        if v not in index:
            visit(v)
    return found


def _short(module: str) -> str:
    return module[len(PACKAGE) + 1:] if module.startswith(PACKAGE + ".") else module


def _covers(owners: set[str], module: str) -> bool:
    short = "" if module == PACKAGE else _short(module)
    return any(short == o or short.startswith(o + ".") for o in owners)


def layer_of(module: str) -> int:
    ranks = [i for i, members in enumerate(LAYERS.values()) if _covers(members, module)]
    assert len(ranks) == 1, f"{module} is in {len(ranks)} layers: place it in exactly one of LAYERS"
    return ranks[0]


def _top(target: str) -> str:
    """The name a rule reads: the package's first level (``report``) or the third party's."""
    if target == PACKAGE:
        return PACKAGE
    if target.startswith(PACKAGE + "."):
        return _short(target).split(".")[0]
    return target.split(".")[0]


# ------------------------------------------------------------------ the reader itself

def test_the_reader_sees_every_kind_of_import(tmp_path):
    # A hand-written file with each form, read as if it were the package's scan module.
    path = tmp_path / "scan.py"
    path.write_text("import numpy as np\nfrom . import store\nfrom .errors import UsageError\n"
                    "from .report.figures import safe_name\n"
                    "def f():\n    import typer\n    from .cluster import check_cluster\n")
    got = sorted(imports_of(f"{PACKAGE}.scan", path))
    assert got == sorted([("numpy", 1), (f"{PACKAGE}.store", 2), (f"{PACKAGE}.errors", 3),
                          (f"{PACKAGE}.report.figures", 4), ("typer", 6), (f"{PACKAGE}.cluster", 7)])


def test_cycles_finds_a_planted_cycle_and_only_it():
    graph = {"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}, "e": set()}
    assert cycles(graph) == [["a", "b", "c"]]
    assert cycles({"a": {"b"}, "b": set()}) == []


def test_every_layer_name_is_a_module_and_every_module_has_one_layer():
    for members in LAYERS.values():
        for name in members - {""}:
            assert f"{PACKAGE}.{name}" in MODULES, name
    for module in MODULES:
        layer_of(module)


def test_no_arrow_points_up_the_layers():
    names = list(LAYERS)
    offenders = []
    for name, path in MODULES.items():
        for target, line in imports_of(name, path):
            if target in MODULES and layer_of(target) > layer_of(name):
                offenders.append(f"{_short(name)}:{line} ({names[layer_of(name)]}) imports "
                                 f"{_short(target)} ({names[layer_of(target)]})")
    assert offenders == []


# ------------------------------------------------------------------ the package

def test_no_import_cycle_among_the_package_modules():
    assert cycles(internal_graph()) == []


def test_no_module_imports_the_package_facade():
    # shortcut_audit/__init__.py imports nearly everything: a module importing it (for
    # __version__, say) closes a cycle through it.
    offenders = [(_short(name), line) for name, path in MODULES.items() if name != PACKAGE
                 for target, line in imports_of(name, path) if target == PACKAGE]
    assert offenders == []


@pytest.mark.parametrize("layer", ["core", "pipeline"])
def test_core_and_pipeline_import_no_writer_or_front_end(layer):
    members = CORE if layer == "core" else PIPELINE
    offenders = []
    for name, path in MODULES.items():
        if _short(name) in members:
            offenders += [(_short(name), target, line) for target, line in imports_of(name, path)
                          if _top(target) in FORBIDDEN_BELOW]
    assert offenders == []


def test_third_party_packages_stay_in_their_modules():
    offenders = []
    for name, path in MODULES.items():
        for target, line in imports_of(name, path):
            owners = ONLY_IN.get(target.split(".")[0])
            if owners is not None and not _covers(owners, name):
                offenders.append((_short(name), target, line))
    assert offenders == []
