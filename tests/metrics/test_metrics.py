"""Point metrics, registry and the metrics record, checked against scikit-learn, scipy and worked examples."""

from __future__ import annotations

import json
import os
import sys
import types
import warnings

import numpy as np
import pytest
import sklearn.metrics as skm
from scipy.stats import mannwhitneyu

from harness.errors import HarnessError
from harness.metrics import stats
from harness.metrics.scores import (
    HEADLINE,
    METRICS,
    accuracy_score,
    balanced_accuracy_score,
    brier_loss,
    check_metric_name,
    compute_metrics,
    expected_calibration_error,
    local_metric,
    log_loss,
    macro_f1_score,
    matthews_score,
    micro_f1_score,
    positive_f1_score,
    reliability_table,
    roc_auc_score,
    weighted_f1_score,
)


def _sk_balanced(y, pred):
    with warnings.catch_warnings():  # sklearn warns when a predicted class is absent from y
        warnings.simplefilter("ignore")
        return skm.balanced_accuracy_score(y, pred)


# Reference value of every registered metric straight from scikit-learn (source: sklearn.metrics docs).
# Arguments: gold, predictions, probabilities, number of classes, positive class index.
REFERENCE = {
    "accuracy": lambda y, pred, p, k, pos: skm.accuracy_score(y, pred),
    "balanced_accuracy": lambda y, pred, p, k, pos: _sk_balanced(y, pred),
    "macro_f1": lambda y, pred, p, k, pos: skm.f1_score(
        y, pred, labels=range(k), average="macro", zero_division=0
    ),
    "micro_f1": lambda y, pred, p, k, pos: skm.f1_score(
        y, pred, labels=range(k), average="micro", zero_division=0
    ),
    "weighted_f1": lambda y, pred, p, k, pos: skm.f1_score(
        y, pred, labels=range(k), average="weighted", zero_division=0
    ),
    "mcc": lambda y, pred, p, k, pos: skm.matthews_corrcoef(y, pred),
    "positive_f1": lambda y, pred, p, k, pos: skm.f1_score(
        y, pred, pos_label=pos, average="binary", zero_division=0
    ),
    "roc_auc": lambda y, pred, p, k, pos: skm.roc_auc_score(y == pos, p[:, pos]),
    "log_loss": lambda y, pred, p, k, pos: skm.log_loss(y, p, labels=range(k)),
    # sklearn >= 1.7 scores multi-class Brier unscaled; for K=2 its binary form is half the multi-class one.
    "brier": lambda y, pred, p, k, pos: skm.brier_score_loss(y, p, labels=range(k), scale_by_half=False),
}


def _case(seed: int, k: int | None = None, n: int | None = None):
    """Random gold labels and probabilities; some classes never predicted, some never gold."""
    rng = np.random.default_rng(seed)
    k = k or int(rng.integers(2, 7))
    n = n or int(rng.integers(8, 200))
    y = rng.integers(0, k, n)
    if k > 2 and seed % 3 == 0:
        y[y == k - 1] = 0  # a class with no gold rows
    alpha = np.ones(k)
    if seed % 2 == 0:
        alpha[int(rng.integers(0, k))] = 0.05  # a class that argmax (almost) never picks
    p = rng.dirichlet(alpha, size=n)
    p[np.arange(n), y] += rng.uniform(0, 0.6, n)  # some skill, so metrics are not all near chance
    p /= p.sum(axis=1, keepdims=True)
    return y, p, k


SEEDS = range(30)


@pytest.mark.parametrize("seed", SEEDS)
def test_label_metrics_equal_sklearn(seed):
    y, p, k = _case(seed)
    rng = np.random.default_rng(1000 + seed)
    pred = rng.choice(rng.permutation(k)[: max(1, k - 1)], size=y.size)  # never predicts at least one class
    pred[: y.size // 3] = y[: y.size // 3]
    ours = {
        "accuracy": accuracy_score,
        "balanced_accuracy": balanced_accuracy_score,
        "macro_f1": macro_f1_score,
        "micro_f1": micro_f1_score,
        "weighted_f1": weighted_f1_score,
        "mcc": matthews_score,
    }
    for name, fn in ours.items():
        assert fn(y, pred, labels=range(k)) == pytest.approx(REFERENCE[name](y, pred, p, k, 1), abs=1e-12), (
            name
        )


@pytest.mark.parametrize("seed", SEEDS)
def test_probability_metrics_equal_sklearn(seed):
    y, p, k = _case(seed)
    assert log_loss(y, p) == pytest.approx(REFERENCE["log_loss"](y, p.argmax(1), p, k, 1), rel=1e-12)
    # Independent formula: mean of -ln p(gold) (common practice; none of the p here are clipped).
    assert log_loss(y, p) == pytest.approx(-np.mean(np.log(p[np.arange(y.size), y])), rel=1e-12)
    assert brier_loss(y, p) == pytest.approx(np.mean(((p - np.eye(k)[y]) ** 2).sum(axis=1)), rel=1e-12)
    if k > 2:
        # sklearn's default ("auto") leaves multi-class Brier unscaled (sklearn.metrics.brier_score_loss docs).
        assert brier_loss(y, p) == pytest.approx(skm.brier_score_loss(y, p, labels=range(k)), rel=1e-12)


@pytest.mark.parametrize("seed", SEEDS)
def test_binary_metrics_equal_sklearn(seed):
    y, p, _ = _case(seed, k=2)
    if seed % 2:
        p[:, 1] = np.round(p[:, 1], 1)  # tied scores
        p[:, 0] = 1.0 - p[:, 1]
    pred = p.argmax(axis=1)
    for pos in (0, 1):
        assert positive_f1_score(y, pred, positive=pos) == pytest.approx(
            skm.f1_score(y, pred, pos_label=pos, average="binary", zero_division=0), abs=1e-12
        )
    assert roc_auc_score(y, p, positive=1) == pytest.approx(skm.roc_auc_score(y, p[:, 1]), abs=1e-12)
    # AUC is the Mann-Whitney U of positive vs negative scores over n1*n0 (Hanley & McNeil 1982; scipy).
    u = mannwhitneyu(p[y == 1, 1], p[y == 0, 1]).statistic
    assert roc_auc_score(y, p) == pytest.approx(u / ((y == 1).sum() * (y == 0).sum()), abs=1e-12)
    # Multi-class Brier (Brier 1950) is twice sklearn's binary brier_score_loss on the positive column.
    assert brier_loss(y, p) == pytest.approx(2 * skm.brier_score_loss(y, p[:, 1]), rel=1e-12)


def test_roc_auc_is_nan_with_one_gold_class():
    p = np.array([[0.2, 0.8], [0.6, 0.4]])
    assert np.isnan(roc_auc_score(np.array([1, 1]), p))


def test_positive_f1_with_positive_class_absent_everywhere():
    # Neither gold nor predictions contain class 1: sklearn's binary F1 is 0 with zero_division=0.
    y = pred = np.zeros(5, dtype=int)
    assert positive_f1_score(y, pred, positive=1) == skm.f1_score(y, pred, zero_division=0) == 0.0


# Worked by hand. 15 bins of width 1/15, each (lower, upper] (Guo et al. 2017):
#   row  probs          gold  top-class conf  correct  bin (index: interval)
#   A    [0.10, 0.90]   1     0.90            yes      13: (0.8667, 0.9333]
#   B    [0.12, 0.88]   0     0.88            no       13
#   C    [0.70, 0.30]   0     0.70            yes      10: (0.6667, 0.7333]
#   D    [0.45, 0.55]   0     0.55            no        8: (0.5333, 0.6000]
#   E    [0.98, 0.02]   0     0.98            yes      14: (0.9333, 1.0000]
# bin 13: conf (0.90+0.88)/2 = 0.89, accuracy 1/2 -> |gap| 0.39, weight 2/5
# bin 10: conf 0.70, accuracy 1 -> 0.30; bin 8: conf 0.55, accuracy 0 -> 0.55; bin 14: 0.98 vs 1 -> 0.02
# ECE = (2*0.39 + 0.30 + 0.55 + 0.02) / 5 = 1.65 / 5 = 0.33
ECE_Y = np.array([1, 0, 0, 0, 0])
ECE_P = np.array([[0.10, 0.90], [0.12, 0.88], [0.70, 0.30], [0.45, 0.55], [0.98, 0.02]])


def test_ece_hand_worked_example():
    assert expected_calibration_error(ECE_Y, ECE_P) == pytest.approx(0.33, abs=1e-12)


def test_reliability_table_hand_worked_example():
    table = reliability_table(ECE_Y, ECE_P)
    assert len(table) == 15
    assert sum(row["count"] for row in table) == 5
    filled = {i: row for i, row in enumerate(table) if row["count"]}
    assert sorted(filled) == [8, 10, 13, 14]
    assert filled[13]["count"] == 2
    assert filled[13]["mean_confidence"] == pytest.approx(0.89)
    assert filled[13]["accuracy"] == pytest.approx(0.5)
    assert filled[8]["lower"] == pytest.approx(8 / 15) and filled[8]["upper"] == pytest.approx(9 / 15)
    assert table[0]["mean_confidence"] is None and table[0]["accuracy"] is None
    assert table[-1]["upper"] == 1.0


@pytest.mark.parametrize("seed", range(10))
def test_reliability_counts_sum_to_n_and_rebuild_ece(seed):
    y, p, _ = _case(seed)
    table = reliability_table(y, p)
    assert sum(row["count"] for row in table) == y.size
    rebuilt = sum(
        r["count"] / y.size * abs(r["accuracy"] - r["mean_confidence"]) for r in table if r["count"]
    )
    assert expected_calibration_error(y, p) == pytest.approx(rebuilt, abs=1e-12)


def test_confidence_bins_are_open_below_closed_above():
    # (lower, upper] bins, as in the reference code of Guo et al. (2017): conf > lower and conf <= upper.
    # 1.0 is in (14/15, 1]; 0.5 is in (7/15, 8/15]; an upper edge belongs to the bin below it.
    assert stats.confidence_bins(np.array([1.0, 0.5]), 15).tolist() == [14, 7]
    edges = np.linspace(0.0, 1.0, 16)
    assert stats.confidence_bins(edges[1:], 15).tolist() == list(range(15))


def test_registry_names_and_directions():
    # Names the configs and metrics.json use.
    expected = [
        "accuracy",
        "balanced_accuracy",
        "macro_f1",
        "micro_f1",
        "weighted_f1",
        "mcc",
        "positive_f1",
        "roc_auc",
        "log_loss",
        "brier",
        "ece",
    ]
    assert list(METRICS) == expected
    assert set(HEADLINE) <= set(METRICS)
    for name, spec in METRICS.items():
        # House naming rule: *_score is higher-better, *_loss / *_error lower-better.
        fname = spec.function.__name__
        assert spec.higher_is_better == fname.endswith("_score"), name
        assert spec.higher_is_better != (fname.endswith("_loss") or fname.endswith("_error")), name
    assert [n for n, s in METRICS.items() if s.binary_only] == ["positive_f1", "roc_auc"]
    assert sorted(stats.BOOTSTRAP_METRICS) == sorted(METRICS)  # every metric has a bootstrap form
    assert {n for n, s in METRICS.items() if s.needs_probs} == {"roc_auc", "log_loss", "brier", "ece"}


def test_check_metric_name():
    assert check_metric_name("macro_f1", "config.yaml: select") is None
    with pytest.raises(HarnessError, match=r"config.yaml: select.*'macro-f1'.*macro_f1.*ece"):
        check_metric_name("macro-f1", "config.yaml: select")


@pytest.mark.parametrize("seed", range(12))
def test_bootstrap_forms_equal_sklearn_on_a_resample(seed):
    y, p, k = _case(seed, k=2 if seed % 2 else None)
    if k == 2:
        p[:, 1] = np.round(p[:, 1], 1)  # tied scores, which AUC counts as one half
        p[:, 0] = 1.0 - p[:, 1]
    idx = np.random.default_rng(seed).integers(0, y.size, y.size)
    yr, pr = y[idx], p[idx]
    pos = 1
    for name, spec in METRICS.items():
        if spec.binary_only and k != 2:
            continue
        got = stats.bootstrap_stat(name, y, p, positive=pos)(idx[None, :])[0]
        if name == "ece":
            want = expected_calibration_error(yr, pr)  # checked by hand above; no sklearn equivalent
        elif name == "roc_auc" and len(np.unique(yr)) < 2:
            assert np.isnan(got)
            continue
        else:
            want = REFERENCE[name](yr, pr.argmax(1), pr, k, pos)
        assert got == pytest.approx(want, abs=1e-12), name


def test_compute_metrics_record_matches_sklearn():
    y, p, k = _case(4, k=4, n=120)
    names = ["north", "south", "east", "west"]
    rec = compute_metrics(y, p, names, bootstrap=200)
    json.dumps(rec, allow_nan=False)  # JSON-ready: no NaN, no numpy types
    pred = p.argmax(axis=1)
    assert rec["n"] == 120 and rec["labels"] == names and rec["binary"] is False and rec["positive"] is None
    assert set(rec["metrics"]) == {n for n, s in METRICS.items() if not s.binary_only}
    for name, value in rec["metrics"].items():
        want = expected_calibration_error(y, p) if name == "ece" else REFERENCE[name](y, pred, p, k, 1)
        assert value == pytest.approx(want, abs=1e-12), name
    assert set(rec["intervals"]) == {h for h in HEADLINE if not METRICS[h].binary_only}
    assert rec["confusion"] == skm.confusion_matrix(y, pred, labels=range(k)).tolist()
    prec, rec_, f1, sup = skm.precision_recall_fscore_support(y, pred, labels=range(k), zero_division=0)
    for i, row in enumerate(rec["per_class"]):
        assert row["label"] == names[i]
        assert (row["precision"], row["recall"], row["f1"]) == pytest.approx((prec[i], rec_[i], f1[i]))
        assert row["support"] == sup[i] == int((y == i).sum())
        assert row["predicted"] == int((pred == i).sum())
    assert sum(r["count"] for r in rec["reliability"]) == 120


def test_compute_metrics_binary_positive_label():
    y, p, _ = _case(7, k=2, n=80)
    default = compute_metrics(y, p, ["ham", "spam"], bootstrap=0)
    assert default["binary"] is True and default["positive"] == "spam" and default["intervals"] == {}
    assert default["metrics"]["positive_f1"] == pytest.approx(skm.f1_score(y, p.argmax(1), pos_label=1))
    assert default["metrics"]["roc_auc"] == pytest.approx(skm.roc_auc_score(y, p[:, 1]))
    flipped = compute_metrics(y, p, ["ham", "spam"], positive="ham", bootstrap=0)
    assert flipped["positive"] == "ham"
    assert flipped["metrics"]["positive_f1"] == pytest.approx(skm.f1_score(y, p.argmax(1), pos_label=0))
    # AUC of the other class from its own column is the same number (common practice: AUC is symmetric).
    assert flipped["metrics"]["roc_auc"] == pytest.approx(default["metrics"]["roc_auc"])


def test_compute_metrics_one_gold_class_gives_none_auc():
    y = np.ones(6, dtype=int)
    p = np.tile([0.3, 0.7], (6, 1))
    rec = compute_metrics(y, p, ["no", "yes"], bootstrap=50)
    assert rec["metrics"]["roc_auc"] is None and rec["intervals"]["roc_auc"] == [None, None]
    json.dumps(rec, allow_nan=False)


def test_compute_metrics_float32_probs_raise_no_warning():
    y, p, _ = _case(3, k=3, n=50)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        compute_metrics(y, p.astype(np.float32), ["a", "b", "c"], bootstrap=20)


@pytest.mark.parametrize(
    ("y", "p", "names", "kwargs", "message"),
    [
        ([0, 1], [[0.5, 0.5], [0.2, 0.8]], ["a"], {}, "at least 2 distinct"),
        ([0, 1], [[0.5, 0.5], [0.2, 0.8]], ["a", "a"], {}, "at least 2 distinct"),
        ([0, 1], [[0.5, 0.5, 0.0], [0.2, 0.8, 0.0]], ["a", "b"], {}, r"shape \(rows, 2\)"),
        ([0], [[0.5, 0.5], [0.2, 0.8]], ["a", "b"], {}, "2 rows"),
        ([0, 1], [[0.5, 0.5], [0.2, 0.7]], ["a", "b"], {}, "probability row 1"),
        ([0, 1], [[0.5, 0.5], [np.nan, 0.8]], ["a", "b"], {}, "probability row 1"),
        ([0, 2], [[0.5, 0.5], [0.2, 0.8]], ["a", "b"], {}, "row 1 is 2"),
        ([0.0, 1.0], [[0.5, 0.5], [0.2, 0.8]], ["a", "b"], {}, "integer class indices"),
        ([0, 1], [[0.5, 0.5], [0.2, 0.8]], ["a", "b"], {"positive": "c"}, "not one of the labels"),
        ([0, 1], [[0.5, 0.5, 0], [0.2, 0.8, 0]], ["a", "b", "c"], {"positive": "b"}, "multi-class"),
        ([0, 1], [[0.5, 0.5], [0.2, 0.8]], ["a", "b"], {"bootstrap": -1}, "0 \\(off\\)"),
        ([0, 1], [[0.5, 0.5], [0.2, 0.8]], ["a", "b"], {"ci": 1.5}, "strictly between"),
    ],
)
def test_compute_metrics_rejects_bad_input(y, p, names, kwargs, message):
    with pytest.raises(HarnessError, match=message):
        compute_metrics(np.asarray(y), np.asarray(p), names, **kwargs)


def test_local_metric_without_evaluate(monkeypatch, tmp_path):
    monkeypatch.setitem(sys.modules, "evaluate", None)  # makes `import evaluate` raise ImportError
    with pytest.raises(HarnessError, match="pip install evaluate"):
        local_metric(tmp_path)


def test_local_metric_missing_folder(tmp_path):
    with pytest.raises(HarnessError, match="does not exist"):
        local_metric(tmp_path / "nowhere")


def test_local_metric_passes_the_folder_offline(monkeypatch, tmp_path):
    calls = []
    fake = types.ModuleType("evaluate")
    fake.load = lambda path: calls.append(path) or "loaded"
    monkeypatch.setitem(sys.modules, "evaluate", fake)
    monkeypatch.setenv("HF_HUB_OFFLINE", "0")  # restored after the test
    monkeypatch.setenv("HF_EVALUATE_OFFLINE", "0")
    assert local_metric(tmp_path) == "loaded"
    assert calls == [str(tmp_path)]
    assert os.environ["HF_HUB_OFFLINE"] == "1" and os.environ["HF_EVALUATE_OFFLINE"] == "1"


def test_local_metric_load_failure_is_a_harness_error(monkeypatch, tmp_path):
    def fail(path):
        raise FileNotFoundError(f"no script in {path}")

    fake = types.ModuleType("evaluate")
    fake.load = fail
    monkeypatch.setitem(sys.modules, "evaluate", fake)
    monkeypatch.setenv("HF_HUB_OFFLINE", "1")
    monkeypatch.setenv("HF_EVALUATE_OFFLINE", "1")
    with pytest.raises(HarnessError, match="could not load"):
        local_metric(tmp_path)
