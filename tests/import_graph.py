"""Print qcd's import graph, module by module, lowest layer first; exit 1 if an import points up.

    python tests/import_graph.py

Every ``import`` of a qcd module counts, also those inside functions (marked ``*``, imported on
first use), those only for type checking (marked ``'``) and a registry's plugin loads (marked
``+``, see ``PLUGINS``); ``from qcd import __version__``
does not (the package is loaded before any of its modules anyway). ``LAYERS`` is the order of
the flow: a module may import only modules listed before it. tests/test_imports.py runs the
same checks.
"""
from __future__ import annotations

import ast
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
PACKAGE = ROOT / "qcd"

# Lowest first. errors and units are importable anywhere; measures/ imports only measures/;
# what a measured file is (results) sits below everything that measures, judges or stores it.
# A plugin load: a registry imports, by name and on first use, a module that sits above it
# because it builds the registry's own types. recording's reader registry loads the format
# readers this way (marked '+'); it is neither an upward import nor a cycle.
PLUGINS = {"recording": ("nwb", "neoread")}

LAYERS = (
    "errors", "lazy", "units", "zones", "measures",
    "measures.noise", "measures.drift", "measures.spectrum", "measures.transient",
    "measures.mains", "measures.humfit", "measures.zoom",
    "measures.steps", "measures.wholecell", "measures.testpulse",
    "config", "abf", "hdf5", "recording", "nwb", "neoread", "results", "runlength", "ruleset",
    "charts", "history", "judge", "alerts", "codec", "schema", "store", "notify",
    "plan", "blocks", "pulse", "analyze", "intake", "workers", "pipeline", "cluster", "watch",
    "status",
    "html", "report", "compare", "export", "digest", "synth", "demo",
    "table", "scan", "review", "control", "cli", "__init__", "__main__",
)


def modules() -> dict[str, Path]:
    """{dotted name below qcd: file} of every module of the package."""
    out = {}
    for path in sorted(PACKAGE.rglob("*.py")):
        rel = path.relative_to(PACKAGE).with_suffix("")
        name = ".".join(rel.parts)
        if name.endswith(".__init__"):          # qcd/measures/__init__.py: the package itself
            name = name[: -len(".__init__")]
        out[name] = path
    return out


def _target(node: ast.ImportFrom | ast.Import, known: set[str]) -> list[str]:
    names = []
    if isinstance(node, ast.Import):
        for a in node.names:
            if a.name == "qcd" or a.name.startswith("qcd."):
                names.append(a.name[4:] or "__init__")
        return names
    mod = node.module or ""
    if node.level or not (mod == "qcd" or mod.startswith("qcd.")):
        return names
    base = mod[4:]
    for a in node.names:
        sub = f"{base}.{a.name}" if base else a.name
        names.append(sub if sub in known else (base or "__init__"))
    return names


def _type_only(tree: ast.Module) -> set[int]:
    """ids of import nodes inside ``if TYPE_CHECKING:`` blocks."""
    out = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.If) and "TYPE_CHECKING" in ast.unparse(node.test):
            for sub in ast.walk(node):
                if isinstance(sub, (ast.Import, ast.ImportFrom)):
                    out.add(id(sub))
    return out


def graph() -> dict[str, dict[str, str]]:
    """{module: {imported module: '' (top level) | '*' (inside a function) | "'" (types)}}."""
    mods = modules()
    known = set(mods)
    out: dict[str, dict[str, str]] = {}
    for name, path in mods.items():
        plugins = set(PLUGINS.get(name, ()))
        tree = ast.parse(path.read_text(encoding="utf-8"))
        typed = _type_only(tree)
        top = {id(n) for n in tree.body}
        edges: dict[str, str] = {}
        for node in ast.walk(tree):
            if not isinstance(node, (ast.Import, ast.ImportFrom)):
                continue
            mark = "'" if id(node) in typed else ("" if id(node) in top else "*")
            plugin = {t for t in _target(node, known) if t in plugins}
            mark = "+" if plugin and mark == "*" else mark
            for t in _target(node, known):
                # `from qcd import __version__`: the package itself, loaded before any module
                if t == "__init__":
                    continue
                if t != name and (t not in edges or mark == ""):
                    edges[t] = mark
        for t in plugins & known:
            edges.setdefault(t, "+")     # loaded by name (importlib), so no import statement
        out[name] = edges
    return out


def problems(g: dict[str, dict[str, str]]) -> list[str]:
    """Every import that points up the flow (or to a module LAYERS does not list)."""
    rank = {m: i for i, m in enumerate(LAYERS)}
    out = []
    for m in sorted(g):
        if m not in rank:
            out.append(f"{m}: not in LAYERS (add it where it belongs in the flow)")
            continue
        for t in sorted(g[m]):
            if g[m][t] == "+" and t in PLUGINS.get(m, ()):
                continue
            if t not in rank:
                out.append(f"{m} -> {t}: {t} not in LAYERS")
            elif rank[t] >= rank[m]:
                out.append(f"{m} -> {t}: points up the flow")
    return out


def cycles(g: dict[str, dict[str, str]]) -> list[list[str]]:
    """Import cycles (each as a path that returns to its start), depth-first."""
    found, state = [], {}

    def visit(m: str, path: list[str]) -> None:
        state[m] = 1
        for t in sorted(g.get(m, {})):
            if g[m][t] == "+":
                continue
            if state.get(t) == 1:
                found.append(path[path.index(t):] + [t])
            elif t in g and not state.get(t):
                visit(t, path + [t])
        state[m] = 2
    for m in sorted(g):
        if not state.get(m):
            visit(m, [m])
    return found


def main() -> int:
    g = graph()
    order = [m for m in LAYERS if m in g] + sorted(set(g) - set(LAYERS))
    width = max(len(m) for m in order)
    for m in order:
        deps = sorted(g[m], key=lambda t: LAYERS.index(t) if t in LAYERS else -1)
        print(f"{m:<{width}} -> {', '.join(t + g[m][t] for t in deps) or '(nothing from qcd)'}")
    bad = problems(g) + [" -> ".join(c) + ": cycle" for c in cycles(g)]
    for line in bad:
        print("UP:", line, file=sys.stderr)
    return 1 if bad else 0


if __name__ == "__main__":
    sys.exit(main())
