"""The `prompt` method: demonstrations, trimming, contextual calibration, refusals (harness/prompting.py)."""

from __future__ import annotations

import logging
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import torch

from harness.config import Config, ModelConfig, config_from_dict
from harness.data.task import Split, TaskData
from harness.errors import HarnessError
from harness.methods.next_token import NextTokenMethod
from harness.methods.prompt import (
    CONTENT_FREE,
    PromptMethod,
    calibrate,
    content_free_probs,
    draw_demonstrations,
    fit_demonstrations,
)
from harness.methods.registry import build_method
from harness.models.backbones import Backbone, load_backbone

NAMES = ["lost_item", "praise", "refund"]
ROWS = [("left my blue bag on the 9.15", 0), ("the crew were lovely today", 1), ("I want my money back", 2),
        ("lost a scarf on the car deck", 0), ("great crossing, thank you", 1), ("charged twice for one ticket", 2),
        ("my phone is still on the boat", 0), ("well done harbour staff", 1), ("refund for the cancelled sailing", 2)]


def make_cfg(checkpoint: Path, *, max_length: int = 64, seed: int = 13, **method: Any) -> Config:
    return config_from_dict({"task": {"name": "t", "train": "unused.csv"}, "model": {"checkpoint": str(checkpoint)},
                             "method": {"kind": "prompt", **method}, "train": {"max_length": max_length, "seed": seed}})


def make_data() -> TaskData:
    split = Split("train", tuple(f"r{i}" for i in range(len(ROWS))), tuple(t for t, _ in ROWS), tuple(y for _, y in ROWS))
    return TaskData(split, split, split, tuple(NAMES), False)


@pytest.fixture(scope="module")
def dec(toy_paths: dict[str, Path]) -> Backbone:
    return load_backbone(ModelConfig(checkpoint=str(toy_paths["decoder"])), for_lm=True)


def test_calibration_on_a_constructed_table() -> None:
    # Zhao et al. 2021, "Calibrate Before Use", sec. 5 (from memory): W = diag(p_cf)^-1, b = 0; we renormalise
    # W p so it stays a probability (the argmax, which the paper reports, is the same). Worked by hand:
    # row 1: [0.6, 0.3, 0.1] / [0.5, 0.3, 0.2] = [1.2, 1.0, 0.5], sum 2.7 -> [0.444444, 0.370370, 0.185185]
    # row 2: [0.2, 0.5, 0.3] / [0.5, 0.3, 0.2] = [0.4, 1.666667, 1.5], sum 3.566667 -> [0.112150, 0.467290, 0.420561]
    probs = np.array([[0.6, 0.3, 0.1], [0.2, 0.5, 0.3]])
    p_cf = np.array([0.5, 0.3, 0.2])
    got = calibrate(probs, p_cf)
    assert np.allclose(got, [[0.444444, 0.370370, 0.185185], [0.112150, 0.467290, 0.420561]], atol=1e-6)
    assert got[1].argmax() == 1 and probs[1].argmax() == 1 and got[0].argmax() == 0
    # A content-free input itself comes out uniform: the prompt's own label preference is removed.
    assert np.allclose(calibrate(p_cf[None, :], p_cf), 1 / 3)


def test_content_free_probs_average_the_three_inputs() -> None:
    seen: list[list[str]] = []
    table = np.array([[0.7, 0.2, 0.1], [0.5, 0.4, 0.1], [0.6, 0.3, 0.1]])

    def predict(texts: list[str]) -> np.ndarray:
        seen.append(texts)
        return table

    assert np.allclose(content_free_probs(predict), [0.6, 0.3, 0.1])
    assert seen == [["N/A", "", "[MASK]"]] == [list(CONTENT_FREE)]


def test_demonstrations_are_seeded_and_per_class() -> None:
    labels = [y for _, y in ROWS]
    a = draw_demonstrations(labels, 4, per_class=False, seed=1)
    assert a == draw_demonstrations(labels, 4, per_class=False, seed=1) and len(set(a)) == 4
    assert any(draw_demonstrations(labels, 4, per_class=False, seed=s) != a for s in range(2, 6))
    per = draw_demonstrations(labels, 2, per_class=True, seed=1)
    assert sorted(labels[i] for i in per) == [0, 0, 1, 1, 2, 2]
    assert len(draw_demonstrations(labels, 50, per_class=False, seed=0)) == len(ROWS)
    assert draw_demonstrations(labels, 0, per_class=True, seed=0) == []


def test_fit_drops_the_last_demonstrations_first_and_logs(caplog: pytest.LogCaptureFixture) -> None:
    demos = ["aaaa", "bbbb", "cccc", "dddd"]
    with caplog.at_level(logging.WARNING, logger="harness.methods.prompt"):
        kept = fit_demonstrations(demos, len, 9)
    assert kept == ["aaaa", "bbbb"]
    assert "dropped 2 of 4 demonstrations" in caplog.text
    caplog.clear()
    with caplog.at_level(logging.WARNING, logger="harness.methods.prompt"):
        assert fit_demonstrations(demos, len, 16) == demos
    assert caplog.text == ""


@pytest.mark.parametrize("shots", [0, 4])
def test_prompt_runs_end_to_end(toy_paths: dict[str, Path], dec: Backbone, shots: int) -> None:
    m = build_method("prompt", cfg=make_cfg(toy_paths["decoder"], shots=shots), data=make_data(), backbone=dec)
    assert isinstance(m, PromptMethod) and m.trains is False and m.trainable_parameters() == []
    items = m.encode([t for t, _ in ROWS], [y for _, y in ROWS])
    probs = m.predict_proba(items, batch_size=4)
    assert probs.shape == (len(ROWS), 3) and np.allclose(probs.sum(1), 1) and np.isfinite(probs).all()
    rows = m.describe()["demonstration_ids"]
    assert len(rows) == shots
    decoded = dec.tokenizer.decode(list(items[0].input_ids[: items[0].extra["prompt_len"]]))
    for rid in rows:  # every drawn demonstration is written into the prompt with its label word
        text, y = ROWS[int(rid[1:])]
        assert f"Message: {text}\nCategory: {NAMES[y].replace('_', ' ')}\n\n" in decoded
    assert decoded.endswith(f"Message: {ROWS[0][0]}\nCategory:")
    assert all(not p.requires_grad for p in m.model.parameters())


def test_demonstrations_are_trimmed_to_the_context(toy_paths: dict[str, Path], dec: Backbone,
                                                   caplog: pytest.LogCaptureFixture) -> None:
    # The toy has 256 positions; an example budget of 230 leaves 26 tokens, too few for 6 demonstrations.
    with caplog.at_level(logging.WARNING, logger="harness.methods.prompt"):
        m = build_method("prompt", cfg=make_cfg(toy_paths["decoder"], max_length=230, shots=6), data=make_data(),
                         backbone=dec)
    assert "demonstrations to fit" in caplog.text
    assert len(m.demo_rows) < 6
    items = m.encode([" ".join(t for t, _ in ROWS) * 3], [0])
    assert len(items[0]) <= 256


def test_calibrated_prompt_equals_hand_calibration(toy_paths: dict[str, Path], dec: Backbone) -> None:
    m = build_method("prompt", cfg=make_cfg(toy_paths["decoder"], shots=3, calibrate=True), data=make_data(),
                     backbone=dec)
    items = m.encode([t for t, _ in ROWS], [y for _, y in ROWS])
    raw = NextTokenMethod.predict_proba(m, items, 8)
    cf_items = m.encode(list(CONTENT_FREE), [-1, -1, -1])  # the same template and demonstrations
    p_cf = NextTokenMethod.predict_proba(m, cf_items, 8).mean(axis=0)
    hand = (raw / p_cf) / (raw / p_cf).sum(axis=1, keepdims=True)
    assert np.allclose(m.predict_proba(items, 4), hand, atol=1e-9)
    assert np.allclose(m.describe()["content_free_probs"], p_cf)


def test_prompt_on_encoder_decoder_with_shots(toy_paths: dict[str, Path]) -> None:
    t5 = load_backbone(ModelConfig(checkpoint=str(toy_paths["encoder-decoder"])), for_lm=True)
    m = build_method("prompt", cfg=make_cfg(toy_paths["encoder-decoder"], shots=2, calibrate=True), data=make_data(),
                     backbone=t5)
    probs = m.predict_proba(m.encode([t for t, _ in ROWS[:3]], [0, 1, 2]), batch_size=2)
    assert probs.shape == (3, 3) and np.allclose(probs.sum(1), 1)


def test_warns_without_a_chat_template(toy_paths: dict[str, Path], dec: Backbone,
                                       caplog: pytest.LogCaptureFixture) -> None:
    with caplog.at_level(logging.WARNING, logger="harness.methods.prompt"):
        build_method("prompt", cfg=make_cfg(toy_paths["decoder"]), data=make_data(), backbone=dec)
    assert "no chat template" in caplog.text
    caplog.clear()
    dec.tokenizer.chat_template = "{% for m in messages %}{{ m['content'] }}{% endfor %}"
    try:
        with caplog.at_level(logging.WARNING, logger="harness.methods.prompt"):
            build_method("prompt", cfg=make_cfg(toy_paths["decoder"]), data=make_data(), backbone=dec)
    finally:
        dec.tokenizer.chat_template = None
    assert "no chat template" not in caplog.text


def test_prompt_refuses_an_encoder(toy_paths: dict[str, Path]) -> None:
    bare = load_backbone(ModelConfig(checkpoint=str(toy_paths["encoder"])), for_lm=False)
    with pytest.raises(HarnessError, match=r"method\.kind: 'prompt'.*no next-token output layer.*method\.kind: head"):
        build_method("prompt", cfg=make_cfg(toy_paths["encoder"]), data=make_data(), backbone=bare)


def test_demo_template_is_checked(toy_paths: dict[str, Path], dec: Backbone) -> None:
    with pytest.raises(HarnessError, match=r"method\.demo_template'? in .*: placeholder \{label\.upper\} is not allowed"):
        build_method("prompt", cfg=make_cfg(toy_paths["decoder"], shots=2, demo_template="{text} {label.upper}\n"),
                     data=make_data(), backbone=dec)


def test_prompt_run_end_to_end_through_the_runner(toy_paths: dict[str, Path], tmp_path: Path) -> None:
    import csv
    import json

    from harness.runs.predict import predict
    from harness.runs.run import execute_run

    rows = [{"text": t, "label": NAMES[y]} for t, y in ROWS]
    for split in ("train", "dev", "test"):
        with open(tmp_path / f"{split}.csv", "w", newline="", encoding="utf-8") as fh:
            writer = csv.DictWriter(fh, fieldnames=["text", "label"])
            writer.writeheader()
            writer.writerows(rows)
    cfg = config_from_dict({
        "task": {"name": "ferry", **{s: str(tmp_path / f"{s}.csv") for s in ("train", "dev", "test")}},
        "model": {"checkpoint": str(toy_paths["decoder"])}, "output": str(tmp_path / "runs"),
        "method": {"kind": "prompt", "shots": 4, "calibrate": True}, "train": {"threads": 1}, "eval": {"bootstrap": 0}})
    threads = torch.get_num_threads()
    try:
        folder = execute_run(cfg, log=lambda _: None)
    finally:
        torch.set_num_threads(threads)  # the runner sets train.threads for the whole process
    described = json.loads((folder / "method.json").read_text())
    assert described["kind"] == "prompt" and len(described["demonstration_ids"]) == 4
    lines = (folder / "predictions.jsonl").read_text().splitlines()
    assert len(lines) == len(ROWS)
    out = predict(folder, tmp_path / "test.csv", tmp_path / "labelled.csv")
    with open(out, encoding="utf-8") as fh:
        labelled = list(csv.DictReader(fh))
    # The reloaded model (same weights, same demonstrations, same calibration) gives the run's own test scores.
    first = json.loads(lines[0])
    probs = [float(labelled[0][f"prob_{n}"]) for n in NAMES]
    assert np.allclose(probs, [first["probs"][n] for n in NAMES], atol=1e-5)
