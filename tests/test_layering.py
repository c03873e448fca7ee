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
    if rel.parts[0] == "api" or rel == Path("app.py"):
        return
    tops = {_top(n) for n in _imports(path)}
    assert not tops & {"flask", "flask_smorest", "werkzeug"}, f"service/{rel} imports Flask; only service/api may"


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
