"""The package's layout: no import cycle, counting imports inside functions.

Data flows one way through the package (config -> model; corpus -> tokens -> batches; trainer
-> run records -> grid -> report), so its import graph must be acyclic. An import placed inside
a function hides a cycle from Python (it runs late, after both modules exist) but not from a
reader, so the graph here counts every import statement, wherever it sits. Checking a module
graph for cycles by walking its import statements is common practice, no source.
"""

from __future__ import annotations

import ast
from pathlib import Path

PACKAGE_DIR = Path(__file__).resolve().parent.parent / "blockyard"


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
