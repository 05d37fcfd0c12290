"""The package's layout: layers in one order and no import cycle, counting imports inside functions.

Data flows one way through the package (config -> model; corpus -> tokens -> batches; trainer
-> run records -> grid -> report), so its import graph must be acyclic, and no module may import
one of a higher layer (:data:`LAYERS`, the one place the order is written). An import placed
inside a function hides a cycle from Python (it runs late, after both modules exist) but not from
a reader, so the graph here counts every import statement, wherever it sits. Checking a module
graph for cycles and layer order by walking its import statements is common practice, no source.
"""

from __future__ import annotations

import ast
from collections.abc import Sequence
from pathlib import Path

import pytest

PACKAGE_DIR = Path(__file__).resolve().parent.parent / "blockyard"

#: The package's layers, lowest first, by top-level module or subpackage: a module may import its own
#: layer and the layers below it, never one above (a higher layer plugs into a lower one through a hook,
#: e.g. the probe suite into the trainer as an eval hook builder). The package's ``__init__.py`` runs
#: before every module, so it counts as the lowest layer.
LAYERS: tuple[tuple[str, ...], ...] = (
    ("", "errors", "text", "palette"),  # import nothing of the package
    ("fs", "plotting"),  # file locks, atomic writes; headless matplotlib in our palette
    ("schema", "integrity", "rundir"),  # dataclass <-> dict; sha256 manifests; reading run dirs without torch
    ("data", "kernels"),  # corpora, tokenizers, tasks, batches; scan and fused kernels
    ("mixers",),
    ("config",),  # the config schema (names the mixers' and data's options)
    ("parametrization", "model"),
    ("cost", "check", "verify"),  # analytic and measured cost; the mixer contract gate; checkpoint checks
    ("train",),
    ("eval",),  # extrapolation, probes and generation of trained runs
    ("grid",),
    ("bench",),
    ("cli", "__main__"),
)


def module_names(package_dir: Path) -> dict[str, Path]:
    """Dotted name -> file of every module under ``package_dir`` (a package is its ``__init__.py``)."""
    root = package_dir.parent
    names = {}
    for path in sorted(package_dir.rglob("*.py")):
        parts = list(path.relative_to(root).with_suffix("").parts)
        if parts[-1] == "__init__":
            parts.pop()
        names[".".join(parts)] = path
    return names


def ancestors(name: str) -> list[str]:
    """``a.b.c`` -> ``["a", "a.b"]``: the packages Python initialises before ``a.b.c``."""
    parts = name.split(".")
    return [".".join(parts[:i]) for i in range(1, len(parts))]


def imported_names(tree: ast.AST, importer: str, is_package: bool) -> set[str]:
    """Every dotted name an import statement anywhere in ``tree`` (functions included) loads.

    ``from p import y`` loads ``p.y`` when that may be a submodule, and ``p`` in any case; relative
    imports are resolved against ``importer``.
    """
    out: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            out.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                here = importer.split(".") if is_package else importer.split(".")[:-1]
                anchor = here[: len(here) - (node.level - 1)]
                base = ".".join([*anchor, base] if base else anchor)
            out.add(base)
            out.update(f"{base}.{alias.name}" for alias in node.names)
    return out


def import_graph(package_dir: Path) -> dict[str, set[str]]:
    """Module -> the package modules it imports, with the parent packages each import initialises.

    Importing ``a.b.c`` runs ``a/__init__.py`` and ``a/b/__init__.py`` too, so those count as
    imported, except the importer's own parent packages: Python has started them before the
    importer runs, whatever the importer says.
    """
    names = module_names(package_dir)
    graph: dict[str, set[str]] = {}
    for name, path in names.items():
        tree = ast.parse(path.read_text(), filename=str(path))
        own = {*ancestors(name), name}
        targets = set()
        for target in imported_names(tree, name, path.name == "__init__.py"):
            for t in (*ancestors(target), target):
                if t in names and t not in own:
                    targets.add(t)
        graph[name] = targets
    return graph


def find_cycle(graph: dict[str, set[str]]) -> list[str] | None:
    """One cycle ``[m0, m1, ..., m0]`` of ``graph`` (depth-first search), or None if it is acyclic."""
    done: set[str] = set()
    for start in sorted(graph):
        if start in done:
            continue
        path, on_path = [start], {start}
        stack = [iter(sorted(graph[start]))]
        while stack:
            nxt = next(stack[-1], None)
            if nxt is None:
                stack.pop()
                finished = path.pop()
                on_path.discard(finished)
                done.add(finished)
                continue
            if nxt in on_path:
                return [*path[path.index(nxt):], nxt]
            if nxt not in done:
                path.append(nxt)
                on_path.add(nxt)
                stack.append(iter(sorted(graph.get(nxt, ()))))
    return None


def layer_of(module: str, layers: Sequence[Sequence[str]]) -> int:
    """Index in ``layers`` of ``module``'s top-level part (``pkg.a.b`` -> ``a``; ``pkg`` itself -> ``""``)."""
    head = module.split(".")[1] if "." in module else ""
    for i, names in enumerate(layers):
        if head in names:
            return i
    raise KeyError(f"{module}: its top-level name {head!r} is in no layer; add it to LAYERS")


def upward_imports(graph: dict[str, set[str]], layers: Sequence[Sequence[str]]) -> list[str]:
    """Every import of ``graph`` from a lower layer into a higher one, as ``"a (layer i) imports b (layer j)"``."""
    found = []
    for importer in sorted(graph):
        low = layer_of(importer, layers)
        for target in sorted(graph[importer]):
            high = layer_of(target, layers)
            if high > low:
                found.append(f"{importer} (layer {low}) imports {target} (layer {high})")
    return found


def test_no_module_imports_a_higher_layer():
    graph = import_graph(PACKAGE_DIR)
    upward = upward_imports(graph, LAYERS)
    assert not upward, "imports up the layer order (imports inside functions count):\n" + "\n".join(upward)


def test_every_top_level_module_has_a_layer():
    names = {p.stem for p in PACKAGE_DIR.glob("*.py")} | {p.parent.name for p in PACKAGE_DIR.glob("*/__init__.py")}
    listed = {name for layer in LAYERS for name in layer}
    assert names - {"__init__"} == listed - {""}  # no module escapes the check, and no layer names a ghost


def test_a_planted_upward_import_is_found(tmp_path):
    # pkg.low sits below pkg.high but imports it inside a function, where Python would not notice.
    pkg = write_package(tmp_path, {
        "pkg/__init__.py": "",
        "pkg/low.py": "def f():\n    from pkg.high import g\n    return g\n",
        "pkg/high/__init__.py": "from pkg import low\n",
        "pkg/high/g.py": "",
    })
    layers = (("",), ("low",), ("high",))
    assert upward_imports(import_graph(pkg), layers) == [
        "pkg.low (layer 1) imports pkg.high (layer 2)", "pkg.low (layer 1) imports pkg.high.g (layer 2)"]
    assert upward_imports(import_graph(pkg), (("",), ("high",), ("low",))) == [
        "pkg.high (layer 1) imports pkg.low (layer 2)"]
    assert upward_imports(import_graph(pkg), (("", "low", "high"),)) == []  # one layer: anything goes


def test_a_module_outside_every_layer_is_an_error(tmp_path):
    pkg = write_package(tmp_path, {"pkg/__init__.py": "", "pkg/a.py": "", "pkg/stray.py": "from pkg import a\n"})
    with pytest.raises(KeyError, match="pkg.stray"):
        upward_imports(import_graph(pkg), (("", "a"),))


def test_the_package_has_no_import_cycle():
    graph = import_graph(PACKAGE_DIR)
    assert len(graph) > 40  # the walk found the package (every module, not just the top level)
    cycle = find_cycle(graph)
    assert cycle is None, "import cycle (imports inside functions count): " + " -> ".join(cycle)


def write_package(root: Path, files: dict[str, str]) -> Path:
    for rel, text in files.items():
        path = root / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(text)
    return root / "pkg"


def test_a_cycle_hidden_in_a_function_is_found(tmp_path):
    pkg = write_package(tmp_path, {
        "pkg/__init__.py": "",
        "pkg/a.py": "def f():\n    from pkg.b import g\n    return g\n",
        "pkg/b.py": "from . import a\n\ndef g():\n    return a\n",
    })
    graph = import_graph(pkg)
    assert graph["pkg.a"] == {"pkg.b"} and graph["pkg.b"] == {"pkg.a"}
    assert find_cycle(graph) in (["pkg.a", "pkg.b", "pkg.a"], ["pkg.b", "pkg.a", "pkg.b"])


def test_importing_a_submodule_counts_its_package_init(tmp_path):
    # pkg.low imports pkg.sub.leaf, which runs pkg/sub/__init__.py, which imports pkg.low back.
    pkg = write_package(tmp_path, {
        "pkg/__init__.py": "",
        "pkg/low.py": "import pkg.sub.leaf\n",
        "pkg/sub/__init__.py": "from pkg.sub.leaf import x\nfrom pkg.low import *\n",
        "pkg/sub/leaf.py": "x = 1\n",
    })
    graph = import_graph(pkg)
    assert graph["pkg.low"] == {"pkg.sub", "pkg.sub.leaf"}
    assert graph["pkg.sub.leaf"] == set()  # its own parent packages do not count
    assert find_cycle(graph) == ["pkg.low", "pkg.sub", "pkg.low"]


def test_an_acyclic_package_passes(tmp_path):
    pkg = write_package(tmp_path, {
        "pkg/__init__.py": "from pkg.top import main\n",
        "pkg/top.py": "from pkg import base\nfrom pkg.base import y\n\ndef main():\n    import pkg.base\n",
        "pkg/base.py": "y = 0\n",
    })
    graph = import_graph(pkg)
    assert graph == {"pkg": {"pkg.top"}, "pkg.top": {"pkg.base"}, "pkg.base": set()}
    assert find_cycle(graph) is None
