"""Expected best score of n tuning trials, from the N trials that were run (Dodge et al. 2019).

Dodge, Gururangan, Card, Schwartz and Smith, "Show Your Work: Improved Reporting of Experimental
Results", arXiv:1909.03004, section 3: treat the N observed dev scores as an empirical distribution
(each with probability 1/N) and report, for n = 1..N, the expected maximum of n draws with
replacement,

    E[max_n] = sum_j u_j * (F(u_j)^n - F(u_{j-1})^n),   F(u_0) = 0,

over the distinct scores u_1 < ... < u_k, with F the empirical CDF (F(u_j) = count(v <= u_j) / N, so
tied scores share one step). The spread is the standard deviation of that same maximum.

The step probabilities are computed exactly in integers, (c_j^n - c_{j-1}^n) / N^n, so a curve that
has flattened at max(scores) reads exactly that instead of a value a rounding error below it.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np

from harness.errors import HarnessError

__all__ = ["expected_max", "expected_max_curve", "expected_max_sd"]


def _checked(scores: Sequence[float | None]) -> np.ndarray:
    """The scores as a float array; refuses an empty list and names the first missing or non-finite trial."""
    if len(scores) == 0:
        raise HarnessError("expected maximum over tuning trials needs at least one trial score, got none")
    for i, v in enumerate(scores):
        if v is None or not math.isfinite(float(v)):
            raise HarnessError(
                f"trial score {i} is {v!r}; leave failed trials out before computing the expected maximum")
    return np.asarray(scores, dtype=float)


def _checked_n(n: int) -> int:
    # why: bool is an int subclass, and True would silently mean one trial
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 1:
        raise HarnessError(f"number of trials n must be a whole number of at least 1, got {n!r}")
    return int(n)


def _max_distribution(values: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Distinct values u_j and P(max of n draws = u_j) = F(u_j)^n - F(u_{j-1})^n, F the empirical CDF."""
    distinct, counts = np.unique(values, return_counts=True)  # sorted ascending
    total = len(values) ** n
    below = 0
    probs = []
    for cumulative in np.cumsum(counts).tolist():
        # Python int arithmetic: exact however large n is; int / int rounds once, correctly
        probs.append((cumulative**n - below**n) / total)
        below = cumulative
    return distinct, np.asarray(probs)


def _mean_sd(values: np.ndarray, n: int) -> tuple[float, float]:
    distinct, probs = _max_distribution(values, n)
    mean = float(np.dot(probs, distinct))
    # why: sum p (u - mean)^2 equals E[max^2] - E[max]^2 but cannot go negative by cancellation, so the
    # sd of a max that is (nearly) certain comes out 0, not the square root of a rounding error
    variance = float(np.dot(probs, (distinct - mean) ** 2))
    return mean, math.sqrt(variance)


def expected_max(scores: Sequence[float], n: int) -> float:
    """Expected best of n trials drawn with replacement from `scores` (Dodge et al. 2019, section 3)."""
    return _mean_sd(_checked(scores), _checked_n(n))[0]


def expected_max_sd(scores: Sequence[float], n: int) -> float:
    """Standard deviation of the best of n trials drawn with replacement from `scores`."""
    return _mean_sd(_checked(scores), _checked_n(n))[1]


def expected_max_curve(scores: Sequence[float], n_max: int | None = None) -> list[dict[str, Any]]:
    """One {"n", "mean", "sd"} per n = 1..n_max (default: the number of scores)."""
    values = _checked(scores)
    last = len(values) if n_max is None else _checked_n(n_max)
    curve = []
    for n in range(1, last + 1):
        mean, sd = _mean_sd(values, n)
        curve.append({"n": n, "mean": mean, "sd": sd})
    return curve
