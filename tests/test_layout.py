"""The package's layout tells the pipeline: stage sub-packages, imports only downwards, no import circles."""

from __future__ import annotations

import ast
import importlib
import pkgutil
import subprocess
import sys
from pathlib import Path

import wetlandflow

PACKAGE = Path(wetlandflow.__file__).parent

# The order of the stages of a run.  A module may import from its own stage and from lower ranks only;
# stages sharing a rank (validation and models; mapping, accuracy, explain and monitoring; report and demo)
# must not import each other in both directions.  Ground level (rank 0) is imported by everything.
RANKS = {
    "errors": 0, "progress": 0, "_provenance": 0, "_lazy": 0,
    "inputs": 1,
    "features": 2,
    "training": 3,
    "validation": 4, "models": 4,
    "mapping": 5, "accuracy": 5, "explain": 5, "monitoring": 5,
    "report": 6, "demo": 6,
    "pipeline": 7,
    "ui": 8,
}


def _module_name(path: Path) -> str:
    parts = list(path.relative_to(PACKAGE.parent).with_suffix("").parts)
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def _imports(path: Path) -> list[tuple[str, int]]:
    """Every ``wetlandflow`` module a file imports (top level or inside functions), with line numbers."""
    name = _module_name(path)
    package = name if path.name == "__init__.py" else name.rsplit(".", 1)[0]
    found = []
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[: len(base) - node.level + 1]
                module = ".".join(base + ([node.module] if node.module else []))
            else:
                module = node.module or ""
            if module == "wetlandflow" or module.startswith("wetlandflow."):
                found.append((module, node.lineno))
                found += [(f"{module}.{a.name}", node.lineno) for a in node.names
                          if _is_module(f"{module}.{a.name}")]
        elif isinstance(node, ast.Import):
            found += [(a.name, node.lineno) for a in node.names if a.name.startswith("wetlandflow")]
    return found


def _is_module(dotted: str) -> bool:
    rel = Path(*dotted.split(".")[1:])
    return (PACKAGE / rel).with_suffix(".py").exists() or (PACKAGE / rel / "__init__.py").exists()


def _stage(module: str) -> str | None:
    """The stage a module belongs to (``None`` for the root package itself)."""
    parts = module.split(".")
    return parts[1] if len(parts) > 1 else None


def _all_sources() -> list[Path]:
    return sorted(PACKAGE.rglob("*.py"))


def test_every_module_belongs_to_a_known_stage():
    unknown = {_stage(_module_name(p)) for p in _all_sources()} - set(RANKS) - {None}
    assert not unknown, f"modules outside the stage layout: {sorted(unknown)}; add them to a stage"


def test_no_stage_imports_a_later_stage():
    """A stage imports only from stages below it in the data flow; nothing imports pipeline or ui but ui."""
    offences = []
    for path in _all_sources():
        importer = _stage(_module_name(path))
        if importer is None:  # the root re-exports lazily (PEP 562): it imports no stage when imported
            continue
        for module, line in _imports(path):
            imported = _stage(module)
            if imported is None or imported == importer:
                continue
            if RANKS[imported] > RANKS[importer]:
                offences.append(f"{path.relative_to(PACKAGE.parent)}:{line} ({importer}) imports {module}")
            if imported in ("pipeline", "ui") and importer != "ui":
                offences.append(f"{path.relative_to(PACKAGE.parent)}:{line} imports {module}")
    assert not offences, "imports against the stage order:\n" + "\n".join(offences)


def test_stages_of_one_rank_do_not_import_each_other_both_ways():
    edges = set()
    for path in _all_sources():
        importer = _stage(_module_name(path))
        for module, _ in _imports(path):
            imported = _stage(module)
            if importer and imported and importer != imported:
                edges.add((importer, imported))
    both = sorted({tuple(sorted(e)) for e in edges if (e[1], e[0]) in edges})
    assert not both, f"stages importing each other: {both}"


def test_no_module_import_circle():
    """The module import graph (lazy imports inside functions included) has no cycle."""
    graph: dict[str, set[str]] = {}
    for path in _all_sources():
        name = _module_name(path)
        targets = {m for m, _ in _imports(path) if _is_module(m) and m != name}
        # importing a.b.c runs a/__init__ and a/b/__init__ first; a package's own modules are not its imports
        graph[name] = {t for t in targets if not name.startswith(t + ".")}
    done: set[str] = set()

    def visit(node: str, path: list[str]) -> list[str] | None:
        for nxt in sorted(graph.get(node, set()) & graph.keys()):
            if nxt in path:
                return path[path.index(nxt):] + [nxt]
            if nxt not in done and (cycle := visit(nxt, [*path, nxt])):
                return cycle
        done.add(node)
        return None

    for node in sorted(graph):
        cycle = visit(node, [node])
        assert cycle is None, "import circle: " + " -> ".join(cycle or [])


def test_every_module_imports_in_a_fresh_interpreter():
    names = sorted(m.name for m in pkgutil.walk_packages(wetlandflow.__path__, "wetlandflow."))
    code = (
        "import importlib, sys\n"
        f"for name in {names!r}:\n"
        "    importlib.import_module(name)\n"
        "print(len(sys.modules))\n"
    )
    # one interpreter per stage, so that no module relies on another stage having been imported first
    for stage in sorted(RANKS):
        chosen = [n for n in names if _stage(n) == stage]
        if not chosen:
            continue
        out = subprocess.run([sys.executable, "-c", code.replace(repr(names), repr(chosen))],
                             capture_output=True, text=True, timeout=300)
        assert out.returncode == 0, f"importing stage {stage!r} failed:\n{out.stderr[-2000:]}"


def test_package_exports_resolve_and_do_not_shadow_sub_modules():
    for stage in sorted(s for s, r in RANKS.items() if r > 0):
        package = importlib.import_module(f"wetlandflow.{stage}")
        sub_modules = {m.name for m in pkgutil.iter_modules(package.__path__)}
        shadowed = sorted(set(package.__all__) & sub_modules)
        assert not shadowed, f"wetlandflow.{stage} exports names equal to its sub-modules: {shadowed}"
        for name in package.__all__:
            assert getattr(package, name) is not None, f"wetlandflow.{stage}.{name}"
    for name in wetlandflow.__all__:
        assert getattr(wetlandflow, name) is not None, f"wetlandflow.{name}"


def test_importing_the_package_loads_no_stage():
    """``import wetlandflow`` stays light: the stages (and XGBoost, rasterio, SHAP) load on first use."""
    code = ("import sys, wetlandflow\n"
            "heavy = [m for m in ('xgboost', 'rasterio', 'shap', 'matplotlib', 'wetlandflow.pipeline',"
            " 'wetlandflow.inputs.layers') if m in sys.modules]\n"
            "print(','.join(heavy))\n"
            "assert wetlandflow.Grid.__module__ == 'wetlandflow.inputs.grid'\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == ""
