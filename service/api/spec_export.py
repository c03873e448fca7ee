"""Write the OpenAPI document of the v1 surface to ``openapi/openapi.json``.

Run ``python -m service.api.spec_export`` after changing a route or a schema and commit the file;
``tests/service/api/test_spec.py`` fails while the committed file and the code disagree.
"""

from __future__ import annotations

import argparse
import json
import tempfile
from pathlib import Path
from typing import Any

SPEC_FILE = Path(__file__).resolve().parents[2] / "openapi" / "openapi.json"
REGENERATE = "python -m service.api.spec_export"


def generate_spec() -> dict[str, Any]:
    """Build a throwaway app (temporary data dir and SQLite records, upgraded so the app starts) and return its spec."""
    from service.app import create_app
    from service.records.engine import make_engine
    from service.records.schema import upgrade
    from service.settings import Settings

    with tempfile.TemporaryDirectory(prefix="sealfold-spec-") as tmp:
        overrides = {"data_dir": tmp, "redis_url": "redis://127.0.0.1:1/0", "database_url": ""}
        engine = make_engine(Settings.load(overrides))
        upgrade(engine)
        engine.dispose()
        app = create_app(overrides)
        response = app.test_client().get("/openapi.json")
        spec: dict[str, Any] = response.get_json()
        app.extensions["sealfold"].engine.dispose()
    return spec


def render(spec: dict[str, Any]) -> str:
    """Serialise the spec the way it is committed: sorted keys, two-space indent, final newline."""
    return json.dumps(spec, indent=2, sort_keys=True, ensure_ascii=False) + "\n"


def main(argv: list[str] | None = None) -> int:
    """Write the spec file (default: the repo's openapi/openapi.json)."""
    parser = argparse.ArgumentParser(prog="python -m service.api.spec_export", description=__doc__)
    parser.add_argument("--output", type=Path, default=SPEC_FILE, help="where to write the spec")
    args = parser.parse_args(argv)
    args.output.parent.mkdir(parents=True, exist_ok=True)
    args.output.write_text(render(generate_spec()), encoding="utf-8")
    print(f"wrote {args.output}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
