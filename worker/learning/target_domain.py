"""Which regression targets an estimator can fit: Poisson and Gamma losses need non-negative / positive y.

scikit-learn's GLMs fail at fit with "Some value(s) of y are out of the valid range of the loss";
LightGBM and XGBoost fail or, worse, fit nonsense. The check job reads the development target
(rows the team already has) and refuses such a configuration before any fold runs, naming the
estimator, the parameter that chose the loss and the smallest target value. The domains are the
losses' own (scikit-learn's ``_loss`` module: HalfPoissonLoss y >= 0, HalfGammaLoss y > 0,
HalfTweedieLoss y >= 0 for 1 <= power < 2 and y > 0 for power >= 2).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np


@dataclass(frozen=True)
class TargetDomain:
    """The targets a loss accepts: strictly positive, or non-negative; ``why`` names the loss."""

    positive: bool
    why: str

    def problem(self, y: np.ndarray) -> str | None:
        """Return why ``y`` is outside the domain, or None."""
        smallest = float(np.min(y)) if y.size else 0.0
        if self.positive and smallest <= 0:
            return f"{self.why} needs a strictly positive target; the smallest development target is {smallest:g}"
        if not self.positive and smallest < 0:
            return f"{self.why} needs a non-negative target; the smallest development target is {smallest:g}"
        if not self.positive and y.size and float(np.sum(y)) <= 0:
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
