"""What serving a finished run's model costs, and the same for its int8 copy (`eval.int8`).

Measured by the runner (harness.runs.run) on the main process, after the test split is scored and the
model saved, at the run's torch thread count, through the method's own `predict_proba` (tokenising is
not included: the test rows are already encoded):
- throughput: test rows per second of the timed test scoring pass, at `eval.batch_size`;
- single-row latency: p50 and p95 over up to LATENCY_ROWS test rows spread evenly over the split,
  each scored alone after WARMUP_ROWS untimed ones; the measurement stops after LATENCY_BUDGET
  seconds, and `latency_rows` says how many rows it timed;
- size: bytes of the saved `model/` folder (weights, tokenizer and config as written).

The int8 copy (harness.models.int8) scores the test split once more: its primary metric and accuracy
beside the float model's, the share of rows where both predict the same label, its throughput,
latency and state_dict size. It is measured, not saved: see `INT8_NOTE`.
"""

from __future__ import annotations

import copy
import logging
import time
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import torch

from harness.config import Config
from harness.errors import SettingError
from harness.methods.registry import Encoded, Method, method_modules
from harness.metrics.scores import compute_metrics
from harness.models.int8 import int8_copy, linear_weights

__all__ = ["INT8_NOTE", "LATENCY_BUDGET", "LATENCY_ROWS", "WARMUP_ROWS", "check_int8", "folder_bytes",
           "int8_method", "measure_int8", "measure_serving", "single_row_latency", "try_int8"]

logger = logging.getLogger(__name__)

LATENCY_ROWS = 50  # enough rows for a p95 that is not simply the slowest row
WARMUP_ROWS = 3  # the first calls build kernels and grow the allocator's pools; not timed
LATENCY_BUDGET = 30.0  # seconds of single-row scoring at most, per model measured
INT8_NOTE = ("measured, not saved: torch stores dynamically quantised weights only in its pickle format "
             "(run folders hold safetensors); quantising the saved float model the same way (harness.models.int8) "
             "rebuilds it, as the int8 scales come from the weights alone")


def folder_bytes(folder: Path) -> int:
    """Total size of the files below `folder`."""
    return sum(p.stat().st_size for p in Path(folder).rglob("*") if p.is_file())


def single_row_latency(score: Callable[[Sequence[Encoded]], Any], items: Sequence[Encoded], *,
                       rows: int = LATENCY_ROWS, warmup: int = WARMUP_ROWS,
                       budget: float = LATENCY_BUDGET) -> dict[str, Any]:
    """p50 / p95 milliseconds of `score([row])`, one row at a time (see the module docstring)."""
    if not items:
        return {"latency_p50_ms": None, "latency_p95_ms": None, "latency_rows": 0, "latency_capped": False}
    picks = np.unique(np.linspace(0, len(items) - 1, min(rows, len(items))).round().astype(int))
    for i in picks[:warmup]:
        score([items[int(i)]])
    times: list[float] = []
    started = time.perf_counter()
    for i in picks:
        t0 = time.perf_counter()
        score([items[int(i)]])
        times.append((time.perf_counter() - t0) * 1000.0)
        if time.perf_counter() - started > budget:
            break
    p50, p95 = np.percentile(times, [50, 95])  # numpy's default linear interpolation
    return {"latency_p50_ms": float(p50), "latency_p95_ms": float(p95), "latency_rows": len(times),
            "latency_capped": len(times) < len(picks)}


def measure_serving(method: Method, items: Sequence[Encoded], *, batch_size: int, eval_seconds: float,
                    model_dir: Path | None = None) -> dict[str, Any]:
    """cost["serving"]: throughput of the timed test pass, single-row latency, the saved model's size."""
    return {
        "rows_per_second": len(items) / eval_seconds if eval_seconds > 0 and items else None,
        "batch_size": batch_size,
        **single_row_latency(lambda batch: method.predict_proba(batch, 1), items),
        "threads": torch.get_num_threads(),
        "model_bytes": folder_bytes(model_dir) if model_dir is not None else None,
    }


def check_int8(method: Method, cfg: Config) -> None:
    """Before anything is written: refuse `eval.int8` for a model dynamic quantisation would not change.

    (A torch build without a quantised engine is refused at config load, harness.config.checks.)
    """
    where = f"method {cfg.method.kind!r} on {cfg.model.checkpoint}"
    if linear_weights(method_modules(method))[0] == 0:
        raise SettingError("eval.int8", f"{where}: the model has no nn.Linear or Conv1D layer, so dynamic int8 "
                           "quantisation would change nothing; set eval.int8: false")


def int8_method(method: Method) -> tuple[Method, dict[str, Any]]:
    """A copy of `method` that scores with the int8 copy of its model (the method itself is untouched)."""
    copies, facts = int8_copy(method_modules(method))
    clone = copy.copy(method)  # shares tokenizer, labels and settings; its modules are replaced below
    vars(clone).update(copies)
    return clone, facts


def try_int8(method: Method, items: Sequence[Encoded], float_probs: np.ndarray, cfg: Config,
             labels: Sequence[int], label_names: Sequence[str]) -> dict[str, Any]:
    """`measure_int8`, or {"error": ...} (logged) when it fails: the run's own results stand either way."""
    try:
        return measure_int8(method, items, float_probs, cfg, labels, label_names)
    except Exception as exc:  # an extra measurement must not fail a trained run
        logger.warning("the int8 copy could not be measured (%s: %s); the run's own results stand",
                       type(exc).__name__, exc)
        return {"error": f"{type(exc).__name__}: {exc}", "saved": False}


def measure_int8(method: Method, items: Sequence[Encoded], float_probs: np.ndarray, cfg: Config,
                 labels: Sequence[int], label_names: Sequence[str]) -> dict[str, Any]:
    """metrics["int8"]: the int8 copy's scores against the float model's, its serving cost and size."""
    quantized, facts = int8_method(method)
    started = time.perf_counter()
    probs = quantized.predict_proba(items, cfg.eval.batch_size)
    seconds = time.perf_counter() - started
    primary = cfg.eval.primary
    kept = (primary, "accuracy")

    def scores(p: np.ndarray) -> dict[str, Any]:
        got = compute_metrics(list(labels), p, label_names, positive=cfg.eval.positive, bootstrap=0,
                              seed=cfg.train.seed)["metrics"]
        return {name: got.get(name) for name in kept}

    mine, theirs = scores(probs), scores(float_probs)
    delta = {name: None if mine[name] is None or theirs[name] is None else mine[name] - theirs[name] for name in kept}
    same = probs.argmax(axis=1) == np.asarray(float_probs).argmax(axis=1)
    return {
        **facts, "rows": len(items), "metrics": mine, "float_metrics": theirs, "delta": delta,
        "agreement": float(same.mean()) if len(items) else None,
        "serving": {"rows_per_second": len(items) / seconds if seconds > 0 and items else None,
                    "batch_size": cfg.eval.batch_size,
                    **single_row_latency(lambda batch: quantized.predict_proba(batch, 1), items),
                    "threads": torch.get_num_threads()},
        "saved": False, "note": INT8_NOTE,
    }
