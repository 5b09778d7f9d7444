"""The architecture the contributor guide describes holds in the code: no import cycles between pooling's
modules (counting imports inside functions too), so the flow input -> statistics -> model -> kernel ->
sampler -> posterior -> results -> presenters (page, terminal, run folder) -> command line runs one way, and
the computing core never imports the shell. (Common practice: a dependency graph without cycles, checked by
walking the import statements with the standard library's ast module.)"""

from __future__ import annotations

import ast
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1] / "pooling"


def _module(path: Path) -> str:
    rel = path.relative_to(ROOT.parent).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(parts)


def _imports(path: Path) -> set[str]:
    mod = _module(path)
    pkg = mod if path.name == "__init__.py" else mod.rpartition(".")[0]
    out = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.ImportFrom):
            if node.level:
                base = pkg.split(".")
                base = base[: len(base) - (node.level - 1)]
                target = ".".join(base + ([node.module] if node.module else []))
            else:
                target = node.module or ""
            if target.startswith("pooling"):
                if node.module:  # `from .model import build`: the module model
                    out.add(target)
                for alias in node.names:  # `from . import kernel`: the module kernel (not the package itself)
                    out.add(f"{target}.{alias.name}")
        elif isinstance(node, ast.Import):
            out |= {a.name for a in node.names if a.name.startswith("pooling")}
    return out


def graph() -> dict[str, set[str]]:
    mods = {_module(p): p for p in ROOT.rglob("*.py")}
    g = {}
    for m, p in mods.items():
        # an import of a package's submodule runs the package's __init__ too, but the edges we care about
        # are module to module; package __init__ files that only re-export are left as nodes of their own
        g[m] = {t for t in _imports(p) if t in mods and t != m}
    return g


def _cycle(g):
    state, stack = {}, []

    def visit(n):
        state[n] = 1
        stack.append(n)
        for t in sorted(g[n]):
            if state.get(t) == 1:
                return stack[stack.index(t) :] + [t]
            if state.get(t) is None:
                c = visit(t)
                if c:
                    return c
        state[n] = 2
        stack.pop()
        return None

    for n in sorted(g):
        if state.get(n) is None:
            c = visit(n)
            if c:
                return c
    return None


def test_no_import_cycles():
    g = graph()
    # the package's own __init__ re-exports names lazily (pooling.__getattr__): not an edge of the flow
    for m in g:
        g[m].discard("pooling")
    assert _cycle(g) is None, _cycle(g)


def test_the_computing_core_does_not_import_the_shell():
    # a functional core and a thin shell: the stages that compute never import what presents or talks to the
    # world (the run folder, the page, the terminal, the command line); and the presenters never compute
    # from draws (they import the results, never the kernel, the sampler or the per-draw formulas)
    g = graph()
    core = [
        "pooling.stats",
        "pooling.model",
        "pooling.kernel",
        "pooling.sampler",
        "pooling.posterior",
        "pooling.answers",
        "pooling.summary",
        "pooling.summary_kernel",
        "pooling.results",
        "pooling.asked",
    ]
    shell = {
        "pooling.output",
        "pooling.cli",
        "pooling.terminal",
        "pooling.report.page",
        "pooling.report.plots",
        "pooling.report.history",
    }
    for m in core:
        assert not (g[m] & shell), (m, g[m] & shell)
    for presenter in ("pooling.report.page", "pooling.terminal", "pooling.report.plots"):
        assert not (g[presenter] & {"pooling.kernel", "pooling.sampler", "pooling.answers", "pooling.summary_kernel"})
