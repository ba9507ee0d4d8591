"""Resampling statistics over prediction rows: bootstrap intervals, seed summaries, paired tests, kappa.

Everything here is vectorised over resamples: a block of bootstrap row indices, shape (r, n), becomes r
confusion matrices (or r weighted sums) with one `np.bincount`, so 1,000 resamples of 1,000 rows cost
milliseconds. The count-based formulas reproduce scikit-learn's definitions exactly (tests compare them).
"""

from __future__ import annotations

import warnings
from collections.abc import Callable, Iterator, Sequence

import numpy as np
from numpy.typing import ArrayLike
from scipy.stats import binom
from sklearn.exceptions import UndefinedMetricWarning
from sklearn.metrics import cohen_kappa_score

from harness.errors import HarnessError

# Index cells per block of resamples: bounds memory (~16 MB of int64) whatever the number of rows.
_BLOCK_CELLS = 2_000_000
N_BINS = 15  # calibration bins for ECE and the reliability table (Guo et al. 2017)

Stat = Callable[[np.ndarray], np.ndarray]  # (r, n) row indices -> (r,) metric values


def resample_indices(n: int, resamples: int, seed: int) -> Iterator[np.ndarray]:
    """Yield blocks of bootstrap row indices, each (r, n), `resamples` rows in all, from one seeded Generator."""
    rng = np.random.default_rng(seed)
    step = max(1, _BLOCK_CELLS // max(n, 1))
    done = 0
    while done < resamples:
        size = min(step, resamples - done)
        yield rng.integers(0, n, size=(size, n))  # (r, n)
        done += size


def bootstrap_distribution(stat: Stat, n: int, resamples: int, seed: int) -> np.ndarray:
    """Values of `stat` on `resamples` bootstrap samples of n rows, shape (resamples,)."""
    if resamples < 1:
        raise HarnessError(f"bootstrap resamples must be at least 1, got {resamples}")
    return np.concatenate([stat(idx) for idx in resample_indices(n, resamples, seed)])


def percentile_interval(values: np.ndarray, ci: float = 0.95) -> list[float | None]:
    """Percentile-method interval [lo, hi] covering `ci` of the finite values (Efron & Tibshirani 1993)."""
    if not 0.0 < ci < 1.0:
        raise HarnessError(f"confidence level must lie strictly between 0 and 1, got {ci}")
    finite = values[np.isfinite(values)]  # resamples where a metric is undefined (e.g. AUC with one class)
    if finite.size == 0:
        return [None, None]
    lo, hi = np.percentile(finite, [50.0 * (1.0 - ci), 50.0 * (1.0 + ci)])
    return [float(lo), float(hi)]


# ----- metrics from stacked confusion matrices, (r, k, k), rows gold, columns predicted -----


def confusion_stack(y_true: np.ndarray, y_pred: np.ndarray, k: int, idx: np.ndarray) -> np.ndarray:
    """Confusion matrix of every resample in `idx` (r, n), as float counts of shape (r, k, k)."""
    r = idx.shape[0]
    codes = np.asarray(y_true) * k + np.asarray(y_pred)  # (n,) cell of each row
    flat = codes[idx] + (np.arange(r) * k * k)[:, None]  # (r, n) cell offset into resample r's block
    return np.bincount(flat.ravel(), minlength=r * k * k).reshape(r, k, k).astype(np.float64)


def _ratio(num: np.ndarray, den: np.ndarray) -> np.ndarray:
    """num / den, 0 where den == 0 (scikit-learn's zero_division=0)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(den > 0, num / den, 0.0)


def _margins(conf: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    tp = np.diagonal(conf, axis1=1, axis2=2)  # (r, k)
    return tp, conf.sum(axis=2), conf.sum(axis=1)  # true positives, gold counts, predicted counts


def _f1_per_class(conf: np.ndarray) -> np.ndarray:
    tp, gold, pred = _margins(conf)
    return _ratio(2.0 * tp, gold + pred)  # 2TP / (2TP + FP + FN), (r, k)


def batch_accuracy(conf: np.ndarray) -> np.ndarray:
    return np.trace(conf, axis1=1, axis2=2) / conf.sum(axis=(1, 2))


def batch_balanced_accuracy(conf: np.ndarray) -> np.ndarray:
    # sklearn: mean recall over classes present in the gold labels; others are dropped, not zeroed.
    tp, gold, _ = _margins(conf)
    present = gold > 0
    return _ratio(tp, gold).sum(axis=1) / present.sum(axis=1)


def batch_macro_f1(conf: np.ndarray) -> np.ndarray:
    return _f1_per_class(conf).mean(axis=1)


def batch_micro_f1(conf: np.ndarray) -> np.ndarray:
    tp, gold, pred = _margins(conf)
    return _ratio(2.0 * tp.sum(axis=1), gold.sum(axis=1) + pred.sum(axis=1))


def batch_weighted_f1(conf: np.ndarray) -> np.ndarray:
    _, gold, _ = _margins(conf)
    return _ratio((_f1_per_class(conf) * gold).sum(axis=1), gold.sum(axis=1))


def batch_mcc(conf: np.ndarray) -> np.ndarray:
    # Gorodkin's multi-class MCC in the covariance form sklearn's matthews_corrcoef uses; 0 when undefined.
    tp, gold, pred = _margins(conf)
    total = gold.sum(axis=1)
    cov_tp = tp.sum(axis=1) * total - (gold * pred).sum(axis=1)
    cov_pp = total**2 - (pred * pred).sum(axis=1)
    cov_tt = total**2 - (gold * gold).sum(axis=1)
    prod = cov_pp * cov_tt
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(prod > 0, cov_tp / np.sqrt(prod), 0.0)


def batch_positive_f1(conf: np.ndarray, positive: int) -> np.ndarray:
    return _f1_per_class(conf)[:, positive]


def batch_kappa(conf: np.ndarray) -> np.ndarray:
    """Cohen's kappa (po - pe) / (1 - pe) per resample; NaN where pe == 1 (sklearn's undefined case)."""
    tp, rows, cols = _margins(conf)
    total = rows.sum(axis=1)
    disagree = total - tp.sum(axis=1)  # sum of off-diagonal cells
    expected_disagree = total - (rows * cols).sum(axis=1) / total  # same sum under independence
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(expected_disagree > 0, 1.0 - disagree / expected_disagree, np.nan)


# Metric name (as in harness.metrics.scores.METRICS) -> its formula on confusion stacks.
COUNT_METRICS: dict[str, Callable[[np.ndarray], np.ndarray]] = {
    "accuracy": batch_accuracy,
    "balanced_accuracy": batch_balanced_accuracy,
    "macro_f1": batch_macro_f1,
    "micro_f1": batch_micro_f1,
    "weighted_f1": batch_weighted_f1,
    "mcc": batch_mcc,
}


# ----- metrics from per-row values, for probability-based metrics -----


def batch_row_mean(row_values: np.ndarray) -> Stat:
    """Resampled mean of a per-row quantity (per-row log loss, per-row Brier score)."""
    return lambda idx: row_values[idx].mean(axis=1)


def confidence_bins(confidence: np.ndarray, n_bins: int) -> np.ndarray:
    """Bin of each confidence among n_bins equal-width bins (lower, upper] on [0, 1] (Guo et al. 2017)."""
    edges = np.linspace(0.0, 1.0, n_bins + 1)
    return np.clip(np.searchsorted(edges, confidence, side="left") - 1, 0, n_bins - 1)


def batch_ece(confidence: np.ndarray, correct: np.ndarray, n_bins: int) -> Stat:
    """Resampled ECE: sum over bins of |sum(conf) - sum(correct)| / n, i.e. sum_b |B|/n |acc_b - conf_b|."""
    bins = confidence_bins(confidence, n_bins)
    gap = confidence - correct.astype(np.float64)

    def stat(idx: np.ndarray) -> np.ndarray:
        r, n = idx.shape
        flat = bins[idx] + (np.arange(r) * n_bins)[:, None]  # (r, n)
        sums = np.bincount(flat.ravel(), weights=gap[idx].ravel(), minlength=r * n_bins)
        return np.abs(sums.reshape(r, n_bins)).sum(axis=1) / n

    return stat


def batch_auc(scores: np.ndarray, is_positive: np.ndarray) -> Stat:
    """Resampled ROC AUC as the Mann-Whitney statistic (ties count one half), NaN if a class is absent."""
    values, rank = np.unique(scores, return_inverse=True)  # rank: (n,) index of each row's distinct score
    u = values.size
    pos = is_positive.astype(np.float64)

    def stat(idx: np.ndarray) -> np.ndarray:
        r = idx.shape[0]
        flat = (rank[idx] + (np.arange(r) * u)[:, None]).ravel()  # (r * n,)
        p = np.bincount(flat, weights=pos[idx].ravel(), minlength=r * u).reshape(r, u)
        q = np.bincount(flat, weights=1.0 - pos[idx].ravel(), minlength=r * u).reshape(r, u)
        below = np.cumsum(q, axis=1) - q  # negatives with a strictly lower score, (r, u)
        pairs = p.sum(axis=1) * q.sum(axis=1)
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(pairs > 0, (p * (below + 0.5 * q)).sum(axis=1) / pairs, np.nan)

    return stat


BOOTSTRAP_METRICS = [*COUNT_METRICS, "positive_f1", "roc_auc", "log_loss", "brier", "ece"]


def bootstrap_stat(name: str, y_true: ArrayLike, probs: ArrayLike, *, positive: int = 1) -> Stat:
    """Vectorised form of metric `name`: maps (r, n) resample indices to r values, for bootstrap_distribution.

    `name` is a metric name of harness.metrics.scores.METRICS (all of them have a form here).

    Expects validated input (as compute_metrics has); predictions are argmax(probs). Tests check that
    it equals the scikit-learn metric on a resample.
    """
    y, p = np.asarray(y_true, dtype=np.int64), np.asarray(probs, dtype=np.float64)
    k, pred = p.shape[1], p.argmax(axis=1)
    if name in COUNT_METRICS:
        formula = COUNT_METRICS[name]
        return lambda idx: formula(confusion_stack(y, pred, k, idx))
    if name == "positive_f1":
        return lambda idx: batch_positive_f1(confusion_stack(y, pred, k, idx), positive)
    if name == "roc_auc":
        return batch_auc(p[:, positive], y == positive)
    if name == "log_loss":
        eps = np.finfo(np.float64).eps  # the clipping sklearn's log_loss applies
        return batch_row_mean(-np.log(np.clip(p[np.arange(y.size), y], eps, 1.0 - eps)))
    if name == "brier":
        return batch_row_mean(((p - np.eye(k)[y]) ** 2).sum(axis=1))
    if name == "ece":
        return batch_ece(p.max(axis=1), pred == y, N_BINS)
    raise HarnessError(f"no bootstrap form for metric {name!r}; use one of: {', '.join(BOOTSTRAP_METRICS)}")


# ----- across seeds and between systems -----


def summarize_seeds(values: ArrayLike) -> dict[str, float | int]:
    """Mean, sample SD (ddof=1; 0 for a single value), min, max and count of one metric over seeds."""
    arr = np.asarray(values, dtype=np.float64)
    if arr.size == 0:
        raise HarnessError("summarize_seeds got no values: run at least one seed")
    sd = float(arr.std(ddof=1)) if arr.size > 1 else 0.0
    return {
        "mean": float(arr.mean()),
        "sd": sd,
        "min": float(arr.min()),
        "max": float(arr.max()),
        "n": int(arr.size),
    }


def _paired(a: ArrayLike, b: ArrayLike, what: str) -> tuple[np.ndarray, np.ndarray]:
    x, y = np.asarray(a), np.asarray(b)
    if x.ndim != 1 or x.shape != y.shape or x.size == 0:
        raise HarnessError(
            f"{what} needs two non-empty 1-D arrays over the same rows, got shapes {x.shape} and {y.shape}"
        )
    return x, y


def mcnemar_exact(correct_a: ArrayLike, correct_b: ArrayLike) -> dict[str, float | int]:
    """Exact McNemar test (Dietterich 1998): two-sided binomial test of b vs c at p=1/2.

    b = rows A gets right and B gets wrong, c = the reverse; p = min(1, 2 * P[X <= min(b, c)]),
    X ~ Binomial(b + c, 1/2), and 1.0 when there are no discordant rows.
    """
    a, b_ = _paired(correct_a, correct_b, "mcnemar_exact")
    a, b_ = a.astype(bool), b_.astype(bool)
    b, c = int(np.sum(a & ~b_)), int(np.sum(~a & b_))
    p = 1.0 if b + c == 0 else min(1.0, 2.0 * float(binom.cdf(min(b, c), b + c, 0.5)))
    return {"b": b, "c": c, "p_value": p}


def paired_bootstrap(
    y_true: ArrayLike,
    pred_a: ArrayLike,
    pred_b: ArrayLike,
    metric_name: str,
    *,
    resamples: int = 1000,
    seed: int = 0,
    ci: float = 0.95,
    labels: Sequence[int] | None = None,
    positive: int = 1,
) -> dict[str, float | None]:
    """Paired bootstrap of delta = metric(A) - metric(B) over the same resampled rows.

    Returns the observed delta, a percentile interval [lo, hi] of the resampled deltas, and
    p = min(1, 2 * f), f = fraction of resamples whose delta is <= 0 when the observed delta is > 0
    (>= 0 when it is < 0); p = 1 when the observed delta is 0. This is the sign-flip mirror of the
    test in Berg-Kirkpatrick et al. (2012), who count resamples with delta* > 2 * delta; the two agree
    when the bootstrap distribution is symmetric. Ties (delta* = 0) count as flips, so p is
    conservative; with R resamples the smallest non-zero p is 2/R, and p = 0 means "< 1/R".
    """
    y, a = _paired(y_true, pred_a, "paired_bootstrap")
    _, b = _paired(y_true, pred_b, "paired_bootstrap")
    if metric_name not in COUNT_METRICS and metric_name != "positive_f1":
        valid = ", ".join([*COUNT_METRICS, "positive_f1"])
        raise HarnessError(
            f"paired_bootstrap compares predicted labels; metric {metric_name!r} is not one of: {valid}"
        )
    extra = [positive] if metric_name == "positive_f1" else []
    k = 1 + int(max(y.max(), a.max(), b.max(), *extra, *(labels if labels is not None else [])))

    def formula(conf: np.ndarray) -> np.ndarray:
        if metric_name == "positive_f1":
            return batch_positive_f1(conf, positive)
        return COUNT_METRICS[metric_name](conf)

    def stat(idx: np.ndarray) -> np.ndarray:
        return formula(confusion_stack(y, a, k, idx)) - formula(confusion_stack(y, b, k, idx))

    delta = float(stat(np.arange(y.size)[None, :])[0])  # identity "resample" = the observed rows
    deltas = bootstrap_distribution(stat, y.size, resamples, seed)
    lo, hi = percentile_interval(deltas, ci)
    if delta == 0.0:
        p = 1.0
    else:
        flips = np.mean(deltas <= 0.0) if delta > 0 else np.mean(deltas >= 0.0)
        p = min(1.0, 2.0 * float(flips))
    return {"delta": delta, "lo": lo, "hi": hi, "p_value": p}


def majority_vote(preds_by_seed: Sequence[ArrayLike]) -> np.ndarray:
    """Per-row most frequent class index over seeds; ties go to the lowest class index."""
    if len(preds_by_seed) == 0:
        raise HarnessError("majority_vote got no predictions: pass one array per seed")
    lengths = {np.shape(p)[0] if np.ndim(p) else 0 for p in preds_by_seed}
    if len(lengths) != 1:
        raise HarnessError(
            f"majority_vote needs one prediction per row from every seed, got lengths {sorted(lengths)}"
        )
    stack = np.asarray(preds_by_seed, dtype=np.int64)  # (seeds, n)
    n, k = stack.shape[1], int(stack.max()) + 1
    cells = (np.arange(n)[None, :] * k + stack).ravel()  # (seeds * n,) row-major cell of (row, class)
    votes = np.bincount(cells, minlength=n * k).reshape(n, k)  # (n, k)
    return votes.argmax(axis=1)  # argmax returns the first maximum: the lowest index wins ties


def cohen_kappa(a: ArrayLike, b: ArrayLike, *, labels: Sequence | None = None) -> float:
    """Cohen's kappa between two raters over the same rows (scikit-learn); NaN when undefined."""
    x, y = _paired(a, b, "cohen_kappa")
    with warnings.catch_warnings():
        # why: both raters using one label makes kappa 0/0; we return NaN and let the report say "undefined"
        warnings.simplefilter("ignore", UndefinedMetricWarning)
        return float(cohen_kappa_score(x, y, labels=labels))


def kappa_interval(
    a: ArrayLike, b: ArrayLike, resamples: int = 1000, seed: int = 0, *, ci: float = 0.95
) -> list[float | None]:
    """Percentile bootstrap interval [lo, hi] of Cohen's kappa, resampling rows; labels may be any values."""
    x, y = _paired(a, b, "kappa_interval")
    _, codes = np.unique(np.concatenate([x, y]), return_inverse=True)  # shared label -> index coding
    ca, cb = codes[: x.size], codes[x.size :]
    k = int(codes.max()) + 1
    values = bootstrap_distribution(
        lambda idx: batch_kappa(confusion_stack(ca, cb, k, idx)), x.size, resamples, seed
    )
    return percentile_interval(values, ci)
