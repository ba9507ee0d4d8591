"""The config schema: one frozen dataclass per section, every field with its default and a description.

The schema is the dataclasses themselves: a field added here is validated by `harness.config.load`,
overridable with `--set`, listed in the README's reference and saved with every run.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from typing import Any, Literal

__all__ = [
    "Config",
    "EvalConfig",
    "LoraConfig",
    "MethodConfig",
    "ModelConfig",
    "SweepConfig",
    "TaskConfig",
    "TrainConfig",
    "TuneConfig",
]


def _doc(text: str, default: Any = dataclasses.MISSING, **kw: Any) -> Any:
    """A dataclass field with a one-line description kept in its metadata."""
    if default is dataclasses.MISSING and "default_factory" not in kw:
        return field(metadata={"doc": text}, **kw)
    if "default_factory" in kw:
        return field(metadata={"doc": text}, **kw)
    return field(default=default, metadata={"doc": text}, **kw)


@dataclass(frozen=True)


class TaskConfig:
    """Where the labelled text is and how to read it."""

    name: str = _doc("task name, used in run folder paths; letters, digits, '_', '-', '.'")
    train: str = _doc("training split: a CSV/TSV/JSONL/Parquet path or 'asset:NAME'")
    dev: str | None = _doc("dev split path; null = carve it from train (dev_fraction)", None)
    test: str | None = _doc("test split path; null = carve it from train (test_fraction)", None)
    text: str | tuple[str, str] = _doc("text column, or a list of two columns for pairs", "text")
    label: str = _doc("label column", "label")
    id: str | None = _doc("row id column; null = '<split>-<row number>'", None)
    labels: tuple[str, ...] | None = _doc("declared label set in order; null = sorted labels of train", None)
    format: Literal["auto", "csv", "tsv", "jsonl", "parquet"] = _doc("file format; auto = by extension", "auto")
    dev_fraction: float = _doc("share of train carved out as dev when dev is null (0-0.5)", 0.15)
    test_fraction: float = _doc("share of train carved out as test when test is null (0-0.5)", 0.15)
    split_seed: int = _doc("seed of the stratified carve-out split", 0)
    dedupe: bool = _doc("drop repeated texts (keep first) before splitting", False)
    train_size: int | None = _doc("seeded stratified subsample of train (rows); null = all", None)
    max_rows: int | None = _doc("cap every split to its first N rows after splitting (smoke runs)", None)


@dataclass(frozen=True)


class ModelConfig:
    """Which pretrained checkpoint to start from."""

    checkpoint: str = _doc("local folder, .gguf file, 'asset:NAME', 'toy:KIND' or a hub id when online")
    family: Literal["auto", "encoder", "decoder", "encoder-decoder"] = _doc(
        "architecture family; auto = detect from the checkpoint's config", "auto"
    )
    layers: int | None = _doc("keep only the first N transformer layers (fast tests); null = all", None)
    trust_remote_code: bool = _doc("run model code shipped with the checkpoint (off: unsafe)", False)
    allow_pickle: bool = _doc("accept pickle-based weight files (.bin/.pt); off: safetensors/GGUF only", False)
    attention_dropout: float | None = _doc(
        "dropout on the attention weights while training; null = the checkpoint's own (0 saves memory, see README)", None
    )


@dataclass(frozen=True)


class LoraConfig:
    """Low-rank adapters (through peft); the classification head stays fully trainable."""

    r: int = _doc("adapter rank (>= 1)", 8)
    alpha: float = _doc("scaling numerator; the update is scaled by alpha / r", 16.0)
    dropout: float = _doc("dropout on the adapter input (0-1)", 0.05)
    targets: tuple[str, ...] | None = _doc("module names to adapt; null = the attention projections", None)


@dataclass(frozen=True)


class MethodConfig:
    """How the checkpoint becomes a classifier: head, next_token or prompt."""

    kind: Literal["head", "next_token", "prompt"] = _doc("head | next_token | prompt", "head")
    pooling: Literal["auto", "first", "last", "mean"] = _doc(
        "head only: auto = first for encoders, last for decoders", "auto"
    )
    use_pooler: bool = _doc("head + first pooling: pass through the checkpoint's trained pooler layer", False)
    dropout: float | None = _doc("head dropout (0-1); null = the checkpoint's hidden dropout, else 0.1", None)
    class_weights: str | dict[str, float] | None = _doc("null | 'balanced' | {label: weight}", None)
    label_smoothing: float = _doc("cross-entropy label smoothing (0-1)", 0.0)
    freeze: Literal["none", "backbone", "embeddings"] = _doc(
        "none | backbone (linear probe) | embeddings", "none"
    )
    lora: LoraConfig | None = _doc("low-rank adapters instead of full fine-tuning; null = off", None)
    template: str = _doc(
        "next_token/prompt: prompt with {text} (a pair task: also its two columns by name, e.g. {question}) and optional {demos}",
        "{demos}Message: {text}\nCategory:",
    )
    demo_template: str = _doc(
        "prompt: how each demonstration is written into {demos}", "Message: {text}\nCategory: {label}\n\n"
    )
    label_words: dict[str, str | tuple[str, ...]] | None = _doc(
        "next_token/prompt: label -> word or list of words; null = the label names", None
    )
    multi_word: Literal["first", "average"] = _doc(
        "several words for one label: score the first only, or average their probabilities", "average"
    )
    space_prefix: Literal["auto", "always", "never"] = _doc(
        "prefix label words with a space; auto = when the tokenizer is byte-level BPE", "auto"
    )
    chat: Literal["auto", "always", "never"] = _doc(
        "next_token/prompt on a decoder: wrap the prompt in the tokenizer's chat template (one user message, then "
        "the assistant turn start); auto = when the tokenizer has one", "never"
    )
    score: Literal["sum", "mean"] = _doc("label score: summed or per-token mean log-probability", "sum")
    end_token: bool = _doc("next_token: append the end-of-text token after the label words", False)
    shots: int = _doc("prompt: number of demonstrations drawn from train (0 = zero-shot)", 0)
    shots_per_class: bool = _doc("prompt: draw `shots` demonstrations from every class", False)
    calibrate: bool = _doc("prompt: contextual calibration with a content-free input (Zhao et al. 2021)", False)


@dataclass(frozen=True)


class TrainConfig:
    """Optimisation and batching; ignored by `prompt`."""

    epochs: float = _doc("passes over train (> 0; fractions allowed)", 3.0)
    max_steps: int | None = _doc("stop after this many optimiser steps; null = epochs decide", None)
    batch_size: int = _doc("examples per forward pass (>= 1)", 16)
    grad_accum: int = _doc("forward passes per optimiser step (>= 1)", 1)
    learning_rate: float = _doc("peak learning rate of the backbone (> 0)", 5.0e-5)
    head_learning_rate: float | None = _doc("learning rate of the fresh head; null = learning_rate", None)
    weight_decay: float = _doc("AdamW weight decay; biases and norm weights are exempt", 0.01)
    schedule: Literal["linear", "cosine", "constant"] = _doc("learning-rate decay after warmup", "linear")
    warmup: float = _doc("warmup length as a share of all steps (0-1)", 0.06)
    max_grad_norm: float | None = _doc("gradient clipping norm; null = off", 1.0)
    max_length: int = _doc("tokens per example after truncation (>= 8)", 128)
    seed: int = _doc("seed of head init, data order, dropout and demonstrations", 13)
    batching: Literal["random", "grouped"] = _doc(
        "random order, or length-grouped batches within shuffled pools (less padding)", "grouped"
    )
    pool_batches: int = _doc("grouped batching: batches per shuffled pool sorted by length", 16)
    pieces: int = _doc(
        "a batch runs its forward and backward passes in up to this many pieces of similar length, "
        "summed into one gradient (less padding, same step); 1 = whole batches", 4
    )
    eval_every: int = _doc("evaluate on dev every N optimiser steps; 0 = every epoch", 0)
    patience: int | None = _doc("early stopping after N evaluations without improvement; null = off", None)
    log_every: int = _doc("write a log.jsonl line every N optimiser steps", 10)
    threads: int | None = _doc("torch intra-op threads; null = physical cores of this machine", None)
    bf16: bool | Literal["auto"] = _doc(
        "bf16 autocast: true, false, or auto = on where the CPU has bf16 instructions (AVX-512 BF16 or AMX) "
        "and no GPU is used, off elsewhere", "auto"
    )
    checkpoint_every: int = _doc("save a resumable checkpoint every N steps; 0 = at each evaluation", 0)


@dataclass(frozen=True)


class EvalConfig:
    """How runs are scored and compared."""

    primary: str = _doc("metric for early stopping, sorting and paired tests", "macro_f1")
    positive: str | None = _doc("binary tasks: the positive label; null = the second label", None)
    batch_size: int = _doc("examples per scoring pass (>= 1)", 64)
    bootstrap: int = _doc("bootstrap resamples for intervals (0 = none)", 1000)
    ci: float = _doc("confidence level of intervals (0.5-0.999)", 0.95)
    worst: int = _doc("misclassified examples listed in the report", 10)
    extra: tuple[str, ...] = _doc("local folders of extra metrics (evaluate library), loaded by path", ())
    store_texts: bool = _doc("copy test texts into predictions.jsonl and the report; false = ids and labels "
                             "only (personal data)", True)
    score_on: Literal["test", "dev"] = _doc(
        "split scored at the end of the run: test, or dev (tuning trials: the test split is never scored)", "test"
    )
    int8: bool = _doc("also score test with a dynamically quantised int8 copy (linear layers) and record its "
                      "scores, agreement, speed and size beside the float model's; measured, not saved", False)


@dataclass(frozen=True)


class TuneConfig:
    """Tuning trials before the seeds: the same number of seeded draws from a search space for every trained arm."""

    trials: int = _doc("trials per trained arm (>= 1), each trained on train and scored on dev with one seed", 4)
    space: dict[str, dict[str, Any]] = _doc(
        "dotted key -> {low: A, high: B, scale: log | linear} or {values: [..]}; an arm's own `tune:` entry "
        "replaces it (or `tune: false` leaves the arm untuned)", default_factory=dict)
    seed: int | None = _doc("seed of the draws and of every trial's run; null = the first train.seed of the grid",
                            None)


@dataclass(frozen=True)


class SweepConfig:
    """A grid of settings expanded into one run per combination."""

    grid: dict[str, tuple[Any, ...]] = _doc("dotted key -> list of values (a 'method' key takes blocks)", default_factory=dict)
    arms: tuple[dict[str, Any], ...] = _doc(
        "settings that travel together (each a map of dotted key -> value), crossed with the grid; () = one arm",
        (),
    )
    exclude: tuple[dict[str, Any], ...] = _doc("combinations to skip: each a map of dotted key -> value", ())
    tune: TuneConfig | None = _doc("tuning trials on dev before the grid's seeds run on test; null = none", None)
    budget: str | None = _doc("wall-time budget of the whole sweep on this machine, e.g. 15m or 1h30m; null = none",
                              None)
    over_budget: Literal["trim", "refuse"] = _doc(
        "a forecast over the budget: trim trials then seeds (see README), or refuse before running", "trim")


@dataclass(frozen=True)


class Config:
    """One run's complete settings."""

    task: TaskConfig = _doc("the labelled data")
    model: ModelConfig = _doc("the pretrained checkpoint")
    method: MethodConfig = _doc("how the checkpoint becomes a classifier", default_factory=MethodConfig)
    train: TrainConfig = _doc("optimisation", default_factory=TrainConfig)
    eval: EvalConfig = _doc("scoring", default_factory=EvalConfig)
    sweep: SweepConfig = _doc("grid of variants (tiltyard sweep)", default_factory=SweepConfig)
    output: str = _doc("folder that holds runs/<task>/<run-id>/", "runs")
    source: str = field(default="<dict>", compare=False, metadata={"doc": "internal: where it was read"})
