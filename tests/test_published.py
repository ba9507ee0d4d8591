"""Published-number checks: real packaged checkpoints on real data, end to end through `execute_run`.

Each check runs one example config from configs/ (with only `output` redirected to tmp_path) and
compares the test-split metrics with numbers published for the same data, written beside every
threshold. The subsets (2,000 training rows, ~1,000 test rows) keep each run within minutes on two
CPU cores; thresholds sit below the published full-data numbers by the margin a smaller model and a
smaller training set explain, and far above what a trivial classifier scores. Each test prints its
metrics with intervals and timings (`pytest -s` shows them).
"""

from __future__ import annotations

import json
import time
from pathlib import Path
from typing import Any

import pytest
from sklearn.metrics import accuracy_score, f1_score

from harness.config import Config, load_config
from harness.data.audit import audit_data
from harness.data.task import load_task
from harness.runs.run import execute_run
from tests.common import CONFIGS


def _config(name: str, tmp_path: Path, *overrides: str) -> Config:
    return load_config(CONFIGS / name, [f"output={tmp_path}", *overrides])


def _run(cfg: Config, title: str, names: tuple[str, ...]) -> tuple[Path, dict[str, Any]]:
    """(run folder, metrics.json) of one run; its summary line (metrics `names`, costs) is printed under `title`."""
    started = time.perf_counter()
    folder = execute_run(cfg, log=lambda _line: None)
    seconds = time.perf_counter() - started
    metrics = json.loads((folder / "metrics.json").read_text(encoding="utf-8"))
    print("\n" + _summary(title, metrics, seconds, names))
    return folder, metrics


def _predictions(folder: Path) -> tuple[list[str], list[str]]:
    rows = [json.loads(line) for line in (folder / "predictions.jsonl").read_text(encoding="utf-8").splitlines()]
    return [r["gold"] for r in rows], [r["predicted"] for r in rows]


def _summary(title: str, metrics: dict[str, Any], seconds: float, names: tuple[str, ...]) -> str:
    parts = []
    for name in names:
        value, interval = metrics["metrics"][name], metrics["intervals"].get(name)
        ci = f" [{interval[0]:.3f}, {interval[1]:.3f}]" if interval and None not in interval else ""
        parts.append(f"{name} {value:.4f}{ci}")
    cost = metrics["cost"]
    return (f"{title}: n={metrics['n']} " + ", ".join(parts)
            + f"; train {cost['train_seconds']:.1f}s ({cost['steps']} steps), scoring {cost['eval_seconds']:.1f}s, "
            f"wall {seconds:.1f}s")


def test_sms_spam_splits_share_no_text() -> None:
    # The SMS Spam Collection repeats many messages verbatim (Almeida et al. 2011 count 5,574 messages;
    # our reader finds ~400 repeats). A repeat on both sides of a split would score memorisation, so
    # the carve-out must keep every text on one side as the audit counts texts (case and surrounding
    # space ignored). Common practice: deduplicate or group before splitting.
    cfg = load_config(CONFIGS / "sms_spam_minilm.yaml")
    data = load_task(cfg.task, seed=cfg.train.seed)  # the seed execute_run subsamples with
    assert len(data.train) == 2000 and 1000 - 30 <= len(data.test) <= 1000 + 30
    report = audit_data(data)
    assert report["splits"]["train"]["duplicate_texts"] > 0  # the collection's repeats are really there
    assert report["leakage"] == {"train/dev": 0, "train/test": 0, "dev/test": 0}


@pytest.mark.slow
def test_minilm_head_on_sms_spam_reaches_published_accuracy(tmp_path: Path) -> None:
    cfg = _config("sms_spam_minilm.yaml", tmp_path)
    folder, metrics = _run(cfg, "minilm-l6 head, sms-spam", ("accuracy", "positive_f1", "macro_f1"))
    assert metrics["positive"] == "spam"  # positive_f1 below is the spam class's F1
    gold, predicted = _predictions(folder)
    # Independent recount from the predictions file with scikit-learn.
    assert metrics["metrics"]["accuracy"] == pytest.approx(accuracy_score(gold, predicted))
    assert metrics["metrics"]["positive_f1"] == pytest.approx(f1_score(gold, predicted, pos_label="spam"))
    always_ham = gold.count("ham") / len(gold)
    print(f"always 'ham' would score accuracy {always_ham:.4f} and spam F1 0")
    assert 1000 - 30 <= metrics["n"] <= 1000 + 30
    # Published: fine-tuned BERT on the SMS Spam Collection reaches 98-99% accuracy (Sahmoud & Mikki
    # 2022, "Spam Detection Using BERT", arXiv:2206.02443, abstract: 97.8-99.3% over their corpora;
    # the collection's own paper, Almeida et al. 2011, reports 97.6% for its best baseline, a linear
    # SVM, from memory). Ours: a 6-layer encoder, 2,000 training messages, one epoch.
    assert metrics["metrics"]["accuracy"] >= 0.97
    # Accuracy alone says little here: answering "ham" always scores ~0.87. Spam F1 >= 0.90 demands
    # that most spam is caught with few false alarms. A fine-tuned BERT's model card for this collection
    # gives spam precision, recall and F1 of about 0.97 (from memory, not checked here; no model hub on
    # these machines); the 0.90 bar sits well below that and well above the majority answer's 0.
    assert metrics["metrics"]["positive_f1"] >= 0.90


@pytest.mark.slow
def test_minilm_head_on_question_types_reaches_published_accuracy(tmp_path: Path) -> None:
    cfg = _config("question_types_minilm.yaml", tmp_path)
    folder, metrics = _run(cfg, "minilm-l6 head, question-types", ("accuracy", "macro_f1", "balanced_accuracy"))
    gold, predicted = _predictions(folder)
    assert metrics["metrics"]["accuracy"] == pytest.approx(accuracy_score(gold, predicted))
    assert metrics["metrics"]["macro_f1"] == pytest.approx(f1_score(gold, predicted, average="macro"))
    assert 1000 - 30 <= metrics["n"] <= 1000 + 30 and len(metrics["labels"]) == 6
    # Published: BERT fine-tuned on all 5,452 TREC training questions (6 coarse classes, Li & Roth
    # 2002) reaches ~97% test accuracy: Sun et al. 2019, "How to Fine-Tune BERT for Text
    # Classification?", TREC error 3.2% for their best variant (as listed by paperswithcode for the
    # paper); plain fine-tuning is a little worse (from memory). Ours: a 6-layer, 22.7M-parameter
    # encoder on 2,000 questions, so the bar is lower; the most frequent class alone scores ~0.23.
    assert metrics["metrics"]["accuracy"] >= 0.90


@pytest.mark.slow
def test_smollm2_next_token_on_sms_spam_beats_the_majority_baseline(tmp_path: Path) -> None:
    # Short training: 300 messages, one epoch, max_length 64 (configs/sms_spam_smollm2.yaml).
    cfg = _config("sms_spam_smollm2.yaml", tmp_path)
    folder, trained = _run(cfg, "smollm2-135m next_token, sms-spam", ("accuracy", "positive_f1", "macro_f1"))
    # The zero-shot prompt with the same template and label words (contextual calibration on, Zhao
    # et al. 2021): reported beside the trained result; only its validity is checked.
    zero_cfg = _config("sms_spam_smollm2.yaml", tmp_path, "method.kind=prompt", "method.calibrate=true")
    zero_folder, zero = _run(zero_cfg, "smollm2-135m prompt (zero-shot, calibrated), sms-spam",
                             ("accuracy", "positive_f1", "macro_f1"))

    assert trained["positive"] == "spam"
    gold, predicted = _predictions(folder)
    assert trained["metrics"]["positive_f1"] == pytest.approx(f1_score(gold, predicted, pos_label="spam"))
    # Baseline: answering "ham" (the majority, ~87% of messages) always gives spam F1 = 0 (no true
    # positives; F1 definition, common practice). The 0.5 bar is this project's own margin over that
    # baseline, not a published number: half the spam caught with precision to match, at least, after a
    # short run (300 messages, one epoch). Published fine-tuned encoders reach ~0.95 (see the MiniLM check).
    assert trained["metrics"]["positive_f1"] >= 0.5

    # The prompt run scored the same test rows, and its record is a complete, consistent metrics dict.
    same = [json.loads((f / "data.json").read_text(encoding="utf-8"))["splits"]["test"]["sha256"]
            for f in (folder, zero_folder)]
    assert same[0] == same[1]
    assert zero["n"] == trained["n"] and zero["labels"] == ["ham", "spam"] and zero["positive"] == "spam"
    assert zero["cost"]["steps"] == 0 and zero["cost"]["trainable_parameters"] == 0
    assert sum(map(sum, zero["confusion"])) == zero["n"]
    for name in ("accuracy", "positive_f1", "macro_f1"):
        assert 0.0 <= zero["metrics"][name] <= 1.0
    zero_gold, zero_predicted = _predictions(zero_folder)
    assert zero["metrics"]["accuracy"] == pytest.approx(accuracy_score(zero_gold, zero_predicted))
