"""Expected best of n tuning trials: brute-force enumeration, the definition at n=1, limits, a worked example.

Reference: Dodge et al. 2019, "Show Your Work: Improved Reporting of Experimental Results",
arXiv:1909.03004, section 3 (the expected maximum of n draws with replacement from the empirical
distribution of N trial scores). The brute force below is that definition itself: every ordered n-tuple
of trials is equally likely, so the mean and (population) sd of the tuples' maxima are the exact values.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest

from harness.errors import HarnessError
from harness.metrics.expected_max import expected_max, expected_max_curve, expected_max_sd

SCORE_LISTS = [
    [0.5, 0.7, 0.7, 0.9],  # a tie in the middle
    [0.2, 0.4, 0.6],
    [0.8, 0.8, 0.8],  # all tied: the max is certain
    [0.91, 0.3, 0.91, 0.55, 0.3],  # unsorted, two ties, one at the top
    [0.42],
]


@pytest.mark.parametrize("scores", SCORE_LISTS)
@pytest.mark.parametrize("n", [1, 2, 3, 4])
def test_mean_and_sd_equal_the_brute_force_over_every_ordered_tuple(scores: list[float], n: int) -> None:
    maxima = np.array([max(t) for t in itertools.product(scores, repeat=n)])  # len(scores) ** n tuples
    assert len(maxima) == len(scores) ** n
    assert expected_max(scores, n) == pytest.approx(float(maxima.mean()), abs=1e-12)
    assert expected_max_sd(scores, n) == pytest.approx(float(maxima.std(ddof=0)), abs=1e-12)


def test_the_curve_agrees_with_the_single_values() -> None:
    scores = SCORE_LISTS[3]
    curve = expected_max_curve(scores)
    assert [c["n"] for c in curve] == [1, 2, 3, 4, 5]  # default n_max: the number of scores
    for c in curve:
        assert c["mean"] == expected_max(scores, c["n"])
        assert c["sd"] == expected_max_sd(scores, c["n"])
    assert [c["n"] for c in expected_max_curve(scores, n_max=8)] == list(range(1, 9))


@pytest.mark.parametrize("scores", SCORE_LISTS)
def test_one_trial_is_the_plain_mean_and_sd(scores: list[float]) -> None:
    # the best of one draw is one draw: the mean of the scores (paper section 3, n = 1)
    assert expected_max(scores, 1) == pytest.approx(float(np.mean(scores)), abs=1e-12)
    assert expected_max_sd(scores, 1) == pytest.approx(float(np.std(scores, ddof=0)), abs=1e-12)


def test_the_curve_never_falls_and_reaches_the_best_score() -> None:
    rng = np.random.default_rng(7)
    for size in range(2, 9):
        scores = np.round(rng.uniform(0.4, 0.9, size), 2).tolist()  # rounding makes ties likely
        means = [c["mean"] for c in expected_max_curve(scores, n_max=40)]
        assert all(b >= a - 1e-15 for a, b in zip(means, means[1:], strict=False)), scores
        assert means[-1] <= max(scores) + 1e-15
    scores = [0.61, 0.74, 0.69]
    # P(max < 0.74) = (2/3)^200 ~ 1e-35: the expectation is the best score, with no spread left
    assert expected_max(scores, 200) == pytest.approx(0.74, abs=1e-6)
    assert expected_max_sd(scores, 200) == pytest.approx(0.0, abs=1e-6)


def test_hand_worked_examples() -> None:
    # [0.2, 0.4, 0.6], n = 2: F = 1/3, 2/3, 1, so P(max = 0.2) = 1/9, P(0.4) = 4/9 - 1/9 = 3/9,
    # P(0.6) = 1 - 4/9 = 5/9; E = (0.2 + 3 * 0.4 + 5 * 0.6) / 9 = 4.4 / 9 = 0.48888...
    # E[max^2] = (0.04 + 3 * 0.16 + 5 * 0.36) / 9 = 2.32 / 9; var = 2.32 / 9 - (4.4 / 9)^2 = 1.52 / 81
    assert expected_max([0.2, 0.4, 0.6], 2) == pytest.approx(4.4 / 9, abs=1e-12)
    assert expected_max_sd([0.2, 0.4, 0.6], 2) == pytest.approx(math.sqrt(1.52) / 9, abs=1e-12)
    # ties share one CDF step: [0.5, 0.7, 0.7, 0.9], n = 2: F(0.5) = 1/4, F(0.7) = 3/4, F(0.9) = 1, so
    # P(0.5) = 1/16, P(0.7) = 9/16 - 1/16 = 8/16, P(0.9) = 1 - 9/16 = 7/16; E = (0.5 + 5.6 + 6.3) / 16 = 0.775
    assert expected_max([0.5, 0.7, 0.7, 0.9], 2) == pytest.approx(0.775, abs=1e-12)


def test_order_of_the_trials_does_not_matter() -> None:
    scores = [0.3, 0.9, 0.5, 0.5, 0.7]
    for n in (1, 3, 6):
        assert expected_max(scores, n) == pytest.approx(expected_max(sorted(scores), n), abs=1e-15)
        assert expected_max_sd(scores, n) == pytest.approx(expected_max_sd(sorted(scores)[::-1], n), abs=1e-15)


def test_empty_scores_and_bad_n_are_refused() -> None:
    with pytest.raises(HarnessError, match="at least one trial score"):
        expected_max([], 1)
    with pytest.raises(HarnessError, match="at least one trial score"):
        expected_max_curve([])
    for bad in (0, -2, 2.5, True):
        with pytest.raises(HarnessError, match="at least 1, got"):
            expected_max([0.5, 0.6], bad)  # type: ignore[arg-type]
        with pytest.raises(HarnessError, match="at least 1, got"):
            expected_max_sd([0.5, 0.6], bad)  # type: ignore[arg-type]
    with pytest.raises(HarnessError, match="at least 1, got 0"):
        expected_max_curve([0.5, 0.6], n_max=0)


@pytest.mark.parametrize("bad", [None, float("nan"), float("inf")])
def test_a_missing_score_is_refused_naming_the_trial(bad: float | None) -> None:
    for call in (lambda s: expected_max(s, 2), lambda s: expected_max_sd(s, 2), expected_max_curve):
        with pytest.raises(HarnessError, match="trial score 2 is .*leave failed trials out") as info:
            call([0.5, 0.6, bad, 0.7])  # type: ignore[list-item]  # a failed trial's None, on purpose
        assert "\n" not in str(info.value)
