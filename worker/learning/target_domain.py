"""Which regression targets an estimator can fit: Poisson and Gamma losses need non-negative / positive y.

scikit-learn's GLMs fail at fit with "Some value(s) of y are out of the valid range of the loss";
LightGBM and XGBoost fail or, worse, fit nonsense. The check job reads the development target
(rows the team already has) and refuses such a configuration before any fold runs, naming the
estimator, the parameter that chose the loss and the smallest target value. The domains are the
losses' own (scikit-learn's ``_loss`` module: HalfPoissonLoss y >= 0, HalfGammaLoss y > 0,
HalfTweedieLoss y >= 0 for 1 <= power < 2 and y > 0 for power >= 2); a target transformed by log1p
must exceed -1, by sqrt be non-negative.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np


@dataclass(frozen=True)
class TargetDomain:
    """The targets a loss or function accepts: above ``bound`` (``positive``) or at least it; ``why`` names it."""

    positive: bool
    why: str
    bound: float = 0.0

    def problem(self, y: np.ndarray) -> str | None:
        """Return why ``y`` is outside the domain, or None."""
        smallest = float(np.min(y)) if y.size else 0.0
        if self.positive and smallest <= self.bound:
            words = "strictly positive" if self.bound == 0 else f"greater than {self.bound:g}"
            return f"{self.why} needs a target {words}; the smallest development target is {smallest:g}"
        if not self.positive and smallest < self.bound:
            return f"{self.why} needs a non-negative target; the smallest development target is {smallest:g}"
        if not self.positive and self.why.startswith(("PoissonRegressor", "HistGradientBoosting")) and y.size \
                and float(np.sum(y)) <= 0:
            return f"{self.why} needs a target whose sum is positive; every development target is 0"
        return None


def _tweedie(power: float, owner: str) -> TargetDomain | None:
    if power >= 2:
        return TargetDomain(True, f"{owner} with power={power:g}")
    if power >= 1:
        return TargetDomain(False, f"{owner} with power={power:g}")
    return None  # power 0 (normal) and power < 0 accept any target


def target_domain(estimator: str, params: Mapping[str, Any]) -> TargetDomain | None:
    """Return the target domain of ``estimator`` with ``params``, or None when any real target fits."""
    if estimator == "TransformedTargetRegressor" and params.get("func") == "log1p":
        return TargetDomain(True, "TransformedTargetRegressor with func='log1p'", bound=-1.0)
    if estimator == "TransformedTargetRegressor" and params.get("func") == "sqrt":
        return TargetDomain(False, "TransformedTargetRegressor with func='sqrt'")
    objective = params.get("objective")
    loss = params.get("loss")
    if estimator == "PoissonRegressor":
        return TargetDomain(False, "PoissonRegressor")
    if estimator == "GammaRegressor":
        return TargetDomain(True, "GammaRegressor")
    if estimator == "TweedieRegressor":
        return _tweedie(float(params.get("power", 0.0)), "TweedieRegressor")
    if estimator == "HistGradientBoostingRegressor" and loss == "poisson":
        return TargetDomain(False, "HistGradientBoostingRegressor with loss='poisson'")
    if estimator == "LGBMRegressor" and objective in ("poisson", "gamma", "tweedie"):
        return TargetDomain(objective == "gamma", f"LGBMRegressor with objective={objective!r}")
    if estimator == "XGBRegressor" and objective in ("count:poisson", "reg:gamma", "reg:tweedie"):
        return TargetDomain(objective == "reg:gamma", f"XGBRegressor with objective={objective!r}")
    return None
