"""One run, end to end: data, backbone, method, training, test scoring, and the run folder.

`execute_run` writes `<output>/<task>/<run-id>/`: config.yaml, environment.json, data.json,
log.jsonl, checkpoints/, predictions.jsonl, metrics.json, method.json, model/ and status.json,
every file atomically. A finished run is never silently redone: `resume=True` skips it (and
continues an unfinished one from its last checkpoint), `overwrite=True` (alias `force`, CLI
`--force`) deletes it and runs again; without either it is an error. An unfinished run without a
checkpoint starts over. Ctrl-C during training saves a checkpoint, marks the run `interrupted`
and raises `harness.checkpoints.Interrupted` (exit_code 130, as the shell reports a SIGINT).

Everything a user can get wrong (the data files, the checkpoint, label words, templates) is read
and checked before the run folder is touched: a bad input leaves an existing run folder exactly as
it was (a new folder only records the error in status.json). A resumed run must see the same data
as the interrupted one. Launched as several processes (see harness.distributed), only the main
process writes. `predict` applies an exported model to new rows.
"""

from __future__ import annotations

import csv
import io
import json
import logging
import os
import re
import shutil
import tempfile
import time
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import yaml

from harness.audit import audit_data, token_counter
from harness.config import Config, config_to_dict, dump_config, key_location
from harness.data import Split, TaskData, load_task, read_rows
from harness.errors import HarnessError
from harness.memory import peak_rss_mb, reset_peak_rss
from harness.methods import Encoded, Method, build_method, load_builtin_methods
from harness.runs import (
    atomic_write_json,
    atomic_write_text,
    environment_info,
    read_json,
    read_status,
    remove_stale_temporaries,
    run_folder,
    write_status,
)

__all__ = ["encode_split", "execute_run", "findings_once", "load_exported", "peak_rss_mb", "predict"]

logger = logging.getLogger(__name__)


_KEY_FIRST = re.compile(r"^((?:task|model|method|train|eval)(?:\.[A-Za-z_][A-Za-z0-9_]*)+):?\s*")


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


def _folder_state(folder: Path) -> str | None:
    """The state of an earlier attempt in `folder` (None: no run there yet); reads, never writes."""
    if (folder / "status.json").exists():
        return str(read_status(folder)["state"])
    if folder.exists() and any(folder.iterdir()):
        raise HarnessError(f"{folder} exists, is not empty and is not a run folder; move it away")
    return None


def _start_folder(folder: Path, resume: bool) -> None:
    """Clear an earlier attempt for a fresh start (nothing of it may leak in), or tidy it for a resume."""
    if resume:
        remove_stale_temporaries(folder)  # what a killed writer left; readers never saw it
    elif folder.exists():
        shutil.rmtree(folder)
    folder.mkdir(parents=True, exist_ok=True)


def _in_config(cfg: Config, exc: HarnessError) -> HarnessError:
    """An input error that starts with a config key, located in the config file ("'key' in FILE line N: ...")."""
    message = str(exc)
    match = _KEY_FIRST.match(message)
    if match is None or not Path(cfg.source).is_file() or cfg.source in message:
        return exc  # data errors name their file and line already
    return HarnessError(f"{key_location(cfg, match.group(1))}: {message[match.end():]}")


def _check_same_data(folder: Path, data: TaskData) -> None:
    """A resumed run must train on the data the interrupted one trained on."""
    path = folder / "data.json"
    if not path.exists():
        return
    before = read_json(path)
    now = data.fingerprint()
    for name, digest in before.get("files", {}).items():
        if now["files"].get(name, digest) != digest:
            raise HarnessError(f"cannot resume {folder.name}: data file {name} changed since the run started "
                               f"(sha256 {digest[:12]} then, {now['files'][name][:12]} now); "
                               "run without --resume, or with --force, to start over")
    for split, info in before.get("splits", {}).items():
        if info.get("sha256") != now["splits"].get(split, {}).get("sha256"):
            raise HarnessError(f"cannot resume {folder.name}: the {split} split differs from the one the run "
                               "started on; run without --resume, or with --force, to start over")


def _load_inputs(cfg: Config, resume_from: Path | None) -> tuple[TaskData, Method, dict[str, Any], list[Any]]:
    """Data, method (checkpoint loaded), data audit and encoded splits: every check on user input."""
    base = Path(cfg.source).parent if Path(cfg.source).is_file() else None
    try:
        data = load_task(cfg.task, seed=cfg.train.seed, base=base)
        if resume_from is not None:
            _check_same_data(resume_from, data)
        method = build_method(cfg.method.kind, cfg=cfg, data=data)
        tokenizer = getattr(method, "tokenizer", None)
        audit = audit_data(data, max_length=cfg.train.max_length,
                           count_tokens=token_counter(tokenizer) if tokenizer is not None else None)
        encoded = [encode_split(method, s, cfg)[0] for s in data.splits()]
    except HarnessError as exc:
        raise _in_config(cfg, exc) from None
    return data, method, audit, encoded


def _save_model(method: Method, target: Path) -> None:
    """`method.save` into a temporary folder beside `target`, then one rename: model/ appears whole or not at all."""
    tmp = Path(tempfile.mkdtemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent))
    try:
        method.save(tmp / target.name)
        if target.exists():
            shutil.rmtree(target)
        os.replace(tmp / target.name, target)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


def _predictions(split: Split, probs: Any, label_names: Sequence[str]) -> str:
    lines = []
    for row_id, text, gold, p in zip(split.ids, split.texts, split.labels, probs, strict=True):
        lines.append(json.dumps({
            "id": row_id, "text": list(text) if isinstance(text, tuple) else text, "gold": label_names[gold],
            "predicted": label_names[int(p.argmax())], "probs": {n: float(v) for n, v in zip(label_names, p, strict=True)},
        }, ensure_ascii=False))
    return "\n".join(lines) + "\n"


# While a sweep runs, the data findings already logged (each is shown once per sweep, not once per run;
# every run's data.json and report still carry all of them).
_shown_findings: set[str] | None = None


@contextmanager
def findings_once() -> Iterator[None]:
    """Within this block, log each data-audit finding the first time only (harness.sweep runs under it)."""
    global _shown_findings
    before, _shown_findings = _shown_findings, set()
    try:
        yield
    finally:
        _shown_findings = before


def execute_run(cfg: Config, *, resume: bool = False, overwrite: bool = False, force: bool = False,
                log: Callable[[str], Any] = print, on_step: Callable[[int], None] | None = None) -> Path:
    """Run `cfg` (one config, one seed) and return its folder; see the module docstring for the rules.

    `force` is `overwrite` under the command line's name (--force). `on_step(step)` runs after every
    optimiser step (tests use it to send SIGINT).
    """
    from harness.checkpoints import Interrupted
    from harness.distributed import is_main_process, predict_sharded, process_state, wait_for_everyone
    from harness.metrics import compute_metrics
    from harness.train import set_threads, train

    processes = process_state().num_processes  # joins launched processes before anything else
    main = is_main_process()
    overwrite = overwrite or force
    folder = run_folder(cfg)
    state = _folder_state(folder)
    if state == "finished" and not overwrite:
        if resume:
            log(f"already finished: {folder}")
            return folder
        raise HarnessError(f"run {folder} already finished; use --force to run it again "
                           "(or --resume to skip finished runs)")
    resume = resume and not overwrite and (folder / "checkpoints" / "last.pt").exists()
    reset_peak_rss()  # this run's own peak, not the largest of a sweep so far
    try:
        threads = set_threads(cfg.train.threads)
        data, method, audit, (train_items, dev_items, test_items) = _load_inputs(cfg, folder if resume else None)
    except Exception as exc:
        if main and state is None:  # a new run says why it never started; an earlier attempt is left as it was
            folder.mkdir(parents=True, exist_ok=True)
            write_status(folder, "failed", error=str(exc) if isinstance(exc, HarnessError) else
                         f"{type(exc).__name__}: {exc}")
        raise
    if main:
        _start_folder(folder, resume)
        write_status(folder, "running", resumed=resume)
    wait_for_everyone()  # the folder exists before anyone trains
    try:
        if main:
            atomic_write_text(folder / "config.yaml", dump_config(cfg))
            atomic_write_json(folder / "environment.json",
                              {**environment_info(), "torch_threads": threads, "processes": processes})
            atomic_write_json(folder / "data.json", {**data.fingerprint(), "audit": audit})
            for finding in audit["findings"]:
                if _shown_findings is None or finding not in _shown_findings:
                    logger.warning("data: %s", finding)
                if _shown_findings is not None:
                    _shown_findings.add(finding)
        result = None
        if method.trains:
            result = train(method, train_items, dev_items, data.label_names, cfg, folder, resume=resume,
                           on_step=on_step)
        started = time.perf_counter()
        probs = predict_sharded(lambda items: method.predict_proba(items, cfg.eval.batch_size), test_items)
        eval_seconds = time.perf_counter() - started
        if main:
            metrics = compute_metrics(list(data.test.labels), probs, data.label_names, positive=cfg.eval.positive,
                                      bootstrap=cfg.eval.bootstrap, ci=cfg.eval.ci, seed=cfg.train.seed)
            metrics["cost"] = {**_cost(method, result, eval_seconds), "processes": processes}
            if result is not None:
                metrics["dev"] = {"best_step": result.best_step, cfg.eval.primary: result.best_value,
                                  "metrics": result.best_metrics, "stopped_early": result.stopped_early}
            atomic_write_text(folder / "predictions.jsonl", _predictions(data.test, probs, data.label_names))
            atomic_write_json(folder / "metrics.json", metrics)
            _save_model(method, folder / "model")
            atomic_write_json(folder / "method.json", method.describe())
    except Interrupted as exc:
        if main:
            write_status(folder, "interrupted", message=str(exc))
        raise
    except KeyboardInterrupt:  # Ctrl-C outside the training loop (loading, scoring): nothing half-done is kept
        if main:
            write_status(folder, "interrupted", message="stopped by Ctrl-C outside training; run it again "
                                                        "with --resume to continue from the last checkpoint")
        raise
    except BaseException as exc:
        if main:
            write_status(folder, "failed", error=f"{type(exc).__name__}: {exc}")
        raise
    if main:
        write_status(folder, "finished")
        try:
            from harness.report import write_run_report

            write_run_report(folder)
        except Exception as exc:  # the run's results stand; a broken figure must not fail it
            logger.warning("run %s finished but its report could not be written: %s", folder, exc)
        _summary(log, folder, cfg, metrics, data)
    wait_for_everyone()  # no process reports done before the folder is complete
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

    # the whole folder must be sound, not only the files read here: a damaged run is not one to trust
    require_finished(run_dir, need=("config.yaml", "metrics.json", "predictions.jsonl", "method.json", "model"))
    kind = read_json(run_dir / "method.json").get("kind")
    loader: Any
    if kind == "head":
        from harness.export import load_head_model as loader
    else:
        loader = getattr(load_builtin_methods().get(str(kind)), "load_exported", None)
    if loader is None:
        raise HarnessError(f"{run_dir}: runs of method {kind!r} cannot be reloaded for prediction")
    try:
        return loader(run_dir / "model")
    except (json.JSONDecodeError, KeyError, OSError, ValueError) as exc:  # a damaged or hand-edited export
        raise HarnessError(f"{run_dir / 'model'} cannot be reloaded ({type(exc).__name__}: "
                           f"{str(exc).splitlines()[0] if str(exc) else ''}); half-written or edited by hand?") from None


def _saved_task(path: Path) -> dict[str, Any]:
    """The task section of a run's saved config.yaml, with a message naming the file when it is damaged."""
    try:
        saved = yaml.safe_load(path.read_text(encoding="utf-8"))
    except yaml.YAMLError:
        raise HarnessError(f"{path} is not valid YAML: half-written or edited by hand?") from None
    task = saved.get("task") if isinstance(saved, dict) else None
    if not isinstance(task, dict) or "text" not in task:
        raise HarnessError(f"{path} has no task section with a 'text' key: half-written or edited by hand?")
    return task


def predict(run_dir: Path | str, input_path: Path | str, output_path: Path | str) -> Path:
    """Label new rows: the input's columns plus `predicted` and `prob_<label>` for every label (CSV out)."""
    run_dir, input_path, output_path = Path(run_dir), Path(input_path), Path(output_path)
    exported = load_exported(run_dir)
    task = _saved_task(run_dir / "config.yaml")
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
