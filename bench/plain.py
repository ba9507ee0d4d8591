"""The benchmark's hand-written contender: a careful plain PyTorch training loop, fp32 or bf16.

It follows the transformers documentation's "own training loop in native PyTorch" tutorial
(AutoModelForSequenceClassification, a DataLoader, AdamW, a linear schedule from `get_scheduler`,
`outputs.loss.backward()`, `optimizer.step()`, `lr_scheduler.step()`, `optimizer.zero_grad()`), made
careful the way a practitioner would on a CPU:
- strict length grouping within shuffled pools: the examples are shuffled, cut into pools of 50
  batches, each pool sorted by length (no regard to the label) and cut into batches, and the order
  of all batches shuffled; every batch is padded only to its own longest row;
- torch's fused AdamW (one kernel per step, `fused=True`, on the CPU since torch 2.4);
- bf16: the forward pass and the loss under `torch.autocast("cpu", dtype=torch.bfloat16)`, the
  weights and optimizer states left in fp32 (the usual mixed-precision recipe, common practice);
- `set_to_none` gradients and `torch.inference_mode` for the test pass.

Throughput = training examples seen / seconds of the training loop alone (no evaluation and no
checkpoint happens inside it), the way every contender is counted. Run by bench.jobs, never by tests.
"""

from __future__ import annotations

import random
import time
from collections.abc import Sequence
from typing import Any

__all__ = ["POOL_BATCHES", "run_plain", "strict_length_batches"]

POOL_BATCHES = 50  # batches per pool, as the harness's own default pool


def strict_length_batches(lengths: Sequence[int], batch_size: int, *, seed: int, epoch: int) -> list[list[int]]:
    """Shuffled pools of POOL_BATCHES batches, each pool sorted by length alone, batch order shuffled."""
    rng = random.Random(f"plain:{seed}:{epoch}")
    order = list(range(len(lengths)))
    rng.shuffle(order)
    pool = batch_size * POOL_BATCHES
    batches: list[list[int]] = []
    for start in range(0, len(order), pool):
        chunk = sorted(order[start:start + pool], key=lambda i: lengths[i])
        batches.extend(chunk[i:i + batch_size] for i in range(0, len(chunk), batch_size))
    rng.shuffle(batches)
    return batches


def run_plain(job: dict[str, Any], cfg: Any, data: Any, tokenizer: Any, model: Any) -> dict[str, Any]:
    """Train `model` on cfg's data with the plain loop; bf16 when job["kind"] is "plain_bf16"."""
    import contextlib

    import torch
    from sklearn.metrics import accuracy_score, f1_score
    from transformers import get_scheduler

    bf16 = job["kind"] == "plain_bf16"
    t = cfg.train
    torch.manual_seed(t.seed)
    encoded = tokenizer(list(data.train.texts), truncation=True, max_length=t.max_length)["input_ids"]
    labels = list(data.train.labels)
    lengths = [len(ids) for ids in encoded]
    pad = tokenizer.pad_token_id

    def collate(rows: Sequence[int], ids: Sequence[Sequence[int]]) -> tuple[Any, Any]:
        width = max(len(ids[i]) for i in rows)
        input_ids = torch.full((len(rows), width), pad, dtype=torch.long)
        mask = torch.zeros((len(rows), width), dtype=torch.long)
        for r, i in enumerate(rows):
            input_ids[r, :len(ids[i])] = torch.tensor(ids[i])
            mask[r, :len(ids[i])] = 1
        return input_ids, mask

    epochs = int(t.epochs)
    plans = [strict_length_batches(lengths, t.batch_size, seed=t.seed, epoch=e) for e in range(epochs)]
    steps = sum(len(p) for p in plans)
    optimizer = torch.optim.AdamW(model.parameters(), lr=t.learning_rate, fused=True)
    schedule = get_scheduler("linear", optimizer=optimizer, num_warmup_steps=0, num_training_steps=steps)
    cast = (lambda: torch.autocast("cpu", dtype=torch.bfloat16)) if bf16 else contextlib.nullcontext
    model.train()
    padded = 0
    started = time.perf_counter()
    for plan in plans:
        for rows in plan:
            input_ids, mask = collate(rows, encoded)
            padded += input_ids.numel()
            target = torch.tensor([labels[i] for i in rows])
            with cast():
                loss = model(input_ids=input_ids, attention_mask=mask, labels=target).loss
            loss.backward()
            optimizer.step()
            schedule.step()
            optimizer.zero_grad(set_to_none=True)
    seconds = time.perf_counter() - started
    model.eval()
    test_ids = tokenizer(list(data.test.texts), truncation=True, max_length=t.max_length)["input_ids"]
    order = sorted(range(len(test_ids)), key=lambda i: len(test_ids[i]))
    predicted = [0] * len(test_ids)
    with torch.inference_mode(), cast():
        for start in range(0, len(order), 64):
            rows = order[start:start + 64]
            input_ids, mask = collate(rows, test_ids)
            for i, p in zip(rows, model(input_ids=input_ids, attention_mask=mask).logits.argmax(-1).tolist(),
                            strict=True):
                predicted[i] = p
    return {"examples_per_second": len(labels) * epochs / seconds, "train_seconds": seconds,
            "accuracy": float(accuracy_score(data.test.labels, predicted)),
            "macro_f1": float(f1_score(data.test.labels, predicted, average="macro")), "steps": steps,
            "lengths": lengths, "real_tokens": sum(lengths) * epochs, "padded_tokens": padded,
            "optimizer": "torch AdamW (fused)", "precision": "bf16" if bf16 else "fp32"}
