"""Online error control across a dataset's stream of holdout champion decisions (LORD++, alpha-spending).

Each holdout champion decision tests H0 "the candidate is worse than the champion by at least the
margin"; a pass rejects it. Tested one after another at a fixed level, a stream of worse candidates
would pass one sooner or later. LORD (Javanmard & Montanari 2018) gives the t-th test a level from
a wealth that starts at W0, is spent by every test and is earned back by every rejection; the
LORD++ form (Ramdas, Yang, Wainwright & Jordan 2017, "Online control of the false discovery rate
with decaying memory", eq. for LORD++) is

    alpha_t = gamma_t * W0 + (alpha - W0) * gamma_{t - tau_1} + alpha * sum_{j >= 2, tau_j < t} gamma_{t - tau_j}

where tau_1 < tau_2 < ... are the indices (1-based) of the earlier tests that rejected, and gamma is a
non-increasing sequence summing to one; the default is Javanmard & Montanari's

    gamma_j = 0.0722 * log(max(j, 2)) / (j * exp(sqrt(log j)))

(0.0722 makes the infinite sum about one; *from memory*, checked here to sum below one). W0 = alpha / 2
(*common practice* in both papers' experiments). LORD++ controls the false discovery rate at alpha
when null p-values are independent of each other and of the others; decisions on one set of sealed
rows are not independent, so the size under that dependence is measured in
bench/champion_holdout.py instead of assumed.

Alpha-spending (the t-th test at alpha * gamma_t, the same gamma; Foster & Stine 2008 describe it as
the simplest alpha-investing rule) needs no independence: by the union bound the chance that any test
of the stream rejects a true null is at most alpha * sum(gamma_t) <= alpha, whatever the dependence
between tests on one set of sealed rows. It never earns wealth back, so it has less power than LORD++.

With the procedure "none" every test runs at alpha (no control across the stream).

Pure: the caller keeps the stream (a dataset's earlier tests, in order) in the records.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

LORD_PLUS_PLUS = "lord++"
ALPHA_SPENDING = "alpha-spending"
NO_CONTROL = "none"
ONLINE_PROCEDURES = (LORD_PLUS_PLUS, ALPHA_SPENDING, NO_CONTROL)
GAMMA_CONSTANT = 0.0722


def gamma(j: int) -> float:
    """Return gamma_j of the default LORD sequence (j >= 1)."""
    if j < 1:
        raise ValueError(f"gamma is indexed from 1, got {j}")
    return GAMMA_CONSTANT * math.log(max(j, 2)) / (j * math.exp(math.sqrt(math.log(j))))


@dataclass(frozen=True)
class Stream:
    """A dataset's earlier champion tests: how many, and which (1-based) rejected."""

    tests: int = 0
    rejections: tuple[int, ...] = ()

    def after(self, rejected: bool) -> Stream:
        """Return the stream with one more test appended."""
        t = self.tests + 1
        return Stream(t, (*self.rejections, t) if rejected else self.rejections)


def lord_plus_plus_level(t: int, rejections: Sequence[int], alpha: float, w0: float) -> float:
    """Return LORD++'s level for test ``t`` (1-based) given the earlier rejection indices."""
    if not 0.0 < w0 <= alpha:
        raise ValueError(f"initial wealth must be in (0, alpha], got {w0} with alpha {alpha}")
    earlier = sorted(r for r in rejections if r < t)
    level = gamma(t) * w0
    if earlier:
        level += (alpha - w0) * gamma(t - earlier[0])
        level += alpha * sum(gamma(t - r) for r in earlier[1:])
    return level


def next_level(stream: Stream, procedure: str, alpha: float) -> float:
    """Return the level the next test of the stream runs at."""
    if procedure == NO_CONTROL:
        return alpha
    if procedure == LORD_PLUS_PLUS:
        return lord_plus_plus_level(stream.tests + 1, stream.rejections, alpha, alpha / 2.0)
    if procedure == ALPHA_SPENDING:
        return alpha * gamma(stream.tests + 1)
    raise ValueError(f"online procedure must be one of {', '.join(ONLINE_PROCEDURES)}, got {procedure!r}")
