"""Ablations of the training and evaluation speed choices, measured in one process, alternating (ABBA).

Each training variant trains a fresh `head` model with `harness.train.train` on the same slice of
the training split and differs from the base settings in one choice only. Throughput is the
steady state: examples of steps 2..N over the time between the end of step 1 and the end of step
N (the first step pays for allocations; evaluation and checkpoints after the last step are
outside the window). Variants that are not config settings are applied as small wrappers:
- `pad_to_max_length`: the batch is padded on to train.max_length after the dynamic collate;
- `host_sync_every_step`: the loss is read on the host (`float(loss)`) after every batch;
- `per_tensor_adamw`: the optimizer is rebuilt without the fused kernel (torch's default on the CPU);
- `exact_widths`: batches padded to their longest row exactly, not rounded up to PAD_MULTIPLE;
- `attention_dropout_off`: attention-probability dropout set to 0 (not a harness setting; measured
  because it decides whether torch's fused attention kernel runs).
Run by scripts/benchmark.py through bench.jobs, never by tests.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import torch
import torch.nn.functional as F

__all__ = ["TRAIN_VARIANTS", "run_ablations", "set_attention_dropout", "train_variants"]

# name -> (config overrides, wrapper name or None); compared against "base".
TRAIN_VARIANTS: dict[str, tuple[dict[str, Any], str | None]] = {
    "base": ({}, None),
    "random batches (no length grouping)": ({"train.batching": "random"}, None),
    "pad to max_length (no dynamic padding)": ({}, "pad_to_max_length"),
    "threads = 2 x logical cores (oversubscribed)": ({"train.threads": 2 * (os.cpu_count() or 1)}, None),
    "loss read on the host every step": ({}, "host_sync_every_step"),
    "per-tensor AdamW (not fused)": ({}, "per_tensor_adamw"),
    "exact batch widths (not rounded up to 8)": ({}, "exact_widths"),
    "attention dropout off (proposal: fused attention kernel)": ({}, "attention_dropout_off"),
}


def set_attention_dropout(model: torch.nn.Module, p: float) -> int:
    """Set the attention-probability dropout of every self-attention module; returns how many changed.

    Why it matters on the CPU: torch's fused attention kernel takes no dropout, so with dropout on
    every layer falls back to the unfused path, which stores the (batch, heads, seq, seq) weights.
    """
    changed = 0
    for module in model.modules():
        dropout = getattr(module, "dropout", None)
        if type(module).__name__.endswith("SelfAttention") and isinstance(dropout, torch.nn.Dropout):
            dropout.p = p
            changed += 1
    return changed


def train_variants(settings: dict[str, Any]) -> dict[str, tuple[dict[str, Any], str | None]]:
    """TRAIN_VARIANTS plus the two optional settings (bf16 autocast, frozen embeddings) flipped from the base."""
    bf16 = bool(settings.get("train.bf16", False))
    frozen = settings.get("method.freeze", "none") == "embeddings"
    return {**TRAIN_VARIANTS,
            f"bf16 autocast {'off' if bf16 else 'on'}": ({"train.bf16": not bf16}, None),
            f"embeddings {'trained' if frozen else 'frozen'}": ({"method.freeze": "none" if frozen else "embeddings"},
                                                                None)}


def _pad_right(batch: dict[str, torch.Tensor], width: int, pad_id: int) -> dict[str, torch.Tensor]:
    out = dict(batch)
    for key in ("input_ids", "attention_mask", "token_type_ids"):
        if key in out:
            extra = width - out[key].shape[1]
            out[key] = F.pad(out[key], (0, extra), value=pad_id if key == "input_ids" else 0)  # (batch, width)
    return out


class _Instrumented:
    """A method seen through the benchmark: its own members, but for the collate and loss given here."""

    def __init__(self, method: Any, collate: Callable[[Any], Any], loss: Callable[[Any], Any]) -> None:
        self._method, self.collate, self.loss = method, collate, loss

    def __getattr__(self, name: str) -> Any:
        return getattr(self._method, name)


def _wrapped(method: Any, wrapper: str | None) -> tuple[Any, Any, list[tuple[int, int, int]]]:
    """One wrapper applied: (method to train, optimizer factory or None, list that records (examples, real
    tokens, padded tokens) per batch). The product is driven through `train`'s public arguments only."""
    from harness.train.loop import make_optimizer

    records: list[tuple[int, int, int]] = []
    collate, loss = method.collate, method.loss

    def recording_collate(items: Any) -> dict[str, torch.Tensor]:
        if wrapper == "exact_widths":
            from harness.methods.batches import collate_encoded

            batch = collate_encoded(items, method.tokenizer.pad_token_id, method.uses_type_ids)  # no limit: no rounding
        else:
            batch = collate(items)
        if wrapper == "pad_to_max_length":
            batch = _pad_right(batch, method.max_length, method.tokenizer.pad_token_id)
        records.append((len(items), sum(len(it) for it in items), int(batch["input_ids"].numel())))
        return batch

    def syncing_loss(batch: dict[str, torch.Tensor]) -> torch.Tensor:
        value = loss(batch)
        float(value.detach())  # the per-step host read the harness loop avoids
        return value

    def per_tensor_optimizer(m: Any, c: Any) -> torch.optim.Optimizer:
        fused = make_optimizer(m, c)
        groups = [{k: g[k] for k in ("params", "lr", "weight_decay")} for g in fused.param_groups]
        return torch.optim.AdamW(groups, lr=c.train.learning_rate, fused=False, foreach=False)

    if wrapper == "attention_dropout_off":
        set_attention_dropout(method.model, 0.0)
    instrumented = _Instrumented(method, recording_collate, syncing_loss if wrapper == "host_sync_every_step" else loss)
    return instrumented, per_tensor_optimizer if wrapper == "per_tensor_adamw" else None, records


def _train_variant(job: dict[str, Any], name: str, data: Any) -> dict[str, Any]:
    from bench.jobs import build_config
    from harness.methods.head import HeadMethod
    from harness.train.loop import train

    overrides, wrapper = train_variants(job.get("settings", {}))[name]
    with tempfile.TemporaryDirectory(prefix="bench-ablate-") as tmp:
        cfg = build_config({**job, "settings": {**job.get("settings", {}), **overrides}}, Path(tmp))
        method = HeadMethod(cfg=cfg, data=data)
        n = job["ablation_examples"]
        train_items = method.encode(data.train.texts[:n], data.train.labels[:n])
        dev_items = method.encode(data.dev.texts[:32], data.dev.labels[:32])
        stamps: list[float] = []
        instrumented, optimizer_factory, records = _wrapped(method, wrapper)
        train(instrumented, train_items, dev_items, data.label_names, cfg, Path(tmp),
              on_step=lambda _step: stamps.append(time.perf_counter()), optimizer_factory=optimizer_factory)
    steady = records[1:len(stamps)]  # batches of steps 2..N (grad_accum is 1 here)
    seconds = stamps[-1] - stamps[0]
    return {"examples_per_second": sum(r[0] for r in steady) / seconds, "seconds": seconds, "steps": len(stamps),
            "real_tokens": sum(r[1] for r in steady), "padded_tokens": sum(r[2] for r in steady),
            "threads": torch.get_num_threads()}


def _timed(fn: Callable[[], Any]) -> float:
    start = time.perf_counter()
    fn()
    return time.perf_counter() - start


def _eval_variants(job: dict[str, Any], data: Any) -> dict[str, list[float]]:
    """Seconds of one test-slice evaluation per variant: the harness path against three simpler loops."""
    from bench.jobs import build_config
    from harness.methods.batches import predict_batches
    from harness.methods.head import HeadMethod
    from harness.train.loop import set_threads

    with tempfile.TemporaryDirectory(prefix="bench-eval-") as tmp:
        cfg = build_config(job, Path(tmp))
    set_threads(cfg.train.threads)
    method = HeadMethod(cfg=cfg, data=data)
    n, bs = job["ablation_examples"], cfg.eval.batch_size
    items = method.encode(data.test.texts[:n], data.test.labels[:n])
    by_length = sorted(items, key=len)
    model = method.model.eval()

    def loop(rows: Any, context: Callable[[], Any]) -> Callable[[], Any]:
        def run() -> None:
            with context():
                for lo in range(0, len(rows), bs):
                    torch.softmax(method.logits(method.collate(rows[lo:lo + bs])), dim=-1)
        return run

    variants: dict[str, Callable[[], Any]] = {
        "harness (length-sorted, inference_mode)": lambda: method.predict_proba(items, bs),
        "in given order, inference_mode": lambda: predict_batches(
            model, (method.collate(items[i:i + bs]) for i in range(0, len(items), bs)), method.logits),
        "length-sorted, no_grad": loop(by_length, torch.no_grad),
        "length-sorted, autograd on": loop(by_length, contextlib.nullcontext),
    }
    times: dict[str, list[float]] = {k: [] for k in variants}
    names = list(variants)
    for order in (names, names[::-1], names, names[::-1]):  # ABBA twice
        for name in order:
            times[name].append(_timed(variants[name]))
    return times


def _token_cache(job: dict[str, Any], data: Any) -> dict[str, float]:
    """Seconds to tokenise the training split (cache miss) and to read it back (cache hit)."""
    from bench.jobs import build_config
    from harness.methods.head import HeadMethod
    from harness.runs.run import encode_split

    with tempfile.TemporaryDirectory(prefix="bench-cache-") as tmp:
        os.environ["HARNESS_CACHE"] = tmp  # an empty cache: the first call must tokenise
        cfg = build_config(job, Path(tmp))
        method = HeadMethod(cfg=cfg, data=data)
        miss = _timed(lambda: encode_split(method, data.train, cfg))
        hits = [_timed(lambda: encode_split(method, data.train, cfg)) for _ in range(3)]
    return {"miss_seconds": miss, "hit_seconds": min(hits), "examples": len(data.train)}


def run_ablations(job: dict[str, Any]) -> dict[str, Any]:
    """Every training variant twice (ABBA order), the evaluation variants and the token cache."""
    from bench.jobs import build_config
    from harness.data.task import load_task

    with tempfile.TemporaryDirectory() as tmp:
        data = load_task(build_config(job, Path(tmp)).task, seed=job["seed"])
    names = list(train_variants(job.get("settings", {})))
    runs: dict[str, list[dict[str, Any]]] = {k: [] for k in names}
    for name in names + names[::-1]:
        runs[name].append(_train_variant(job, name, data))
    return {"contender": "ablation", "train": runs, "eval_seconds": _eval_variants(job, data),
            "token_cache": _token_cache(job, data)}
