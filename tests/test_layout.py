"""The package's shape, checked: layers, no import cycles, modules and functions of a sane size.

The layering is the one DEVELOPERS.md draws: cli -> audit -> library, listening, convert,
inspection, demo -> report, audio_io, dsp -> recipe, errors. Imports are read from
the source with :mod:`ast` (module level and inside functions alike), so a lazy
import cannot hide a dependency.
"""

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "requant"

#: Which groups each group may import (besides itself, the package face and errors).
ALLOWED = {
    "recipe": set(),
    "dsp": {"recipe"},
    "audio_io": {"recipe"},
    "report": {"dsp", "audio_io", "recipe"},
    "convert": {"report", "dsp", "audio_io", "recipe"},
    "inspection": {"dsp", "audio_io", "recipe"},
    "demo": {"convert", "report", "dsp", "audio_io", "recipe"},
    "library": {"convert", "report", "dsp", "audio_io", "recipe"},
    "listening": {"convert", "report", "dsp", "audio_io", "recipe"},
    "audit": {"library", "report", "dsp", "audio_io", "recipe"},
    "cli": {"library", "listening", "convert", "inspection", "demo", "audit", "report", "dsp",
            "audio_io", "recipe"},
}
#: Modules every group may use: the exceptions, the notices of pauses, the lazy-export helper,
#: the package face.
BASE = {"requant.errors", "requant.notices", "requant._lazy", "requant", "requant.__main__"}


def _modules():
    out = {}
    for path in sorted(PACKAGE.rglob("*.py")):
        rel = path.relative_to(PACKAGE.parent).with_suffix("")
        parts = list(rel.parts)
        if parts[-1] == "__init__":
            parts = parts[:-1]
        out[".".join(parts)] = path
    return out


MODULES = _modules()


def _group(module):
    parts = module.split(".")
    return parts[1] if len(parts) > 1 else None


def _imports(module, path):
    """Every requant module ``module`` imports, at module level or inside functions."""
    tree = ast.parse(path.read_text())
    package = module if path.name == "__init__.py" else module.rsplit(".", 1)[0]
    found = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names = [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                base = ".".join(package.split(".")[: len(package.split(".")) - node.level + 1]
                                + ([base] if base else []))
            names = [base] + [f"{base}.{a.name}" for a in node.names]
        else:
            continue
        for name in names:
            if name == "requant" or name.startswith("requant."):
                # the deepest known module this name refers to
                while name not in MODULES and "." in name:
                    name = name.rsplit(".", 1)[0]
                if name in MODULES and name != module:
                    found.add(name)
    return found


GRAPH = {m: _imports(m, p) for m, p in MODULES.items()}


@pytest.mark.parametrize("module", sorted(m for m in MODULES if _group(m) in ALLOWED))
def test_layers(module):
    group = _group(module)
    bad = sorted(dep for dep in GRAPH[module]
                 if dep not in BASE and _group(dep) != group
                 and _group(dep) not in ALLOWED[group])
    assert not bad, f"{module} ({group}) may not import {bad}"


def test_every_module_has_a_layer():
    assert {_group(m) for m in MODULES} - {None} <= set(ALLOWED) | {"errors", "notices", "_lazy",
                                                                     "__main__"}


def test_nothing_below_imports_the_cli():
    users = sorted(m for m, deps in GRAPH.items()
                   if _group(m) != "cli" and m != "requant.__main__"
                   and any(_group(d) == "cli" for d in deps))
    assert not users


def test_no_import_cycles():
    # Tarjan-free check: a depth-first search that reports the first back edge
    state, stack = {}, []

    def visit(m):
        state[m] = "open"
        stack.append(m)
        for dep in sorted(GRAPH[m]):
            if dep in BASE and dep != "requant.errors":
                continue  # the package face re-exports lazily; it imports nothing at load
            if state.get(dep) == "open":
                cycle = stack[stack.index(dep):] + [dep]
                raise AssertionError("import cycle: " + " -> ".join(cycle))
            if dep not in state:
                visit(dep)
        stack.pop()
        state[m] = "done"

    for m in sorted(GRAPH):
        if m not in state:
            visit(m)


# The compiled kernels (dsp/kernel.py build, dsp/peakkernel.py build_dual, dsp/residual.py
# build) stay whole: numba compiles one function, and splitting it would cost speed; the
# kernels take their buffers as arguments (dsp/peakkernel, dsp/loudness and dsp/scan too).
# CLI commands list their options as parameters, which is how typer declares them.
WIDE_OK = {"requant.dsp.kernel", "requant.dsp.truepeak", "requant.dsp.residual",
           "requant.dsp.peakkernel", "requant.dsp.loudness", "requant.dsp.scan",
           "requant.cli.batch", "requant.cli.convert", "requant.cli.listen"}
LONG_OK = {("requant.dsp.kernel", "build")}


def _functions():
    for module, path in MODULES.items():
        for node in ast.walk(ast.parse(path.read_text())):
            if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
                a = node.args
                width = (len(a.posonlyargs) + len(a.args) + len(a.kwonlyargs)
                         + bool(a.vararg) + bool(a.kwarg))
                body = node.body[1:] if (node.body and isinstance(node.body[0], ast.Expr)
                                         and isinstance(node.body[0].value, ast.Constant)) \
                    else node.body
                length = (body[-1].end_lineno - body[0].lineno + 1) if body else 0
                yield module, node.name, width, length


def test_modules_stay_small():
    sizes = {m: len(p.read_text().splitlines()) for m, p in MODULES.items()}
    assert {m: n for m, n in sizes.items() if n > 800} == {}


def test_signatures_stay_narrow():
    wide = [(m, f, w) for m, f, w, _ in _functions()
            if w > 10 and m not in WIDE_OK and f != "__init__"]
    assert wide == []


def test_functions_stay_short():
    # code lines, docstring excluded; "very few over 100"
    long = [(m, f, n) for m, f, _, n in _functions() if n > 100 and (m, f) not in LONG_OK]
    assert long == []
