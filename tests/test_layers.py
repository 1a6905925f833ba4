"""The import direction of the layers (docs/design.md, section 1: data flow with no back edges).

Every module under realopt/ is parsed with ``ast`` (imports inside functions count too) and each
import of another realopt module must go to the same layer or a lower one. A new module must be
given a layer here, so that the rule cannot be skipped by adding a file.
"""
from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1] / "realopt"

# lowest first; a module may import its own layer and the layers before it
LAYERS = (
    ("model", ("realopt.model", "realopt.errors", "realopt.validate", "realopt.keypaths",
               "realopt.jsontext", "realopt.formula", "realopt.forecast", "realopt.rights.*")),
    ("project", ("realopt.project", "realopt.project.*", "realopt.project_simulation")),
    ("underlying", ("realopt.underlying", "realopt.drivers")),
    ("rights", ("realopt.rights", "realopt.rights.graph")),
    ("lattice", ("realopt.lattice", "realopt.simulation", "realopt.simulation.*")),
    ("appraisal", ("realopt.appraisal",)),
    ("outputs", ("realopt.outputs", "realopt.outputs.*", "realopt.sweep", "realopt.portfolio",
                 "realopt.fanout")),
    ("cli", ("realopt.cli", "realopt.report_command", "realopt.sweep_command",
             "realopt.portfolio_command", "realopt.__main__")),
)

# Known back edges, each with its reason; the test fails when one disappears, so the list shrinks
# as the debt is paid. sweep and portfolio hold their own command wiring (register/run) and take
# the shared project options and printing helpers from the command line.
KNOWN_BACK_EDGES: dict = {}


def _layer(module: str) -> int | None:
    """Index in LAYERS (an exact name wins over a pattern ``pkg.*``), or None."""
    best = None
    for i, (_, names) in enumerate(LAYERS):
        for n in names:
            if n == module:
                return i
            if n.endswith(".*") and module.startswith(n[:-1]) and best is None:
                best = i
    return best


def _modules():
    for f in sorted(ROOT.rglob("*.py")):
        parts = f.relative_to(ROOT.parent).with_suffix("").parts
        is_pkg = parts[-1] == "__init__"
        name = ".".join(parts[:-1] if is_pkg else parts)
        yield name, (name if is_pkg else name.rpartition(".")[0]), f


def _imports(name, package, path):
    """(imported realopt module, line, inside a function) for every import in the file."""
    tree = ast.parse(path.read_text(encoding="utf-8"), str(path))
    inner = {id(n) for fn in ast.walk(tree) if isinstance(fn, (ast.FunctionDef,
                                                               ast.AsyncFunctionDef))
             for n in ast.walk(fn)}
    for node in ast.walk(tree):
        targets = []
        if isinstance(node, ast.Import):
            targets = [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")[: len(package.split(".")) - (node.level - 1)]
                mod = ".".join(base + ([node.module] if node.module else []))
            else:
                mod = node.module or ""
            # "from . import model" imports the module realopt.model
            targets = [f"{mod}.{a.name}" if _is_module(f"{mod}.{a.name}") else mod
                       for a in node.names]
        for t in targets:
            if t == "realopt" or t.startswith("realopt."):
                yield t, node.lineno, id(node) in inner


def _is_module(name: str) -> bool:
    rel = Path(*name.split("."))
    return (ROOT.parent / rel).with_suffix(".py").is_file() or (ROOT.parent / rel).is_dir()


MODULES = list(_modules())


def test_every_module_has_a_layer():
    missing = [n for n, _, _ in MODULES if n != "realopt" and _layer(n) is None]
    assert not missing, f"give these modules a layer in tests/test_layers.py LAYERS: {missing}"


def test_imports_follow_the_layers():
    """No module imports a later layer (outputs never import cli; the engine never imports
    outputs; the loader never imports the engine)."""
    bad, seen = [], set()
    for name, package, path in MODULES:
        for target, line, in_function in _imports(name, package, path):
            if name == "realopt":
                # the package root: only model and errors at import time; its facade functions
                # (load_project, appraise) import lazily and sit above everything
                if not in_function and _layer(target) != 0:
                    bad.append(f"{path.relative_to(ROOT.parent)}:{line}: realopt imports "
                               f"{target} at import time")
                continue
            if target == "realopt":     # CAUTION, __version__: constants of the root
                continue
            a, b = _layer(name), _layer(target)
            if a is None or b is None or b <= a:
                continue
            if (name, target) in KNOWN_BACK_EDGES:
                seen.add((name, target))
                continue
            bad.append(f"{path.relative_to(ROOT.parent)}:{line}: {name} ({LAYERS[a][0]}) "
                       f"imports {target} ({LAYERS[b][0]}), a later layer")
    assert not bad, "back edges in the layers of docs/design.md:\n" + "\n".join(bad)
    gone = set(KNOWN_BACK_EDGES) - seen
    assert not gone, f"these known back edges are gone; delete them from KNOWN_BACK_EDGES: {gone}"


def test_outputs_never_import_the_command_line():
    hits = [f"{p.relative_to(ROOT.parent)}:{line}" for n, pkg, p in MODULES
            if n.startswith("realopt.outputs")
            for t, line, _ in _imports(n, pkg, p) if t == "realopt.cli"]
    assert not hits, f"outputs import realopt.cli at {hits}"


@pytest.mark.parametrize("source, expected", [
    # a back edge planted in a scratch file is found (the checker itself can fail)
    ("from .cli import main\n", "realopt.cli"),
    ("def f():\n    from ..appraisal import appraise\n", "realopt.appraisal"),
])
def test_the_checker_sees_imports(tmp_path, source, expected):
    pkg = "realopt" if source.startswith("from .cli") else "realopt.project"
    f = tmp_path / "scratch.py"
    f.write_text(source, encoding="utf-8")
    found = [t for t, _, _ in _imports(f"{pkg}.scratch", pkg, f)]
    assert found == [expected]
    assert _layer(expected) > _layer("realopt.project")


def test_the_loader_package_stays_in_small_modules():
    """realopt/project/ was split so that each module has one job (issue 9); keep each of them
    near 400 lines so that the next section gets its own module instead of growing one."""
    sizes = {f.name: len(f.read_text(encoding="utf-8").splitlines())
             for f in (ROOT / "project").glob("*.py")}
    assert len(sizes) >= 8 and not {n: s for n, s in sizes.items() if s > 450}, sizes
