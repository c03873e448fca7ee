"""The shipped systemd units agree with the code: known settings, real commands, a long enough stop timeout."""

from __future__ import annotations

import configparser
import shlex
from pathlib import Path

from service.cli.main import build_parser
from service.settings import _ENV_NAMES

SYSTEMD = Path(__file__).resolve().parents[3] / "docker" / "systemd"


def _unit(name: str) -> configparser.ConfigParser:
    parser = configparser.ConfigParser(strict=False, interpolation=None)
    parser.optionxform = str  # type: ignore[assignment,method-assign]
    parser.read_string((SYSTEMD / name).read_text().replace("\\\n", " "))
    return parser


def _environment() -> dict[str, str]:
    lines = [line for line in (SYSTEMD / "sealfold.env").read_text().splitlines() if line and not line.startswith("#")]
    return dict(line.split("=", 1) for line in lines)


def test_the_environment_file_names_only_settings_sealfold_reads() -> None:
    known = set(_ENV_NAMES.values()) | {"PROMETHEUS_MULTIPROC_DIR"}
    assert set(_environment()) <= known


def test_each_sealfold_command_in_a_unit_parses() -> None:
    for name in ("sealfold-upgrade.service", "sealfold-worker@.service"):
        argv = shlex.split(_unit(name)["Service"]["ExecStart"])
        assert argv[0].endswith("/sealfold")
        build_parser().parse_args(argv[1:])  # exits (SystemExit) on an unknown command


def test_the_api_unit_uses_the_gunicorn_settings_module_and_the_app_factory() -> None:
    argv = shlex.split(_unit("sealfold-api.service")["Service"]["ExecStart"])
    assert "python:service.api.gunicorn_conf" in argv and argv[-1] == "service.app:create_app()"


def test_a_worker_may_finish_a_fold_before_it_is_killed() -> None:
    timeout_stop = int(_unit("sealfold-worker@.service")["Service"]["TimeoutStopSec"])
    assert timeout_stop >= int(_environment()["SEALFOLD_FOLD_TIMEOUT"])
