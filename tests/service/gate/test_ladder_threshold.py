"""The parameter-free ladder's threshold as a multiple of its standard error (release.ladder_threshold_se)."""

from __future__ import annotations

import math
from dataclasses import replace
from datetime import UTC, datetime

import numpy as np
import pytest

from service.errors import InputError
from service.gate.policy import ReleaseParams, default_policy, parse_policy
from service.gate.release import HoldoutScores, release

NOW = datetime(2026, 3, 1, 12, 0, tzinfo=UTC)


def _moves(multiple: float, gain_in_se: float) -> bool:
    """Whether a submission better than the best by ``gain_in_se`` standard errors of the difference moves it."""
    base = default_policy("regression", ["mae"])
    policy = replace(base, release=replace(base.release, ladder_threshold_se=multiple))
    rng = np.random.default_rng(1)
    best = np.abs(rng.normal(1.0, 0.5, 400))
    first = release(policy, HoldoutScores("a", {"mae": float(best.mean())}, 1.0, 0.1, 100, 400, best), state=None,
                    spent_at=[], now=NOW, rng=rng)
    wiggle = rng.normal(0.0, 0.2, 400)
    # Blum & Hardt 2015's parameter-free threshold: sd(l_new - l_best) / sqrt(n), here times the multiple.
    se = float(np.std(wiggle, ddof=1)) / math.sqrt(400)
    level = first.state["ladder"]["released_loss"]
    new = best + wiggle - wiggle.mean() - (best.mean() - level) - gain_in_se * se
    out = release(policy, HoldoutScores("b", {"mae": float(new.mean())}, 1.0, 0.1, 100, 400, new),
                  state=first.state, spent_at=[], now=NOW, rng=rng, best_per_example=best)
    assert f"{multiple:g} x the standard error" in (out.note or "")
    return out.new_best


@pytest.mark.parametrize(("multiple", "gain", "moves"), [
    (1.0, 1.5, True), (2.5, 1.5, False), (2.5, 2.0, False), (2.5, 3.0, True), (3.0, 2.9, False), (3.0, 3.2, True)])
def test_the_threshold_is_the_multiple_of_the_standard_error(multiple: float, gain: float, moves: bool) -> None:
    assert _moves(multiple, gain) is moves


def test_the_default_multiple_is_the_measured_one_and_the_field_parses() -> None:
    assert ReleaseParams().ladder_threshold_se == 2.5  # bench/ladder_adaptive.py, README "What a submitter sees"
    parsed = parse_policy({"release": {"ladder_threshold_se": 1.5}}, "regression")
    assert parsed.release.ladder_threshold_se == 1.5
    with pytest.raises(InputError) as err:
        parse_policy({"release": {"ladder_threshold_se": 0}}, "regression")
    assert err.value.problems[0].pointer == "/release/ladder_threshold_se"
