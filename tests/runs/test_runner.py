"""Whole runs: the run folder, refusal and resume rules, bit-exact resume, export and predict, token cache."""

from __future__ import annotations

import csv
import dataclasses
import json
import math
import os
import re
import signal
from pathlib import Path

import numpy as np
import pytest
import torch
from sklearn.metrics import accuracy_score, f1_score
from transformers import AutoModelForSequenceClassification, AutoTokenizer

from harness.config import config_from_dict, config_to_dict
from harness.data.task import load_task
from harness.data.token_cache import tokenizer_fingerprint
from harness.errors import HarnessError
from harness.methods.head import HeadMethod
from harness.runs.folders import read_status
from harness.runs.predict import label_rows, load_exported, predict
from harness.runs.run import encode_split, execute_run
from harness.train.checkpoints import Interrupted
from tests.common import ferry_dict


def make_cfg(out: Path, checkpoint: str = "toy:decoder", *, method: dict | None = None, **train: object):
    """The shared ferry config on every row, with this file's training settings (defaults elsewhere)."""
    settings = {"batch_size": 16, "learning_rate": 2e-3, "log_every": 5, "max_length": None, "seed": None}
    return config_from_dict(ferry_dict(out, rows=None, checkpoint=checkpoint, method=method or {"kind": "head"},
                                       train={**settings, **train}, eval={"bootstrap": 50}))


def read_predictions(folder: Path) -> list[dict]:
    return [json.loads(line) for line in (folder / "predictions.jsonl").read_text().splitlines()]


def probs_of(rows: list[dict]) -> np.ndarray:
    return np.array([list(r["probs"].values()) for r in rows])


def test_run_folder_holds_every_file_and_one_prediction_per_test_row(tmp_path):
    lines = []
    folder = execute_run(make_cfg(tmp_path), log=lines.append)
    for name in ("config.yaml", "environment.json", "data.json", "log.jsonl", "predictions.jsonl", "metrics.json",
                 "method.json", "status.json", "model/harness_head.json", "checkpoints/best.safetensors"):
        assert (folder / name).exists(), name
    assert read_status(folder)["state"] == "finished"
    assert str(folder) in lines[-1]
    rows = read_predictions(folder)
    data = load_task(make_cfg(tmp_path).task)
    assert [r["id"] for r in rows] == list(data.test.ids)  # none dropped, repeated or reordered
    metrics = json.loads((folder / "metrics.json").read_text())
    gold, pred = [r["gold"] for r in rows], [r["predicted"] for r in rows]
    # Reference: scikit-learn on the written predictions gives the recorded metrics.
    assert metrics["metrics"]["accuracy"] == pytest.approx(accuracy_score(gold, pred))
    assert metrics["metrics"]["macro_f1"] == pytest.approx(f1_score(gold, pred, average="macro"))
    cost = metrics["cost"]
    assert cost["steps"] == math.ceil(len(data.train) / 16) and cost["train_seconds"] > 0
    assert cost["peak_rss_mb"] > 50 and 0 < cost["trainable_parameters"] <= cost["total_parameters"]
    assert json.loads((folder / "method.json").read_text())["pooling"] == "last"


def test_finished_runs_are_refused_skipped_or_overwritten(tmp_path):
    cfg = make_cfg(tmp_path, max_steps=3)
    folder = execute_run(cfg, log=lambda s: None)
    with pytest.raises(HarnessError, match="already finished.*--force"):
        execute_run(cfg, log=lambda s: None)
    said = []
    assert execute_run(cfg, resume=True, log=said.append) == folder
    assert said == [f"already finished: {folder}"]
    stamp = read_status(folder)["started"]
    (folder / "marker").write_text("x")
    execute_run(cfg, force=True, log=lambda s: None)
    assert not (folder / "marker").exists() and read_status(folder)["state"] == "finished"
    assert read_status(folder)["started"] >= stamp


def test_a_failed_run_records_its_error(tmp_path):
    cfg = make_cfg(tmp_path)
    cfg = dataclasses.replace(cfg, model=dataclasses.replace(cfg.model, checkpoint=str(tmp_path / "nowhere")))
    with pytest.raises(HarnessError):
        execute_run(cfg, log=lambda s: None)
    from harness.runs.folders import run_folder

    status = read_status(run_folder(cfg))
    assert status["state"] == "failed" and "model.checkpoint" in status["error"]


def test_same_config_twice_gives_identical_results(tmp_path):
    a = execute_run(make_cfg(tmp_path / "a", max_steps=12), log=lambda s: None)
    b = execute_run(make_cfg(tmp_path / "b", max_steps=12), log=lambda s: None)
    ma, mb = (json.loads((f / "metrics.json").read_text()) for f in (a, b))
    assert ma["metrics"] == mb["metrics"] and ma["intervals"] == mb["intervals"]
    assert np.array_equal(probs_of(read_predictions(a)), probs_of(read_predictions(b)))
    c = execute_run(make_cfg(tmp_path / "c", max_steps=12, seed=14), log=lambda s: None)
    assert not np.array_equal(probs_of(read_predictions(a)), probs_of(read_predictions(c)))


@pytest.mark.parametrize("where, accum", [("end_of_first_epoch", 1), ("mid_epoch", 2)])
def test_interrupted_and_resumed_run_equals_an_uninterrupted_one(tmp_path, where, accum):
    kw = {"epochs": 2, "grad_accum": accum, "learning_rate": 1e-3}
    whole = execute_run(make_cfg(tmp_path / "whole", **kw), log=lambda s: None)
    per_epoch = math.ceil(math.ceil(len(load_task(make_cfg(tmp_path).task).train) / 16) / accum)
    stop_at = per_epoch if where == "end_of_first_epoch" else per_epoch + per_epoch // 2

    def ctrl_c(step: int) -> None:
        if step == stop_at:
            os.kill(os.getpid(), signal.SIGINT)  # the real signal: the loop saves a checkpoint and stops

    cfg = make_cfg(tmp_path / "split", **kw)
    with pytest.raises(Interrupted, match=f"step {stop_at}"):
        execute_run(cfg, log=lambda s: None, on_step=ctrl_c)
    from harness.runs.folders import run_folder

    assert read_status(run_folder(cfg))["state"] == "interrupted"
    resumed = execute_run(cfg, resume=True, log=lambda s: None)
    m1, m2 = (json.loads((f / "metrics.json").read_text()) for f in (whole, resumed))
    assert m1["metrics"] == m2["metrics"] and m1["dev"] == m2["dev"] and m1["cost"]["steps"] == m2["cost"]["steps"]
    assert np.array_equal(probs_of(read_predictions(whole)), probs_of(read_predictions(resumed)))
    losses = lambda f: [r.get("loss") for r in map(json.loads, (f / "log.jsonl").read_text().splitlines())]  # noqa: E731
    assert losses(whole) == losses(resumed)  # the same batches and dropout masks, step for step


def _library_probs(folder: Path, texts: list[str]) -> np.ndarray:
    """Probabilities from the exported folder through the library's own auto class."""
    model = AutoModelForSequenceClassification.from_pretrained(folder / "model").eval()
    tok = AutoTokenizer.from_pretrained(folder / "model")
    assert tok.padding_side == "right"
    with torch.inference_mode():
        batch = tok(texts, padding=True, truncation=True, max_length=128, return_tensors="pt")
        batch.pop("token_type_ids", None) if model.config.model_type == "gpt2" else None
        return torch.softmax(model(**batch).logits, dim=-1).numpy()


@pytest.mark.parametrize("checkpoint, method", [
    ("toy:encoder", {"kind": "head", "use_pooler": True}),
])
def test_export_reloads_in_the_library_class_with_label_names(tmp_path, checkpoint, method):
    folder = execute_run(make_cfg(tmp_path, checkpoint, method=method, max_steps=10), log=lambda s: None)
    assert json.loads((folder / "model" / "harness_head.json").read_text())["format"] == "transformers"
    rows = read_predictions(folder)[:20]
    model = AutoModelForSequenceClassification.from_pretrained(folder / "model")
    assert list(model.config.id2label.values()) == list(rows[0]["probs"])
    np.testing.assert_allclose(_library_probs(folder, [r["text"] for r in rows]), probs_of(rows), atol=1e-5)


@pytest.mark.parametrize("checkpoint, method", [
    ("toy:encoder", {"kind": "head"}),  # first pooling without the pooler: our own format
    ("toy:decoder", {"kind": "head"}),  # our head has a bias, the library's decoder `score` none
    ("toy:encoder", {"kind": "head", "pooling": "mean", "lora": {"r": 4, "alpha": 8}}),
])
def test_exported_model_predicts_what_the_run_predicted(tmp_path, checkpoint, method):
    folder = execute_run(make_cfg(tmp_path, checkpoint, method=method, max_steps=10), log=lambda s: None)
    rows = read_predictions(folder)
    exported = load_exported(folder)
    assert exported.info["format"] == "harness"
    np.testing.assert_allclose(exported.predict_proba([r["text"] for r in rows]), probs_of(rows), atol=1e-5)

    source = tmp_path / "new.csv"
    with source.open("w", newline="") as fh:
        writer = csv.writer(fh)
        writer.writerow(["id", "text"])
        writer.writerows([r["id"], r["text"]] for r in rows[:15])
    out = predict(folder, source, tmp_path / "labelled.csv")
    labelled = list(csv.DictReader(out.open()))
    assert [r["predicted"] for r in labelled] == [r["predicted"] for r in rows[:15]]
    got = np.array([[float(r[f"prob_{n}"]) for n in exported.label_names] for r in labelled])
    np.testing.assert_allclose(got, probs_of(rows[:15]), atol=1e-5)


def test_token_cache_is_reused_and_invalidated(tmp_path, monkeypatch):
    monkeypatch.setenv("HARNESS_CACHE", str(tmp_path / "cache"))
    cfg = make_cfg(tmp_path, "toy:encoder")
    data = load_task(cfg.task)
    method = HeadMethod(cfg=cfg, data=data)
    first, hit1 = encode_split(method, data.dev, cfg)
    again, hit2 = encode_split(method, data.dev, cfg)
    assert (hit1, hit2) == (False, True) and again == first
    assert len(list((tmp_path / "cache" / "tokens").glob("*.json"))) == 1
    # Another run of a sweep (a new seed, a new learning rate) shares the file.
    other = config_from_dict({**config_to_dict(cfg), "train": {**config_to_dict(cfg)["train"], "seed": 99}})
    assert encode_split(HeadMethod(cfg=other, data=data), data.dev, other)[1] is True
    # A different max_length, different data or a changed tokenizer is a miss.
    short = config_from_dict({**config_to_dict(cfg), "train": {**config_to_dict(cfg)["train"], "max_length": 16}})
    items, hit = encode_split(HeadMethod(cfg=short, data=data), data.dev, short)
    assert not hit and max(map(len, items)) <= 16
    changed = dataclasses.replace(data.dev, texts=("a brand new text",) + data.dev.texts[1:])
    assert encode_split(method, changed, cfg)[1] is False
    before = tokenizer_fingerprint(method.tokenizer)
    method.tokenizer.add_tokens(["ferryboat"])
    assert tokenizer_fingerprint(method.tokenizer) != before
    assert encode_split(method, data.dev, cfg)[1] is False


def test_store_texts_off_keeps_ids_and_labels_only(tmp_path: Path) -> None:
    cfg = config_from_dict(ferry_dict(tmp_path / "runs", rows=24, eval={"bootstrap": 0, "store_texts": False}))
    folder = execute_run(cfg, log=lambda _: None)
    rows = read_predictions(folder)
    assert rows and all(set(r) == {"id", "gold", "predicted", "probs"} for r in rows)
    data = load_task(cfg.task)
    report = (folder / "report.md").read_text(encoding="utf-8") + (folder / "report.html").read_text(encoding="utf-8")
    for text in data.test.texts:  # no test text reaches the reports either
        assert str(text) not in report
    assert "texts are not stored" in report
    # the default keeps them: the same run with texts has every test text in predictions.jsonl
    on = execute_run(config_from_dict(ferry_dict(tmp_path / "runs2", rows=24, eval={"bootstrap": 0})), log=lambda _: None)
    assert [r["text"] for r in read_predictions(on)] == list(data.test.texts)


def test_predict_through_the_cli_prints_the_caution(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    from harness.cli import main

    folder = execute_run(config_from_dict(ferry_dict(tmp_path / "runs", rows=24, eval={"bootstrap": 0})),
                         log=lambda _: None)
    source = tmp_path / "new.csv"
    source.write_text("id,text\nn1,when does the first boat leave\nn2,my bag is still on board\n", encoding="utf-8")
    assert main(["predict", str(folder), str(source)]) == 0
    out = capsys.readouterr().out
    assert "predictions written to" in out and "keep a person reviewing them" in out and "per group" in out
    assert re.search(r"^2 rows labelled in \d+\.\d\d s: [\d,]+\.\d rows/s ", out, flags=re.M)
    done = label_rows(folder, source, tmp_path / "again.csv")
    assert done.rows == 2 and done.seconds > 0 and done.rows_per_second == pytest.approx(2 / done.seconds)
    assert done.path.read_text() == source.with_name("new.predictions.csv").read_text()  # what `predict` wrote
