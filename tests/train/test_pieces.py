"""Batches cut into length pieces: the cheapest cut, the whole batch's loss and gradient, the same training."""

from __future__ import annotations

import itertools
import json
import random
from pathlib import Path
from typing import Any

import pytest
import torch

from harness.config import config_from_dict
from harness.data.task import load_task
from harness.methods.registry import build_method
from harness.train import loop
from harness.train.batching import PieceCollate, length_pieces
from harness.train.loop import backward_pieces, max_pieces, train
from tests.common import ferry_dict


def _cost(lengths: list[int], pieces: list[list[int]], overhead: int, width: Any = None) -> int:
    return sum(len(p) * (width or (lambda n: n))(max(lengths[i] for i in p)) + overhead for p in pieces)


def _brute_force(lengths: list[int], max_pieces: int, overhead: int, width: Any = None, step: int = 1) -> int:
    """The cheapest cost over every cut of the sorted order into at most `max_pieces` contiguous runs,
    every run but the last holding a multiple of `step` rows."""
    order = sorted(range(len(lengths)), key=lambda i: lengths[i])
    best = None
    for k in range(1, min(max_pieces, len(order)) + 1):
        for cuts in itertools.combinations(range(step, len(order), step), k - 1):
            bounds = [0, *cuts, len(order)]
            cost = _cost(lengths, [order[a:b] for a, b in itertools.pairwise(bounds)], overhead, width)
            best = cost if best is None else min(best, cost)
    assert best is not None
    return best


def _round8(n: int) -> int:
    return n if n <= 32 else -(-n // 8) * 8  # the shape of harness.methods.batches.batch_width


def test_pieces_are_the_cheapest_cut_of_the_length_order_and_hold_every_row_once() -> None:
    rng = random.Random(0)
    for _ in range(300):
        lengths = [rng.randint(3, 120) for _ in range(rng.randint(1, 9))]
        k, overhead = rng.randint(1, 4), rng.choice([0, 20, 160])
        width, step = rng.choice([None, _round8]), rng.choice([1, 2, 4])
        pieces = length_pieces(lengths, k, overhead, width=width, step=step)
        assert sorted(i for p in pieces for i in p) == list(range(len(lengths)))
        assert 1 <= len(pieces) <= k
        assert all(len(p) % step == 0 for p in pieces[:-1])
        assert _cost(lengths, pieces, overhead, width) == _brute_force(lengths, k, overhead, width, step)


def test_a_batch_whose_length_tracks_the_label_is_cut_between_short_and_long() -> None:
    lengths = [12, 60, 14, 11, 58, 13, 15, 12]  # six short rows (one class) and two long ones
    assert length_pieces(lengths, 4, overhead=160) == [[3, 0, 7, 5, 2, 6], [4, 1]]
    assert length_pieces(lengths, 1) == [sorted(range(8), key=lambda i: lengths[i])]
    assert len(length_pieces([20] * 8, 4)) == 1  # nothing to save: the whole batch
    assert len(length_pieces(lengths, 4, overhead=10_000)) == 1  # a cut that costs more than it saves


def _method(tmp_path: Path, checkpoint: str, kind: str, **method: Any) -> tuple[Any, list[Any]]:
    cfg = config_from_dict(ferry_dict(tmp_path, rows=48, checkpoint=checkpoint, method={"kind": kind, **method}))
    data = load_task(cfg.task, seed=cfg.train.seed)
    built = build_method(kind, cfg=cfg, data=data)
    return built, built.encode(data.train.texts, data.train.labels)


@pytest.mark.parametrize("checkpoint, kind, method", [
    ("toy:encoder", "head", {"class_weights": "balanced", "label_smoothing": 0.1}),
    ("toy:decoder", "head", {}),
    ("toy:decoder", "next_token", {}),
    ("toy:encoder-decoder", "next_token", {}),
])
def test_pieces_give_the_whole_batchs_loss_and_gradient(tmp_path: Path, checkpoint: str, kind: str,
                                                        method: dict[str, Any]) -> None:
    m, items = _method(tmp_path, checkpoint, kind, **method)
    by_length = sorted(items, key=len)
    batch = by_length[:10] + by_length[-3:]  # short rows and long ones: worth cutting
    pieces = PieceCollate(m.collate, 4, overhead=0)(batch)  # the toys' rows are short: every saving counts
    assert len(pieces) > 1
    assert sum(p["input_ids"].numel() for p in pieces) < m.collate(batch)["input_ids"].numel()  # less padding
    m.model.eval()  # no dropout: the two ways must agree to rounding
    results = []
    for parts in ([m.collate(batch)], pieces):
        m.model.zero_grad()
        loss = backward_pieces(m, parts, lambda loss: loss.backward())
        results.append((loss.detach(), {n: p.grad.clone() for n, p in m.model.named_parameters() if p.grad is not None}))
    (whole, whole_grads), (cut, cut_grads) = results
    assert torch.allclose(whole, cut, atol=1e-6)
    assert whole_grads.keys() == cut_grads.keys() and whole_grads
    for name, grad in whole_grads.items():
        assert torch.allclose(grad, cut_grads[name], atol=1e-6, rtol=1e-4), name


def test_training_in_pieces_follows_training_on_whole_batches(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    cut = []

    class Counting(PieceCollate):
        def __call__(self, items: Any) -> list[Any]:
            out = super().__call__(items)
            cut.append(len(out) > 1)
            return out

    # No fixed cost per piece: the toys' rows are short, and the run must really train in pieces.
    monkeypatch.setattr(loop, "PieceCollate", lambda collate, k, **kw: Counting(collate, k, **{**kw, "overhead": 0}))
    weights = []
    for pieces in (1, 4):
        data = ferry_dict(tmp_path / f"p{pieces}", rows=48, method={"kind": "head", "dropout": 0.0},
                          model={"attention_dropout": 0.0},
                          train={"pieces": pieces, "batching": "random", "epochs": 2, "batch_size": 12, "log_every": 2,
                                 "bf16": False})  # bf16 rounding would differ between the two ways
        cfg = config_from_dict(data)
        task = load_task(cfg.task, seed=cfg.train.seed)
        m = build_method("head", cfg=cfg, data=task)
        for module in m.model.modules():  # the toy's hidden dropout too: the two runs must see the same network
            if isinstance(module, torch.nn.Dropout):
                module.p = 0.0
        encoded = [m.encode(s.texts, s.labels) for s in (task.train, task.dev)]
        start = {n: p.detach().clone() for n, p in m.model.named_parameters()}
        assert max_pieces(m, cfg) == pieces
        train(m, encoded[0], encoded[1], task.label_names, cfg, tmp_path / f"p{pieces}")
        weights.append({n: p.detach() - start[n] for n, p in m.model.named_parameters()})  # what training changed
        assert any(cut) == (pieces > 1)
        cut.clear()
    assert max(float(w.abs().max()) for w in weights[0].values()) > 1e-3  # training moved the weights
    for name, w in weights[0].items():  # and both ways moved them alike, to float32 rounding (AdamW, 8 steps)
        assert torch.allclose(w, weights[1][name], atol=1e-5), name
    losses = [[json.loads(line)["loss"] for line in (tmp_path / f"p{k}" / "log.jsonl").read_text().splitlines()
               if "loss" in json.loads(line)] for k in (1, 4)]
    assert losses[0] and losses[0] == pytest.approx(losses[1], abs=1e-5)  # the logged batch losses agree too
