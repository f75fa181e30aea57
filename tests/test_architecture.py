"""The package's shape: no import circles, and the library never touches the viewer's toolkits.

Every module of ``mapkit/`` is parsed with :mod:`ast`; each ``import`` and ``from ... import``
statement, at module level or inside a function (a deferred import closes a circle just the
same, only later), is an edge to the module it names. Circles are found as the strongly
connected components of that graph (Tarjan 1972, "Depth-first search and linear graph
algorithms", SIAM J. Comput. 1(2)).
"""

from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

import mapkit

PACKAGE = Path(mapkit.__file__).resolve().parent

#: the viewer and its toolkits: the library never imports them (DEVELOPERS.md)
GUI_ROOTS = ("napari", "mapkit_napari", "qtpy", "PyQt5", "PyQt6", "PySide2", "PySide6",
             "magicgui", "superqt", "vispy")
#: the one place allowed to: ``mapkit view`` starts the viewer, inside its own function
GUI_ALLOWED = {("mapkit.cli", "cmd_view")}

#: import circles that exist today, each a set of modules; they may shrink or vanish, never grow
#: and never gain a companion. Both work only because one side imports inside a function:
KNOWN_CYCLES = [
    # open_map (dispatch) imports the readers inside itself; the HDF5 and table readers take
    # read_steps from dispatch at module level, and the NeXus reader builds on the HDF5 one
    frozenset({"mapkit.read.dispatch", "mapkit.read.hdf5", "mapkit.read.nexus",
               "mapkit.read.table"}),
    # register.py builds on read.optical's OpticalImage; read_placed_image (read.optical)
    # imports register.PlacedImage inside itself
    frozenset({"mapkit.read.optical", "mapkit.register"}),
]


def _module_name(path: Path) -> str:
    rel = path.relative_to(PACKAGE.parent).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def _modules() -> dict[str, Path]:
    return {_module_name(p): p for p in sorted(PACKAGE.rglob("*.py"))}


def _imports(name: str, path: Path, known: set[str]):
    """(target module, enclosing function or None, absolute imported name) for each import."""
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    package = name if path.name == "__init__.py" else name.rpartition(".")[0]
    out = []

    def visit(node, func):
        for child in ast.iter_child_nodes(node):
            inner = child.name if isinstance(child, (ast.FunctionDef, ast.AsyncFunctionDef)) \
                else func
            if isinstance(child, ast.Import):
                out.extend((a.name, func) for a in child.names)
            elif isinstance(child, ast.ImportFrom):
                if child.level:
                    base = package.split(".")
                    base = base[:len(base) - (child.level - 1)]
                    mod = ".".join(base + ([child.module] if child.module else []))
                else:
                    mod = child.module or ""
                for a in child.names:
                    sub = f"{mod}.{a.name}"
                    # `from . import layout` names a module; `from .read import open_map` a name
                    out.append((sub if sub in known else mod, func))
            visit(child, inner)

    visit(tree, None)
    return out


def _graph():
    mods = _modules()
    known = set(mods)
    graph = {m: set() for m in mods}
    raw = {}
    for name, path in mods.items():
        raw[name] = _imports(name, path, known)
        for target, _ in raw[name]:
            if target in known and target != name:
                graph[name].add(target)
    return graph, raw


def _cycles(graph):
    """Strongly connected components with more than one module (Tarjan's algorithm)."""
    index, low, stack, on, comps = {}, {}, [], set(), []

    def strong(v):
        index[v] = low[v] = len(index)
        stack.append(v)
        on.add(v)
        for w in sorted(graph[v]):
            if w not in index:
                strong(w)
                low[v] = min(low[v], low[w])
            elif w in on:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            comp = set()
            while True:
                w = stack.pop()
                on.discard(w)
                comp.add(w)
                if w == v:
                    break
            if len(comp) > 1:
                comps.append(frozenset(comp))

    sys.setrecursionlimit(max(sys.getrecursionlimit(), 10 * len(graph) + 100))
    for v in sorted(graph):
        if v not in index:
            strong(v)
    return comps


def test_graph_sees_module_and_function_level_imports():
    """The parser must see both kinds, or a test of no circles could not fail."""
    graph, raw = _graph()
    assert "mapkit.cli_common" in graph["mapkit.cli"]                       # module level
    assert "mapkit.pipeline" in graph["mapkit.cli"]                         # inside a function
    assert "mapkit.cli_quantify" in graph["mapkit.cli"]   # `from . import cli_quantify`
    # a circle planted in a copy of the graph is found
    planted = {k: set(v) for k, v in graph.items()}
    planted["mapkit.cli_common"].add("mapkit.cli")
    assert any({"mapkit.cli", "mapkit.cli_common"} <= c for c in _cycles(planted))


def test_command_modules_form_no_circle():
    graph, _ = _graph()
    cli = {m for m in graph if m.startswith("mapkit.cli")}
    assert {"mapkit.cli", "mapkit.cli_common", "mapkit.cli_reduce",
            "mapkit.cli_quantify"} <= cli
    sub = {m: graph[m] & cli for m in cli}
    assert _cycles(sub) == []
    # the parser imports the subcommand modules; none of them imports the parser back
    for m in cli - {"mapkit.cli"}:
        assert "mapkit.cli" not in graph[m], f"{m} imports mapkit.cli"
    assert not graph["mapkit.cli_common"] & cli, "the shared helpers import a command module"


def test_package_circles_do_not_grow():
    graph, _ = _graph()
    found = _cycles(graph)
    for comp in found:
        assert any(comp <= known for known in KNOWN_CYCLES), \
            f"new import circle among {sorted(comp)}"


def test_library_never_imports_the_viewer():
    _, raw = _graph()
    bad = [(mod, func, target) for mod, edges in raw.items() for target, func in edges
           if target.split(".")[0] in GUI_ROOTS and (mod, func) not in GUI_ALLOWED]
    assert bad == []
    # and at run time: importing every module of the library loads none of them
    names = sorted(_modules())
    code = ("import importlib, sys\n"
            f"for n in {names!r}:\n    importlib.import_module(n)\n"
            f"print(sorted(m for m in sys.modules if m.split('.')[0] in {GUI_ROOTS!r}))")
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    assert r.stdout.strip() == "[]"
