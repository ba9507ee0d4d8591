"""The training loop: batching, optimiser groups, schedule, learning, early stopping, LoRA."""

from __future__ import annotations

import json
import math
import random
from collections import Counter
from pathlib import Path

import pytest
import torch

from harness.config import config_from_dict
from harness.data.task import load_task
from harness.methods.head import HeadMethod
from harness.train.batching import epoch_batches
from harness.train.loop import make_optimizer, make_scheduler, planned_steps, train
from tests.common import FERRY


def make_cfg(tmp_path: Path, checkpoint: str = "toy:decoder", **train: object) -> object:
    paths = {s: str(FERRY / f"{s}.csv") for s in ("train", "dev", "test")}
    settings = {"epochs": 2, "batch_size": 16, "learning_rate": 1e-3, "threads": 1, "log_every": 5, "warmup": 0.1}
    settings.update(train)
    return config_from_dict({
        "task": {"name": "ferry", "id": "id", **paths}, "model": {"checkpoint": checkpoint},
        "train": settings, "eval": {"bootstrap": 0}, "output": str(tmp_path / "runs"),
    })


def _setup(cfg, **method_kw):
    data = load_task(cfg.task, seed=cfg.train.seed)
    method = HeadMethod(cfg=cfg, data=data)
    items = [method.encode(s.texts, s.labels) for s in data.splits()]
    return data, method, items


# ----- batching


def test_grouped_batches_are_reproducible_complete_and_not_globally_sorted():
    lengths = [5 + (i * 37) % 50 for i in range(400)]
    kw = {"mode": "grouped", "pool_batches": 4, "seed": 3}
    a = epoch_batches(lengths, 8, epoch=0, **kw)
    assert a == epoch_batches(lengths, 8, epoch=0, **kw)  # same seed and epoch: same batches
    assert a != epoch_batches(lengths, 8, epoch=1, **kw)  # a new order every epoch
    assert a != epoch_batches(lengths, 8, epoch=0, mode="grouped", pool_batches=4, seed=4)
    flat = [i for b in a for i in b]
    assert sorted(flat) == list(range(400))  # every example exactly once
    means = [sum(lengths[i] for i in b) / len(b) for b in a]
    assert means != sorted(means) and means != sorted(means, reverse=True)  # no global length order
    # Grouping pays: less padding than plain random batches of the same size.
    pad = lambda bs: sum(max(lengths[i] for i in b) * len(b) - sum(lengths[i] for i in b) for b in bs)  # noqa: E731
    assert pad(a) < pad(epoch_batches(lengths, 8, epoch=0, mode="random", pool_batches=4, seed=3))


def test_grouped_batches_mix_classes_when_length_tracks_the_label():
    # Labels decided by length: a global sort would give runs of one-class batches.
    lengths = [10] * 200 + [40] * 200
    shares = []
    for epoch in range(20):
        batches = epoch_batches(lengths, 10, mode="grouped", pool_batches=4, seed=0, epoch=epoch)
        order = [i for b in batches for i in b]
        first_half = [lengths[i] == 10 for i in order[:200]]
        assert 0 < sum(first_half) < 200  # a global sort would make this half all short
        shares.append(sum(first_half) / 200)
    assert 0.4 < sum(shares) / len(shares) < 0.6  # short examples spread evenly over the epoch


def test_grouped_batches_given_labels_hold_every_class_and_still_pad_less_than_random():
    # Spam-like data: the minority class (1) runs long. Grouped by length alone, pools yield one-class
    # batches; given the labels, every batch must hold each class in about the pool's proportion.
    rng = random.Random(0)
    labels = [1 if i % 8 == 0 else 0 for i in range(800)]  # 12.5 % minority, as in SMS spam
    lengths = [rng.randint(25, 60) if y else rng.randint(5, 40) for y in labels]
    kw = {"mode": "grouped", "pool_batches": 8, "seed": 1, "epoch": 0}
    plain = epoch_batches(lengths, 16, **kw)
    mixed = epoch_batches(lengths, 16, labels=labels, **kw)
    assert any(len({labels[i] for i in b}) == 1 for b in plain)  # the failure this guards against
    assert sorted(i for b in mixed for i in b) == list(range(800))
    assert all(1 <= sum(labels[i] for i in b) <= 3 for b in mixed)  # 2 of 16 expected in each batch
    assert mixed == epoch_batches(lengths, 16, labels=labels, **kw)  # reproducible
    pad = lambda bs: sum(max(lengths[i] for i in b) * len(b) for b in bs)  # noqa: E731
    assert pad(mixed) < pad(epoch_batches(lengths, 16, mode="random", pool_batches=8, seed=1, epoch=0))


# ----- optimiser and schedule


def test_weight_decay_skips_biases_and_norm_weights(tmp_path):
    cfg = make_cfg(tmp_path, "toy:encoder", head_learning_rate=1e-2)
    _, method, _ = _setup(cfg)
    opt = make_optimizer(method, cfg)
    names = {id(p): n for n, p in method.trainable_parameters()}
    for group in opt.param_groups:
        for p in group["params"]:
            name = names[id(p)]
            is_exempt = name.endswith("bias") or "LayerNorm" in name
            assert (group["weight_decay"] == 0.0) == is_exempt, name
            assert group["lr"] == (1e-2 if name.startswith("head.") else 1e-3), name
    assert sum(len(g["params"]) for g in opt.param_groups) == len(names)


def test_linear_schedule_with_warmup_follows_the_textbook_shape(tmp_path):
    # Common practice (the transformers linear schedule): lr rises linearly over warmup steps, then
    # falls linearly to 0 at the last step.
    cfg = make_cfg(tmp_path, warmup=0.1)
    param = torch.nn.Parameter(torch.zeros(1))
    opt = torch.optim.AdamW([param], lr=1.0)
    sched = make_scheduler(opt, cfg, total_steps=100)
    lrs = []
    for _ in range(100):
        lrs.append(sched.get_last_lr()[0])
        opt.step()
        sched.step()
    assert lrs[0] == 0.0 and lrs[5] == pytest.approx(0.5) and lrs[10] == pytest.approx(1.0)
    assert lrs[55] == pytest.approx(0.5) and lrs[99] == pytest.approx(1 / 90)


def test_planned_steps_count_accumulation_fractions_and_caps(tmp_path):
    assert planned_steps(10, make_cfg(tmp_path, epochs=3)) == 30
    assert planned_steps(10, make_cfg(tmp_path, epochs=3, grad_accum=4)) == 9  # ceil(10/4) per epoch
    assert planned_steps(10, make_cfg(tmp_path, epochs=0.5)) == 5
    assert planned_steps(10, make_cfg(tmp_path, epochs=3, max_steps=7)) == 7


# ----- learning


@pytest.mark.parametrize("checkpoint", ["toy:encoder", "toy:decoder"])
def test_head_training_lowers_the_loss_and_beats_the_majority_class(tmp_path, checkpoint):
    cfg = make_cfg(tmp_path, checkpoint, epochs=3, learning_rate=2e-3)
    data, method, (tr, dev, _) = _setup(cfg)
    result = train(method, tr, dev, data.label_names, cfg, tmp_path)
    losses = [r["loss"] for r in map(json.loads, (tmp_path / "log.jsonl").read_text().splitlines()) if "loss" in r]
    assert losses[-1] < 0.8 * losses[0]
    majority = Counter(data.dev.labels).most_common(1)[0][1] / len(data.dev)  # the majority-class baseline
    assert result.best_metrics["accuracy"] > majority + 0.1
    assert (tmp_path / "checkpoints" / "best.safetensors").exists() and (tmp_path / "checkpoints" / "last.pt").exists()


def test_early_stopping_after_patience_evaluations_without_improvement(tmp_path):
    # A learning rate too small to change predictions: no evaluation after the first can improve.
    cfg = make_cfg(tmp_path, learning_rate=1e-12, eval_every=2, patience=2, epochs=5, warmup=0.0)
    data, method, (tr, dev, _) = _setup(cfg)
    result = train(method, tr, dev, data.label_names, cfg, tmp_path)
    assert result.stopped_early and result.best_step == 2 and result.steps == 6


def test_lora_trains_only_adapters_and_the_head(tmp_path):
    cfg = config_from_dict({**_as_dict(make_cfg(tmp_path, epochs=1, learning_rate=5e-3)),
                            "method": {"kind": "head", "lora": {"r": 4, "alpha": 8}}})
    data, method, (tr, dev, _) = _setup(cfg)
    before = {n: p.detach().clone() for n, p in method.model.named_parameters()}
    train(method, tr, dev, data.label_names, cfg, tmp_path)
    changed = {n for n, p in method.model.named_parameters() if not torch.equal(p, before[n])}
    assert changed, "training changed nothing"
    assert all("lora_" in n or n.startswith("head.") for n in changed), sorted(changed)
    assert any(n.startswith("head.") for n in changed) and any("lora_B" in n for n in changed)


def test_frozen_backbone_is_a_linear_probe(tmp_path):
    cfg = config_from_dict({**_as_dict(make_cfg(tmp_path, "toy:encoder", epochs=1)),
                            "method": {"kind": "head", "freeze": "backbone"}})
    _, method, _ = _setup(cfg)
    assert [n for n, _ in method.trainable_parameters()] == ["head.linear.weight", "head.linear.bias"]
    cfg = config_from_dict({**_as_dict(make_cfg(tmp_path, "toy:encoder", epochs=1)),
                            "method": {"kind": "head", "freeze": "embeddings"}})
    _, method, _ = _setup(cfg)
    names = [n for n, _ in method.trainable_parameters()]
    assert not any(".embeddings." in n for n in names) and any(".layer.0." in n for n in names)


def _as_dict(cfg):
    from harness.config import config_to_dict

    return config_to_dict(cfg)


def test_bf16_autocast_trains_with_finite_losses(tmp_path):
    cfg = make_cfg(tmp_path, "toy:encoder", bf16=True, max_steps=4, log_every=2)
    data, method, (tr, dev, _) = _setup(cfg)
    result = train(method, tr, dev, data.label_names, cfg, tmp_path)
    losses = [r["loss"] for r in map(json.loads, (tmp_path / "log.jsonl").read_text().splitlines()) if "loss" in r]
    assert result.steps == 4 and len(losses) == 2 and all(math.isfinite(x) for x in losses)
    # Parameters stay fp32 (autocast only changes the compute dtype).
    assert all(p.dtype == torch.float32 for p in method.model.parameters())


def test_default_threads_are_the_cores_this_process_may_use(monkeypatch: pytest.MonkeyPatch) -> None:
    import os

    import psutil

    from harness.train.loop import set_threads

    before = torch.get_num_threads()
    try:
        monkeypatch.setattr(psutil, "cpu_count", lambda logical=True: 8)
        monkeypatch.setattr(os, "sched_getaffinity", lambda pid: {0, 1, 2}, raising=False)  # a scheduler's cpuset
        assert set_threads(None) == 3 and torch.get_num_threads() == 3
        monkeypatch.setenv("LOCAL_WORLD_SIZE", "3")  # three launched processes share those cores
        assert set_threads(None) == 1
        assert set_threads(2) == 2  # train.threads wins
    finally:
        torch.set_num_threads(before)
