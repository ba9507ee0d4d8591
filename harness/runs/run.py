"""One run, end to end: data, backbone, method, training, test scoring, and the run folder.

`execute_run` writes `<output>/<task>/<run-id>/`: config.yaml, environment.json, data.json,
log.jsonl, checkpoints/, predictions.jsonl, metrics.json, method.json, model/ and status.json,
every file atomically. A finished run is never silently redone: `resume=True` skips it (and
continues an unfinished one from its last checkpoint), `overwrite=True` (alias `force`, CLI
`--force`) deletes it and runs again; without either it is an error. An unfinished run without a
checkpoint starts over. Ctrl-C during training saves a checkpoint, marks the run `interrupted`
and raises `harness.train.checkpoints.Interrupted` (exit_code 130, as the shell reports a SIGINT).

Everything a user can get wrong (the data files, the checkpoint, label words, templates) is read
and checked before the run folder is touched: a bad input leaves an existing run folder exactly as
it was (a new folder only records the error in status.json). A resumed run must see the same data
as the interrupted one. Launched as several processes (see harness.train.processes), only the main
process writes. One process at a time: the run is claimed with an OS-level lock before the first
write (harness.runs.claim). (`harness.runs.predict` applies a finished run's model to new rows.)
"""

from __future__ import annotations

import json
import logging
import shutil
import time
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

from harness.config import Config, config_folder, config_to_dict, dump_config, key_location
from harness.data.audit import audit_data, token_counter
from harness.data.task import Split, TaskData, load_task
from harness.data.token_cache import cache_key, cached_encode, tokenizer_fingerprint
from harness.errors import HarnessError, SettingError
from harness.files import (
    atomic_folder,
    atomic_write_json,
    atomic_write_text,
    read_json,
    remove_stale_temporaries,
)
from harness.methods.batches import count_parameters
from harness.methods.registry import Encoded, Method, build_method, method_modules
from harness.metrics.scores import compute_metrics
from harness.models.backbones import position_limit
from harness.report.run_report import write_run_report
from harness.runs.claim import claim_launched
from harness.runs.folders import environment_info, read_status, run_folder, write_status
from harness.runs.serving import check_int8, measure_serving, try_int8
from harness.runs.twin import adopt_training, dev_twin, twin_cost
from harness.train.checkpoints import Interrupted
from harness.train.loop import set_threads, train
from harness.train.memory import peak_rss_mb, reset_peak_rss
from harness.train.precision import cpu_has_bf16, drop_autocast, uses_bf16
from harness.train.processes import is_main_process, predict_sharded, process_state, wait_for_everyone

__all__ = ["encode_split", "execute_run", "peak_rss_mb"]

logger = logging.getLogger(__name__)



def encode_split(method: Method, split: Split, cfg: Config) -> tuple[list[Encoded], bool]:
    """Tokenise a split through the on-disk token cache; returns (items, cache hit)."""
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
    """A setting found wrong after loading, located in the config file ("'key' in FILE line N: ...")."""
    if not isinstance(exc, SettingError) or exc.where is not None or not Path(cfg.source).is_file():
        return exc  # data errors name their file and line already
    return exc.located(key_location(cfg, exc.key))


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
    base = config_folder(cfg)
    try:
        data = load_task(cfg.task, seed=cfg.train.seed, base=base)
        if resume_from is not None:
            _check_same_data(resume_from, data)
        method = build_method(cfg.method.kind, cfg=cfg, data=data)
        if cfg.eval.int8:
            check_int8(method, cfg)
        tokenizer = getattr(method, "tokenizer", None)
        backbone = getattr(method, "backbone", None)
        audit = audit_data(data, max_length=cfg.train.max_length,
                           count_tokens=token_counter(tokenizer) if tokenizer is not None else None,
                           positions=position_limit(backbone) if backbone is not None else None)
        # a tuning trial (eval.score_on: dev) never encodes, let alone scores, the test split
        encoded = [encode_split(method, s, cfg)[0] if s.name != "test" or cfg.eval.score_on == "test" else []
                   for s in data.splits()]
    except HarnessError as exc:
        raise _in_config(cfg, exc) from None
    return data, method, audit, encoded


def _save_model(method: Method, target: Path) -> None:
    """`method.save` into a temporary folder beside `target`, then one rename: model/ appears whole or not at all."""
    with atomic_folder(target) as tmp:
        tmp.rmdir()  # `save` creates the folder itself
        method.save(tmp)


def _predictions(split: Split, probs: Any, label_names: Sequence[str], *, texts: bool) -> str:
    """predictions.jsonl: one row per test example; `texts=False` leaves the raw text out (eval.store_texts)."""
    lines = []
    for row_id, text, gold, p in zip(split.ids, split.texts, split.labels, probs, strict=True):
        row: dict[str, Any] = {"id": row_id}
        if texts:
            row["text"] = list(text) if isinstance(text, tuple) else text
        row.update({"gold": label_names[gold], "predicted": label_names[int(p.argmax())],
                    "probs": {n: float(v) for n, v in zip(label_names, p, strict=True)}})
        lines.append(json.dumps(row, ensure_ascii=False))
    return "\n".join(lines) + "\n"


def execute_run(cfg: Config, *, resume: bool = False, overwrite: bool = False, force: bool = False,
                log: Callable[[str], Any] = logger.info, on_step: Callable[[int], None] | None = None,
                shown_findings: set[str] | None = None, prepare: Callable[[Method], None] | None = None,
                threads: int | None = None, reuse_training: bool = False) -> Path:
    """Run `cfg` (one config, one seed) and return its folder; see the module docstring for the rules.

    `force` is `overwrite` under the command line's name (--force). `on_step(step)` runs after every
    optimiser step (tests use it to send SIGINT). `shown_findings`, when given, holds the data-audit
    findings already logged (a sweep passes one set to all its runs, so each finding is shown once;
    every run's data.json and report still carry all of them); the run adds its own. `prepare(method)`
    runs once the method is built, before training (the benchmark's ablations set attributes through it).
    `threads` is the torch thread count when the config leaves `train.threads` unset (a cluster task
    passes the CPUs it was given). The run is claimed (harness.runs.claim) before anything is written
    and held to the end: a run another process holds raises `RunBusy`. `reuse_training` lets a new run
    scored on test take over the training of its finished tuning trial (harness.runs.twin).
    """
    process_state()  # joins launched processes before anything else
    folder = run_folder(cfg)
    with claim_launched(folder):
        return _execute_claimed(cfg, folder, resume=resume, overwrite=overwrite or force, log=log,
                                on_step=on_step, shown_findings=shown_findings, threads=threads, prepare=prepare,
                                reuse_training=reuse_training)


def _execute_claimed(cfg: Config, folder: Path, *, resume: bool, overwrite: bool, log: Callable[[str], Any],
                     on_step: Callable[[int], None] | None, shown_findings: set[str] | None,
                     threads: int | None, prepare: Callable[[Method], None] | None, reuse_training: bool) -> Path:
    processes = process_state().num_processes
    main = is_main_process()
    state = _folder_state(folder)
    if state == "finished" and not overwrite:
        if resume:
            log(f"already finished: {folder}")
            return folder
        raise HarnessError(f"run {folder} already finished; use --force to run it again "
                           "(or --resume to skip finished runs)")
    resume = resume and not overwrite and (folder / "checkpoints" / "last.pt").exists()
    twin = dev_twin(cfg) if reuse_training and state is None else None
    reset_peak_rss()  # this run's own peak, not the largest of a sweep so far
    try:
        threads = set_threads(cfg.train.threads or threads)
        data, method, audit, (train_items, dev_items, test_items) = _load_inputs(cfg, folder if resume else twin)
        if prepare is not None:
            prepare(method)
    except Exception as exc:
        if main and state is None:  # a new run says why it never started; an earlier attempt is left as it was
            folder.mkdir(parents=True, exist_ok=True)
            write_status(folder, "failed", error=str(exc) if isinstance(exc, HarnessError) else
                         f"{type(exc).__name__}: {exc}")
        raise
    if main:
        _start_folder(folder, resume)
        if twin is not None:
            adopt_training(twin, folder)
            log(f"training taken over from tuning trial {twin.name} (same settings and seed; scoring test)")
        write_status(folder, "running", resumed=resume, **({"training_from": twin.name} if twin else {}))
    wait_for_everyone()  # the folder exists before anyone trains
    try:
        if main:
            atomic_write_text(folder / "config.yaml", dump_config(cfg))
            atomic_write_json(folder / "environment.json",
                              {**environment_info(), "torch_threads": threads, "processes": processes,
                               "bf16": uses_bf16(cfg.train), "cpu_bf16": cpu_has_bf16()})
            atomic_write_json(folder / "data.json", {**data.fingerprint(), "audit": audit})
            for finding in audit["findings"]:
                if shown_findings is None or finding not in shown_findings:
                    logger.warning("data: %s", finding)
                if shown_findings is not None:
                    shown_findings.add(finding)
        result = None
        if method.trains:
            result = train(method, train_items, dev_items, data.label_names, cfg, folder,
                           resume=resume or twin is not None, on_step=on_step, threads=threads)
            for module in {id(m): m for m in method_modules(method).values()}.values():
                drop_autocast(module)  # scored, served and exported as the float32 model it is saved as
        scored, items = (data.dev, dev_items) if cfg.eval.score_on == "dev" else (data.test, test_items)
        started = time.perf_counter()
        probs = predict_sharded(lambda items: method.predict_proba(items, cfg.eval.batch_size), items)
        eval_seconds = time.perf_counter() - started
        if main:
            metrics = compute_metrics(list(scored.labels), probs, data.label_names, positive=cfg.eval.positive,
                                      bootstrap=cfg.eval.bootstrap, ci=cfg.eval.ci, seed=cfg.train.seed)
            metrics["scored_on"] = cfg.eval.score_on
            metrics["cost"] = {**_cost(method, result, eval_seconds), "processes": processes,
                               **(twin_cost(twin) if twin is not None else {})}
            if result is not None:
                metrics["dev"] = {"best_step": result.best_step, cfg.eval.primary: result.best_value,
                                  "metrics": result.best_metrics, "stopped_early": result.stopped_early}
            atomic_write_text(folder / "predictions.jsonl", _predictions(scored, probs, data.label_names,
                                                                         texts=cfg.eval.store_texts))
            _save_model(method, folder / "model")
            if cfg.eval.score_on == "test":  # a tuning trial only chooses settings: nobody serves it
                metrics["cost"]["serving"] = measure_serving(method, test_items, batch_size=cfg.eval.batch_size,
                                                             eval_seconds=eval_seconds, model_dir=folder / "model")
                if cfg.eval.int8:
                    metrics["int8"] = try_int8(method, test_items, probs, cfg, data.test.labels, data.label_names)
            atomic_write_json(folder / "metrics.json", metrics)
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
            write_run_report(folder)
        except Exception as exc:  # the run's results stand; a broken figure must not fail it
            logger.warning("run %s finished but its report could not be written: %s", folder, exc)
        _summary(log, folder, cfg, metrics, data)
    wait_for_everyone()  # no process reports done before the folder is complete
    return folder


def _cost(method: Method, result: Any, eval_seconds: float) -> dict[str, Any]:
    trainable, total = count_parameters(method.model)
    return {
        "train_seconds": result.train_seconds if result else 0.0,
        "eval_seconds": eval_seconds,
        "train_examples_per_second": result.examples_per_second if result else None,
        "train_dev_seconds": result.dev_seconds if result else 0.0,  # of train_seconds: dev scoring, checkpoints
        "peak_rss_mb": peak_rss_mb(),
        "trainable_parameters": trainable if method.trains else 0,
        "total_parameters": total,
        "steps": result.steps if result else 0,
    }


def _summary(log: Callable[[str], Any], folder: Path, cfg: Config, metrics: dict[str, Any], data: TaskData) -> None:
    primary = metrics["metrics"].get(cfg.eval.primary)
    interval = metrics.get("intervals", {}).get(cfg.eval.primary)
    ci = f" [{interval[0]:.3f}, {interval[1]:.3f}]" if interval and None not in interval else ""
    value = f"{primary:.4f}" if isinstance(primary, float) else str(primary)
    cost = metrics["cost"]
    rows = len(data.dev if cfg.eval.score_on == "dev" else data.test)
    log(f"{cfg.method.kind} on {cfg.task.name}: {cfg.eval.score_on} {cfg.eval.primary} {value}{ci} over {rows} rows; "
        f"{cost['steps']} steps, {cost['train_seconds']:.1f}s training")
    log(f"run folder: {folder}")
