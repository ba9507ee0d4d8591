"""One run, end to end: data, backbone, method, training, test scoring, and the run folder.

`execute_run` writes `<output>/<task>/<run-id>/`: config.yaml, environment.json, data.json,
log.jsonl, checkpoints/, predictions.jsonl, metrics.json, method.json, model/ and status.json,
every file atomically. A finished run is never silently redone: `resume=True` skips it (and
continues an unfinished one from its last checkpoint), `overwrite=True` (alias `force`, CLI
`--force`) deletes it and runs again; without either it is an error. An unfinished run without a
checkpoint starts over. Ctrl-C during training saves a checkpoint, marks the run `interrupted`
and raises `harness.checkpoints.Interrupted` (exit_code 130, as the shell reports a SIGINT). `predict` applies an exported model to
new rows.
"""

from __future__ import annotations

import csv
import io
import json
import logging
import shutil
import sys
import time
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import yaml

from harness.audit import audit_data, token_counter
from harness.config import Config, config_to_dict, dump_config
from harness.data import Split, TaskData, load_task, read_rows
from harness.errors import HarnessError
from harness.methods import Encoded, Method, build_method, load_builtin_methods
from harness.runs import (
    atomic_write_json,
    atomic_write_text,
    environment_info,
    read_status,
    run_folder,
    write_status,
)

__all__ = ["encode_split", "execute_run", "load_exported", "peak_rss_mb", "predict"]

logger = logging.getLogger(__name__)


def peak_rss_mb() -> float:
    """Peak resident memory of this process in MiB (getrusage; psutil's current RSS where that is missing)."""
    try:
        import resource

        peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
        return peak / (1024 * 1024) if sys.platform == "darwin" else peak / 1024  # bytes on macOS, KiB on Linux
    except ImportError:  # Windows
        import psutil

        return psutil.Process().memory_info().rss / (1024 * 1024)


def encode_split(method: Method, split: Split, cfg: Config) -> tuple[list[Encoded], bool]:
    """Tokenise a split through the on-disk token cache; returns (items, cache hit)."""
    from harness.tokencache import cache_key, cached_encode, tokenizer_fingerprint

    tokenizer = getattr(method, "tokenizer", None)
    if tokenizer is None:  # a method without a tokenizer of its own: nothing to key the cache on
        return method.encode(split.texts, split.labels), False
    params_of = getattr(method, "cache_params", None)
    # Without the method's own list, every method setting is part of the key: safe, if less shared.
    params = params_of() if callable(params_of) else config_to_dict(cfg)["method"]
    max_length = int(getattr(method, "max_length", cfg.train.max_length))
    key = cache_key(tokenizer_fingerprint(tokenizer), split.content_hash(), max_length,
                    {"kind": cfg.method.kind, **params})
    return cached_encode(key, len(split), lambda: method.encode(split.texts, split.labels))


def _prepare_folder(folder: Path, resume: bool, overwrite: bool) -> tuple[bool, bool]:
    """(skip, resume) for this folder, after refusing or clearing a finished run as asked."""
    state = read_status(folder)["state"] if (folder / "status.json").exists() else None
    if state == "finished" and not overwrite:
        if resume:
            return True, False
        raise HarnessError(f"run {folder} already finished; use --force to run it again "
                           "(or --resume to skip finished runs)")
    can_resume = resume and not overwrite and (folder / "checkpoints" / "last.pt").exists()
    if folder.exists() and not can_resume:  # a fresh start: nothing of an earlier attempt may leak in
        if state is None and any(folder.iterdir()):
            raise HarnessError(f"{folder} exists, is not empty and is not a run folder; move it away")
        shutil.rmtree(folder)
    return False, can_resume


def _predictions(split: Split, probs: Any, label_names: Sequence[str]) -> str:
    lines = []
    for row_id, text, gold, p in zip(split.ids, split.texts, split.labels, probs, strict=True):
        lines.append(json.dumps({
            "id": row_id, "text": list(text) if isinstance(text, tuple) else text, "gold": label_names[gold],
            "predicted": label_names[int(p.argmax())], "probs": {n: float(v) for n, v in zip(label_names, p, strict=True)},
        }, ensure_ascii=False))
    return "\n".join(lines) + "\n"


def execute_run(cfg: Config, *, resume: bool = False, overwrite: bool = False, force: bool = False,
                log: Callable[[str], Any] = print, on_step: Callable[[int], None] | None = None) -> Path:
    """Run `cfg` (one config, one seed) and return its folder; see the module docstring for the rules.

    `force` is `overwrite` under the command line's name (--force). `on_step(step)` runs after every
    optimiser step (tests use it to send SIGINT).
    """
    from harness.checkpoints import Interrupted
    from harness.metrics import compute_metrics
    from harness.train import set_threads, train

    folder = run_folder(cfg)
    skip, resume = _prepare_folder(folder, resume, overwrite or force)
    if skip:
        log(f"already finished: {folder}")
        return folder
    folder.mkdir(parents=True, exist_ok=True)
    write_status(folder, "running", resumed=resume)
    try:
        threads = set_threads(cfg.train.threads)
        atomic_write_text(folder / "config.yaml", dump_config(cfg))
        atomic_write_json(folder / "environment.json", {**environment_info(), "torch_threads": threads})
        base = Path(cfg.source).parent if Path(cfg.source).is_file() else None
        data = load_task(cfg.task, seed=cfg.train.seed, base=base)
        method = build_method(cfg.method.kind, cfg=cfg, data=data)
        tokenizer = getattr(method, "tokenizer", None)
        audit = audit_data(data, max_length=cfg.train.max_length,
                           count_tokens=token_counter(tokenizer) if tokenizer is not None else None)
        atomic_write_json(folder / "data.json", {**data.fingerprint(), "audit": audit})
        for finding in audit["findings"]:
            logger.warning("data: %s", finding)
        (train_items, _), (dev_items, _), (test_items, _) = (encode_split(method, s, cfg) for s in data.splits())
        result = None
        if method.trains:
            result = train(method, train_items, dev_items, data.label_names, cfg, folder, resume=resume,
                           on_step=on_step)
        started = time.perf_counter()
        probs = method.predict_proba(test_items, cfg.eval.batch_size)
        eval_seconds = time.perf_counter() - started
        metrics = compute_metrics(list(data.test.labels), probs, data.label_names, positive=cfg.eval.positive,
                                  bootstrap=cfg.eval.bootstrap, ci=cfg.eval.ci, seed=cfg.train.seed)
        metrics["cost"] = _cost(method, result, eval_seconds)
        if result is not None:
            metrics["dev"] = {"best_step": result.best_step, cfg.eval.primary: result.best_value,
                              "metrics": result.best_metrics, "stopped_early": result.stopped_early}
        atomic_write_text(folder / "predictions.jsonl", _predictions(data.test, probs, data.label_names))
        atomic_write_json(folder / "metrics.json", metrics)
        method.save(folder / "model")
        atomic_write_json(folder / "method.json", method.describe())
    except Interrupted as exc:
        write_status(folder, "interrupted", message=str(exc))
        raise
    except BaseException as exc:
        write_status(folder, "failed", error=f"{type(exc).__name__}: {exc}")
        raise
    write_status(folder, "finished")
    try:
        from harness.report import write_run_report

        write_run_report(folder)
    except Exception as exc:  # the run's results stand; a broken figure must not fail it
        logger.warning("run %s finished but its report could not be written: %s", folder, exc)
    _summary(log, folder, cfg, metrics, data)
    return folder


def _cost(method: Method, result: Any, eval_seconds: float) -> dict[str, Any]:
    params = list(method.model.parameters())
    return {
        "train_seconds": result.train_seconds if result else 0.0,
        "eval_seconds": eval_seconds,
        "train_examples_per_second": result.examples_per_second if result else None,
        "peak_rss_mb": peak_rss_mb(),
        "trainable_parameters": sum(p.numel() for p in params if p.requires_grad) if method.trains else 0,
        "total_parameters": sum(p.numel() for p in params),
        "steps": result.steps if result else 0,
    }


def _summary(log: Callable[[str], Any], folder: Path, cfg: Config, metrics: dict[str, Any], data: TaskData) -> None:
    primary = metrics["metrics"].get(cfg.eval.primary)
    interval = metrics.get("intervals", {}).get(cfg.eval.primary)
    ci = f" [{interval[0]:.3f}, {interval[1]:.3f}]" if interval and None not in interval else ""
    value = f"{primary:.4f}" if isinstance(primary, float) else str(primary)
    cost = metrics["cost"]
    log(f"{cfg.method.kind} on {cfg.task.name}: test {cfg.eval.primary} {value}{ci} over {len(data.test)} rows; "
        f"{cost['steps']} steps, {cost['train_seconds']:.1f}s training")
    log(f"run folder: {folder}")


def load_exported(run_dir: Path | str) -> Any:
    """The exported model of a finished run, with `label_names` and `predict_proba(texts)`.

    `head` runs are read by harness.export.load_head_model; another method provides a
    `load_exported(folder)` on its registered class.
    """
    run_dir = Path(run_dir)
    from harness.runs import require_finished

    require_finished(run_dir, need=("method.json", "model"))
    kind = json.loads((run_dir / "method.json").read_text(encoding="utf-8")).get("kind")
    if kind == "head":
        from harness.export import load_head_model

        return load_head_model(run_dir / "model")
    loader = getattr(load_builtin_methods().get(str(kind)), "load_exported", None)
    if loader is None:
        raise HarnessError(f"{run_dir}: runs of method {kind!r} cannot be reloaded for prediction")
    return loader(run_dir / "model")


def predict(run_dir: Path | str, input_path: Path | str, output_path: Path | str) -> Path:
    """Label new rows: the input's columns plus `predicted` and `prob_<label>` for every label (CSV out)."""
    run_dir, input_path, output_path = Path(run_dir), Path(input_path), Path(output_path)
    exported = load_exported(run_dir)
    task = yaml.safe_load((run_dir / "config.yaml").read_text(encoding="utf-8"))["task"]
    columns = task["text"] if isinstance(task["text"], list) else [task["text"]]
    rows, lines = read_rows(input_path)
    if not rows:
        raise HarnessError(f"{input_path} has no data rows to label")
    texts: list[Any] = []
    for row, line in zip(rows, lines, strict=True):
        cells = []
        for col in columns:
            value = row.get(col)
            if value is None or not str(value).strip():
                raise HarnessError(f"{input_path} line {line}: no text in column {col!r} (the run's task.text)")
            cells.append(str(value))
        texts.append(tuple(cells) if len(cells) == 2 else cells[0])
    probs = exported.predict_proba(texts)
    names = list(exported.label_names)
    out = io.StringIO()
    fields = [*rows[0].keys(), "predicted", *(f"prob_{n}" for n in names)]
    writer = csv.DictWriter(out, fieldnames=list(dict.fromkeys(fields)), lineterminator="\n", extrasaction="ignore")
    writer.writeheader()
    for row, p in zip(rows, probs, strict=True):
        writer.writerow({**row, "predicted": names[int(p.argmax())], **{f"prob_{n}": f"{v:.6f}" for n, v in zip(names, p, strict=True)}})
    atomic_write_text(output_path, out.getvalue())
    return output_path
