"""The layout shows the architecture: module sizes, no import cycles, thin package files and a
light ``import lshjob``. The import direction between layers (cli -> jobs -> stages -> core) is
checked by import-linter from ``.importlinter`` (run in ``.ci/run``); these tests cover the rest.

Oracle: the module graph is built here from the source with ``ast``, independently of
import-linter, so a cycle is found even between siblings that the layer contract allows.
"""

from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent

PACKAGE = Path(__file__).resolve().parent.parent / "lshjob"
MAX_LINES = 400


def _modules() -> dict[str, Path]:
    found = {}
    for path in sorted(PACKAGE.rglob("*.py")):
        parts = path.relative_to(PACKAGE.parent).with_suffix("").parts
        name = ".".join(parts[:-1] if parts[-1] == "__init__" else parts)
        found[name] = path
    return found


def _imports(name: str, path: Path, known: set[str]) -> set[str]:
    """The lshjob modules ``name`` imports at module level (function-level imports are how a
    command defers heavy libraries, so they may point anywhere the layer rule allows)."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    package = name if path.name == "__init__.py" else name.rpartition(".")[0]
    targets: set[str] = set()
    for node in tree.body:
        if isinstance(node, ast.If) and "TYPE_CHECKING" in ast.unparse(node.test):
            continue
        for sub in [node] if isinstance(node, (ast.Import, ast.ImportFrom)) else []:
            if isinstance(sub, ast.Import):
                targets.update(alias.name for alias in sub.names)
            else:
                base = sub.module or ""
                if sub.level:
                    up = package.split(".")[: len(package.split(".")) - (sub.level - 1)]
                    base = ".".join(up + ([base] if base else []))
                targets.add(base)
                targets.update(f"{base}.{alias.name}" for alias in sub.names)
    resolved = set()
    for target in targets:
        while target and target not in known:
            target = target.rpartition(".")[0]
        if target and target != name and target.startswith("lshjob"):
            resolved.add(target)
    return resolved


def test_no_module_is_over_the_line_limit():
    long = {name: n for name, path in _modules().items()
            if (n := len(path.read_text(encoding="utf-8").splitlines())) > MAX_LINES}
    assert not long, f"modules over {MAX_LINES} lines: {long}"


def _cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    """Tarjan's strongly connected components; a component of two or more modules is a cycle."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    cycles: list[list[str]] = []

    def visit(node: str) -> None:
        index[node] = low[node] = len(index)
        stack.append(node)
        on_stack.add(node)
        for nxt in graph.get(node, ()):
            # a module importing its own package's __init__ is how Python loads it, not a cycle
            if node.startswith(nxt + "."):
                continue
            if nxt not in index:
                visit(nxt)
                low[node] = min(low[node], low[nxt])
            elif nxt in on_stack:
                low[node] = min(low[node], index[nxt])
        if low[node] == index[node]:
            component = []
            while True:
                top = stack.pop()
                on_stack.discard(top)
                component.append(top)
                if top == node:
                    break
            if len(component) > 1:
                cycles.append(sorted(component))

    for node in graph:
        if node not in index:
            visit(node)
    return cycles


def test_no_import_cycle_at_module_level():
    modules = _modules()
    graph = {name: _imports(name, path, set(modules)) - {"lshjob"} for name, path in modules.items()}
    assert not _cycles(graph), f"import cycles: {_cycles(graph)}"


def test_the_cycle_finder_finds_a_planted_cycle(tmp_path):
    # The check above must be able to fail: two modules that import each other are a cycle.
    a, b = tmp_path / "a.py", tmp_path / "b.py"
    a.write_text("import lshjob.b\n")
    b.write_text("from lshjob import a\n")
    known = {"lshjob", "lshjob.a", "lshjob.b"}
    assert _imports("lshjob.a", a, known) == {"lshjob.b"}
    graph = {"lshjob.a": _imports("lshjob.a", a, known), "lshjob.b": _imports("lshjob.b", b, known) - {"lshjob"}}
    assert _cycles(graph) == [["lshjob.a", "lshjob.b"]]
    assert _cycles({"lshjob.a": {"lshjob.b"}, "lshjob.b": set()}) == []


def test_package_init_files_only_re_export():
    # A package's __init__ holds no work: imports, __all__, a docstring, and at most the
    # lazy-loading hook (PEP 562) of the top-level package.
    allowed = (ast.Import, ast.ImportFrom, ast.Expr, ast.Assign, ast.AnnAssign)
    for path in PACKAGE.rglob("__init__.py"):
        tree = ast.parse(path.read_text(encoding="utf-8"))
        extra = [type(node).__name__ for node in tree.body if not isinstance(node, allowed)
                 and not (isinstance(node, ast.FunctionDef) and node.name in ("__getattr__", "__dir__"))]
        assert not extra, f"{path.relative_to(PACKAGE.parent)} does work: {extra}"


@pytest.mark.parametrize("statement", [
    "import lshjob",
    "from lshjob import EventSpec, ParameterError, SignatureParams",
    "import lshjob.cli.console",
])
def test_light_import_loads_no_compiler_or_engine(statement):
    # ``import lshjob`` (and the console entry before it parses options) loads neither numba
    # (compiles kernels) nor DuckDB (the join engine): each comes when a stage needs it.
    script = f"import sys\n{statement}\nprint(sorted(m for m in ('numba', 'duckdb') if m in sys.modules))"
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=120, check=True)
    assert done.stdout.strip() == "[]", done.stdout


def test_import_layers_hold():
    # import-linter reads .importlinter: cli/report above jobs above the stages (audit, index,
    # plan, sign, ingest in that order) above the core services and core.
    linter = Path(sys.executable).parent / "lint-imports"
    if not linter.exists():
        pytest.skip("import-linter is not installed (pip install '.[test]')")
    done = subprocess.run([str(linter), "--config", str(ROOT / ".importlinter")], cwd=ROOT,
                          capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stdout[-3000:] + done.stderr[-2000:]


def test_ruff_is_clean():
    # ruff reads [tool.ruff] in pyproject.toml (line length 120, the rule sets chosen there);
    # a new finding anywhere in the repository fails here with ruff's own report.
    ruff = Path(sys.executable).parent / "ruff"
    if not ruff.exists():
        pytest.skip("ruff is not installed (pip install '.[test]')")
    done = subprocess.run([str(ruff), "check", "--no-cache", "--output-format", "concise", "."], cwd=ROOT,
                          capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stdout[-3000:] + done.stderr[-2000:]
