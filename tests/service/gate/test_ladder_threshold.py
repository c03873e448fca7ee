"""The parameter-free ladder's threshold and shrink, as multiples of its standard error (release.ladder_*_se)."""

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


def test_the_default_multiples_are_the_measured_ones_and_the_fields_parse() -> None:
    # bench/ladder_adaptive.py, README "Why the parameter-free ladder is 2 and 1 standard errors"
    assert (ReleaseParams().ladder_threshold_se, ReleaseParams().ladder_shrink_se) == (2.0, 1.0)
    parsed = parse_policy({"release": {"ladder_threshold_se": 1.5, "ladder_shrink_se": 0.5}}, "regression")
    assert (parsed.release.ladder_threshold_se, parsed.release.ladder_shrink_se) == (1.5, 0.5)
    with pytest.raises(InputError) as err:
        parse_policy({"release": {"ladder_threshold_se": 0}}, "regression")
    assert err.value.problems[0].pointer == "/release/ladder_threshold_se"


def test_the_shrink_must_stay_below_the_threshold_so_a_new_best_always_moves_the_figure() -> None:
    with pytest.raises(InputError) as err:
        parse_policy({"release": {"ladder_threshold_se": 1.0}}, "regression")  # the default shrink is 1
    assert err.value.problems[0].pointer == "/release/ladder_shrink_se"
    assert "smaller than ladder_threshold_se" in err.value.problems[0].detail
    with pytest.raises(InputError) as err:
        parse_policy({"release": {"ladder_shrink_se": -0.5}}, "regression")
    assert err.value.problems[0].pointer == "/release/ladder_shrink_se"
    assert parse_policy({"release": {"ladder_shrink_se": 0}}, "regression").release.ladder_shrink_se == 0.0


def _two_releases(shrink: float) -> tuple[float, float, float, float, str]:
    """Release a first best, then one 3 standard errors better; return (first figure, second figure, the
    second's raw mae, the standard error of the difference, the second's note)."""
    base = default_policy("regression", ["mae"])
    policy = replace(base, release=replace(base.release, ladder_shrink_se=shrink))
    rng = np.random.default_rng(4)
    best = np.abs(rng.normal(1.0, 0.5, 400))
    first = release(policy, HoldoutScores("a", {"mae": float(best.mean())}, 1.0, 0.1, 100, 400, best), state=None,
                    spent_at=[], now=NOW, rng=rng)
    wiggle = rng.normal(0.0, 0.2, 400)
    se = float(np.std(wiggle, ddof=1)) / math.sqrt(400)  # Blum & Hardt 2015: sd(l_new - l_best) / sqrt(n)
    new = best + wiggle - wiggle.mean() - 3.0 * se
    out = release(policy, HoldoutScores("b", {"mae": float(new.mean())}, 1.0, 0.1, 100, 400, new),
                  state=first.state, spent_at=[], now=NOW, rng=rng, best_per_example=best)
    assert first.released is not None and out.released is not None and out.new_best
    return first.released["mae"], out.released["mae"], float(new.mean()), se, out.note or ""


def test_the_first_release_is_exact_and_a_later_new_best_is_shown_shrunk_by_its_standard_error() -> None:
    first, second, raw, se, note = _two_releases(1.0)
    assert first == pytest.approx(float(f"{raw + 3.0 * se:.3g}"))  # the first best's own mae, 3 digits
    # mae is a loss: shrinking the figure means adding one standard error of the gain, then 3 digits
    assert second == float(f"{raw + se:.3g}")
    assert second < first  # threshold 2 > shrink 1: the figure still improves
    assert "less 1 standard error of its gain" in note
    _, unshrunk, raw0, _, note0 = _two_releases(0.0)
    assert unshrunk == float(f"{raw0:.3g}") and "less" not in note0
