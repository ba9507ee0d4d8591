"""Range and consistency checks that types alone cannot express, run on every config at load time."""

from __future__ import annotations

import difflib
import re
from collections.abc import Callable
from pathlib import Path
from typing import Any

from harness.config.schema import Config
from harness.errors import HarnessError, SettingError

__all__ = ["check_values"]

_NAME_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,79}$")


def check_values(cfg: Config, where: Callable[[str], str]) -> None:
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
    need(tr.pieces >= 1, "train.pieces", "at least 1", tr.pieces)
    need(tr.eval_every >= 0, "train.eval_every", "0 or more", tr.eval_every)
    need(tr.patience is None or tr.patience >= 1, "train.patience", "at least 1 or null", tr.patience)
    need(tr.log_every >= 1, "train.log_every", "at least 1", tr.log_every)
    need(tr.threads is None or tr.threads >= 1, "train.threads", "at least 1 or null", tr.threads)
    need(tr.checkpoint_every >= 0, "train.checkpoint_every", "0 or more", tr.checkpoint_every)
    need(ev.batch_size >= 1, "eval.batch_size", "at least 1", ev.batch_size)
    need(ev.bootstrap >= 0, "eval.bootstrap", "0 or more", ev.bootstrap)
    need(0.5 <= ev.ci <= 0.999, "eval.ci", "between 0.5 and 0.999", ev.ci)
    need(ev.worst >= 0, "eval.worst", "0 or more", ev.worst)
    if ev.int8 and not _quantized_engines():
        raise SettingError("eval.int8", "this torch build has no quantised CPU engine (torch.backends.quantized."
                           "supported_engines lists none), so no int8 copy can run here; set eval.int8: false",
                           where=where("eval.int8"))
    _check_output(cfg.output, where)
    from harness.metrics.scores import METRICS  # late: metrics imports nothing from here

    if ev.primary not in METRICS:
        close = difflib.get_close_matches(ev.primary, list(METRICS), n=1)
        hint = f"did you mean '{close[0]}'? " if close else ""
        raise HarnessError(f"{where('eval.primary')}: unknown metric {ev.primary!r}; {hint}choose one of "
                           + ", ".join(METRICS))
    if m.kind != "head":
        from harness.methods.templates import check_text_fields, parse_template, text_fields

        try:
            fields = text_fields(t.text)
        except SettingError as exc:
            raise exc.located(where("task.text")) from None
        for key, text, allowed in (("method.template", m.template, (*fields, "demos")),
                                   ("method.demo_template", m.demo_template, (*fields, "label"))):
            try:
                template = parse_template(text, key=key, allowed=allowed)
                if key == "method.template":
                    check_text_fields(template, fields)
            except SettingError as exc:
                raise exc.located(where(key)) from None
    if m.kind == "prompt" and m.lora is not None:
        raise HarnessError(f"{where('method.lora')}: method 'prompt' trains nothing; remove method.lora")


def _quantized_engines() -> list[str]:
    """The quantised CPU kernel libraries of this torch build (as harness.models.int8.quantized_engines)."""
    import torch  # late: config loading stays free of torch unless a config asks for int8

    return [e for e in torch.backends.quantized.supported_engines if e != "none"]


def _check_output(output: str, where: Callable[[str], str]) -> None:
    """`output` must be a folder or a path one can become: no part of it may be an existing file."""
    path = Path(output).expanduser()
    for part in (path, *path.parents):
        if part.exists():
            if not part.is_dir():
                what = "is a file" if part == path else f"runs through {part}, which is a file"
                raise HarnessError(f"{where('output')}: {output!r} {what}; give a folder for the run folders "
                                   "(it is created when missing)")
            return
