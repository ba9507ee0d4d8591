"""Point metrics over class-index predictions, their registry, and the metrics record of one split.

Labels are integer class indices 0..K-1; `probs` is an (n, K) array of per-label probabilities.
Every metric wraps scikit-learn where it has one, always scoring over labels=range(K) so a class
missing from the predictions (or the gold labels) counts, with zero_division=0.
"""

from __future__ import annotations

import os
import warnings
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import sklearn.metrics as skm
from numpy.typing import ArrayLike

from harness.errors import HarnessError
from harness.metrics import stats

N_BINS = stats.N_BINS  # calibration bins, as in Guo et al. (2017)


def _label_list(labels: Sequence[int] | None, *arrays: Any) -> list[int]:
    """The class indices to score over: `labels`, else 0..max index seen."""
    if labels is not None:
        return [int(i) for i in labels]
    return list(range(1 + max(int(np.max(a)) for a in arrays)))


def _prob_labels(labels: Sequence[int] | None, probs: ArrayLike) -> list[int]:
    return [int(i) for i in labels] if labels is not None else list(range(np.shape(probs)[1]))


@contextmanager
def _no_label_set_warnings() -> Iterator[None]:
    """Silence sklearn's notes about classes missing from y_true/y_pred: we score over all K on purpose."""
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="y_pred contains classes not in y_true")
        warnings.filterwarnings("ignore", message="A single label was found in 'y_true' and 'y_pred'")
        yield


# ----- point metrics from predicted labels -----


def accuracy_score(y_true: ArrayLike, y_pred: ArrayLike, *, labels: Sequence[int] | None = None) -> float:
    """Fraction of rows predicted right (`labels` does not change it; accepted for a uniform signature)."""
    return float(skm.accuracy_score(y_true, y_pred))


def balanced_accuracy_score(
    y_true: ArrayLike, y_pred: ArrayLike, *, labels: Sequence[int] | None = None
) -> float:
    """Mean recall over the classes present in y_true (scikit-learn's definition; `labels` is not used)."""
    with _no_label_set_warnings():  # a predicted class absent from gold is dropped, as we want
        return float(skm.balanced_accuracy_score(y_true, y_pred))


def _f1(y_true: ArrayLike, y_pred: ArrayLike, labels: Sequence[int] | None, average: str) -> float:
    chosen = _label_list(labels, y_true, y_pred)
    return float(skm.f1_score(y_true, y_pred, labels=chosen, average=average, zero_division=0))


def macro_f1_score(y_true: ArrayLike, y_pred: ArrayLike, *, labels: Sequence[int] | None = None) -> float:
    """Unweighted mean of per-class F1 over `labels` (a class never gold nor predicted scores 0)."""
    return _f1(y_true, y_pred, labels, "macro")


def micro_f1_score(y_true: ArrayLike, y_pred: ArrayLike, *, labels: Sequence[int] | None = None) -> float:
    """F1 of pooled counts; equals accuracy when `labels` covers every class."""
    return _f1(y_true, y_pred, labels, "micro")


def weighted_f1_score(y_true: ArrayLike, y_pred: ArrayLike, *, labels: Sequence[int] | None = None) -> float:
    """Per-class F1 averaged with gold support as weights."""
    return _f1(y_true, y_pred, labels, "weighted")


def matthews_score(y_true: ArrayLike, y_pred: ArrayLike, *, labels: Sequence[int] | None = None) -> float:
    """Matthews correlation coefficient, multi-class form (0 when undefined; `labels` does not change it)."""
    with _no_label_set_warnings():  # classes absent from both add nothing to MCC
        return float(skm.matthews_corrcoef(y_true, y_pred))


def positive_f1_score(
    y_true: ArrayLike, y_pred: ArrayLike, *, positive: int = 1, labels: Sequence[int] | None = None
) -> float:
    """F1 of the class with index `positive` (binary tasks)."""
    f1 = skm.f1_score(y_true, y_pred, labels=[int(positive)], average=None, zero_division=0)
    return float(f1[0])


# ----- point metrics from probabilities -----


def roc_auc_score(
    y_true: ArrayLike, probs: ArrayLike, *, positive: int = 1, labels: Sequence[int] | None = None
) -> float:
    """ROC AUC of class `positive` against the rest from probs[:, positive]; NaN when one class is absent."""
    is_pos = np.asarray(y_true) == positive
    if is_pos.all() or not is_pos.any():
        return float("nan")  # undefined; sklearn would warn and return NaN too
    return float(skm.roc_auc_score(is_pos, np.asarray(probs)[:, positive]))


def log_loss(y_true: ArrayLike, probs: ArrayLike, *, labels: Sequence[int] | None = None) -> float:
    """Mean negative natural log of the gold label's probability (clipped to [eps, 1-eps] by sklearn)."""
    return float(skm.log_loss(y_true, np.asarray(probs), labels=_prob_labels(labels, probs)))


def brier_loss(y_true: ArrayLike, probs: ArrayLike, *, labels: Sequence[int] | None = None) -> float:
    """Multi-class Brier score, mean over rows of sum_k (p_k - onehot_k)^2, in [0, 2] (Brier 1950).

    This is Brier's original definition, used for every K including K=2. sklearn's binary
    brier_score_loss(y, p_positive) is half of it for K=2.
    """
    return float(
        skm.brier_score_loss(
            y_true, np.asarray(probs), labels=_prob_labels(labels, probs), scale_by_half=False
        )
    )


def _top(y_true: ArrayLike, probs: ArrayLike) -> tuple[np.ndarray, np.ndarray]:
    p = np.asarray(probs, dtype=np.float64)
    return p.max(axis=1), p.argmax(axis=1) == np.asarray(y_true)  # top-class confidence, correct?


def expected_calibration_error(
    y_true: ArrayLike, probs: ArrayLike, *, labels: Sequence[int] | None = None, n_bins: int = N_BINS
) -> float:
    """ECE (Guo et al. 2017): sum over equal-width confidence bins of |B|/n * |accuracy(B) - confidence(B)|."""
    confidence, correct = _top(y_true, probs)
    bins = stats.confidence_bins(confidence, n_bins)
    gaps = np.bincount(
        bins, weights=confidence - correct, minlength=n_bins
    )  # per bin sum(conf) - sum(correct)
    return float(np.abs(gaps).sum() / confidence.size)


def reliability_table(
    y_true: ArrayLike, probs: ArrayLike, *, labels: Sequence[int] | None = None, n_bins: int = N_BINS
) -> list[dict[str, float | int | None]]:
    """One row per bin (lower, upper]: count, mean top-class confidence and accuracy (None when empty)."""
    confidence, correct = _top(y_true, probs)
    bins = stats.confidence_bins(confidence, n_bins)
    edges = np.linspace(0.0, 1.0, n_bins + 1)
    rows: list[dict[str, float | int | None]] = []
    for b in range(n_bins):
        inside = bins == b
        count = int(inside.sum())
        rows.append(
            {
                "lower": float(edges[b]),
                "upper": float(edges[b + 1]),
                "count": count,
                "mean_confidence": float(confidence[inside].mean()) if count else None,
                "accuracy": float(correct[inside].mean()) if count else None,
            }
        )
    return rows


# ----- registry -----


@dataclass(frozen=True)
class MetricSpec:
    """How to compute and read one metric."""

    function: Callable[..., float]
    needs_probs: bool  # takes (y_true, probs) rather than (y_true, y_pred)
    higher_is_better: bool
    binary_only: bool  # takes positive=<class index>; reported for binary tasks only
    display: str


METRICS: dict[str, MetricSpec] = {
    "accuracy": MetricSpec(accuracy_score, False, True, False, "Accuracy"),
    "balanced_accuracy": MetricSpec(balanced_accuracy_score, False, True, False, "Balanced accuracy"),
    "macro_f1": MetricSpec(macro_f1_score, False, True, False, "Macro-F1"),
    "micro_f1": MetricSpec(micro_f1_score, False, True, False, "Micro-F1"),
    "weighted_f1": MetricSpec(weighted_f1_score, False, True, False, "Weighted F1"),
    "mcc": MetricSpec(matthews_score, False, True, False, "MCC"),
    "positive_f1": MetricSpec(positive_f1_score, False, True, True, "F1 (positive class)"),
    "roc_auc": MetricSpec(roc_auc_score, True, True, True, "ROC AUC"),
    "log_loss": MetricSpec(log_loss, True, False, False, "Log loss"),
    "brier": MetricSpec(brier_loss, True, False, False, "Brier score"),
    "ece": MetricSpec(expected_calibration_error, True, False, False, "ECE (15 bins)"),
}

# Reported with bootstrap intervals, in this order (binary-only ones on binary tasks only).
HEADLINE: list[str] = [
    "accuracy",
    "macro_f1",
    "balanced_accuracy",
    "mcc",
    "positive_f1",
    "roc_auc",
    "log_loss",
    "ece",
]


def check_metric_name(name: str, where: str) -> None:
    """Raise HarnessError unless `name` is a registered metric; `where` names the file/key it came from."""
    if name not in METRICS:
        raise HarnessError(f"{where}: unknown metric {name!r}; use one of: {', '.join(METRICS)}")


# ----- the metrics record of one split -----


def _checked(
    y_true: ArrayLike, probs: ArrayLike, label_names: Sequence[str]
) -> tuple[np.ndarray, np.ndarray]:
    """Validate gold indices and probabilities; return int64 labels and float64 rows renormalised to sum 1."""
    k = len(label_names)
    if k < 2 or len(set(label_names)) != k:
        raise HarnessError(f"label names must be at least 2 distinct names, got {list(label_names)}")
    p = np.asarray(probs, dtype=np.float64)
    y = np.asarray(y_true)
    if p.ndim != 2 or p.shape[1] != k or p.shape[0] == 0:
        raise HarnessError(
            f"probabilities must have shape (rows, {k}) for labels {list(label_names)}, got {p.shape}"
        )
    if y.shape != (p.shape[0],):
        raise HarnessError(
            f"gold labels have shape {y.shape} but there are {p.shape[0]} rows of probabilities"
        )
    bad = ~np.isfinite(p).all(axis=1) | (p.min(axis=1) < 0) | (np.abs(p.sum(axis=1) - 1.0) > 1e-3)
    if bad.any():
        row = int(np.argmax(bad))
        raise HarnessError(
            f"probability row {row} is {p[row].tolist()}: each row must be non-negative and sum to 1"
        )
    if y.dtype.kind not in "iu":
        raise HarnessError(
            f"gold labels must be integer class indices 0..{k - 1}, got values of type {y.dtype}"
        )
    if y.min() < 0 or y.max() >= k:
        row = int(np.argmax((y < 0) | (y >= k)))
        raise HarnessError(f"gold label at row {row} is {int(y[row])}: expected a class index in 0..{k - 1}")
    # why: float32 softmax rows sum to 1 only within ~1e-7, which sklearn's probability checks warn about
    return y.astype(np.int64), p / p.sum(axis=1, keepdims=True)


def _json(value: float) -> float | None:
    return None if not np.isfinite(value) else float(value)


def compute_metrics(
    y_true: ArrayLike,
    probs: ArrayLike,
    label_names: Sequence[str],
    *,
    positive: str | None = None,
    bootstrap: int = 1000,
    ci: float = 0.95,
    seed: int = 0,
) -> dict[str, Any]:
    """Every registered metric of one split, bootstrap intervals of the HEADLINE ones, per-class counts.

    Predictions are argmax(probs) (ties to the lowest index). Binary tasks add positive_f1 and roc_auc
    for `positive` (a label name; default the second of `label_names`). `bootstrap=0` skips intervals.
    Undefined values (AUC with one gold class, an interval with no finite resample) are None.
    """
    y, p = _checked(y_true, probs, label_names)
    k, n = p.shape[1], y.size
    binary = k == 2
    if positive is not None and not binary:
        raise HarnessError(
            f"positive label {positive!r} given, but the task has {k} labels: drop it for multi-class"
        )
    if positive is not None and positive not in label_names:
        raise HarnessError(f"positive label {positive!r} is not one of the labels {list(label_names)}")
    if bootstrap < 0:
        raise HarnessError(f"bootstrap resamples must be 0 (off) or more, got {bootstrap}")
    if not 0.0 < ci < 1.0:
        raise HarnessError(f"confidence level must lie strictly between 0 and 1, got {ci}")
    pos = list(label_names).index(positive) if positive is not None else 1
    pred = p.argmax(axis=1)
    labels = list(range(k))

    names = [name for name, spec in METRICS.items() if binary or not spec.binary_only]
    values: dict[str, float | None] = {}
    for name in names:
        spec = METRICS[name]
        extra = {"positive": pos} if spec.binary_only else {}
        values[name] = _json(spec.function(y, p if spec.needs_probs else pred, labels=labels, **extra))

    intervals: dict[str, list[float | None]] = {}
    if bootstrap:
        for name in (h for h in HEADLINE if h in names):
            # Same seed for every metric: all intervals come from one shared set of resamples.
            dist = stats.bootstrap_distribution(
                stats.bootstrap_stat(name, y, p, positive=pos), n, bootstrap, seed
            )
            intervals[name] = stats.percentile_interval(dist, ci)

    precision, recall, f1, support = skm.precision_recall_fscore_support(
        y, pred, labels=labels, zero_division=0
    )
    predicted = np.bincount(pred, minlength=k)
    per_class = [
        {
            "label": label_names[i],
            "precision": float(precision[i]),
            "recall": float(recall[i]),
            "f1": float(f1[i]),
            "support": int(support[i]),
            "predicted": int(predicted[i]),
        }
        for i in range(k)
    ]
    return {
        "n": int(n),
        "labels": list(label_names),
        "metrics": values,
        "intervals": intervals,
        "per_class": per_class,
        "confusion": skm.confusion_matrix(y, pred, labels=labels).tolist(),  # rows gold, columns predicted
        "reliability": reliability_table(y, p),
        "binary": binary,
        "positive": label_names[pos] if binary else None,
    }


def local_metric(path: str | os.PathLike[str]) -> Any:
    """Load an `evaluate` metric from a local folder (never the hub); needs `pip install evaluate`."""
    folder = Path(path)
    if not folder.exists():
        raise HarnessError(f"metric folder {folder} does not exist: give the path of a local evaluate metric")
    try:
        import evaluate  # optional dependency, imported only when a local metric is asked for
    except ImportError as exc:
        raise HarnessError(
            f"loading the metric at {folder} needs the evaluate library: pip install evaluate"
        ) from exc
    os.environ["HF_HUB_OFFLINE"] = "1"  # no downloads at run time
    os.environ["HF_EVALUATE_OFFLINE"] = "1"
    try:
        return evaluate.load(str(folder))
    except (FileNotFoundError, ImportError, ValueError) as exc:
        raise HarnessError(f"could not load the evaluate metric at {folder}: {exc}") from exc
