"""Typed, frozen run configuration, built by `load_config` and nowhere else.

A config file is YAML with the sections `task`, `model`, `method`, `train`, `eval`, `sweep`
and `output`, whose fields are declared in `harness.schema`. This module reads the YAML
(keeping every key's line), checks types and values, applies `--set` overrides and writes the
resolved config back out.
"""

from __future__ import annotations

import dataclasses
import difflib
import json
import re
import types
import typing
from pathlib import Path
from typing import Any, Literal, Union, get_args, get_origin

import yaml

from harness.errors import HarnessError
from harness.schema import (
    Config,
    EvalConfig,
    LoraConfig,
    MethodConfig,
    ModelConfig,
    SweepConfig,
    TaskConfig,
    TrainConfig,
)
from harness.yamlio import collect_lines, read_yaml

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
    "field_docs",
    "get_dotted",
    "key_location",
    "load_config",
    "parse_override",
    "set_dotted",
]

_NAME_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,79}$")

# ---------------------------------------------------------------------------------------------
# Building typed objects


class _Where:
    """Formats 'key in file line N' for messages."""

    def __init__(self, source: str, lines: dict[str, int]) -> None:
        self.source = source
        self.lines = lines

    def __call__(self, key: str) -> str:
        line = self.lines.get(key)
        if line == 0:  # the value came from the command line, not from the file
            return f"'{key}' in --set (config {self.source})"
        return f"'{key}' in {self.source}" + (f" line {line}" if line else "")


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
    need(cfg.model.attention_dropout is None or 0.0 <= cfg.model.attention_dropout < 1.0, "model.attention_dropout",
         "in [0, 1) or null", cfg.model.attention_dropout)
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
    if m.kind != "head":
        from harness.templates import check_text_fields, parse_template

        for key, text, allowed in (("method.template", m.template, ("text", "text_a", "text_b", "demos")),
                                   ("method.demo_template", m.demo_template, ("text", "text_a", "text_b", "label"))):
            try:
                template = parse_template(text, key=key, allowed=allowed)
                if key == "method.template":
                    check_text_fields(template, is_pair=isinstance(t.text, tuple))
            except HarnessError as exc:
                raise HarnessError(f"{where(key)}: {str(exc).removeprefix(key + ': ')}") from None
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
            trial = set_dotted(base, key, _thaw(value), where("sweep.grid." + key))
            try:
                config_from_dict(trial, source=cfg.source, check_sweep=False)
            except HarnessError as exc:
                raise HarnessError(f"{where('sweep.grid.' + key)}: value {_thaw(value)!r} is invalid: {exc}") from None
    for i, arm in enumerate(cfg.sweep.arms):
        trial = base
        for key, value in arm.items():
            if key.startswith("sweep") or key == "output":
                raise HarnessError(f"{where('sweep.arms')}: arm {i + 1}: '{key}' cannot be set by an arm")
            if key != "method":
                try:
                    _check_override_key(key)
                except HarnessError as exc:
                    hint = str(exc).split("; ", 1)[1] if "; " in str(exc) else ""
                    raise HarnessError(f"{where('sweep.arms')}: arm {i + 1}: '{key}' is not a config key; {hint}") from None
            trial = set_dotted(trial, key, _thaw(value), where("sweep.arms"))
        try:
            config_from_dict(trial, source=cfg.source, check_sweep=False)
        except HarnessError as exc:
            raise HarnessError(f"{where('sweep.arms')}: arm {i + 1} is invalid: {exc}") from None
    for i, rule in enumerate(cfg.sweep.exclude):
        for key in rule:
            get_dotted(base, key, f"sweep.exclude[{i}] in {cfg.source}")


def _thaw(value: Any) -> Any:
    if isinstance(value, tuple):
        return [_thaw(v) for v in value]
    if isinstance(value, dict):
        return {k: _thaw(v) for k, v in value.items()}
    return value


def set_dotted(data: dict[str, Any], key: str, value: Any, where: str) -> dict[str, Any]:
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


def get_dotted(data: dict[str, Any], key: str, where: str) -> Any:
    node: Any = data
    for part in key.split("."):
        if not isinstance(node, dict) or part not in node:
            raise HarnessError(f"{where}: '{key}' is not a config key")
        node = node[part]
    return node


def key_location(cfg: Config, key: str) -> str:
    """"'key' in FILE line N" for a value found wrong after loading (a checkpoint that does not load...).

    The line is the key's line in the config file when the file holds the value the run uses;
    a value from --set or a sweep is said to be so, since no line of the file shows it.
    """
    path = Path(cfg.source)
    if not path.is_file():
        return f"'{key}'"
    try:
        data = read_yaml(path)
    except HarnessError:
        return f"'{key}' in {cfg.source}"
    lines: dict[str, int] = {}
    collect_lines(data, "", lines)
    missing = object()
    try:
        in_file = get_dotted(_fix_yaml_numbers(_thaw_located(data)), key, "")
    except HarnessError:
        in_file = missing
    used = get_dotted(config_to_dict(cfg), key, "") if key.split(".")[0] != "sweep" else missing
    if in_file is not missing and _thaw(in_file) == used and key in lines:
        return f"'{key}' in {cfg.source} line {lines[key]}"
    if in_file is missing and key not in lines:
        return f"'{key}' (its default) in {cfg.source}"
    return f"'{key}' (set by --set or the sweep) in {cfg.source}"


def config_from_dict(
    data: dict[str, Any], *, source: str = "<dict>", lines: dict[str, int] | None = None, check_sweep: bool = True
) -> Config:
    """Build and validate a Config from plain data (as read from YAML)."""
    if lines is None:
        lines = {}
        collect_lines(data, "", lines)
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
    data: dict[str, Any] = read_yaml(path)
    lines: dict[str, int] = {}
    collect_lines(data, "", lines)
    plain = _thaw_located(data)
    plain = _fix_yaml_numbers(plain)
    for text in overrides:
        key, value = parse_override(text)
        _check_override_key(key)
        plain = set_dotted(plain, key, value, f"--set {key}")
        lines = {k: v for k, v in lines.items() if k != key and not k.startswith(key + ".")}
        lines[key] = 0  # _Where says "in --set"
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
            default = json.dumps(_thaw(f.default))
        elif f.default_factory is not dataclasses.MISSING:
            default = json.dumps(_thaw(f.default_factory()))
        else:
            default = "required"
        rows.append((prefix + f.name, default, f.metadata.get("doc", "")))
    return rows


_set_dotted = set_dotted  # older name, kept for callers inside the package
