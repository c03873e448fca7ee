"""Schemathesis over every operation of the committed surface: no 5xx, every answer as documented.

The app runs in-process (WSGI), and every operation goes through three of schemathesis's phases:
the spec's examples (missing ones filled in), sent with the key of each role; boundary values
(coverage phase); and generated requests, valid and invalid ("all" mode), sent with the key of a
drawn role. Half of the time path parameters name a real dataset or submission, so answers with
bodies are checked too and not only the 404s. ``-m fuzz`` selects this module, ``-m 'not fuzz'``
leaves it out; ``SEALFOLD_FUZZ_EXAMPLES`` and ``SEALFOLD_FUZZ_SEED`` change the budget and the seed.
"""

from __future__ import annotations

import itertools
import os
from typing import Any

import pytest
import schemathesis
from hypothesis import strategies as st
from schemathesis.checks import not_a_server_error
from schemathesis.specs.openapi.checks import response_schema_conformance

from service.api.spec_export import SPEC_FILE
from tests.service.api.conftest import FuzzTarget

pytestmark = [pytest.mark.fuzz, pytest.mark.timeout(600)]

# Generated requests per operation: the whole module takes 1-2 minutes on 2 cores.
MAX_EXAMPLES = int(os.environ.get("SEALFOLD_FUZZ_EXAMPLES", "40"))
SEED = int(os.environ.get("SEALFOLD_FUZZ_SEED", "20260101"))
ROLES = ("submitter", "steward", "admin")
CHECKS = [not_a_server_error, response_schema_conformance]


def _config(phase: str) -> schemathesis.Config:
    phases = {name: {"enabled": name == phase} for name in ("examples", "coverage", "fuzzing", "stateful")}
    return schemathesis.Config.from_dict({
        "seed": SEED,
        "generation": {"mode": "all", "max-examples": MAX_EXAMPLES, "database": "none"},
        "phases": {**phases, "examples": {"enabled": phase == "examples", "fill-missing": True}},
        "checks": {"enabled": False, **{check.__name__: {"enabled": True} for check in CHECKS}},
    })


# The committed document (test_spec checks that it is what the app serves).
examples = schemathesis.openapi.from_path(SPEC_FILE, config=_config("examples"))
boundaries = schemathesis.openapi.from_path(SPEC_FILE, config=_config("coverage"))
generated = schemathesis.openapi.from_path(SPEC_FILE, config=_config("fuzzing"))
_turns = itertools.cycle(itertools.product(ROLES, (True, False)))


def _aim(case: Any, target: FuzzTarget, pick: int) -> None:
    """Point the case's dataset and submission path parameters at real records."""
    real = {"ds_id": target.dataset_ids, "sub_id": target.submission_ids}
    for name, ids in real.items():
        if name in (case.path_parameters or {}):
            case.path_parameters[name] = ids[pick % len(ids)]


def _send(case: Any, target: FuzzTarget, who: str) -> None:
    case.call_and_validate(app=target.api.app, headers={"Authorization": f"Bearer {target.api.tokens[who]}"},
                           checks=CHECKS)


@examples.parametrize()
def test_spec_examples_for_every_role(case: Any, fuzz_target: FuzzTarget) -> None:
    for pick, who in enumerate(ROLES):
        _aim(case, fuzz_target, pick)
        _send(case, fuzz_target, who)


@boundaries.parametrize()
def test_boundary_values(case: Any, fuzz_target: FuzzTarget) -> None:
    # Schemathesis's coverage phase: each field missing, of the wrong type, at and beyond its bounds.
    # It is deterministic, so roles and real ids take turns instead of being drawn.
    who, known = next(_turns)
    if known:
        _aim(case, fuzz_target, ROLES.index(who))
    _send(case, fuzz_target, who)


@generated.parametrize()
@generated.given(who=st.sampled_from(ROLES), known=st.booleans(), pick=st.integers(0, 7))
def test_generated_requests(case: Any, who: str, known: bool, pick: int, fuzz_target: FuzzTarget) -> None:
    if known:
        _aim(case, fuzz_target, pick)
    _send(case, fuzz_target, who)
