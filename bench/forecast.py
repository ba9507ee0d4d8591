"""Forecast accuracy: forecast every run of a sweep, run the sweep, compare each forecast with its wall time.

    python scripts/benchmark.py --forecast                      # configs/bakeoff.yaml -> docs/forecast_accuracy.*
    python scripts/benchmark.py --forecast configs/x.yaml --out DIR

The runs go to a fresh output folder, and the speed is measured afresh into a fresh speed folder
(so the forecasts rest on this machine, now, as a first dry run's would); the token cache is the
usual one. Each run is then done by `execute_run`, one after another in this process as `tiltyard
sweep` does them, and timed from outside (wall clock around the whole call), against the forecast's
total. A run's folder is deleted once its numbers are read (`keep_runs` keeps them), so a sweep of
decoder runs does not fill the disk with checkpoints.
"""

from __future__ import annotations

import dataclasses
import json
import shutil
import tempfile
import time
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

from bench.flops import machine_info
from harness.config import load_config
from harness.experiments.forecast import Forecast, forecast_runs
from harness.experiments.speed import cpu_seconds, others_share
from harness.experiments.sweep import expand_sweep
from harness.files import read_json
from harness.runs.run import execute_run

__all__ = ["TOLERANCE", "forecast_accuracy", "forecast_of_sweep", "render_forecast", "within"]

TOLERANCE = 0.35  # a forecast within +-35 % of the measured wall time counts as right


def within(forecast: float | None, measured: float, tolerance: float = TOLERANCE) -> bool:
    """True when `forecast` is within +-tolerance (a share) of `measured`."""
    return forecast is not None and abs(forecast - measured) <= tolerance * measured


def forecast_accuracy(config: Path, out: Path, *, overrides: Sequence[str] = (), log: Callable[[str], None] = print,
                      keep_runs: bool = False) -> dict[str, Any]:
    """Forecast, then run every run of `config`'s sweep; write out/forecast_accuracy.json and .md; return the report."""
    info = machine_info()
    scratch = Path(tempfile.mkdtemp(prefix="tiltyard-forecast-bench-"))
    try:
        cfg = load_config(config, [*overrides, f"output={scratch / 'runs'}"])
        runs = expand_sweep(cfg)
        started = time.perf_counter()
        forecasts = forecast_runs(runs, log=log, speed_folder=scratch / "speed")
        forecast_seconds = time.perf_counter() - started
        rows: list[dict[str, Any]] = []
        shown: set[str] = set()  # as a sweep does: each data finding once
        for n, (run, f) in enumerate(zip(runs, forecasts, strict=True), 1):
            log(f"[{n}/{len(runs)}] {f.run_id}: forecast {_s(f.total_seconds)} s ...")
            busy, began = cpu_seconds(), time.perf_counter()
            folder = execute_run(run, log=lambda _: None, shown_findings=shown)
            wall = time.perf_counter() - began
            others = others_share(busy, cpu_seconds(), wall)
            cost = read_json(folder / "metrics.json")["cost"]
            if not keep_runs:
                shutil.rmtree(folder)
            rows.append({**_row(run, f, wall, cost), "others_cpu": others})
            log(f"    measured {wall:.1f} s ({'within' if rows[-1]['within'] else 'outside'} +-{TOLERANCE:.0%})")
    finally:
        if not keep_runs:
            shutil.rmtree(scratch, ignore_errors=True)
    info["load_average_end"] = machine_info()["load_average"]
    hits = sum(r["within"] for r in rows)
    forecast_total = sum(r["forecast"]["total"] or 0.0 for r in rows)
    report = {"config": str(config), "overrides": list(overrides), "machine": info, "tolerance": TOLERANCE,
              "forecast_seconds": forecast_seconds, "runs": rows, "within": hits,
              "share_within": hits / len(rows) if rows else None,
              "total": {"forecast": forecast_total, "wall": sum(r["measured"]["wall"] for r in rows)}}
    out.mkdir(parents=True, exist_ok=True)
    (out / "forecast_accuracy.json").write_text(json.dumps(report, indent=2) + "\n", encoding="utf-8")
    (out / "forecast_accuracy.md").write_text(render_forecast(report), encoding="utf-8")
    return report


def forecast_of_sweep(sweep: Path, out: Path, *, log: Callable[[str], None] = print) -> dict[str, Any]:
    """Forecast accuracy of a sweep that `tiltyard sweep` already ran (tuning trials included): every run its
    sweep.json times (`wall_seconds`) is forecast afresh, as a new run, with this machine's speed measured
    again into a fresh folder, and set against that wall time. A run that took over its trial's training
    (harness.runs.twin) is forecast without training, as the sweep's budget does. Writes out/forecast_accuracy.*."""
    info = machine_info()
    index = read_json(sweep / "sweep.json")
    timed = [r for r in index["runs"] if r.get("wall_seconds") and r.get("state") == "finished"]
    scratch = Path(tempfile.mkdtemp(prefix="tiltyard-forecast-bench-"))
    try:
        # read from the run folders, placed in an empty output folder: forecast as runs not yet done
        runs = [dataclasses.replace(load_config(Path(r["path"]) / "config.yaml"), output=str(scratch / "runs"))
                for r in timed]
        started = time.perf_counter()
        forecasts = forecast_runs(runs, log=log, speed_folder=scratch / "speed")
        forecast_seconds = time.perf_counter() - started
    finally:
        shutil.rmtree(scratch, ignore_errors=True)
    rows = []
    for record, run, f in zip(timed, runs, forecasts, strict=True):
        if read_json(Path(record["path"]) / "status.json").get("training_from") and f.train_seconds is not None:
            f = dataclasses.replace(f, train_seconds=0.0, basis=f.basis + "; training taken over from its trial")
        cost = read_json(Path(record["path"]) / "metrics.json")["cost"]
        if cost.get("training_from"):
            cost = {**cost, "train_seconds": 0.0}  # the trial's seconds, recorded as the run's; not spent here
        rows.append({**_row(run, f, float(record["wall_seconds"]), cost), "role": record.get("role", "run"),
                     "others_cpu": None})
    hits = sum(r["within"] for r in rows)
    report = {"config": str(index.get("config")), "sweep": str(sweep), "overrides": [], "machine": info,
              "tolerance": TOLERANCE, "forecast_seconds": forecast_seconds, "runs": rows, "within": hits,
              "share_within": hits / len(rows) if rows else None,
              "total": {"forecast": sum(r["forecast"]["total"] or 0.0 for r in rows),
                        "wall": sum(r["measured"]["wall"] for r in rows)}}
    info["load_average_end"] = machine_info()["load_average"]
    out.mkdir(parents=True, exist_ok=True)
    (out / "forecast_accuracy.json").write_text(json.dumps(report, indent=2) + "\n", encoding="utf-8")
    (out / "forecast_accuracy.md").write_text(render_forecast(report), encoding="utf-8")
    return report


def _row(run: Any, f: Forecast, wall: float, cost: dict[str, Any]) -> dict[str, Any]:
    train, score = float(cost["train_seconds"]), float(cost["eval_seconds"])
    return {"id": f.run_id, "checkpoint": run.model.checkpoint, "method": run.method.kind, "seed": run.train.seed,
            "family": f.family, "basis": f.basis, "work": f.work,
            "forecast": {"train": f.train_seconds, "score": f.score_seconds, "overhead": f.overhead_seconds,
                         "total": f.total_seconds},
            "measured": {"wall": wall, "train": train, "score": score, "other": wall - train - score},
            "ratio": None if f.total_seconds is None else f.total_seconds / wall,
            "within": within(f.total_seconds, wall)}


def _s(value: float | None) -> str:
    return "?" if value is None else f"{value:.1f}"


def _share(value: float | None) -> str:
    return "?" if value is None else f"{value:.0%}"


def render_forecast(report: dict[str, Any]) -> str:
    """The report as Markdown: the machine, one row per run (forecast against measured), the share within."""
    m = report["machine"]
    rows = report["runs"]
    share = report["share_within"]
    lines = [f"# Forecast accuracy: {report['config']}", "",
             f"Machine: {m.get('cpu_model')}, {m.get('physical_cores')} physical / {m.get('logical_cores')} logical "
             f"cores, torch {m.get('torch')} on {m.get('torch_threads')} threads; load average "
             f"{m.get('load_average')} at the start, {m.get('load_average_end')} at the end.", "",
             f"Forecasting the {len(rows)} runs took {report['forecast_seconds']:.1f} s (the speed measured afresh). "
             "Forecast: train (with its dev evaluations) + scoring + overhead (loading, files, report); measured: "
             "the run's own train_seconds and eval_seconds (metrics.json) and the wall clock around its whole "
             "execute_run call; other = wall - train - scoring.", "",
             *([f"The runs are those of the sweep in `{report['sweep']}` (tuning trials included), each timed by "
                "the sweep itself (sweep.json `wall_seconds`: the whole run, loading to report); they were "
                "forecast afterwards as new runs, with this machine's speed measured again. 'taken over': the "
                "run took over its tuning trial's training, so neither forecast nor measurement counts it.", ""]
               if report.get("sweep") else []),
             "Others' CPU: the share of the machine's CPU time other processes used during the run (the speed "
             "was measured with whatever they used then).", "",
             "| run | method | basis | forecast train / score / overhead = total s | measured train / score / other "
             f"= wall s | forecast / wall | within ±{report['tolerance']:.0%} | others' CPU |",
             "|---|---|---|---|---|---|---|---|"]
    for r in rows:
        f, x = r["forecast"], r["measured"]
        ratio = "?" if r["ratio"] is None else f"{r['ratio']:.2f}"
        lines.append(f"| {r['id']} | {r['method']} | {r['basis']} | {_s(f['train'])} / {_s(f['score'])} / "
                     f"{_s(f['overhead'])} = {_s(f['total'])} | {x['train']:.1f} / {x['score']:.1f} / {x['other']:.1f} "
                     f"= {x['wall']:.1f} | {ratio} | {'yes' if r['within'] else 'no'} | {_share(r['others_cpu'])} |")
    total = report["total"]
    lines += ["", f"{report['within']} of {len(rows)} runs within ±{report['tolerance']:.0%} of their wall time"
              + ("" if share is None else f" ({share:.0%})") + f"; all runs: forecast {total['forecast'] / 60:.1f} min, "
              f"measured {total['wall'] / 60:.1f} min.", ""]
    return "\n".join(lines)
