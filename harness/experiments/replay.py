"""Exact replay: re-run a finished run from its saved config and check the outputs are identical.

"Identical" means byte-for-byte equal values: every metric in metrics.json (not the cost
block, which holds timings) and every prediction row (id, gold, predicted, per-label scores).
Differences in data files or package versions are warned about by name, since they are the
usual reason a replay drifts.
"""

from __future__ import annotations

import dataclasses
import json
import logging
from collections.abc import Callable
from pathlib import Path
from typing import Any

from harness.config import load_config
from harness.errors import HarnessError
from harness.files import atomic_write_json, read_json
from harness.runs import run as runner
from harness.runs.folders import require_finished, run_folder

__all__ = ["replay_verdict", "replay_run"]

logger = logging.getLogger(__name__)

_SHOWN = 5  # differing rows or metrics quoted in the verdict


def _leaves(data: Any, prefix: str = "") -> dict[str, str]:
    """Dotted key -> canonical JSON text of every leaf (NaN == NaN, 1 != 1.0000001)."""
    if isinstance(data, dict):
        out: dict[str, str] = {}
        for k, v in data.items():
            out.update(_leaves(v, f"{prefix}{k}."))
        return out
    return {prefix.rstrip("."): json.dumps(data, sort_keys=True)}


def _diff_maps(a: dict[str, Any], b: dict[str, Any]) -> list[str]:
    la, lb = _leaves(a), _leaves(b)
    return [k for k in sorted(set(la) | set(lb)) if la.get(k) != lb.get(k)]


def _read_predictions(path: Path) -> list[dict[str, Any]]:
    rows = []
    for n, line in enumerate(path.read_text(encoding="utf-8").splitlines(), start=1):
        if line.strip():
            try:
                rows.append(json.loads(line))
            except json.JSONDecodeError:
                raise HarnessError(f"{path} line {n}: not valid JSON; the file is damaged") from None
    return rows


def _data_warnings(orig: dict[str, Any], new: dict[str, Any]) -> list[str]:
    out = []
    old_files, new_files = orig.get("files", {}), new.get("files", {})
    for path, digest in old_files.items():
        if path not in new_files:
            out.append(f"data file {path} was read by the run but not by the replay")
        elif new_files[path] != digest:
            out.append(f"data file {path} changed since the run (sha256 {digest[:12]} -> {new_files[path][:12]})")
    out += [f"data file {path} was read by the replay but not by the run" for path in new_files if path not in old_files]
    for split, info in orig.get("splits", {}).items():
        now = new.get("splits", {}).get(split, {})
        if info.get("sha256") != now.get("sha256"):
            out.append(f"split {split}: content hash differs ({info.get('rows')} rows then, {now.get('rows')} now)")
    return out


def _environment_warnings(orig: dict[str, Any], new: dict[str, Any]) -> list[str]:
    out = []
    old_pk, new_pk = orig.get("packages", {}), new.get("packages", {})
    for name in sorted(set(old_pk) | set(new_pk)):
        if old_pk.get(name) != new_pk.get(name):
            out.append(f"package {name}: {old_pk.get(name)} at the run, {new_pk.get(name)} now")
    for key, why in (("python", ""), ("machine", ""), ("torch_threads", " (summation order, so floats, may differ)")):
        if orig.get(key) != new.get(key):
            out.append(f"{key}: {orig.get(key)} at the run, {new.get(key)} now{why}")
    return out


def _prediction_differences(a: list[dict[str, Any]], b: list[dict[str, Any]]) -> list[dict[str, Any]]:
    diffs = []
    for n, (ra, rb) in enumerate(zip(a, b, strict=False)):
        fields = sorted(k for k in set(ra) | set(rb) if json.dumps(ra.get(k)) != json.dumps(rb.get(k)))
        if fields:
            diffs.append({"row": n + 1, "id": ra.get("id"), "fields": fields})
    return diffs


def replay_run(run_dir: Path, out_dir: Path, *, log: Callable[[str], None] = logger.info) -> dict[str, Any]:
    """Re-run `run_dir` from its config.yaml into `out_dir`; compare data, environment, metrics, predictions."""
    run_dir = Path(run_dir).resolve()
    require_finished(run_dir, need=("metrics.json", "predictions.jsonl", "config.yaml", "data.json",
                                    "environment.json"))
    cfg = load_config(run_dir / "config.yaml")
    cfg = dataclasses.replace(cfg, output=str(Path(out_dir).resolve()))
    target = run_folder(cfg)
    if target == run_dir:
        raise HarnessError(f"replay output {out_dir} is the run's own output folder; pass a different --out")
    log(f"replaying {run_dir} into {target}")
    runner.execute_run(cfg, overwrite=True, log=log)
    warnings = _data_warnings(read_json(run_dir / "data.json"), read_json(target / "data.json"))
    warnings += _environment_warnings(read_json(run_dir / "environment.json"), read_json(target / "environment.json"))
    for w in warnings:
        log(f"warning: {w}")
    old_m, new_m = read_json(run_dir / "metrics.json"), read_json(target / "metrics.json")
    metric_diffs = _diff_maps(old_m.get("metrics", {}), new_m.get("metrics", {}))
    old_p = _read_predictions(run_dir / "predictions.jsonl")
    new_p = _read_predictions(target / "predictions.jsonl")
    pred_diffs = _prediction_differences(old_p, new_p)
    same_rows = len(old_p) == len(new_p) and not pred_diffs
    result = {
        "run": str(run_dir),
        "replay": str(target),
        "identical": same_rows and not metric_diffs,
        "metrics_identical": not metric_diffs,
        "metric_differences": metric_diffs,
        "predictions_identical": same_rows,
        "prediction_rows": [len(old_p), len(new_p)],
        "prediction_differences": pred_diffs,
        "warnings": warnings,
    }
    atomic_write_json(target / "replay.json", result)
    return result


def replay_verdict(result: dict[str, Any]) -> str:
    rows_then, rows_now = result["prediction_rows"]
    if result["identical"]:
        return f"replay identical: all metrics and all {rows_then} prediction rows match exactly"
    parts = []
    if rows_then != rows_now:
        parts.append(f"{rows_then} prediction rows then, {rows_now} now")
    if result["prediction_differences"]:
        first = "; ".join(f"row {d['row']} (id {d['id']}): {', '.join(d['fields'])}"
                          for d in result["prediction_differences"][:_SHOWN])
        parts.append(f"{len(result['prediction_differences'])} prediction rows differ, first: {first}")
    if result["metric_differences"]:
        parts.append("metrics differ: " + ", ".join(result["metric_differences"][:_SHOWN])
                     + (" ..." if len(result["metric_differences"]) > _SHOWN else ""))
    if result["warnings"]:
        parts.append(f"{len(result['warnings'])} data/environment differences (warnings above) may explain it")
    return "replay differs: " + "; ".join(parts)
