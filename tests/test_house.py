"""The house rules of the package layout (DEVELOPERS.md, "The house"), checked on the source.

These are the project's own rules, not facts from outside: the stage packages import only earlier
stages, modules import each other without cycles, private names stay inside their package, modules
stay under 500 lines, every import of a bayesgeo name resolves (in the package, the tests, the
examples, the benchmarks and the validation scripts), and the public API stays small and documented.
"""

from __future__ import annotations

import ast
import importlib
import subprocess
from pathlib import Path

import pytest

import bayesgeo

ROOT = Path(__file__).resolve().parents[1]
PACKAGE = ROOT / "bayesgeo"

#: The stage order of DEVELOPERS.md: a package may import its own modules and earlier packages only.
ORDER = ("common", "gp", "data", "explore", "convergence", "fitting", "checks", "predict", "stages", "report",
         "study", "calibration", "cli")

MAX_LINES = 500


def _modules() -> dict[str, Path]:
    out = {}
    for path in PACKAGE.rglob("*.py"):
        parts = path.relative_to(PACKAGE).with_suffix("").parts
        out[".".join(parts).removesuffix(".__init__") or "__init__"] = path
    return out


def _imports(path: Path, modules: dict[str, Path]) -> list[tuple[int, str, str]]:
    """(line, imported module, imported name) of every bayesgeo import in ``path``, at any depth, except
    imports under ``if TYPE_CHECKING``."""
    tree = ast.parse(path.read_text())
    skip = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.If) and "TYPE_CHECKING" in ast.unparse(node.test):
            skip.update(id(n) for n in ast.walk(node))
    out = []
    for node in ast.walk(tree):
        if id(node) in skip:
            continue
        if isinstance(node, ast.ImportFrom) and node.module and node.module.startswith("bayesgeo"):
            base = node.module.removeprefix("bayesgeo").lstrip(".")
            for alias in node.names:
                full = f"{base}.{alias.name}".lstrip(".")
                out.append((node.lineno, full if full in modules else base, alias.name))
        elif isinstance(node, ast.Import):
            out += [(node.lineno, a.name.removeprefix("bayesgeo."), "") for a in node.names
                    if a.name.startswith("bayesgeo.")]
    return out


def _package(module: str) -> str | None:
    head = module.split(".")[0]
    return head if head in ORDER else None


def test_every_module_sits_in_a_stage_package():
    """Besides the package's own __init__ and __main__, every module lives in one of the stage packages."""
    loose = [m for m in _modules() if _package(m) is None and m not in ("__init__", "__main__")]
    assert loose == []


def test_no_stage_imports_a_later_one():
    """Data flows one way: no module imports a package later in :data:`ORDER` (function-level imports too)."""
    modules = _modules()
    late = []
    for name, path in modules.items():
        src = _package(name)
        for line, target, _ in _imports(path, modules):
            dst = _package(target)
            if src and dst and ORDER.index(dst) > ORDER.index(src):
                late.append(f"{name}:{line} imports {target}")
    assert late == []


def test_no_import_cycles():
    """No two modules import each other, directly or through others (Tarjan's strongly connected components)."""
    modules = _modules()
    graph = {m: {t for _, t, _ in _imports(p, modules) if t in modules and t != m and t != "__init__"}
             for m, p in modules.items()}
    index, low, stack, on, cycles = {}, {}, [], set(), []

    def visit(v):
        index[v] = low[v] = len(index)
        stack.append(v)
        on.add(v)
        for w in graph[v]:
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            comp = []
            while True:
                w = stack.pop()
                on.discard(w)
                comp.append(w)
                if w == v:
                    break
            if len(comp) > 1:
                cycles.append(sorted(comp))

    for v in graph:
        if v not in index:
            visit(v)
    assert cycles == []


def test_private_names_stay_in_their_package():
    """A name with a leading underscore (module or object) is imported only inside its own package."""
    modules = _modules()
    leaks = []
    for name, path in modules.items():
        for line, target, imported in _imports(path, modules):
            private = imported.startswith("_") and imported != "__version__"
            if private and _package(target) and _package(target) != _package(name):
                leaks.append(f"{name}:{line} imports {target}.{imported}")
    assert leaks == []


def test_modules_stay_small():
    """Modules of a few hundred lines (STYLE.md): none above 500."""
    long = {name: n for name, path in _modules().items() if (n := len(path.read_text().splitlines())) > MAX_LINES}
    assert long == {}


def _tracked_python_files() -> list[Path]:
    out = subprocess.run(["git", "ls-files", "*.py"], cwd=ROOT, capture_output=True, text=True)
    if out.returncode != 0:
        pytest.skip("not a git checkout")
    return [ROOT / f for f in out.stdout.split()]


def test_every_bayesgeo_import_resolves():
    """Every ``from bayesgeo... import name`` in the repository (package, tests, examples, benchmarks,
    validation scripts; function-level imports too) names something that exists, and every attribute
    read through an imported bayesgeo module exists: a module move cannot leave a stale import behind."""
    missing = []
    for path in _tracked_python_files():
        tree = ast.parse(path.read_text())
        aliases = {}
        for node in ast.walk(tree):
            if isinstance(node, ast.ImportFrom) and node.module and node.module.startswith("bayesgeo"):
                mod = importlib.import_module(node.module)
                for alias in node.names:
                    if hasattr(mod, alias.name):
                        obj = getattr(mod, alias.name)
                    else:
                        try:
                            obj = importlib.import_module(f"{node.module}.{alias.name}")
                        except ImportError:
                            missing.append(f"{path.relative_to(ROOT)}:{node.lineno}: {node.module}.{alias.name}")
                            continue
                    if type(obj).__name__ == "module":
                        aliases[alias.asname or alias.name] = obj
            elif isinstance(node, ast.Import):
                for alias in node.names:
                    if alias.name.startswith("bayesgeo") and alias.asname:
                        aliases[alias.asname] = importlib.import_module(alias.name)
        for node in ast.walk(tree):
            if (isinstance(node, ast.Attribute) and isinstance(node.value, ast.Name) and node.value.id in aliases
                    and isinstance(node.ctx, ast.Load) and not hasattr(aliases[node.value.id], node.attr)):
                missing.append(f"{path.relative_to(ROOT)}:{node.lineno}: {aliases[node.value.id].__name__}.{node.attr}")
    assert missing == []


def test_public_api_is_small_and_documented():
    """About 25 names at the top level, each documented, in stage order (DEVELOPERS.md)."""
    names = bayesgeo.__all__
    assert 20 <= len(names) <= 32 and len(set(names)) == len(names)
    objects = {n: getattr(bayesgeo, n) for n in names}
    undocumented = [n for n, obj in objects.items() if callable(obj) and not (obj.__doc__ or "").strip()]
    assert undocumented == []
