"""The benchmark's training contenders, each run as `python -m bench.jobs JOB.json RESULT.json`.

- `harness`: one `harness.runs.run.execute_run` of the `head` method, exactly as `tiltyard run` does it.
- `trainer_fp32`: the same checkpoint, data, epochs, batch size, learning rate and max length, trained
  the way the transformers documentation teaches (its text-classification task guide and the
  `Trainer` pages): `AutoModelForSequenceClassification`, `DataCollatorWithPadding`, `Trainer`
  with `TrainingArguments(use_cpu=True, ...)` and every other argument at its default (random
  batches, the library's default optimizer and schedule).
- `trainer_bf16`: the same Trainer at its own best CPU settings: `bf16=True`,
  `train_sampling_strategy="group_by_length"`, `save_strategy="no"`.
- `plain_fp32`, `plain_bf16`: a careful hand-written PyTorch loop (bench.plain).
- `ablation` (bench.ablate) and `scoring` (bench.scoring) live in their own modules; `memory`
  (bench.memory) measures the bake-off arms' peak memory.

Throughput is counted alike for every contender: training examples seen / seconds of training,
evaluation and checkpoint writes excluded (the harness's dev scoring and checkpoints inside its
training call are recorded as `cost.train_dev_seconds` and taken out).

Every job reports its own peak resident memory (VmHWM of its own process, harness.train.memory):
one process per job keeps the peaks of different contenders apart. Not getrusage's ru_maxrss: Linux
keeps it across fork and exec, so a job would report at least its parent's size at the fork (the
benchmark's own process, ~1.6 GB once it has prepared the checkpoints). Run by scripts/benchmark.py, never by tests.
"""

from __future__ import annotations

import json
import os
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

__all__ = ["CONTENDERS", "JOBS", "build_config", "main", "token_lengths"]


def _set_dotted(data: dict[str, Any], key: str, value: Any) -> None:
    section = data
    *parents, last = key.split(".")
    for part in parents:
        section = section.setdefault(part, {})
    section[last] = value


def build_config(job: dict[str, Any], output: Path) -> Any:
    """The harness Config of a training job: task, checkpoint, shared settings, then the job's own overrides."""
    from harness.config import config_from_dict

    data: dict[str, Any] = {
        "task": dict(job["task"]), "model": {"checkpoint": job["checkpoint"]},
        "method": {"kind": "head"},
        "train": {"epochs": job["epochs"], "batch_size": job["batch_size"], "learning_rate": job["learning_rate"],
                  "max_length": job["max_length"], "seed": job["seed"], "threads": job.get("threads"),
                  "log_every": 20},
        "eval": {"primary": "macro_f1", "bootstrap": 0, "batch_size": 64}, "output": str(output),
    }
    for key, value in job.get("settings", {}).items():
        _set_dotted(data, key, value)
    return config_from_dict(data)


def token_lengths(tokenizer: Any, texts: Any, max_length: int) -> list[int]:
    """Real token counts after truncation, as both contenders tokenise (special tokens included)."""
    return [len(ids) for ids in tokenizer(list(texts), truncation=True, max_length=max_length)["input_ids"]]


def _model_facts(model: Any) -> dict[str, int]:
    from bench.flops import nonembedding_parameters

    config = model.config
    return {"nonembedding_parameters": nonembedding_parameters(model), "layers": int(config.num_hidden_layers),
            "hidden": int(config.hidden_size), "parameters": sum(p.numel() for p in model.parameters())}


def _ablation(job: dict[str, Any]) -> Any:
    """The memory ablations: one harness choice undone, through the product's documented hooks only
    (see scripts/benchmark.py): the method's `pad_multiple` set by execute_run's `prepare`, and
    HARNESS_HEAP=default for glibc's own adaptive mmap threshold."""
    import os

    if job.get("heap") == "default":
        os.environ["HARNESS_HEAP"] = "default"  # this job's own process only
    if "pad_multiple" not in job:
        return None
    multiple = int(job["pad_multiple"])

    def prepare(method: Any) -> None:
        method.pad_multiple = multiple  # batch widths not rounded up

    return prepare


def run_harness(job: dict[str, Any]) -> dict[str, Any]:
    """One harness `head` run; throughput = examples seen / (training call - its dev scoring and checkpoints)."""
    import torch
    from transformers import AutoTokenizer

    from bench.flops import padded_tokens
    from harness.data.task import load_task
    from harness.methods.batches import PAD_MULTIPLE, batch_width
    from harness.models.backbones import resolve_source
    from harness.runs.run import execute_run
    from harness.train.batching import PIECE_STEP, epoch_batches, length_pieces

    prepare = _ablation(job)
    with tempfile.TemporaryDirectory(prefix="bench-run-") as tmp:
        cfg = build_config(job, Path(tmp))
        folder = execute_run(cfg, log=lambda _line: None, prepare=prepare)
        metrics = json.loads((folder / "metrics.json").read_text(encoding="utf-8"))
        method = json.loads((folder / "method.json").read_text(encoding="utf-8"))
    data = load_task(cfg.task, seed=cfg.train.seed)
    source, _ = resolve_source(cfg.model.checkpoint)
    lengths = token_lengths(AutoTokenizer.from_pretrained(str(source)), data.train.texts, cfg.train.max_length)
    t = cfg.train
    batches = [b for e in range(int(t.epochs)) for b in epoch_batches(
        lengths, t.batch_size, mode=t.batching, pool_batches=t.pool_batches, seed=t.seed, epoch=e, labels=data.train.labels)]
    def width(n: int) -> int:
        return batch_width(n, t.max_length, int(job.get("pad_multiple", PAD_MULTIPLE)))

    pieces = [[b[i] for i in piece] for b in batches  # as the loop's PieceCollate cuts them (train.pieces)
              for piece in length_pieces([lengths[i] for i in b], t.pieces, width=width, step=PIECE_STEP)]
    padded = padded_tokens(lengths, pieces, width=width)
    cost = metrics["cost"]
    seconds = cost["train_seconds"] - cost.get("train_dev_seconds", 0.0)  # training alone, as for every contender
    return {"contender": "harness", "examples_per_second": len(data.train) * int(t.epochs) / seconds,
            "train_seconds": seconds, "train_call_seconds": cost["train_seconds"],
            "train_dev_seconds": cost.get("train_dev_seconds"), "eval_seconds": cost["eval_seconds"],
            "accuracy": metrics["metrics"]["accuracy"], "macro_f1": metrics["metrics"]["macro_f1"],
            "steps": cost["steps"], "passes": len(pieces), "train_examples": len(data.train), "test_examples": len(data.test),
            "lengths": lengths, "real_tokens": sum(lengths) * int(t.epochs), "padded_tokens": padded,
            "trainable_parameters": method.get("trainable_parameters"), "torch_threads": torch.get_num_threads(),
            "model": _loaded_facts(cfg)}


def _loaded_facts(cfg: Any) -> dict[str, int]:
    """N, layers and width of the bare backbone the head method trains (loaded again: the run has ended)."""
    from harness.models.backbones import load_backbone

    return _model_facts(load_backbone(cfg.model, for_lm=False).model)


def _library_setup(job: dict[str, Any]) -> tuple[Any, Any, Any, Any]:
    """Config, data (the very splits the harness run sees), tokenizer and a fresh classifier, the library's way."""
    import torch
    from transformers import AutoModelForSequenceClassification, AutoTokenizer
    from transformers.utils import logging as hf_logging

    from harness.data.task import load_task
    from harness.models.backbones import resolve_source

    hf_logging.set_verbosity_error()  # the "newly initialized weights" notice, once per job
    if job.get("threads"):
        torch.set_num_threads(int(job["threads"]))  # the same thread count as the harness run, when one is forced
    cfg = build_config(job, Path(tempfile.gettempdir()))
    data = load_task(cfg.task, seed=cfg.train.seed)
    source, _ = resolve_source(cfg.model.checkpoint)
    tokenizer = AutoTokenizer.from_pretrained(str(source))
    torch.manual_seed(cfg.train.seed)  # the head's initial weights follow the seed
    model = AutoModelForSequenceClassification.from_pretrained(str(source), num_labels=len(data.label_names))
    if tokenizer.pad_token is None:  # the documented fix for decoders without a pad token
        tokenizer.pad_token = tokenizer.eos_token
    model.config.pad_token_id = tokenizer.pad_token_id
    return cfg, data, tokenizer, model


def run_trainer(job: dict[str, Any]) -> dict[str, Any]:
    """The documented Trainer recipe (fp32 defaults, or bf16 + length groups); throughput over trainer.train()."""
    import numpy as np
    import torch
    from datasets import Dataset
    from sklearn.metrics import accuracy_score, f1_score
    from transformers import DataCollatorWithPadding, Trainer, TrainingArguments

    cfg, data, tokenizer, model = _library_setup(job)

    def dataset(split: Any) -> Any:
        raw = Dataset.from_dict({"text": list(split.texts), "label": list(split.labels)})
        return raw.map(lambda b: tokenizer(b["text"], truncation=True, max_length=cfg.train.max_length),
                       batched=True, remove_columns=["text"])

    train_set, test_set = dataset(data.train), dataset(data.test)
    collator = DataCollatorWithPadding(tokenizer)
    shapes: list[tuple[int, int]] = []

    def counting_collator(features: list[dict[str, Any]]) -> Any:
        batch = collator(features)  # unchanged; the shape is only recorded, for the padding count
        shapes.append(tuple(batch["input_ids"].shape))  # type: ignore[arg-type]
        return batch

    best: dict[str, Any] = {"bf16": True, "train_sampling_strategy": "group_by_length", "save_strategy": "no"}
    with tempfile.TemporaryDirectory(prefix="bench-ref-") as out:
        args = TrainingArguments(output_dir=out, use_cpu=True, num_train_epochs=cfg.train.epochs,
                                 per_device_train_batch_size=cfg.train.batch_size,
                                 learning_rate=cfg.train.learning_rate, seed=cfg.train.seed, disable_tqdm=True,
                                 **(best if job["kind"] == "trainer_bf16" else {}))
        trainer = Trainer(model=model, args=args, train_dataset=train_set, processing_class=tokenizer,
                          data_collator=counting_collator)
        started = time.perf_counter()
        trainer.train()
        seconds = time.perf_counter() - started
        train_shapes = list(shapes)
        predicted = np.asarray(trainer.predict(test_set).predictions).argmax(-1)
    lengths = [len(x) for x in train_set["input_ids"]]
    seen = len(data.train) * cfg.train.epochs
    return {"contender": job["kind"], "examples_per_second": seen / seconds, "train_seconds": seconds,
            "accuracy": float(accuracy_score(data.test.labels, predicted)),
            "macro_f1": float(f1_score(data.test.labels, predicted, average="macro")),
            "steps": len(train_shapes), "train_examples": len(data.train), "test_examples": len(data.test),
            "lengths": lengths, "real_tokens": sum(lengths) * int(cfg.train.epochs),
            "padded_tokens": sum(b * s for b, s in train_shapes), "optimizer": str(args.optim),
            "torch_threads": torch.get_num_threads(), "model": _model_facts(model.base_model)}


def run_plain_loop(job: dict[str, Any]) -> dict[str, Any]:
    """The careful hand-written loop of bench.plain, in job["precision"]."""
    import torch

    from bench.plain import run_plain

    cfg, data, tokenizer, model = _library_setup(job)
    result = run_plain(job, cfg, data, tokenizer, model)
    return {"contender": job["kind"], **result, "train_examples": len(data.train), "test_examples": len(data.test),
            "torch_threads": torch.get_num_threads(), "model": _model_facts(model.base_model)}


def _run_ablation(job: dict[str, Any]) -> dict[str, Any]:
    from bench.ablate import run_ablations

    return run_ablations(job)


def _run_scoring(job: dict[str, Any]) -> dict[str, Any]:
    from bench.scoring import run_scoring

    return run_scoring(job)


def _run_memory(job: dict[str, Any]) -> dict[str, Any]:
    from bench.memory import run_memory

    return run_memory(job)


JOBS = {"harness": run_harness, "trainer_fp32": run_trainer, "trainer_bf16": run_trainer,
        "plain_fp32": run_plain_loop, "plain_bf16": run_plain_loop, "ablation": _run_ablation,
        "scoring": _run_scoring, "memory": _run_memory}
CONTENDERS = ("harness", "trainer_fp32", "trainer_bf16", "plain_fp32", "plain_bf16")


def main(argv: list[str]) -> int:
    """Run the job described in argv[0] (JSON) and write its result, with peak memory, to argv[1]."""
    import warnings

    from harness.train.memory import peak_rss_mb

    os.environ["HF_HUB_OFFLINE"] = "1"  # no model hub at run time
    warnings.filterwarnings("ignore")  # library notices would only clutter the job log
    job = json.loads(Path(argv[0]).read_text(encoding="utf-8"))
    result = JOBS[job["kind"]](job)
    result["peak_rss_mb"] = peak_rss_mb()  # this process's own peak (VmHWM on Linux; see the module docstring)
    Path(argv[1]).write_text(json.dumps(result), encoding="utf-8")
    return 0


if __name__ == "__main__":
    raise SystemExit(main(sys.argv[1:]))
