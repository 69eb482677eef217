"""The package's import graph: imports point downward only, no cycles, no hidden local imports.

Layers, lowest first (DEVELOPERS.md, "Layout"): ``crosswind.models`` → the shared tables and
helpers (``crosswind.solver.vocabulary``, ``crosswind.solver.pytrees``) → ``crosswind.solver.engine``
→ ``crosswind.solver.study`` → ``crosswind.solver.reporting`` → ``crosswind.solver.fitting`` →
``crosswind.validation`` → the application entry points (``crosswind.solver.cli``,
``crosswind.solver.demo``) and the public facade ``crosswind.solver`` itself.  A module may import
its own layer or any layer below; the graph of module-to-module imports (function bodies included)
must have no cycle.  Function-local imports are allowed only for optional heavy libraries.
"""
from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PACKAGES = {"crosswind": ROOT / "solver" / "root_package", "crosswind.models": ROOT / "models",
            "crosswind.solver": ROOT / "solver", "crosswind.validation": ROOT / "validation"}
LAYERS = [("crosswind",), ("crosswind.models",), ("crosswind.solver.vocabulary", "crosswind.solver.pytrees"),
          ("crosswind.solver.engine",), ("crosswind.solver.study",),
          ("crosswind.solver.reporting",), ("crosswind.solver.fitting",), ("crosswind.validation",),
          ("crosswind.solver.cli", "crosswind.solver.demo", "crosswind.solver")]
# heavy libraries of the file and figure stack, imported only by the functions that write files;
# dask/distributed: the optional cluster extra, imported only inside solver/study/cluster.py's functions
# so that a run without --cluster never imports Dask from Crosswind (nor pays its start-up time)
LOCAL_IMPORTS_ALLOWED = ("matplotlib", "xarray", "pandas", "tqdm", "dask", "distributed")


def _modules() -> dict[str, Path]:
    out = {}
    for pkg, folder in PACKAGES.items():
        for path in folder.rglob("*.py"):
            if pkg == "crosswind.solver" and "root_package" in path.parts:
                continue
            rel = path.relative_to(folder).with_suffix("")
            parts = [p for p in rel.parts if p != "__init__"]
            out[".".join([pkg, *parts])] = path
    return out


MODULES = _modules()


def _is_package(name: str) -> bool:
    return MODULES[name].name == "__init__.py"


def _resolve(module: str, node: ast.ImportFrom | ast.Import) -> list[str]:
    """The package modules an import statement loads (ignoring everything outside the package)."""
    if isinstance(node, ast.Import):
        names = [a.name for a in node.names]
    else:
        base = node.module or ""
        if node.level:
            pkg = module if _is_package(module) else module.rsplit(".", 1)[0]
            for _ in range(node.level - 1):
                pkg = pkg.rsplit(".", 1)[0]
            base = f"{pkg}.{base}" if base else pkg
        names = [f"{base}.{a.name}" if f"{base}.{a.name}" in MODULES else base for a in node.names]
    found = []
    for n in names:
        while n and n not in MODULES:
            n = n.rsplit(".", 1)[0] if "." in n else ""
        if n:
            found.append(n)
    return found


def _imports(module: str):
    """(target module, line, is function-local, imported top name) for every import in ``module``."""
    tree = ast.parse(MODULES[module].read_text(encoding="utf-8"))
    out = []

    def visit(node, local):
        for child in ast.iter_child_nodes(node):
            inner = local or isinstance(child, (ast.FunctionDef, ast.AsyncFunctionDef, ast.Lambda))
            if isinstance(child, (ast.Import, ast.ImportFrom)):
                top = (child.names[0].name if isinstance(child, ast.Import) else (child.module or "")).split(".")[0]
                targets = _resolve(module, child)
                out.append((targets, child.lineno, local, top if not getattr(child, "level", 0) else "crosswind"))
            visit(child, inner)

    visit(tree, False)
    return out


def _where(module: str) -> str:
    path = MODULES[module]
    return str(path.relative_to(ROOT)) if path.is_relative_to(ROOT) else path.name


def _layer(module: str) -> int:
    best, level = -1, None
    for i, prefixes in enumerate(LAYERS):
        for p in prefixes:
            if (module == p or module.startswith(p + ".")) and len(p) > best:
                best, level = len(p), i
    assert level is not None, f"{module} belongs to no layer; add it to LAYERS"
    return level


def test_the_graph_sees_every_subpackage():
    assert {"crosswind.solver.engine.response", "crosswind.solver.study.chain", "crosswind.solver.study.sweep",
            "crosswind.solver.reporting.report", "crosswind.solver.fitting.fit", "crosswind.models.registry"} <= set(MODULES)


def test_imports_point_downward_only():
    bad = []
    for m in MODULES:
        for targets, line, _, _ in _imports(m):
            for t in targets:
                if t != m and _layer(t) > _layer(m):
                    bad.append(f"{_where(m)}:{line} imports {t} (a higher layer)")
    assert not bad, "\n".join(bad)


def test_no_import_cycles():
    graph = {m: sorted({t for targets, *_ in _imports(m) for t in targets if t != m}) for m in MODULES}
    state, stack, cycles = {}, [], []

    def dfs(m):
        state[m] = 1
        stack.append(m)
        for t in graph[m]:
            if state.get(t) == 1:
                cycles.append(" → ".join(stack[stack.index(t):] + [t]))
            elif t not in state:
                dfs(t)
        stack.pop()
        state[m] = 2

    for m in sorted(graph):
        if m not in state:
            dfs(m)
    assert not cycles, "import cycles:\n" + "\n".join(cycles)


def test_function_local_imports_only_for_optional_heavy_libraries():
    bad = [f"{_where(m)}:{line} imports {top} inside a function"
           for m in MODULES for targets, line, local, top in _imports(m)
           if local and top not in LOCAL_IMPORTS_ALLOWED]
    assert not bad, "\n".join(bad)


def test_the_registry_does_not_import_the_catalogue_it_registers():
    targets = {t for ts, *_ in _imports("crosswind.models.registry") for t in ts}
    assert not any(t.startswith("crosswind.models.builtin") for t in targets)


@pytest.mark.parametrize("statement", [
    "from crosswind.models import build, band_geometry",
    "from crosswind.solver import response, sensitivities, chern_number",
    "from crosswind import __version__",
])
def test_public_imports_keep_working(statement):
    exec(statement, {})


def test_the_checker_catches_an_upward_import(tmp_path, monkeypatch):
    """The checker itself can fail: an engine module importing the study layer is reported."""
    fake = tmp_path / "bad.py"
    fake.write_text("from crosswind.solver.study.chain import evaluate\n")
    monkeypatch.setitem(MODULES, "crosswind.solver.engine.bad", fake)
    with pytest.raises(AssertionError, match="bad.py:1 imports crosswind.solver.study.chain"):
        test_imports_point_downward_only()
