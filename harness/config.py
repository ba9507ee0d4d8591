"""Typed, frozen run configuration, built by `load_config` and nowhere else.

A config file is YAML with the sections `task`, `model`, `method`, `train`, `eval`, `sweep`
and `output`. Every field below carries its default and allowed values; the schema is the
dataclasses themselves, so a field added here is validated, overridable with `--set` and
saved with every run without further wiring.
"""

from __future__ import annotations

import dataclasses
import difflib
import re
import types
import typing
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal, Union, get_args, get_origin

import yaml

from harness.errors import HarnessError

__all__ = [
    "Config",
    "EvalConfig",
    "LoraConfig",
    "MethodConfig",
    "ModelConfig",
    "SweepConfig",
    "TaskConfig",
    "TrainConfig",
    "config_from_dict",
    "config_to_dict",
    "dump_config",
    "load_config",
    "parse_override",
]

_NAME_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,79}$")


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
        "next_token/prompt: prompt with {text} (or {text_a}/{text_b}) and optional {demos}",
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
    eval_every: int = _doc("evaluate on dev every N optimiser steps; 0 = every epoch", 0)
    patience: int | None = _doc("early stopping after N evaluations without improvement; null = off", None)
    log_every: int = _doc("write a log.jsonl line every N optimiser steps", 10)
    threads: int | None = _doc("torch intra-op threads; null = physical cores of this machine", None)
    bf16: bool = _doc("bf16 autocast on the CPU (measure first: not faster on every CPU)", False)
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


@dataclass(frozen=True)
class SweepConfig:
    """A grid of settings expanded into one run per combination."""

    grid: dict[str, tuple[Any, ...]] = _doc("dotted key -> list of values (a 'method' key takes blocks)", default_factory=dict)
    exclude: tuple[dict[str, Any], ...] = _doc("combinations to skip: each a map of dotted key -> value", ())


@dataclass(frozen=True)
class Config:
    """One run's complete settings."""

    task: TaskConfig = _doc("the labelled data")
    model: ModelConfig = _doc("the pretrained checkpoint")
    method: MethodConfig = _doc("how the checkpoint becomes a classifier", default_factory=MethodConfig)
    train: TrainConfig = _doc("optimisation", default_factory=TrainConfig)
    eval: EvalConfig = _doc("scoring", default_factory=EvalConfig)
    sweep: SweepConfig = _doc("grid of variants (harness sweep)", default_factory=SweepConfig)
    output: str = _doc("folder that holds runs/<task>/<run-id>/", "runs")
    source: str = field(default="<dict>", compare=False, metadata={"doc": "internal: where it was read"})


# ---------------------------------------------------------------------------------------------
# YAML with line numbers


class _LineLoader(yaml.SafeLoader):
    """A safe loader that remembers the line of every mapping key."""


def _construct_mapping(loader: _LineLoader, node: yaml.MappingNode) -> dict[str, Any]:
    out: dict[str, Any] = {}
    lines: dict[str, int] = {}
    for key_node, value_node in node.value:
        key = loader.construct_object(key_node, deep=True)
        if not isinstance(key, str):
            raise HarnessError(f"key {key!r} on line {key_node.start_mark.line + 1} is not a string")
        if key in out:
            raise HarnessError(f"key '{key}' appears twice (line {key_node.start_mark.line + 1})")
        out[key] = loader.construct_object(value_node, deep=True)
        lines[key] = key_node.start_mark.line + 1
    return _Located(out, lines)


class _Located(dict):  # type: ignore[type-arg]
    """A dict that knows the source line of each key."""

    def __init__(self, data: dict[str, Any], lines: dict[str, int]) -> None:
        super().__init__(data)
        self.lines = lines


_LineLoader.add_constructor(yaml.resolver.BaseResolver.DEFAULT_MAPPING_TAG, _construct_mapping)  # type: ignore[arg-type]


def _read_yaml(path: Path) -> dict[str, Any]:
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise HarnessError(f"config file {path} does not exist") from None
    except UnicodeDecodeError as exc:
        raise HarnessError(f"config file {path} is not UTF-8 text ({exc.reason} at byte {exc.start})") from None
    try:
        data = yaml.load(text, Loader=_LineLoader)  # noqa: S506 - a SafeLoader subclass
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark
        where = f" line {mark.line + 1}" if mark is not None else ""
        raise HarnessError(f"{path}{where}: not valid YAML: {exc.problem}") from None
    except HarnessError as exc:
        raise HarnessError(f"{path}: {exc}") from None
    if data is None:
        raise HarnessError(f"config file {path} is empty; it needs at least 'task' and 'model' sections")
    if not isinstance(data, dict):
        raise HarnessError(f"config file {path} must be a mapping of sections, got {type(data).__name__}")
    return data


# ---------------------------------------------------------------------------------------------
# Building typed objects


class _Where:
    """Formats 'key in file line N' for messages."""

    def __init__(self, source: str, lines: dict[str, int]) -> None:
        self.source = source
        self.lines = lines

    def __call__(self, key: str) -> str:
        line = self.lines.get(key)
        return f"'{key}' in {self.source}" + (f" line {line}" if line else "")


def _collect_lines(data: Any, prefix: str, out: dict[str, int]) -> None:
    if isinstance(data, _Located):
        for key, value in data.items():
            dotted = f"{prefix}{key}"
            out[dotted] = data.lines[key]
            _collect_lines(value, dotted + ".", out)


def _type_name(tp: Any) -> str:
    origin = get_origin(tp)
    if origin is Literal:
        return " | ".join(str(a) for a in get_args(tp))
    if origin in (Union, types.UnionType):
        return " or ".join(_type_name(a) for a in get_args(tp))
    if origin is tuple:
        return "a list"
    if origin is dict:
        return "a mapping"
    if tp is type(None):
        return "null"
    if dataclasses.is_dataclass(tp):
        return "a mapping"
    return getattr(tp, "__name__", str(tp))


def _coerce(value: Any, tp: Any, key: str, where: _Where) -> Any:
    """Check `value` against the annotation `tp`, converting lists to tuples."""
    origin = get_origin(tp)
    bad = HarnessError(
        f"{where(key)}: expected {_type_name(tp)}, got {value!r}"
        if not isinstance(value, (dict, list))
        else f"{where(key)}: expected {_type_name(tp)}, got a {'mapping' if isinstance(value, dict) else 'list'}"
    )
    if tp is Any:
        return _freeze(value)
    if origin in (Union, types.UnionType):
        args = get_args(tp)
        if value is None:
            if type(None) in args:
                return None
            raise bad
        for arg in args:
            if arg is type(None):
                continue
            try:
                return _coerce(value, arg, key, where)
            except HarnessError:
                continue
        raise bad
    if origin is Literal:
        if value not in get_args(tp):
            allowed = ", ".join(repr(a) for a in get_args(tp))
            raise HarnessError(f"{where(key)}: {value!r} is not allowed; choose one of {allowed}")
        return value
    if origin is tuple:
        args = get_args(tp)
        if not isinstance(value, list):
            raise bad
        if len(args) == 2 and args[1] is Ellipsis:
            return tuple(_coerce(v, args[0], f"{key}[{i}]", where) for i, v in enumerate(value))
        if len(value) != len(args):
            raise HarnessError(f"{where(key)}: expected a list of {len(args)} items, got {len(value)}")
        return tuple(_coerce(v, a, f"{key}[{i}]", where) for i, (v, a) in enumerate(zip(value, args, strict=True)))
    if origin is dict:
        k_tp, v_tp = get_args(tp)
        if not isinstance(value, dict):
            raise bad
        return {str(_coerce(k, k_tp, key, where)): _coerce(v, v_tp, f"{key}.{k}", where) for k, v in value.items()}
    if dataclasses.is_dataclass(tp):
        if not isinstance(value, dict):
            raise bad
        return _build(tp, value, key + ".", where)
    if tp is bool:
        if not isinstance(value, bool):
            raise bad
        return value
    if tp is int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise bad
        return value
    if tp is float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise bad
        return float(value)
    if tp is str:
        if not isinstance(value, str):
            raise bad
        return value
    raise AssertionError(f"unhandled annotation {tp!r} for {key}")  # internal: a schema bug


def _freeze(value: Any) -> Any:
    if isinstance(value, list):
        return tuple(_freeze(v) for v in value)
    if isinstance(value, dict):
        return {k: _freeze(v) for k, v in value.items()}
    return value


def _build(cls: Any, data: dict[str, Any], prefix: str, where: _Where) -> Any:
    hints = typing.get_type_hints(cls)
    names = [f.name for f in dataclasses.fields(cls) if f.name != "source"]
    for key in data:
        if key not in names:
            close = difflib.get_close_matches(key, names, n=1, cutoff=0.6)
            hint = f"; did you mean '{prefix}{close[0]}'?" if close else f"; known keys: {', '.join(names)}"
            raise HarnessError(f"unknown key {where(prefix + key)}{hint}")
    kwargs: dict[str, Any] = {}
    for f in dataclasses.fields(cls):
        if f.name == "source":
            continue
        if f.name in data:
            kwargs[f.name] = _coerce(data[f.name], hints[f.name], prefix + f.name, where)
        elif f.default is dataclasses.MISSING and f.default_factory is dataclasses.MISSING:
            section = prefix.rstrip(".") or "the top level"
            raise HarnessError(f"missing required key '{prefix}{f.name}' in {where.source} (section {section})")
    return cls(**kwargs)


def _check_values(cfg: Config, where: _Where) -> None:
    """Range checks that types alone cannot express."""

    def need(ok: bool, key: str, rule: str, value: Any) -> None:
        if not ok:
            raise HarnessError(f"{where(key)}: must be {rule}, got {value!r}")

    t, tr, ev, m = cfg.task, cfg.train, cfg.eval, cfg.method
    need(bool(_NAME_RE.match(t.name)) and ".." not in t.name, "task.name",
         "letters, digits, '_', '-' or '.' (no path separators, no '..')", t.name)
    need(0.0 <= t.dev_fraction <= 0.5, "task.dev_fraction", "between 0 and 0.5", t.dev_fraction)
    need(0.0 <= t.test_fraction <= 0.5, "task.test_fraction", "between 0 and 0.5", t.test_fraction)
    need(t.train_size is None or t.train_size >= 2, "task.train_size", "at least 2 or null", t.train_size)
    need(t.max_rows is None or t.max_rows >= 1, "task.max_rows", "at least 1 or null", t.max_rows)
    if t.labels is not None:
        need(len(t.labels) >= 2, "task.labels", "a list of at least 2 labels", list(t.labels))
        need(len(set(t.labels)) == len(t.labels), "task.labels", "a list without repeats", list(t.labels))
    if isinstance(t.text, tuple):
        need(t.text[0] != t.text[1], "task.text", "two different columns", list(t.text))
    need(cfg.model.layers is None or cfg.model.layers >= 1, "model.layers", "at least 1 or null", cfg.model.layers)
    need(m.dropout is None or 0.0 <= m.dropout < 1.0, "method.dropout", "in [0, 1) or null", m.dropout)
    need(0.0 <= m.label_smoothing < 1.0, "method.label_smoothing", "in [0, 1)", m.label_smoothing)
    if isinstance(m.class_weights, str):
        need(m.class_weights == "balanced", "method.class_weights", "'balanced', a mapping or null", m.class_weights)
    elif isinstance(m.class_weights, dict):
        for label, w in m.class_weights.items():
            need(w > 0, f"method.class_weights.{label}", "a positive number", w)
    if m.lora is not None:
        need(m.lora.r >= 1, "method.lora.r", "at least 1", m.lora.r)
        need(0.0 <= m.lora.dropout < 1.0, "method.lora.dropout", "in [0, 1)", m.lora.dropout)
    need(m.shots >= 0, "method.shots", "0 or more", m.shots)
    need(tr.epochs > 0, "train.epochs", "greater than 0", tr.epochs)
    need(tr.max_steps is None or tr.max_steps >= 1, "train.max_steps", "at least 1 or null", tr.max_steps)
    need(tr.batch_size >= 1, "train.batch_size", "at least 1", tr.batch_size)
    need(tr.grad_accum >= 1, "train.grad_accum", "at least 1", tr.grad_accum)
    need(tr.learning_rate > 0, "train.learning_rate", "greater than 0", tr.learning_rate)
    need(tr.head_learning_rate is None or tr.head_learning_rate > 0, "train.head_learning_rate",
         "greater than 0 or null", tr.head_learning_rate)
    need(tr.weight_decay >= 0, "train.weight_decay", "0 or more", tr.weight_decay)
    need(0.0 <= tr.warmup < 1.0, "train.warmup", "a share of steps in [0, 1)", tr.warmup)
    need(tr.max_grad_norm is None or tr.max_grad_norm > 0, "train.max_grad_norm", "greater than 0 or null",
         tr.max_grad_norm)
    need(tr.max_length >= 8, "train.max_length", "at least 8", tr.max_length)
    need(tr.pool_batches >= 1, "train.pool_batches", "at least 1", tr.pool_batches)
    need(tr.eval_every >= 0, "train.eval_every", "0 or more", tr.eval_every)
    need(tr.patience is None or tr.patience >= 1, "train.patience", "at least 1 or null", tr.patience)
    need(tr.log_every >= 1, "train.log_every", "at least 1", tr.log_every)
    need(tr.threads is None or tr.threads >= 1, "train.threads", "at least 1 or null", tr.threads)
    need(tr.checkpoint_every >= 0, "train.checkpoint_every", "0 or more", tr.checkpoint_every)
    need(ev.batch_size >= 1, "eval.batch_size", "at least 1", ev.batch_size)
    need(ev.bootstrap >= 0, "eval.bootstrap", "0 or more", ev.bootstrap)
    need(0.5 <= ev.ci <= 0.999, "eval.ci", "between 0.5 and 0.999", ev.ci)
    need(ev.worst >= 0, "eval.worst", "0 or more", ev.worst)
    from harness.metrics import METRICS  # late: metrics imports nothing from here

    if ev.primary not in METRICS:
        close = difflib.get_close_matches(ev.primary, list(METRICS), n=1)
        hint = f"did you mean '{close[0]}'? " if close else ""
        raise HarnessError(f"{where('eval.primary')}: unknown metric {ev.primary!r}; {hint}choose one of "
                           + ", ".join(METRICS))
    if m.kind == "prompt" and m.lora is not None:
        raise HarnessError(f"{where('method.lora')}: method 'prompt' trains nothing; remove method.lora")
    _check_sweep(cfg, where)


def _check_sweep(cfg: Config, where: _Where) -> None:
    base = config_to_dict(cfg)
    for key, values in cfg.sweep.grid.items():
        if not isinstance(values, tuple) or not values:
            raise HarnessError(f"{where('sweep.grid.' + key)}: must be a non-empty list of values")
        if key.startswith("sweep") or key == "output":
            raise HarnessError(f"{where('sweep.grid.' + key)}: '{key}' cannot be swept")
        if key != "method":
            try:
                _check_override_key(key)
            except HarnessError as exc:
                hint = str(exc).split("; ", 1)[1] if "; " in str(exc) else ""
                raise HarnessError(f"{where('sweep.grid.' + key)}: '{key}' is not a config key; {hint}") from None
        for value in values:
            trial = _set_dotted(base, key, _thaw(value), where("sweep.grid." + key))
            try:
                config_from_dict(trial, source=cfg.source, check_sweep=False)
            except HarnessError as exc:
                raise HarnessError(f"{where('sweep.grid.' + key)}: value {_thaw(value)!r} is invalid: {exc}") from None
    for i, rule in enumerate(cfg.sweep.exclude):
        for key in rule:
            _get_dotted(base, key, f"sweep.exclude[{i}] in {cfg.source}")


def _thaw(value: Any) -> Any:
    if isinstance(value, tuple):
        return [_thaw(v) for v in value]
    if isinstance(value, dict):
        return {k: _thaw(v) for k, v in value.items()}
    return value


def _set_dotted(data: dict[str, Any], key: str, value: Any, where: str) -> dict[str, Any]:
    """A copy of `data` with the dotted `key` set; the key must name a known section."""
    import copy

    out = copy.deepcopy(data)
    parts = key.split(".")
    node = out
    for i, part in enumerate(parts[:-1]):
        child = node.get(part)
        if child is None and part in ("lora",):
            child = node[part] = {}
        if not isinstance(child, dict):
            raise HarnessError(f"{where}: '{'.'.join(parts[: i + 1])}' is not a config section")
        node = child
    node[parts[-1]] = value
    return out


def _get_dotted(data: dict[str, Any], key: str, where: str) -> Any:
    node: Any = data
    for part in key.split("."):
        if not isinstance(node, dict) or part not in node:
            raise HarnessError(f"{where}: '{key}' is not a config key")
        node = node[part]
    return node


def config_from_dict(
    data: dict[str, Any], *, source: str = "<dict>", lines: dict[str, int] | None = None, check_sweep: bool = True
) -> Config:
    """Build and validate a Config from plain data (as read from YAML)."""
    if lines is None:
        lines = {}
        _collect_lines(data, "", lines)
    where = _Where(source, lines)
    cfg = _build(Config, dict(data), "", where)
    cfg = dataclasses.replace(cfg, source=source)
    if check_sweep:
        _check_values(cfg, where)
    else:
        saved = cfg.sweep
        _check_values(dataclasses.replace(cfg, sweep=SweepConfig()), where)
        cfg = dataclasses.replace(cfg, sweep=saved)
    return cfg


def parse_override(text: str) -> tuple[str, Any]:
    """Split `a.b=value`; the value is read as YAML (so 3e-5, true, [a, b] work)."""
    if "=" not in text:
        raise HarnessError(f"--set {text!r}: expected KEY=VALUE with a dotted key, e.g. train.learning_rate=3e-5")
    key, raw = text.split("=", 1)
    key = key.strip()
    if not key or not all(part.isidentifier() for part in key.split(".")):
        raise HarnessError(f"--set {text!r}: '{key}' is not a dotted key like train.epochs")
    try:
        value = yaml.safe_load(raw) if raw.strip() else ""
    except yaml.YAMLError:
        value = raw
    # YAML 1.1 reads 3e-5 (no dot) as a string; accept it as the number it obviously is.
    if isinstance(value, str):
        try:
            value = float(value) if re.fullmatch(r"[-+]?\d+(\.\d*)?[eE][-+]?\d+", value) else value
        except ValueError:
            pass
    return key, value


def load_config(path: str | Path, overrides: typing.Sequence[str] = ()) -> Config:
    """Read a YAML config, apply `--set key=value` overrides and validate everything."""
    path = Path(path)
    data: dict[str, Any] = _read_yaml(path)
    lines: dict[str, int] = {}
    _collect_lines(data, "", lines)
    plain = _thaw_located(data)
    plain = _fix_yaml_numbers(plain)
    for text in overrides:
        key, value = parse_override(text)
        _check_override_key(key)
        plain = _set_dotted(plain, key, value, f"--set {key}")
        lines[key] = 0
    lines = {k: v for k, v in lines.items() if v}
    return config_from_dict(plain, source=str(path), lines=lines)


def _check_override_key(key: str) -> None:
    """Unknown override keys get the same suggestion as unknown file keys."""
    cls: Any = Config
    parts = key.split(".")
    for i, part in enumerate(parts):
        if not dataclasses.is_dataclass(cls):
            if i == len(parts) - 1 or cls is dict:
                return
            break
        names = [f.name for f in dataclasses.fields(cls) if f.name != "source"]
        if part not in names:
            prefix = ".".join(parts[:i])
            close = difflib.get_close_matches(part, names, n=1, cutoff=0.6)
            dotted = f"{prefix}.{close[0]}" if prefix and close else (close[0] if close else "")
            hint = f"; did you mean '{dotted}'?" if close else f"; known keys: {', '.join(names)}"
            raise HarnessError(f"unknown key '{key}' in --set{hint}")
        hint_tp = typing.get_type_hints(cls)[part]
        args = [a for a in get_args(hint_tp) if dataclasses.is_dataclass(a)]
        cls = args[0] if args else hint_tp
        if get_origin(cls) is dict:
            return


def _thaw_located(data: Any) -> Any:
    if isinstance(data, dict):
        return {k: _thaw_located(v) for k, v in data.items()}
    if isinstance(data, list):
        return [_thaw_located(v) for v in data]
    return data


def _fix_yaml_numbers(data: Any) -> Any:
    if isinstance(data, dict):
        return {k: _fix_yaml_numbers(v) for k, v in data.items()}
    if isinstance(data, list):
        return [_fix_yaml_numbers(v) for v in data]
    if isinstance(data, str) and re.fullmatch(r"[-+]?\d+(\.\d*)?[eE][-+]?\d+", data):
        return float(data)
    return data


def config_to_dict(cfg: Config) -> dict[str, Any]:
    """Plain data (lists, not tuples) for YAML/JSON, the inverse of `config_from_dict`."""
    out = _thaw(dataclasses.asdict(cfg))
    out.pop("source", None)
    return out


def dump_config(cfg: Config) -> str:
    """The resolved config as YAML text, as saved in every run folder."""
    return yaml.safe_dump(config_to_dict(cfg), sort_keys=False, allow_unicode=True)


def field_docs(cls: Any = Config, prefix: str = "") -> list[tuple[str, str, str]]:
    """(dotted key, default, description) for every field: the reference in the README."""
    rows: list[tuple[str, str, str]] = []
    hints = typing.get_type_hints(cls)
    for f in dataclasses.fields(cls):
        if f.name == "source":
            continue
        sub = [a for a in (get_args(hints[f.name]) or (hints[f.name],)) if dataclasses.is_dataclass(a)]
        if sub:
            rows.extend(field_docs(sub[0], prefix + f.name + "."))
            continue
        if f.default is not dataclasses.MISSING:
            default = repr(_thaw(f.default))
        elif f.default_factory is not dataclasses.MISSING:
            default = repr(_thaw(f.default_factory()))
        else:
            default = "required"
        rows.append((prefix + f.name, default, f.metadata.get("doc", "")))
    return rows
