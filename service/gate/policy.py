"""Parse, default and serialise a dataset's review policy (the rules a verdict is judged by).

A steward PUTs a policy document; ``parse_policy`` turns it into a frozen ``Policy`` once, at the
edge, and reports every bad field at once as an ``InputError`` with one ``FieldProblem`` per field.
Fields left out take the task's defaults, so a steward may send only what they change.

Defaults and where they come from:
- primary metric: the first of the dataset's default metrics (rmse for regression, accuracy for
  classification, ``service.catalog.metrics.DEFAULT_METRICS``).
- baseline_alpha = champion_alpha = 0.05: the conventional level (*common practice*).
- champion_margin and holdout_gap.floor: 0.01 for unit-free metrics (accuracy, balanced_accuracy,
  f1, roc_auc, r2, log_loss, brier, ...), 0 for metrics in the target's units (rmse, mae, mse,
  median_absolute_error, pinball_loss, Poisson and Tweedie deviances: ``MetricSpec.in_target_units``),
  whose scale no default can know (*common practice*; a steward should set them for regression).
- holdout_gap.k_std = 3.0, i.e. a nominal false-fail rate of 2 * (1 - Phi(3)) = 0.27 % (*common practice*:
  the three-sigma convention). The rule is a t prediction interval at that rate
  (``service.gate.statistics.holdout_interval``); a steward may give ``false_fail_rate`` instead of k_std.
- release: mode "ladder" with ladder_step null (the parameter-free ladder, Blum & Hardt 2015), chosen
  by the measurement in tests/service/gate/test_release_adaptive.py, with a threshold of 2 and a shrink of
  1 standard errors (bench/ladder_adaptive.py, README); 3 significant digits; 10 releases per
  submitter (a person or CI identity, not a key) per 24 hours (*common practice*); a team at most
  ``team_budget`` per window, by default three submitters' worth (a judgement).
- champion_rule = "both": a candidate must be shown within the margin of the champion on the
  shared folds (CV) and on the sealed rows (one more holdout query, service.gate.holdout_champion);
  the folds are public, so after many tries the CV comparison alone is optimistic.
- champion_online = "lord++": the holdout champion decisions of a dataset are one stream under LORD++
  (service.gate.online), so many tries do not eventually pass a worse model by chance; "alpha-spending"
  holds under any dependence between the tests, with less power (bench/champion_holdout.py).
- thresholdout: threshold 0.04 and sigma 0.01 for unit-free metrics (the values of Dwork et al. 2015's
  illustration, *from memory*), budget 100 (*common practice*); null for metrics in the target's
  units: a steward must give them before choosing the thresholdout mode.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace
from typing import Any

from scipy import stats as sps

from service.catalog.metric_keys import MetricRefused, resolve_metric
from service.catalog.metrics import DEFAULT_METRICS, METRICS, spec_of
from service.errors import FieldProblem, InputError
from service.gate.online import LORD_PLUS_PLUS, ONLINE_PROCEDURES
from service.gate.policy_fields import FieldReader, or_fallback, unknown_fields
from service.vocabulary import RELEASE_MODES

CHAMPION_RULES = ("cv", "holdout", "both")  # which champion comparison decides
UNIT_METRICS = frozenset(m.name for m in METRICS.values() if m.in_target_units)  # in the target's units
MAX_DIGITS, MAX_BUDGET, MAX_WINDOW_HOURS = 12, 10_000, 24.0 * 366
TEAM_BUDGET_MULTIPLE = 3  # a team's default budget: three submitters' worth (*common practice*, a judgement)


@dataclass(frozen=True)
class HoldoutGap:
    """The holdout must fall within the prediction interval of the CV mean, widened by ``floor``.

    ``k_std`` is the width in normal standard deviations that sets the nominal false-fail rate,
    2 * (1 - Phi(k_std)); the interval itself uses Student's t at that rate (see
    ``service.gate.statistics.holdout_interval``), so with few folds it is wider than k_std fold spreads.
    """

    k_std: float = 3.0
    floor: float = 0.0

    @property
    def false_fail_rate(self) -> float:
        """The chance that a sound model's holdout score falls outside (floor aside): 2 * (1 - Phi(k_std))."""
        return math.erfc(self.k_std / math.sqrt(2.0))


def k_std_for_rate(rate: float) -> float:
    """Return the k_std whose nominal false-fail rate is ``rate``: Phi^-1(1 - rate/2)."""
    return float(sps.norm.isf(rate / 2.0))


@dataclass(frozen=True)
class ThresholdoutParams:
    """Thresholdout's threshold T and noise scale sigma (metric units) and its budget B per dataset."""

    threshold: float
    sigma: float
    budget: int


@dataclass(frozen=True)
class ReleaseParams:
    """How much of the holdout score a submitter sees, and how often."""

    mode: str = "ladder"
    digits: int = 3  # significant digits of a released figure
    budget: int = 10  # holdout queries per submitter (a person or CI identity) per dataset per window
    window_hours: float = 24.0
    team_budget: int | None = None  # per team per dataset per window; None: TEAM_BUDGET_MULTIPLE * budget
    ladder_step: float | None = None  # None: the parameter-free ladder
    ladder_threshold_se: float = 2.0  # parameter-free ladder: threshold in standard errors (bench/ladder_adaptive.py)
    ladder_shrink_se: float = 1.0  # parameter-free ladder: a new best's figure is its score less this many SE
    thresholdout: ThresholdoutParams | None = None

    @property
    def team_limit(self) -> int:
        """The team's holdout queries per dataset per window: set, or a multiple of the submitter's."""
        return self.team_budget if self.team_budget is not None else TEAM_BUDGET_MULTIPLE * self.budget


@dataclass(frozen=True)
class Policy:
    """A dataset's review policy; see the module docstring for the defaults."""

    primary_metric: str
    greater_is_better: bool
    bar: float | None = None
    baseline_alpha: float = 0.05
    champion_margin: float = 0.0
    champion_alpha: float = 0.05
    holdout_gap: HoldoutGap = HoldoutGap()
    max_fold_std: float | None = None
    release: ReleaseParams = ReleaseParams()
    champion_rule: str = "both"
    champion_online: str = LORD_PLUS_PLUS

    def to_document(self, version: int) -> dict[str, Any]:
        """Return the policy document ``GET /v1/datasets/{id}/policy`` serves (``version`` 0 = the task default)."""
        r = self.release
        return {
            "version": version, "primary_metric": self.primary_metric, "greater_is_better": self.greater_is_better,
            "bar": self.bar, "baseline_alpha": self.baseline_alpha, "champion_margin": self.champion_margin,
            "champion_alpha": self.champion_alpha,
            "holdout_gap": {"k_std": self.holdout_gap.k_std, "floor": self.holdout_gap.floor,
                            "false_fail_rate": self.holdout_gap.false_fail_rate},
            "max_fold_std": self.max_fold_std,
            "champion_rule": self.champion_rule, "champion_online": self.champion_online,
            "release": {
                "mode": r.mode, "digits": r.digits, "budget": r.budget, "window_hours": r.window_hours,
                "team_budget": r.team_budget, "ladder_step": r.ladder_step,
                "ladder_threshold_se": r.ladder_threshold_se, "ladder_shrink_se": r.ladder_shrink_se,
                "thresholdout": None if r.thresholdout is None else {
                    "threshold": r.thresholdout.threshold, "sigma": r.thresholdout.sigma,
                    "budget": r.thresholdout.budget},
            },
        }


def default_policy(task: str, metrics: Sequence[str] | None = None) -> Policy:
    """Return the default policy for a task; the primary metric is the first of ``metrics`` if given."""
    if task not in DEFAULT_METRICS:
        raise ValueError(f"task must be one of {', '.join(DEFAULT_METRICS)}, got {task!r}")
    primary = metrics[0] if metrics else DEFAULT_METRICS[task][0]
    return _defaults_for(primary)


def parse_policy(
    doc: Mapping[str, Any], task: str, allowed_metrics: Sequence[str] | None = None,
    classes: Sequence[str] | None = None,
) -> Policy:
    """Parse a policy document for a dataset of ``task``; missing fields take the defaults.

    ``allowed_metrics`` are the metric names the dataset accepts (default: every metric of the task,
    with its choices: ``f1(average=weighted)``, resolved to its key with the dataset's ``classes``
    when given, ``service.catalog.metric_keys``). Raises InputError listing every bad field.
    """
    allowed = list(allowed_metrics) if allowed_metrics is not None else [
        m.name for m in METRICS.values() if m.task == task]
    problems: list[FieldProblem] = []
    if not isinstance(doc, Mapping):
        raise InputError(f"a policy must be a JSON object, got {type(doc).__name__}",
                         [FieldProblem("", f"a policy must be a JSON object, got {type(doc).__name__}")])
    unknown_fields(doc, {f for f in _TOP_FIELDS} | {"version"}, "", problems)

    primary = doc.get("primary_metric", allowed[0] if allowed else DEFAULT_METRICS.get(task, ("",))[0])
    key, refused = _primary_key(primary, task, allowed, allowed_metrics is not None, classes)
    if key is None:
        problems.append(FieldProblem("/primary_metric", refused or f"primary_metric must be one of "
                                     f"{', '.join(allowed)} for a {task} dataset, got {primary!r}"))
        base = default_policy(task) if task in DEFAULT_METRICS else _defaults_for("rmse")
    else:
        base = _defaults_for(key)
    metric = base.primary_metric
    if "greater_is_better" in doc and doc["greater_is_better"] is not base.greater_is_better:
        problems.append(FieldProblem("/greater_is_better", f"greater_is_better is fixed by the metric: {metric} "
                                     f"is {'greater' if base.greater_is_better else 'lower'}-is-better "
                                     f"({str(base.greater_is_better).lower()}), got {doc['greater_is_better']!r}"))

    p = FieldReader(doc, "", problems)
    bar = p.number("bar", base.bar, nullable=True)
    baseline_alpha = p.level("baseline_alpha", base.baseline_alpha)
    margin = p.number("champion_margin", base.champion_margin, minimum=0.0,
                      hint=f" (a non-inferiority margin in {metric} units; a negative margin has the wrong sign)")
    champion_alpha = p.level("champion_alpha", base.champion_alpha)
    max_fold_std = p.number("max_fold_std", base.max_fold_std, nullable=True, positive=True)

    gap = base.holdout_gap
    g = p.child("holdout_gap", {"k_std", "floor", "false_fail_rate"})
    if g is not None:
        gap = HoldoutGap(k_std=or_fallback(_gap_width(g, gap.k_std), gap.k_std),
                         floor=or_fallback(g.number("floor", gap.floor, minimum=0.0), gap.floor))

    release = _parse_release(p, base.release, metric)
    champion_rule = p.choice("champion_rule", base.champion_rule, CHAMPION_RULES)
    champion_online = p.choice("champion_online", base.champion_online, ONLINE_PROCEDURES)
    policy = Policy(metric, base.greater_is_better, bar, or_fallback(baseline_alpha, 0.05), or_fallback(margin, 0.0),
                    or_fallback(champion_alpha, 0.05), gap, max_fold_std, release, champion_rule, champion_online)
    if problems:
        raise InputError("; ".join(pr.detail for pr in problems), problems)
    return policy


_TOP_FIELDS = ("primary_metric", "greater_is_better", "bar", "baseline_alpha", "champion_margin",
               "champion_alpha", "holdout_gap", "max_fold_std", "release", "champion_rule", "champion_online")
_RELEASE_FIELDS = {"mode", "digits", "budget", "window_hours", "team_budget", "ladder_step", "ladder_threshold_se",
                   "ladder_shrink_se", "thresholdout"}


def _primary_key(
    primary: Any, task: str, allowed: Sequence[str], listed: bool, classes: Sequence[str] | None
) -> tuple[str | None, str | None]:
    """Return the primary metric's key, or None and why it was refused."""
    if not isinstance(primary, str | Mapping) or (listed and primary not in allowed):
        return None, None
    try:
        return resolve_metric(primary, task, classes), None
    except MetricRefused as exc:
        return None, f"primary_metric: {exc}"


def _defaults_for(metric: str) -> Policy:
    spec = spec_of(metric)
    unit_free = not spec.in_target_units
    small = 0.01 if unit_free else 0.0
    thresholdout = ThresholdoutParams(0.04, 0.01, 100) if unit_free else None
    return Policy(primary_metric=metric, greater_is_better=spec.greater_is_better, champion_margin=small,
                  holdout_gap=HoldoutGap(3.0, small), release=ReleaseParams(thresholdout=thresholdout))


def _parse_release(p: FieldReader, base: ReleaseParams, metric: str) -> ReleaseParams:
    r = p.child("release", _RELEASE_FIELDS)
    if r is None:
        return base
    mode = r.doc.get("mode", base.mode)
    if mode not in RELEASE_MODES:
        r.problem("mode", f"release mode must be one of {', '.join(RELEASE_MODES)}, got {mode!r}")
        mode = base.mode
    digits = r.integer("digits", base.digits, 1, MAX_DIGITS)
    budget = r.integer("budget", base.budget, 1, MAX_BUDGET)
    window = r.number("window_hours", base.window_hours, positive=True, maximum=MAX_WINDOW_HOURS)
    team_budget = None if "team_budget" in r.doc and r.doc["team_budget"] is None \
        else r.integer("team_budget", base.team_budget, 1, MAX_BUDGET)
    step = r.number("ladder_step", base.ladder_step, nullable=True, positive=True)
    threshold_se = r.number("ladder_threshold_se", base.ladder_threshold_se, positive=True, maximum=10.0)
    shrink_se = r.number("ladder_shrink_se", base.ladder_shrink_se, minimum=0.0, maximum=10.0)
    if threshold_se is not None and shrink_se is not None and shrink_se >= threshold_se:
        r.problem("ladder_shrink_se", f"ladder_shrink_se must be smaller than ladder_threshold_se ({threshold_se:g}), "
                                      f"so that a new best always improves the released figure; got {shrink_se:g}")
        shrink_se = None
    thresholdout = base.thresholdout
    if "thresholdout" in r.doc and r.doc["thresholdout"] is None:
        thresholdout = None
    else:
        t = r.child("thresholdout", {"threshold", "sigma", "budget"})
        if t is not None:
            old = thresholdout
            missing = [f for f in ("threshold", "sigma", "budget") if old is None and f not in t.doc]
            for f in missing:
                t.problem(f, f"thresholdout.{f} is required for {metric} (no default exists in its units)")
            threshold = t.number("threshold", old.threshold if old else None, positive=True)
            sigma = t.number("sigma", old.sigma if old else None, positive=True)
            t_budget = t.integer("budget", old.budget if old else None, 1, MAX_BUDGET)
            if not missing and threshold is not None and sigma is not None and t_budget is not None:
                thresholdout = ThresholdoutParams(threshold, sigma, t_budget)
    if mode == "thresholdout" and thresholdout is None and not r.has_problem_under("/release/thresholdout"):
        r.problem("thresholdout", f"release mode thresholdout needs thresholdout parameters (threshold, sigma, "
                                  f"budget) in {metric} units; got none")
    return replace(base, mode=mode, digits=or_fallback(digits, base.digits), budget=or_fallback(budget, base.budget),
                   window_hours=or_fallback(window, base.window_hours), team_budget=team_budget, ladder_step=step,
                   ladder_threshold_se=or_fallback(threshold_se, base.ladder_threshold_se),
                   ladder_shrink_se=or_fallback(shrink_se, base.ladder_shrink_se), thresholdout=thresholdout)


def _gap_width(g: FieldReader, default: float) -> float | None:
    """Read k_std, or false_fail_rate in its stead; both given must agree (a policy document has both)."""
    k_std = g.number("k_std", default, positive=True)
    if "false_fail_rate" not in g.doc:
        return k_std
    rate = g.number("false_fail_rate", None, positive=True, maximum=0.5)
    if rate is None:
        return None
    from_rate = k_std_for_rate(rate)
    if "k_std" in g.doc and k_std is not None and not math.isclose(k_std, from_rate, rel_tol=1e-6):
        g.problem("false_fail_rate", f"holdout_gap.false_fail_rate {rate:g} asks for k_std {from_rate:.6g}, but "
                                     f"k_std {k_std:g} was given; give one of them, or both in agreement")
        return None
    return k_std if "k_std" in g.doc else from_rate
