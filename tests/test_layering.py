"""The dependency direction of ARCHITECTURE.md, checked on the import statements of every module."""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent


def _imports(path: Path) -> set[str]:
    tree = ast.parse(path.read_text(), filename=str(path))
    names: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            names.add(node.module)
    return names


def _modules(package: str) -> list[Path]:
    return sorted((ROOT / package).rglob("*.py"))


def _top(name: str) -> str:
    return name.split(".")[0]


@pytest.mark.parametrize("path", _modules("service"), ids=lambda p: str(p.relative_to(ROOT)))
def test_service_never_imports_worker_or_sklearn(path: Path) -> None:
    tops = {_top(n) for n in _imports(path)}
    assert "worker" not in tops, f"{path.name} imports the worker package; enqueue 'worker.jobs.<name>' instead"
    assert "sklearn" not in tops, f"{path.name} imports scikit-learn; only worker/ may"


@pytest.mark.parametrize("path", _modules("service"), ids=lambda p: str(p.relative_to(ROOT)))
def test_only_the_api_layer_imports_flask(path: Path) -> None:
    rel = path.relative_to(ROOT / "service")
    if rel.parts[0] in ("api", "web") or rel == Path("app.py"):
        return  # the HTTP side: the JSON API and the browser desk
    tops = {_top(n) for n in _imports(path)}
    assert not tops & {"flask", "flask_smorest", "werkzeug"}, \
        f"service/{rel} imports Flask; only service/api and service/web may"


@pytest.mark.parametrize("path", _modules("worker"), ids=lambda p: str(p.relative_to(ROOT)))
def test_worker_never_imports_flask(path: Path) -> None:
    tops = {_top(n) for n in _imports(path)}
    assert not tops & {"flask", "flask_smorest", "werkzeug"}, f"{path.name} imports Flask"
    assert not any(n.startswith("service.api") or n == "service.app" for n in _imports(path))


def test_api_process_does_not_load_sklearn() -> None:
    """Building the app must not pull scikit-learn into the API process (it stays light)."""
    import subprocess
    import sys

    code = (
        "import sys\n"
        "from service.app import create_app\n"
        "from service.records.engine import make_engine\n"
        "from service.records.schema import upgrade\n"
        "from service.settings import Settings\n"
        "upgrade(make_engine(Settings.load({'data_dir': sys.argv[1]})))\n"
        "create_app({'data_dir': sys.argv[1], 'redis_url': 'redis://127.0.0.1:1/0'})\n"
        "print('sklearn' in sys.modules, 'worker' in sys.modules)\n"
    )
    import tempfile

    with tempfile.TemporaryDirectory() as tmp:
        out = subprocess.run([sys.executable, "-c", code, tmp], capture_output=True, text=True, check=True)
    assert out.stdout.split() == ["False", "False"], out.stdout + out.stderr


_WORKER_LAYERS = {"process": 0, "jobs": 1, "learning": 2}


@pytest.mark.parametrize("path", _modules("worker"), ids=lambda p: str(p.relative_to(ROOT)))
def test_worker_layers_import_downward_only(path: Path) -> None:
    """worker/process over worker/jobs over worker/learning: a layer never imports one above it."""
    rel = path.relative_to(ROOT / "worker")
    if len(rel.parts) < 2 or rel.parts[0] not in _WORKER_LAYERS:
        return
    own = _WORKER_LAYERS[rel.parts[0]]
    for name in _imports(path):
        parts = name.split(".")
        if parts[0] == "worker" and len(parts) > 1 and parts[1] in _WORKER_LAYERS:
            assert _WORKER_LAYERS[parts[1]] >= own, f"worker/{rel} imports {name}, a layer above it"


def _module_name(path: Path) -> str:
    parts = list(path.relative_to(ROOT).with_suffix("").parts)
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def test_no_module_imports_in_a_circle() -> None:
    """Module-level imports among service/ and worker/ form no cycle (imports inside functions excepted)."""
    paths = _modules("service") + _modules("worker")
    known = {_module_name(p) for p in paths}
    graph: dict[str, set[str]] = {}
    for path in paths:
        tree = ast.parse(path.read_text(), filename=str(path))
        targets: set[str] = set()
        for node in tree.body:  # module level only
            if isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
                for alias in node.names:
                    full = f"{node.module}.{alias.name}"
                    targets.add(full if full in known else node.module)
            elif isinstance(node, ast.Import):
                targets.update(alias.name for alias in node.names)
        graph[_module_name(path)] = {t for t in targets if t in known and t != _module_name(path)}
    state: dict[str, int] = {}
    stack: list[str] = []

    def visit(node: str) -> None:
        state[node] = 1
        stack.append(node)
        for nxt in sorted(graph.get(node, ())):
            if state.get(nxt) == 1:
                cycle = [*stack[stack.index(nxt):], nxt]
                pytest.fail("import cycle: " + " -> ".join(cycle))
            if nxt not in state:
                visit(nxt)
        stack.pop()
        state[node] = 2

    for module in sorted(graph):
        if module not in state:
            visit(module)
