"""The layout keeps the data flow visible: checks on the source tree itself.

Rules (DEVELOPERS.md, "Architecture"): no import cycles between subpackages, counting
imports inside functions; stages never import the writers or plotting; no function over
about 100 lines and no module over 800 lines outside compiled (numba) kernels; no fixed
machine paths in the code or the tests.
"""
from __future__ import annotations

import ast
import re
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PACKAGE = ROOT / "src" / "kinemap"
SUBPACKAGES = sorted(p.name for p in PACKAGE.iterdir() if (p / "__init__.py").exists())
STAGES = ("maps", "linefit", "rings", "widths", "turbulence", "extract", "stacking")
WRITERS = ("kinemap.io.writer", "kinemap.io.outdir", "kinemap.io.html", "kinemap.plotting")


def _modules():
    for path in sorted(PACKAGE.rglob("*.py")):
        yield path, ast.parse(path.read_text(), filename=str(path))


def _unit(path: Path) -> str:
    """Subpackage of a module ('io', 'rings', ...) or the top-level module's name."""
    return path.relative_to(PACKAGE).parts[0].removesuffix(".py")


def _imports(path: Path, tree) -> set[str]:
    """Every kinemap module a file imports, at any depth (relative imports resolved)."""
    pkg = ["kinemap", *path.relative_to(PACKAGE).parent.parts]
    out = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            out |= {a.name for a in node.names if a.name.startswith("kinemap")}
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                base = ".".join(pkg[: len(pkg) - node.level + 1] + ([base] if base else []))
            if base.startswith("kinemap"):
                out.add(base)
                out |= {f"{base}.{a.name}" for a in node.names}
    return out


def _graph():
    graph: dict[str, set[str]] = {}
    for path, tree in _modules():
        src = _unit(path)
        for mod in _imports(path, tree):
            parts = mod.split(".")
            if len(parts) > 1 and parts[1] in SUBPACKAGES and parts[1] != src:
                graph.setdefault(src, set()).add(parts[1])
    return graph


def test_no_import_cycles_between_subpackages():
    graph = _graph()
    cycles = []

    def visit(node, trail):
        for nxt in sorted(graph.get(node, ())):
            if nxt in trail:
                cycles.append(" -> ".join(trail[trail.index(nxt):] + [nxt]))
            elif len(trail) < len(SUBPACKAGES):
                visit(nxt, trail + [nxt])

    for start in SUBPACKAGES:
        visit(start, [start])
    assert not cycles, "import cycles: " + "; ".join(sorted(set(cycles)))


def test_the_flow_goes_one_way():
    """io and spectral lean on no stage; stages import neither writers nor plotting."""
    graph = _graph()
    for low in ("io", "spectral", "parallel", "plotting"):
        assert not (graph.get(low, set()) & {"maps", "linefit", "rings", "widths", "pipeline",
                                             "datasets"}), (low, graph.get(low))
    for path, tree in _modules():
        if _unit(path) in STAGES:
            bad = [m for m in _imports(path, tree) if m.startswith(WRITERS)]
            assert not bad, f"{path.relative_to(ROOT)} imports {bad}"


def _is_kernel(node) -> bool:
    names = {ast.unparse(d).split("(")[0] for d in node.decorator_list}
    return bool(names & {"njit", "numba.njit", "jit", "numba.jit", "_njit", "_kernel"})


def _code_lines(node) -> int:
    """Lines of a function from its first statement after the docstring to its end (the
    signature and the docstring do not count: a long parameter list documented well is not
    a long function)."""
    body = node.body
    if (body and isinstance(body[0], ast.Expr) and isinstance(body[0].value, ast.Constant)
            and isinstance(body[0].value.value, str) and len(body) > 1):
        body = body[1:]
    return node.end_lineno - body[0].lineno + 1


def test_functions_and_modules_stay_small():
    long_functions, long_modules = [], []
    for path, tree in _modules():
        kernels = "_kernel" in path.name or path.name.startswith("_kern_")
        lines = path.read_text().count("\n")
        if lines > 800 and not kernels:
            long_modules.append(f"{path.relative_to(ROOT)} ({lines})")
        for node in ast.walk(tree):
            if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)) and not _is_kernel(node):
                n = _code_lines(node)
                if n > 100:
                    long_functions.append(f"{path.relative_to(ROOT)}:{node.name} ({n})")
    assert not long_modules, long_modules
    assert not long_functions, long_functions


@pytest.mark.parametrize("folder", ["src", "tests", "benchmarks", "demo_cubes"])
def test_no_fixed_machine_paths(folder):
    pattern = re.compile(r"""["'](/work/|/home/|/root/|/Users/|C:\\)""")
    hits = [f"{p.relative_to(ROOT)}:{i}" for p in (ROOT / folder).rglob("*.py")
            for i, line in enumerate(p.read_text().splitlines(), 1) if pattern.search(line)]
    assert not hits, hits
