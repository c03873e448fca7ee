"""The champion decision on the sealed rows: one non-inferiority test, at the level the stream allows.

The development partition and its folds are public, so a submitter can pick, among many
configurations, the one that happens to do well on exactly those folds; the CV comparison with the
champion is then optimistic. The sealed rows cannot be selected on that way. This rule compares the
candidate's per-row values on the sealed rows with the champion's (service.gate.noninferiority),
tests at the level the dataset's online procedure gives the next test (service.gate.online), and
leaves the service with its outcome and that level only: no estimate, statistic or p-value, which
would each tell more about the sealed rows than one bit.

It is one holdout query: the caller counts it against the submitter's release budget and, with no
budget left, withholds it (the rule is then inconclusive and the stream does not advance).

Which form of the test applies follows the metric (``PER_EXAMPLE_FORMS``): a mean of per-row values,
rmse (the square root of one), or anything else (the paired bootstrap, through a callable the worker
builds from the kept predictions with scikit-learn's own metric).
"""

from __future__ import annotations

import hashlib
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

from service.gate import noninferiority as ni
from service.gate.online import NO_CONTROL, Stream, next_level
from service.gate.policy import Policy
from service.gate.release import PER_EXAMPLE_FORMS

RULE = "champion_holdout"
BOOTSTRAP_RESAMPLES = 1000


@dataclass(frozen=True)
class SealedRows:
    """What is kept of one model on the sealed rows: per-row values of the metric, or a way to score rows."""

    per_example: np.ndarray | None  # mean = the metric (rmse: squared errors); None for other metrics
    n_rows: int


@dataclass(frozen=True)
class Decision:
    """One holdout champion decision: the test (kept inside), the level and its place in the stream."""

    test: ni.NonInferiority
    level: float
    index: int  # 1-based position in the dataset's stream
    passed: bool


def test_form(metric: str) -> str:
    """Return the test a metric's holdout champion decision uses."""
    form = PER_EXAMPLE_FORMS.get(metric)
    return ni.PAIRED_T_ROWS if form == "mean" else ni.DELTA_RMSE if form == "sqrt_of_mean" else ni.PAIRED_BOOTSTRAP


def bootstrap_seed(candidate_id: str, champion_id: str) -> int:
    """Seed the bootstrap from the pair, so a retried verdict job reaches the same decision."""
    return int.from_bytes(hashlib.sha256(f"{candidate_id}:{champion_id}".encode()).digest()[:8], "big")


def decide(
    policy: Policy, stream: Stream, candidate: SealedRows, champion: SealedRows, *,
    candidate_id: str, champion_id: str,
    score_rows: Callable[[np.ndarray], tuple[float, float]] | None = None,
) -> Decision:
    """Test the candidate against the champion at the stream's next level.

    ``score_rows(rows)`` returns (candidate, champion) metric values on the given sealed row indices;
    it is needed only for metrics that are not a mean of per-row values.
    """
    form = test_form(policy.primary_metric)
    margin, gib = policy.champion_margin, policy.greater_is_better
    if form != ni.PAIRED_BOOTSTRAP and (candidate.per_example is None or champion.per_example is None):
        raise ValueError(f"the per-row values of {policy.primary_metric} are needed for both models")
    if form == ni.PAIRED_T_ROWS:
        assert candidate.per_example is not None and champion.per_example is not None
        test = ni.mean_rows(candidate.per_example, champion.per_example, margin, gib)
    elif form == ni.DELTA_RMSE:
        assert candidate.per_example is not None and champion.per_example is not None
        test = ni.rmse_rows(candidate.per_example, champion.per_example, margin)
    else:
        if score_rows is None:
            raise ValueError(f"{policy.primary_metric} needs a paired bootstrap: pass score_rows")
        rng = np.random.default_rng(bootstrap_seed(candidate_id, champion_id))
        test = ni.paired_bootstrap(score_rows, candidate.n_rows, margin, gib, rng, BOOTSTRAP_RESAMPLES)
    level = next_level(stream, policy.champion_online, policy.champion_alpha)
    return Decision(test, level, stream.tests + 1, test.rejects(level))


def rule(policy: Policy, champion_id: str, decision: Decision, *, decides: bool) -> dict[str, Any]:
    """Return the verdict's rule entry: the outcome and the level, nothing computed from the rows."""
    margin = policy.champion_margin
    figures = {"champion": champion_id, "margin": margin, "alpha": policy.champion_alpha, "level": decision.level,
               "online": policy.champion_online, "stream_index": decision.index, "test": decision.test.method,
               "decides": decides}
    how = (f"test {decision.index} of this dataset's champion decisions on the sealed rows, at level "
           f"{decision.level:.3g}" + ("" if policy.champion_online == NO_CONTROL else
                                      f" ({policy.champion_online}, alpha {policy.champion_alpha:g})"))
    if decision.passed:
        sentence = (f"Shown not worse than champion {champion_id} by more than the margin {margin:g} on the sealed "
                    f"rows ({how}).")
        return _entry("pass", sentence, figures)
    sentence = (f"Not shown within the margin {margin:g} of champion {champion_id} on the sealed rows ({how}); "
                "only this outcome and its level are released.")
    return _entry("fail", sentence, figures)


def not_decided(policy: Policy, champion_id: str | None, reason: str, *, decides: bool,
                outcome: str = "inconclusive") -> dict[str, Any]:
    """Return the rule entry when no decision was made (no champion, no budget, nothing kept)."""
    figures = {"champion": champion_id, "margin": policy.champion_margin, "alpha": policy.champion_alpha,
               "level": None, "online": policy.champion_online, "decides": decides}
    return _entry(outcome, reason, figures)


def _entry(outcome: str, sentence: str, figures: dict[str, Any]) -> dict[str, Any]:
    return {"rule": RULE, "outcome": outcome, "sentence": sentence, "figures": figures}
