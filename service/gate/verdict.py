"""Judge a submission against its dataset's policy and build its verdict document (``result.verdict``).

Rules, each with figures and one plain sentence:
- baseline: the candidate beats the baseline (corrected resampled t, one-sided, paired on the same
  folds; with the 5x2cv option Dietterich's test, whose one-sided p is t.sf(t, 5): half the two-sided
  p when t > 0, one minus half of it otherwise).
- bar: the CV mean meets the policy's absolute bar (skipped when none is set).
- champion: non-inferiority, the same test on d + margin over the (repeat, fold) cells both have;
  only when both ran the same fold plan (scheme, folds, seed) -- the champion's configuration is
  scored on the candidate's plan when they differ (``ChampionFolds.replayed``). Without such scores,
  inconclusive, never a pass.
- champion_holdout: non-inferiority on the sealed rows, paired per row, at the level the dataset's
  online procedure allows (service.gate.holdout_champion; the verdict job makes it). The policy's
  champion_rule says which of the two champion rules decides (cv, holdout or both); the other is
  shown with ``figures.decides`` false and does not enter the decision.
- holdout_gap: |holdout - cv_mean| <= half width of the t prediction interval at the policy's
  false-fail rate + floor (``statistics.holdout_interval``: Nadeau & Bengio's correlated-fold term,
  the holdout's size, J - 1 degrees of freedom); skipped without a holdout score. A holdout outside
  it still passes when the score without its few largest per-row losses (``trimmed_rows``: 1 %,
  at most 5) lies inside: a few extreme rows are not a verdict on the model. Its figures never
  contain the holdout score or the gap: what a submitter sees of the holdout is decided by
  service.gate.release alone. Its outcome is a bit about the holdout, so it is judged only
  on the figure as released (a function of a counted release tells nothing more), and shown as
  withheld (skipped, counting for nothing) whenever no own figure of the submission was released. A
  holdout attempt that failed, when the release policy lets that be told, fails it in fixed words.
- fold_stability: fold std <= max_fold_std (skipped when not set).

The burden of proof is on the candidate: a test that does not reach its level fails the rule. A
degenerate test (fewer than two paired cells, or all differences equal) is inconclusive, except that
all-equal differences that show no advantage at all (<= 0) fail: no fold favours the candidate.
Decision: fail if any rule fails, else inconclusive if any is, else pass.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from service.gate import holdout_champion as hc
from service.gate.policy import Policy
from service.gate.statistics import (
    CORRECTED_RESAMPLED_T,
    FIVE_BY_TWO_CV,
    PairedTest,
    corrected_resampled_t,
    five_by_two_cv_t,
    holdout_interval,
)

Cell = tuple[int, int]  # (repeat, fold)
FIVE_BY_TWO_CELLS = frozenset((r, f) for r in range(5) for f in range(2))
_ORDER = {"fail": 0, "inconclusive": 1, "pass": 2, "skipped": 3}
# Scores equal to this relative tolerance are the same score (e.g. a candidate identical to the baseline).
_SAME_SCORE_RTOL = 1e-12


@dataclass(frozen=True)
class PlanFacts:
    """The fold plan a submission ran and its (train_rows, test_rows) per cell."""

    key: tuple[str, int, int]  # (scheme, folds, seed); equal keys mean identical splits per repeat
    sizes: Mapping[Cell, tuple[int, int]]
    overridden: bool = False  # the submission's folds differ from the dataset's plan
    holdout_rows: int | None = None  # size of the sealed partition; scales the holdout-gap allowance
    test: str = CORRECTED_RESAMPLED_T  # or FIVE_BY_TWO_CV (the "5x2cv" validation option)


@dataclass(frozen=True)
class TrimmedHoldout:
    """The holdout's primary metric recomputed without its ``rows`` largest per-row losses.

    Lets the consistency rule tell a model that is off from a holdout with a few extreme rows. It is
    derived from sealed rows, so, like the holdout score, it never appears in a verdict.
    """

    score: float
    rows: int


@dataclass(frozen=True)
class ChampionFolds:
    """The champion in force: its id, primary-metric fold scores and the fold plan they came from."""

    submission_id: str
    scores: Mapping[Cell, float]
    plan_key: tuple[str, int, int]
    replayed: bool = False  # its configuration scored on the candidate's plan, not its own folds


def judge(
    policy: Policy, candidate: Mapping[Cell, float], baseline: Mapping[Cell, float],
    champion: ChampionFolds | None, holdout: float | None, plan: PlanFacts, *, policy_version: int,
    holdout_hidden: str | None = None, holdout_failed: bool = False,
    champion_holdout: Mapping[str, Any] | None = None, holdout_rule: dict[str, Any] | None = None,
    holdout_trimmed: TrimmedHoldout | None = None,
) -> dict[str, Any]:
    """Return the verdict document for a candidate's primary-metric fold scores.

    ``holdout`` is the released figure (never a raw score the release withheld); ``holdout_hidden``
    says why the holdout rule is withheld; ``holdout_failed``: the attempt failed and that is released.
    ``champion_holdout`` is the rule entry of the champion decision on the sealed rows
    (service.gate.holdout_champion), made by the verdict job; None when it was not made.
    ``holdout_rule``, when given, stands for the holdout-gap rule instead of checking it on ``holdout``:
    a re-judge passes the answer an earlier verdict already gave, or a rule saying the check is withheld.
    ``holdout_trimmed``: the holdout score without its few largest per-row losses (see ``trimmed_rows``),
    for the metrics whose per-row losses are unbounded.
    """
    if plan.test not in (CORRECTED_RESAMPLED_T, FIVE_BY_TWO_CV):
        raise ValueError(f"test must be {CORRECTED_RESAMPLED_T} or {FIVE_BY_TWO_CV}, got {plan.test!r}")
    j = _Judge(policy, candidate, plan)
    if holdout_rule is not None:
        gap = holdout_rule
    elif holdout_hidden or holdout_failed:
        gap = j.holdout_unavailable(holdout_hidden, holdout_failed)
    else:
        gap = j.holdout_gap(holdout, holdout_trimmed)
    on_cv, on_holdout = _champion_rules(policy, champion, champion_holdout, j.champion(champion))
    rules = [j.baseline(baseline), j.bar(), on_cv, on_holdout, gap, j.fold_stability()]
    outcomes = {r["outcome"] for r in rules if r["figures"].get("decides", True)}
    decision = "fail" if "fail" in outcomes else "inconclusive" if "inconclusive" in outcomes else "pass"
    ordered = sorted(rules, key=lambda r: _ORDER[r["outcome"]])
    return {"decision": decision, "reasons": [r["sentence"] for r in ordered], "rules": rules,
            "primary_metric": policy.primary_metric, "test": plan.test, "policy_version": policy_version,
            "champion": None if champion is None else champion.submission_id}


def _champion_rules(
    policy: Policy, champion: ChampionFolds | None, on_holdout: Mapping[str, Any] | None, on_cv: dict[str, Any],
) -> tuple[dict[str, Any], dict[str, Any]]:
    """Mark which champion comparison decides (the policy's champion_rule); the other is shown only."""
    by_cv, by_holdout = policy.champion_rule in ("cv", "both"), policy.champion_rule in ("holdout", "both")
    if champion is None:
        held = hc.not_decided(policy, None, "No champion to compare with on the sealed rows: none is in force.",
                              decides=by_holdout, outcome="skipped")
    elif on_holdout is None and not by_holdout:
        held = hc.not_decided(policy, champion.submission_id, "Not compared with the champion on the sealed rows: "
                              "the policy decides on the folds (champion_rule cv), so no holdout query was spent.",
                              decides=False, outcome="skipped")
    elif on_holdout is None:
        held = hc.not_decided(policy, champion.submission_id, f"Cannot compare with champion "
                              f"{champion.submission_id} on the sealed rows: the comparison was not made.",
                              decides=by_holdout)
    else:
        held = {**on_holdout, "figures": {**on_holdout["figures"]}}
    entries = []
    for entry, decides in ((on_cv, by_cv), (held, by_holdout)):
        entry = {**entry, "figures": {**entry["figures"], "decides": decides}}
        if not decides and entry["outcome"] != "skipped":
            entry["sentence"] += f" (Shown only: the policy's champion_rule is {policy.champion_rule}.)"
        entries.append(entry)
    return entries[0], entries[1]


def holdout_gap_rule(policy: Policy, candidate: Mapping[Cell, float], plan: PlanFacts,
                     holdout: float | None) -> dict[str, Any]:
    """Return the holdout-gap rule alone (a re-judge checks it apart from the others)."""
    return _Judge(policy, candidate, plan).holdout_gap(holdout)


def _rule(rule: str, outcome: str, sentence: str, figures: dict[str, Any]) -> dict[str, Any]:
    return {"rule": rule, "outcome": outcome, "sentence": sentence, "figures": figures}


def _g(x: float | None) -> str:
    return "n/a" if x is None else f"{x:.4g}"


# Metrics whose per-row losses are unbounded, so a few rows can carry the score, and how the rows make it.
TRIMMABLE_FORMS = {"rmse": "sqrt_of_mean", "mse": "mean", "mae": "mean", "log_loss": "mean"}
MIN_TRIMMED_HOLDOUT = 20  # below this a single row is too large a share to set aside


def trimmed_rows(holdout_rows: int) -> int:
    """How many of the largest per-row losses the consistency rule may set aside: 1 %, 1 to 5 rows.

    *Common practice* (a few rows, a small share), not a published figure; 0 on holdouts under 20 rows.
    """
    if holdout_rows < MIN_TRIMMED_HOLDOUT:
        return 0
    return max(1, min(5, math.ceil(0.01 * holdout_rows)))


class _Judge:
    """The rules over one candidate; each method returns one rule entry."""

    def __init__(self, policy: Policy, candidate: Mapping[Cell, float], plan: PlanFacts) -> None:
        self.policy, self.plan = policy, plan
        self.metric = policy.primary_metric
        self.sign = 1.0 if policy.greater_is_better else -1.0
        self.cells = sorted(candidate)
        self.scores = np.array([candidate[c] for c in self.cells], dtype=float)
        self.candidate = candidate
        self.largest = -np.inf  # the largest oriented (and shifted) difference of the last paired test

    # -- paired tests -------------------------------------------------------------------------------
    def _paired(self, other: Mapping[Cell, float], shift: float) -> tuple[PairedTest | None, str, list[Cell]]:
        """Run the plan's paired test on candidate - other (oriented: positive = candidate better) + shift."""
        cells = sorted(set(self.candidate) & set(other))
        self.largest = -np.inf
        if len(cells) < 2:
            return None, f"they share {len(cells)} scored fold(s); a paired test needs at least 2", cells
        mine = np.array([self.candidate[c] for c in cells], dtype=float)
        theirs = np.array([other[c] for c in cells], dtype=float)
        d = self.sign * (mine - theirs)
        scale = max(1.0, float(np.abs(mine).max()), float(np.abs(theirs).max()))
        if float(np.abs(d).max()) <= _SAME_SCORE_RTOL * scale:
            d = np.zeros_like(d)  # the same scores: make the zero exact, not rounding noise
        d = d + shift
        self.largest = float(d.max())
        if self.plan.test == FIVE_BY_TWO_CV:
            if set(cells) != FIVE_BY_TWO_CELLS:
                return None, f"5x2cv needs all 10 cells (5 repeats x 2 folds), they share {len(cells)}", cells
            grid = np.zeros((5, 2))
            for (r, f), value in zip(cells, d, strict=True):
                grid[r, f] = value
            return five_by_two_cv_t(grid), "", cells
        n_train = float(np.mean([self.plan.sizes[c][0] for c in cells]))
        n_test = float(np.mean([self.plan.sizes[c][1] for c in cells]))
        return corrected_resampled_t(d, n_train, n_test), "", cells

    def _test_outcome(self, test: PairedTest, alpha: float) -> str:
        if test.decidable:
            assert test.p_greater is not None
            return "pass" if test.p_greater < alpha else "fail"
        if test.n_differences >= 2 and self.largest <= 0:
            return "fail"  # zero spread and no cell favours the candidate
        return "inconclusive"

    def _test_text(self, test: PairedTest, alpha: float) -> str:
        name = "5x2cv t" if test.test == FIVE_BY_TWO_CV else "corrected resampled t"
        if not test.decidable:
            return f"the test is undecidable: {test.undecidable}"
        assert test.p_greater is not None
        cmp = "<" if test.p_greater < alpha else ">="
        return f"{name} = {test.statistic:.3f}, df {test.df}, one-sided p = {test.p_greater:.3g} {cmp} {alpha:g}"

    def _test_figures(self, test: PairedTest | None, alpha: float, cells: list[Cell]) -> dict[str, Any]:
        figures: dict[str, Any] = {"cells": len(cells), "alpha": alpha}
        if test is not None:
            figures.update(test.figures())
            figures["lower_bound"] = test.lower_bound(alpha)
        if self.plan.test == CORRECTED_RESAMPLED_T and cells:
            figures["n_train"] = float(np.mean([self.plan.sizes[c][0] for c in cells]))
            figures["n_test"] = float(np.mean([self.plan.sizes[c][1] for c in cells]))
        return figures

    # -- rules --------------------------------------------------------------------------------------
    def baseline(self, baseline: Mapping[Cell, float]) -> dict[str, Any]:
        alpha = self.policy.baseline_alpha
        test, why, cells = self._paired(baseline, 0.0)
        figures = self._test_figures(test, alpha, cells)
        if test is None:
            return _rule("baseline", "inconclusive", f"Cannot compare with the baseline: {why}.", figures)
        figures["candidate_mean"] = float(np.mean([self.candidate[c] for c in cells]))
        figures["baseline_mean"] = float(np.mean([baseline[c] for c in cells]))
        outcome = self._test_outcome(test, alpha)
        head = {"pass": "Beats the baseline", "fail": "Does not beat the baseline",
                "inconclusive": "Cannot tell whether it beats the baseline"}[outcome]
        return _rule("baseline", outcome, (
            f"{head}: mean {self.metric} {_g(figures['candidate_mean'])} against {_g(figures['baseline_mean'])} "
            f"over {len(cells)} folds, {_diff(test.mean_difference)} ({self._test_text(test, alpha)})."), figures)

    def bar(self) -> dict[str, Any]:
        bar = self.policy.bar
        if bar is None:
            return _rule("bar", "skipped", "No bar is set.", {"bar": None})
        if not self.cells:
            return _rule("bar", "inconclusive", "Cannot check the bar: no fold was scored.", {"bar": bar})
        mean = float(self.scores.mean())
        met = mean >= bar if self.policy.greater_is_better else mean <= bar
        relation = "at least" if self.policy.greater_is_better else "at most"
        return _rule("bar", "pass" if met else "fail",
                     f"{'Meets' if met else 'Misses'} the bar: CV mean {self.metric} {_g(mean)}, "
                     f"the bar asks for {relation} {_g(bar)}.", {"bar": bar, "cv_mean": mean})

    def champion(self, champion: ChampionFolds | None) -> dict[str, Any]:
        if champion is None:
            return _rule("champion", "skipped", "No champion is in force on this dataset.", {"champion": None})
        margin, alpha, name = self.policy.champion_margin, self.policy.champion_alpha, champion.submission_id
        base = {"champion": name, "margin": margin, "alpha": alpha}
        if self.plan.key != champion.plan_key:
            why = "overrode the dataset's fold plan" if self.plan.overridden else "ran a different fold plan"
            return _rule("champion", "inconclusive", (
                f"Cannot compare with champion {name}: the submission {why} ({_plan(self.plan.key)}; the "
                f"champion: {_plan(champion.plan_key)}), so no paired test exists."),
                {**base, "plan": list(self.plan.key), "champion_plan": list(champion.plan_key)})
        test, why, cells = self._paired(champion.scores, margin)
        figures = {**base, **self._test_figures(test, alpha, cells), "champion_on_candidate_plan": champion.replayed}
        if test is None:
            return _rule("champion", "inconclusive", f"Cannot compare with champion {name}: {why}.", figures)
        figures["candidate_mean"] = float(np.mean([self.candidate[c] for c in cells]))
        figures["champion_mean"] = float(np.mean([champion.scores[c] for c in cells]))
        # The test ran on d + margin; show the difference itself (positive = candidate better) and its bound.
        figures["estimate_plus_margin"] = figures.pop("estimate")
        figures["mean_difference"] = test.mean_difference - margin
        if figures["lower_bound"] is not None:
            figures["lower_bound"] -= margin
        outcome = self._test_outcome(test, alpha)
        if outcome == "fail" and test.decidable and test.p_greater is not None and 1.0 - test.p_greater >= alpha:
            # Neither shown within the margin nor shown worse beyond it: the folds cannot tell (a model
            # about as good as the champion often lands here). Not a pass, and not a proven shortfall.
            outcome = "inconclusive"
        head = {"pass": f"Not worse than champion {name} by more than the margin {margin:g}",
                "fail": f"Worse than champion {name} by more than the margin {margin:g}",
                "inconclusive": f"Cannot tell whether it is within the margin {margin:g} of champion {name}"}[outcome]
        return _rule("champion", outcome, (
            f"{head}: mean {self.metric} {_g(figures['candidate_mean'])} against {_g(figures['champion_mean'])} "
            f"over {len(cells)} shared folds{_REPLAYED if champion.replayed else ''}, "
            f"{_diff(figures['mean_difference'])}; on the difference plus the margin, "
            f"{self._test_text(test, alpha)}."), figures)

    def holdout_gap(self, holdout: float | None, trimmed: TrimmedHoldout | None = None) -> dict[str, Any]:
        gap = self.policy.holdout_gap
        figures: dict[str, Any] = {"k_std": gap.k_std, "floor": gap.floor, "false_fail_rate": gap.false_fail_rate}
        if holdout is None:
            return _rule("holdout_gap", "skipped", "No holdout score to compare with.", figures)
        if len(self.cells) < 2:
            return _rule("holdout_gap", "inconclusive",
                         f"Cannot check the holdout against CV: the fold spread needs 2 folds, got {len(self.cells)}.",
                         figures)
        n_train, n_test = self._fold_rows()
        interval = holdout_interval(self.scores, n_train, n_test, self.plan.holdout_rows, gap.false_fail_rate)
        allowed = interval.half_width + gap.floor
        figures.update({"cv_mean": interval.cv_mean, "fold_std": interval.fold_std,
                        "expected_spread": interval.expected_spread, "t_quantile": interval.quantile,
                        "df": interval.folds - 1, "allowed_gap": allowed})
        band = (f"CV mean {_g(interval.cv_mean)} +/- {_g(allowed)} (t {interval.quantile:.3g}, "
                f"df {interval.folds - 1}, x expected spread {_g(interval.expected_spread)} + floor {gap.floor:g}; "
                f"a sound model falls outside {_pct(gap.false_fail_rate)} of the time)")
        if abs(holdout - interval.cv_mean) <= allowed:
            return _rule("holdout_gap", "pass", f"The holdout score is consistent with CV: it lies within {band}.",
                         figures)
        if trimmed is not None:
            figures["rows_set_aside"] = trimmed.rows
            if abs(trimmed.score - interval.cv_mean) <= allowed:
                return _rule("holdout_gap", "pass", (
                    f"The holdout score is consistent with CV once its {trimmed.rows} largest per-row "
                    f"loss(es) are set aside: it then lies within {band}; a few extreme rows, not the "
                    "model as a whole, make the difference."), figures)
        return _rule("holdout_gap", "fail", f"The holdout score is not consistent with CV: it lies outside {band} "
                     "(a leak, a shift between partitions or an unstable model can cause this).", figures)

    def holdout_unavailable(self, hidden: str | None, failed: bool) -> dict[str, Any]:
        """The holdout rule when no own figure may be judged: withheld, or failed in fixed words."""
        gap = self.policy.holdout_gap
        figures: dict[str, Any] = {"k_std": gap.k_std, "floor": gap.floor}
        if hidden is not None:
            return _rule("holdout_gap", "skipped", f"Whether the holdout is consistent with CV is withheld: {hidden}.",
                         {**figures, "withheld": True})
        return _rule("holdout_gap", "fail", "The holdout step did not produce a figure, so the model's consistency "
                     "with CV could not be checked; the attempt counted as one holdout query.", figures)

    def _fold_rows(self) -> tuple[float, float]:
        """Mean training and test rows of the scored folds; without sizes, a 5-fold split's ratio."""
        sizes = [self.plan.sizes[c] for c in self.cells if c in self.plan.sizes]
        if not sizes or min(min(pair) for pair in sizes) <= 0:
            return 4.0, 1.0
        return float(np.mean([p[0] for p in sizes])), float(np.mean([p[1] for p in sizes]))

    def fold_stability(self) -> dict[str, Any]:
        limit = self.policy.max_fold_std
        if limit is None:
            return _rule("fold_stability", "skipped", "No limit on the fold spread is set.", {"max_fold_std": None})
        if len(self.cells) < 2:
            return _rule("fold_stability", "inconclusive",
                         f"Cannot measure the fold spread: it needs 2 folds, got {len(self.cells)}.",
                         {"max_fold_std": limit})
        std = float(self.scores.std(ddof=1))
        ok = std <= limit
        return _rule("fold_stability", "pass" if ok else "fail",
                     f"Folds are {'stable' if ok else 'unstable'}: fold std of {self.metric} {_g(std)} "
                     f"{'within' if ok else 'above'} the limit {limit:g}.", {"max_fold_std": limit, "fold_std": std})


_REPLAYED = " (the champion's configuration scored on this submission's folds)"


def _pct(rate: float) -> str:
    return f"{100.0 * rate:.2g} %"


def _diff(d: float) -> str:
    if d == 0:
        return "no difference"
    return f"{'an improvement' if d > 0 else 'a shortfall'} of {_g(abs(d))}"


def _plan(key: tuple[str, int, int]) -> str:
    return f"{key[0]}, {key[1]} folds, seed {key[2]}"
