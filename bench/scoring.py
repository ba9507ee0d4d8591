"""Scoring speed: cached-prompt rank scoring against one full pass per label, and against a head's pass.

The prompts are question-type test questions in a template of our own; the label sequences are
five invented answer-type phrases cut to exactly 3 tokens each (and, for the single-token case,
5 distinct one-token words). Contenders, timed over the same length-sorted batches:
- `cached`: `harness.methods.rank_scoring.decoder_rank_scores` (prompts once, their key/value cache reused);
- `per_label`: every label its own forward pass over prompt + label words, left-padded so the
  label positions line up, with the output layer on those positions only (the fair version of
  the obvious loop);
- `single_token`: `decoder_rank_scores` with one-token labels (the prompt pass only);
- `single_token_all_positions`: the same with the output layer on every prompt position (what
  the prompt pass did before it asked for the last position only);
- `head_pass`: a `head` method's evaluation pass (last-token pooling + linear head) on the same
  decoder and the same token sequences, through `harness.methods.head.predict_batches`.
Run by scripts/benchmark.py through bench.jobs, never by tests.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Sequence
from typing import Any

import torch

__all__ = ["LABEL_PHRASES", "per_label_scores", "run_scoring"]

TEMPLATE = "Question: {text}\nThe answer is"
LABEL_PHRASES = (" an abbreviation expanded", " a description of it", " a thing or entity", " a person or group",
                 " a place on a map", " a number or a date")[:5]
SINGLE_WORDS = (" short", " why", " thing", " who", " where")


@torch.no_grad()
def per_label_scores(model: Any, prompts: Sequence[Sequence[int]], seqs: Sequence[Sequence[int]],
                     pad_id: int) -> torch.Tensor:
    """Summed log-probs (n_prompts, n_seqs), one full forward pass over prompt + sequence per label."""
    from harness.methods.batches import pad_batch

    device = next(model.parameters()).device
    out = torch.empty((len(prompts), len(seqs)))
    for j, seq in enumerate(seqs):
        batch = pad_batch([(*p, *seq) for p in prompts], pad_id, side="left")  # rows end together
        ids, mask = batch["input_ids"], batch["attention_mask"]
        positions = (mask.cumsum(-1) - 1).clamp(min=0)
        k = len(seq)
        logits = model(input_ids=ids.to(device), attention_mask=mask.to(device), position_ids=positions.to(device),
                       logits_to_keep=k + 1).logits[:, :-1].float()  # (n, k, vocab): positions predicting seq
        logp = logits.log_softmax(-1)[:, torch.arange(k), torch.tensor(list(seq))]  # (n, k)
        out[:, j] = logp.sum(-1).cpu()
    return out


def _exact_tokens(tokenizer: Any, phrases: Sequence[str], count: int) -> list[tuple[int, ...]]:
    seqs = [tuple(tokenizer.encode(p, add_special_tokens=False)[:count]) for p in phrases]
    if any(len(s) != count for s in seqs) or len(set(seqs)) != len(seqs):
        raise RuntimeError(f"label phrases do not give {len(phrases)} distinct {count}-token sequences: {seqs}")
    return seqs


def _timed(fn: Callable[[], Any]) -> tuple[float, Any]:
    start = time.perf_counter()
    value = fn()
    return time.perf_counter() - start, value


def run_scoring(job: dict[str, Any]) -> dict[str, Any]:
    """Seconds per contender (ABBA-alternated repeats), the largest score difference, sizes."""
    import harness.methods.rank_scoring as rs
    from harness.config import ModelConfig, TaskConfig
    from harness.data.task import load_task
    from harness.methods.batches import pad_batch, predict_batches
    from harness.methods.pooling import ClassifierHead, HeadModel, LastPooling
    from harness.models.backbones import load_backbone
    from harness.train.loop import set_threads

    threads = set_threads(job.get("threads"))
    backbone = load_backbone(ModelConfig(checkpoint=job["checkpoint"], layers=job.get("layers")), for_lm=True)
    model, tok = backbone.model.eval(), backbone.tokenizer
    data = load_task(TaskConfig(**job["task"]), seed=0)
    texts = data.test.texts[: job["prompts"]]
    prompts = sorted((tuple(tok.encode(TEMPLATE.format(text=t), add_special_tokens=False)) for t in texts), key=len)
    bs, pad = job["batch_size"], tok.pad_token_id
    chunks = [prompts[i:i + bs] for i in range(0, len(prompts), bs)]
    three, one = _exact_tokens(tok, LABEL_PHRASES, 3), _exact_tokens(tok, SINGLE_WORDS, 1)
    config = model.config
    head = HeadModel(model.base_model, LastPooling(), ClassifierHead(config.hidden_size, len(one), dropout=0.1, seed=0),
                     "decoder")
    def all_positions() -> torch.Tensor:  # the output layer on every prompt position
        return torch.cat([rs.decoder_rank_scores(model, c, one, pad, last_position_only=False) for c in chunks])

    contenders: dict[str, Callable[[], Any]] = {
        "cached": lambda: torch.cat([rs.decoder_rank_scores(model, c, three, pad) for c in chunks]),
        "per_label": lambda: torch.cat([per_label_scores(model, c, three, pad) for c in chunks]),
        "single_token": lambda: torch.cat([rs.decoder_rank_scores(model, c, one, pad) for c in chunks]),
        "single_token_all_positions": all_positions,
        "head_pass": lambda: predict_batches(head, (pad_batch(c, pad) for c in chunks),
                                             lambda b: head(b["input_ids"], b["attention_mask"])),
    }
    seconds: dict[str, list[float]] = {k: [] for k in contenders}
    values: dict[str, Any] = {}
    names = list(contenders)
    for rep in range(job["repeats"]):
        for name in names if rep % 2 == 0 else names[::-1]:  # ABBA: drift hits every contender alike
            took, values[name] = _timed(contenders[name])
            seconds[name].append(took)
    diff = (values["cached"] - values["per_label"]).abs().max().item()
    return {"contender": "scoring", "seconds": seconds, "max_abs_difference": diff, "prompts": len(prompts),
            "mean_prompt_tokens": sum(map(len, prompts)) / len(prompts), "labels": len(three), "label_tokens": 3,
            "layers": int(config.num_hidden_layers), "threads": threads, "batch_size": bs,
            "label_token_ids": [list(s) for s in three]}
