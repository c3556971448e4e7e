"""The package layout is the architecture: imports point down, the core stays free of files and screens.

Layers, lowest first: model, theory, engine, odometry, files, traces, runs, view, cli.  A module
may import its own layer and the layers below; ``sim.errors`` and ``sim.procs`` are shared by all.
The core (model, theory, engine, odometry) imports no YAML, drawing, plotting or file code.  No
import cycles between modules; no private name (``_x``) imported from another module.
"""
from __future__ import annotations

import ast
import pathlib

SIM = pathlib.Path(__file__).resolve().parents[1] / "sim"
LAYERS = ("model", "theory", "engine", "odometry", "files", "traces", "runs", "view", "cli")
SHARED = ("sim", "sim.errors", "sim.procs")
CORE = LAYERS[:4]
CORE_FORBIDDEN = ("yaml", "ruamel", "pygame", "matplotlib", "polars", "csv", "json")


def _modules():
    for path in sorted(SIM.rglob("*.py")):
        parts = path.relative_to(SIM.parent).with_suffix("").parts
        name = ".".join(parts[:-1] if parts[-1] == "__init__" else parts)
        yield name, path


def _imports(name, path):
    """(imported module, imported names, line) for every import in the file, relative ones resolved."""
    pkg = name if path.name == "__init__.py" else name.rpartition(".")[0]
    for node in ast.walk(ast.parse(path.read_text(), str(path))):
        if isinstance(node, ast.Import):
            for a in node.names:
                yield a.name, (), node.lineno
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                up = pkg.split(".")[: len(pkg.split(".")) - node.level + 1]
                base = ".".join(up + ([base] if base else []))
            yield base, tuple(a.name for a in node.names), node.lineno


def _layer(module):
    parts = module.split(".")
    return parts[1] if len(parts) > 1 and parts[0] == "sim" and parts[1] in LAYERS else None


def _graph():
    mods = dict(_modules())
    edges = {}
    for name, path in mods.items():
        for target, names, line in _imports(name, path):
            # "from sim.x import y" where y is a module counts as importing sim.x.y
            for t in [target] + [f"{target}.{n}" for n in names if f"{target}.{n}" in mods]:
                if t in mods and t != name:
                    edges.setdefault(name, set()).add((t, line))
    return mods, edges


def test_imports_point_down():
    mods, _ = _graph()
    bad = []
    for name, path in mods.items():
        mine = _layer(name)
        if mine is None:
            continue
        for target, _, line in _imports(name, path):
            theirs = _layer(target)
            if theirs is not None and LAYERS.index(theirs) > LAYERS.index(mine):
                bad.append(f"{path.relative_to(SIM.parent)}:{line}: {mine} imports {target} ({theirs} is above)")
    assert not bad, "\n".join(bad)


def test_core_imports_no_files_or_screens():
    mods, _ = _graph()
    bad = []
    for name, path in mods.items():
        if _layer(name) not in CORE:
            continue
        for target, _, line in _imports(name, path):
            if target.split(".")[0] in CORE_FORBIDDEN:
                bad.append(f"{path.relative_to(SIM.parent)}:{line}: core module imports {target}")
    assert not bad, "\n".join(bad)


def test_no_import_cycles():
    mods, edges = _graph()
    state, stack, cycles = {}, [], []

    def visit(m):
        state[m] = 1
        stack.append(m)
        for t, _ in sorted(edges.get(m, ())):
            if t in SHARED:
                continue
            if state.get(t) == 1:
                cycles.append(" -> ".join(stack[stack.index(t):] + [t]))
            elif t not in state:
                visit(t)
        stack.pop()
        state[m] = 2

    for m in sorted(mods):
        if m not in state:
            visit(m)
    assert not cycles, "\n".join(cycles)


def test_no_private_names_across_modules():
    mods, _ = _graph()
    bad = []
    for name, path in mods.items():
        for target, names, line in _imports(name, path):
            if not target.startswith("sim"):
                continue
            for n in names:
                sub = SIM.parent.joinpath(*target.split("."))
                if n.startswith("_") and not n.startswith("__") and not list(sub.glob(n + ".*")):
                    bad.append(f"{path.relative_to(SIM.parent)}:{line}: imports private {target}.{n}")
    assert not bad, "\n".join(bad)


def test_numba_only_through_the_one_place_of_compile_options():
    # every kernel shares sim/jit.py's OPTIONS (cache, no fast-math): nobody else imports numba
    mods, _ = _graph()
    bad = [f"{path.relative_to(SIM.parent)}:{line}: imports {target}"
           for name, path in mods.items() if name != "sim.jit"
           for target, _, line in _imports(name, path) if target.split(".")[0] == "numba"]
    assert not bad, "\n".join(bad)


def test_the_checker_sees_a_violation(tmp_path):
    # the rules above must be able to fail: an engine module importing the view is caught
    assert _layer("sim.view.render") == "view"
    assert LAYERS.index(_layer("sim.view.render")) > LAYERS.index(_layer("sim.engine.simulator"))
    src = tmp_path / "m.py"
    src.write_text("from sim.view import render\nfrom ..files.fields import _private\n")
    got = list(_imports("sim.engine.m", src))
    assert ("sim.view", ("render",), 1) in got
    assert ("sim.files.fields", ("_private",), 2) in got
