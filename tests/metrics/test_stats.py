"""Resampling and paired statistics, checked against scipy, scikit-learn, the stdlib and worked examples."""

from __future__ import annotations

import statistics
import warnings

import numpy as np
import pytest
import sklearn.metrics as skm
from scipy.stats import binomtest, mode

from harness.errors import HarnessError
from harness.metrics.scores import compute_metrics
from harness.metrics.stats import (
    COUNT_METRICS,
    batch_kappa,
    bootstrap_distribution,
    cohen_kappa,
    confusion_stack,
    kappa_interval,
    majority_vote,
    mcnemar_exact,
    paired_bootstrap,
    percentile_interval,
    resample_indices,
    summarize_seeds,
)


def _fixed_accuracy(n: int, accuracy: float, seed: int = 0):
    """Binary gold labels and probabilities whose argmax is right on exactly accuracy*n rows."""
    rng = np.random.default_rng(seed)
    y = rng.integers(0, 2, n)
    right = np.zeros(n, dtype=bool)
    right[: round(accuracy * n)] = True
    rng.shuffle(right)
    pred = np.where(right, y, 1 - y)
    conf = rng.uniform(0.55, 0.95, n)
    p = np.where(pred[:, None] == np.arange(2), conf[:, None], 1 - conf[:, None])  # (n, 2)
    return y, p


# ----- seed summaries -----


def test_summarize_seeds_matches_stdlib():
    values = [0.81, 0.79, 0.86, 0.80]
    got = summarize_seeds(values)
    # Sample mean and standard deviation (ddof=1), as Python's statistics module defines them.
    assert got["mean"] == pytest.approx(statistics.mean(values))
    assert got["sd"] == pytest.approx(statistics.stdev(values))
    assert (got["min"], got["max"], got["n"]) == (0.79, 0.86, 4)


def test_summarize_one_seed_has_zero_sd_and_none_raises():
    assert summarize_seeds([0.7]) == {"mean": 0.7, "sd": 0.0, "min": 0.7, "max": 0.7, "n": 1}
    with pytest.raises(HarnessError, match="at least one seed"):
        summarize_seeds([])


# ----- McNemar -----


def test_mcnemar_worked_example():
    # Worked by hand: b=1, c=7 -> p = 2 * sum_{k<=1} C(8,k) / 2^8 = 2 * (1 + 8) / 256 = 0.0703125.
    a = np.array([True] + [False] * 7 + [True] * 5 + [False] * 3)
    b = np.array([False] + [True] * 7 + [True] * 5 + [False] * 3)
    got = mcnemar_exact(a, b)
    assert (got["b"], got["c"]) == (1, 7)
    assert got["p_value"] == pytest.approx(0.0703125, abs=1e-15)


@pytest.mark.parametrize("seed", range(25))
def test_mcnemar_equals_scipy_binomtest(seed):
    rng = np.random.default_rng(seed)
    n = int(rng.integers(5, 120))
    a = rng.random(n) < rng.uniform(0.3, 0.9)
    b = rng.random(n) < rng.uniform(0.3, 0.9)
    got = mcnemar_exact(a, b)
    b_, c_ = int(np.sum(a & ~b)), int(np.sum(~a & b))
    assert (got["b"], got["c"]) == (b_, c_)
    if b_ + c_:
        # Exact two-sided binomial test on the discordant pairs (Dietterich 1998; scipy.stats.binomtest).
        assert got["p_value"] == pytest.approx(binomtest(b_, b_ + c_, 0.5).pvalue, rel=1e-12)


def test_mcnemar_without_discordant_rows_is_one():
    same = np.array([True, False, True])
    assert mcnemar_exact(same, same) == {"b": 0, "c": 0, "p_value": 1.0}


def test_mcnemar_rejects_unequal_lengths():
    with pytest.raises(HarnessError, match="same rows"):
        mcnemar_exact([True, False], [True])


# ----- bootstrap intervals -----


def test_interval_contains_point_and_shrinks_with_n():
    small = compute_metrics(*_fixed_accuracy(100, 0.8), ["a", "b"], bootstrap=1000)
    large = compute_metrics(*_fixed_accuracy(2000, 0.8, seed=1), ["a", "b"], bootstrap=1000)
    for rec in (small, large):
        assert rec["metrics"]["accuracy"] == pytest.approx(0.8)
        for name in ("accuracy", "macro_f1", "mcc", "log_loss", "roc_auc"):
            lo, hi = rec["intervals"][name]
            assert lo <= rec["metrics"][name] <= hi, name
    width = {
        k: r["intervals"]["accuracy"][1] - r["intervals"]["accuracy"][0]
        for k, r in (("s", small), ("l", large))
    }
    # Width scales like 1/sqrt(n): sqrt(2000/100) ~ 4.5 times narrower; demand at least 3.
    assert width["l"] * 3 < width["s"]


def test_accuracy_interval_width_near_normal_approximation():
    # Common practice: a 95% interval for a proportion is about +-1.96 * sqrt(p(1-p)/n) (Wald).
    rec = compute_metrics(*_fixed_accuracy(1000, 0.8), ["a", "b"], bootstrap=2000)
    lo, hi = rec["intervals"]["accuracy"]
    assert hi - lo == pytest.approx(2 * 1.96 * np.sqrt(0.8 * 0.2 / 1000), rel=0.15)


def test_same_seed_same_interval_other_seed_differs():
    y, p = _fixed_accuracy(300, 0.7)
    first = compute_metrics(y, p, ["a", "b"], seed=5)["intervals"]
    again = compute_metrics(y, p, ["a", "b"], seed=5)["intervals"]
    other = compute_metrics(y, p, ["a", "b"], seed=6)["intervals"]
    assert first == again
    assert first != other
    assert first["log_loss"] != other["log_loss"]


def test_resample_blocks_cover_requested_count_and_rows():
    blocks = list(resample_indices(n=1_000_001, resamples=3, seed=0))  # > 2e6 / n: one resample per block
    assert [b.shape for b in blocks] == [(1, 1_000_001)] * 3
    small = np.concatenate(list(resample_indices(n=10, resamples=7, seed=0)))
    assert small.shape == (7, 10) and small.min() >= 0 and small.max() <= 9


def test_percentile_interval_matches_numpy_and_skips_nan():
    values = np.array([0.1, 0.5, np.nan, 0.3, 0.9, 0.7])
    finite = values[np.isfinite(values)]
    # numpy's linear-interpolation percentiles, 2.5 and 97.5 for 95%.
    assert percentile_interval(values, 0.95) == pytest.approx(list(np.percentile(finite, [2.5, 97.5])))
    assert percentile_interval(np.array([np.nan, np.nan])) == [None, None]
    with pytest.raises(HarnessError, match="strictly between"):
        percentile_interval(values, 0.0)


def test_bootstrap_distribution_requires_resamples():
    with pytest.raises(HarnessError, match="at least 1"):
        bootstrap_distribution(lambda idx: idx.mean(axis=1), 10, 0, 0)


@pytest.mark.parametrize("seed", range(15))
def test_count_metrics_equal_sklearn_on_resamples(seed):
    rng = np.random.default_rng(seed)
    k, n = int(rng.integers(2, 7)), int(rng.integers(5, 150))
    y = rng.integers(0, k, n)
    pred = np.where(rng.random(n) < 0.5, y, rng.integers(0, max(1, k - 1), n))  # class k-1 rarely predicted
    idx = rng.integers(0, n, size=(4, n))
    conf = confusion_stack(y, pred, k, idx)
    for r in range(4):
        yr, pr = y[idx[r]], pred[idx[r]]
        assert conf[r].tolist() == skm.confusion_matrix(yr, pr, labels=range(k)).tolist()
        # Each formula against its sklearn function (sklearn.metrics docs), labels=range(k), zero_division=0.
        want = {
            "accuracy": skm.accuracy_score(yr, pr),
            "macro_f1": skm.f1_score(yr, pr, labels=range(k), average="macro", zero_division=0),
            "micro_f1": skm.f1_score(yr, pr, labels=range(k), average="micro", zero_division=0),
            "weighted_f1": skm.f1_score(yr, pr, labels=range(k), average="weighted", zero_division=0),
            "mcc": skm.matthews_corrcoef(yr, pr),
        }
        for name, value in want.items():
            assert COUNT_METRICS[name](conf[r : r + 1])[0] == pytest.approx(value, abs=1e-12), name
        with warnings.catch_warnings():  # sklearn notes predicted classes absent from y; expected here
            warnings.simplefilter("ignore")
            want_bal = skm.balanced_accuracy_score(yr, pr)
        assert COUNT_METRICS["balanced_accuracy"](conf[r : r + 1])[0] == pytest.approx(want_bal, abs=1e-12)


# ----- paired bootstrap -----


def _paired_case(n=150, seed=0, skill_a=0.8, skill_b=0.7, k=3):
    rng = np.random.default_rng(seed)
    y = rng.integers(0, k, n)
    a = np.where(rng.random(n) < skill_a, y, rng.integers(0, k, n))
    b = np.where(rng.random(n) < skill_b, y, rng.integers(0, k, n))
    return y, a, b


@pytest.mark.parametrize(
    ("name", "sk"),
    [
        ("accuracy", lambda y, p: skm.accuracy_score(y, p)),
        ("macro_f1", lambda y, p: skm.f1_score(y, p, labels=range(3), average="macro", zero_division=0)),
        ("mcc", lambda y, p: skm.matthews_corrcoef(y, p)),
    ],
)
@pytest.mark.parametrize("close", [False, True])
def test_paired_bootstrap_equals_a_loop_over_sklearn(name, sk, close):
    y, a, b = _paired_case()
    if close:  # B differs from A on 4 rows only: many resampled deltas are exactly 0
        b = a.copy()
        b[:4] = (a[:4] + 1) % 3
    got = paired_bootstrap(y, a, b, name, resamples=200, seed=3)
    # Reference: the same resamples, each scored by sklearn one at a time.
    idx = np.concatenate(list(resample_indices(y.size, 200, 3)))
    deltas = np.array([sk(y[i], a[i]) - sk(y[i], b[i]) for i in idx])
    delta = sk(y, a) - sk(y, b)
    assert got["delta"] == pytest.approx(delta, abs=1e-12)
    assert [got["lo"], got["hi"]] == pytest.approx(list(np.percentile(deltas, [2.5, 97.5])), abs=1e-12)
    flips = np.mean(deltas <= 0) if delta > 0 else np.mean(deltas >= 0)
    assert got["p_value"] == pytest.approx(min(1.0, 2 * flips))


@pytest.mark.parametrize("name, sk", [
    ("accuracy", None),
    ("macro_f1", lambda y, p: skm.f1_score(y, p, labels=range(3), average="macro", zero_division=0)),
])
def test_paired_bootstrap_interval_agrees_with_scipy(name, sk):
    # The paired bootstrap: resample test rows with replacement, score both systems on the same rows,
    # take percentiles of the differences (Efron & Tibshirani 1993, "An Introduction to the Bootstrap",
    # ch. 13, percentile interval; for NLP systems Berg-Kirkpatrick, Burkett & Klein 2012, "An Empirical
    # Investigation of Statistical Significance in NLP", EMNLP, section 2; both from memory). An
    # independent implementation, scipy.stats.bootstrap(paired=True, method="percentile"), must give the
    # same interval up to Monte Carlo error (about 0.002 per end at 4,000 resamples for these deltas).
    from scipy import stats as sps

    y, a, b = _paired_case(n=150, seed=5)
    ours = paired_bootstrap(y, a, b, name, resamples=4000, seed=11)
    if sk is None:  # accuracy: the mean of per-row differences in correctness, vectorised
        data = ((a == y).astype(float), (b == y).astype(float))
        ref = sps.bootstrap(data, lambda x, z, axis=-1: x.mean(axis=axis) - z.mean(axis=axis), paired=True,
                            vectorized=True, n_resamples=4000, method="percentile", random_state=7)
    else:
        ref = sps.bootstrap((y, a, b), lambda yy, aa, bb: sk(yy, aa) - sk(yy, bb), paired=True, vectorized=False,
                            n_resamples=1000, method="percentile", random_state=7)
    tol = 0.012 if sk is None else 0.02
    assert ours["lo"] == pytest.approx(ref.confidence_interval.low, abs=tol)
    assert ours["hi"] == pytest.approx(ref.confidence_interval.high, abs=tol)


def test_paired_bootstrap_clear_win_tie_and_errors():
    y, a, b = _paired_case(n=400, skill_a=0.95, skill_b=0.55, seed=1)
    win = paired_bootstrap(y, a, b, "accuracy")
    assert win["delta"] > 0.2 and win["lo"] > 0 and win["p_value"] == 0.0
    assert paired_bootstrap(y, b, a, "accuracy")["hi"] < 0
    assert paired_bootstrap(y, a, a, "macro_f1")["p_value"] == 1.0
    with pytest.raises(HarnessError, match="log_loss.*accuracy"):
        paired_bootstrap(y, a, b, "log_loss")


def test_paired_bootstrap_positive_f1_equals_sklearn():
    y, a, b = _paired_case(k=2, seed=4)
    got = paired_bootstrap(y, a, b, "positive_f1", positive=0, resamples=50)
    want = skm.f1_score(y, a, pos_label=0) - skm.f1_score(y, b, pos_label=0)
    assert got["delta"] == pytest.approx(want, abs=1e-12)


def test_paired_bootstrap_labels_count_unseen_classes():
    y, a, b = _paired_case(k=2, seed=2)
    got = paired_bootstrap(y, a, b, "macro_f1", labels=range(3), resamples=20)
    # sklearn scores an unseen listed class as F1 0 with zero_division=0.
    want = skm.f1_score(y, a, labels=range(3), average="macro", zero_division=0) - skm.f1_score(
        y, b, labels=range(3), average="macro", zero_division=0
    )
    assert got["delta"] == pytest.approx(want, abs=1e-12)


# ----- majority vote -----


def test_majority_vote_hand_example_ties_to_lowest():
    seeds = [[0, 1, 2, 0], [1, 1, 0, 2], [1, 2, 2, 1]]
    # Worked by hand: row 0 votes 0,1,1 -> 1; row 1: 1,1,2 -> 1; row 2: 2,0,2 -> 2; row 3: 0,2,1 tie -> 0.
    assert majority_vote(seeds).tolist() == [1, 1, 2, 0]


@pytest.mark.parametrize("seed", range(10))
def test_majority_vote_equals_scipy_mode(seed):
    rng = np.random.default_rng(seed)
    preds = [rng.integers(0, 4, 60) for _ in range(int(rng.integers(2, 7)))]
    # scipy.stats.mode returns the smallest of tied modes (scipy docs).
    assert majority_vote(preds).tolist() == mode(np.stack(preds), axis=0).mode.tolist()


def test_majority_vote_rejects_bad_input():
    with pytest.raises(HarnessError, match="no predictions"):
        majority_vote([])
    with pytest.raises(HarnessError, match="lengths"):
        majority_vote([[0, 1], [0]])


# ----- Cohen's kappa -----


def test_kappa_textbook_example():
    # Source of the definition: Cohen, J. (1960), "A coefficient of agreement for nominal scales",
    # Educational and Psychological Measurement 20(1), 37-46: kappa = (p_o - p_e) / (1 - p_e), p_e the
    # agreement expected from the two raters' marginals (from memory). The counts are a 2x2 worked example
    # computed by hand here:
    # 50 items, yes/yes 20, yes/no 5, no/yes 10, no/no 15: p_o = 35/50 = 0.7,
    # p_e = 0.5*0.6 + 0.5*0.4 = 0.5, kappa = (0.7-0.5)/(1-0.5) = 0.4.
    a = ["yes"] * 25 + ["no"] * 25
    b = ["yes"] * 20 + ["no"] * 5 + ["yes"] * 10 + ["no"] * 15
    assert cohen_kappa(a, b) == pytest.approx(0.4, abs=1e-12)
    lo, hi = kappa_interval(a, b, 500, 0)
    assert lo < 0.4 < hi


@pytest.mark.parametrize("seed", range(15))
def test_kappa_equals_sklearn_and_batch_form(seed):
    rng = np.random.default_rng(seed)
    k, n = int(rng.integers(2, 6)), int(rng.integers(10, 150))
    a = rng.integers(0, k, n)
    b = np.where(rng.random(n) < 0.6, a, rng.integers(0, k, n))
    assert cohen_kappa(a, b) == pytest.approx(skm.cohen_kappa_score(a, b), abs=1e-12)
    idx = rng.integers(0, n, size=(3, n))
    got = batch_kappa(confusion_stack(a, b, k, idx))
    for r in range(3):
        assert got[r] == pytest.approx(skm.cohen_kappa_score(a[idx[r]], b[idx[r]]), abs=1e-12)


def test_kappa_undefined_is_nan_without_warning(recwarn):
    assert np.isnan(cohen_kappa(["x", "x"], ["x", "x"]))
    assert np.isnan(
        batch_kappa(confusion_stack(np.zeros(2, int), np.zeros(2, int), 1, np.array([[0, 1]])))[0]
    )
    assert not [w for w in recwarn if "kappa" in str(w.message)]


def test_kappa_interval_is_seeded():
    rng = np.random.default_rng(9)
    a = rng.integers(0, 3, 200)
    b = np.where(rng.random(200) < 0.7, a, rng.integers(0, 3, 200))
    first = kappa_interval(a, b, 400, 1)
    assert first == kappa_interval(a, b, 400, 1)
    assert first != kappa_interval(a, b, 400, 2)
    assert first[0] < cohen_kappa(a, b) < first[1]
    with pytest.raises(HarnessError, match="same rows"):
        kappa_interval(a, b[:-1])
