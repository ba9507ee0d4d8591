"""Sweeps under load: twelve runs in one process, memory flat from run to run, all twelve compared.

The sweep records, per run, its own peak resident memory (the runner starts a new peak window at
each run's start, /proc/self/clear_refs on Linux) and the memory left once the run is over and
collected. A model, optimiser or batch kept alive by something global would raise both, run after run.
"""

from __future__ import annotations

import gc
import json
import os
import subprocess
import sys
import weakref
from pathlib import Path

import pytest

from harness.config import load_config
from harness.experiments.sweep import expand_sweep, run_sweep
from harness.runs.folders import run_id
from tests.common import ferry_config


def write_sweep(folder: Path, seeds: list[int]) -> Path:
    """A 2 x len(seeds) sweep (head and next_token on the toy decoder, 40 rows per split)."""
    return ferry_config(folder, "load.yaml", rows=40, checkpoint="toy:decoder",
                        sweep={"grid": {"train.seed": seeds, "method": [
                            {"kind": "head"}, {"kind": "next_token", "template": "Message: {text}\nTopic:"}]}})


@pytest.mark.skipif(not Path("/proc/self/clear_refs").exists(), reason="per-run peaks need Linux's clear_refs")
def test_twelve_runs_keep_memory_flat_and_are_all_compared(tmp_path: Path) -> None:
    path = write_sweep(tmp_path, [1, 2, 3, 4, 5, 6])
    runs = expand_sweep(load_config(path))
    assert len(runs) == 12
    proc = subprocess.run([sys.executable, "-m", "harness", "--quiet", "sweep", str(path)], cwd=tmp_path,
                          env={**os.environ, "HF_HUB_OFFLINE": "1"}, capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr[-3000:]
    sweep_dir = tmp_path / "runs" / "ferry" / "sweeps" / "load"
    index = json.loads((sweep_dir / "sweep.json").read_text())
    assert [r["state"] for r in index["runs"]] == ["finished"] * 12
    memory = [r["memory"] for r in index["runs"]]
    # Runs 2 and 12 use the same method (next_token; the grid's method varies fastest): the first run pays
    # for one-time imports and caches, so the comparison starts at the second.
    assert index["runs"][1]["method"] == index["runs"][11]["method"] == "next_token"
    second, last = memory[1], memory[11]
    assert last["peak_rss_mb"] <= 1.10 * second["peak_rss_mb"], memory
    assert last["rss_mb_after"] <= 1.10 * second["rss_mb_after"], memory
    # each run's peak is its own, not the sweep's running maximum: some run peaks below an earlier one
    peaks = [m["peak_rss_mb"] for m in memory]
    assert any(b < a for a, b in zip(peaks, peaks[1:], strict=False)), peaks

    comparison = json.loads((sweep_dir / "comparison.json").read_text())
    assert comparison["runs"] == 12 and comparison["incomplete"] == []
    listed = sorted(name for group in comparison["groups"] for name in group["runs"])
    assert listed == sorted(run_id(r) for r in runs)
    report = (sweep_dir / "comparison.md").read_text()
    assert report.startswith("# Comparison of 12 runs")


def test_no_model_outlives_its_run(tmp_path: Path) -> None:
    # Every model built during the sweep is garbage once the sweep returns: nothing global keeps one.
    from transformers import PreTrainedModel

    made: list[weakref.ref[PreTrainedModel]] = []
    real_init = PreTrainedModel.__init__

    def tracked(self: PreTrainedModel, *args: object, **kwargs: object) -> None:
        real_init(self, *args, **kwargs)
        made.append(weakref.ref(self))

    PreTrainedModel.__init__ = tracked  # type: ignore[method-assign]
    try:
        summary = run_sweep(load_config(write_sweep(tmp_path, [1])), "load", compare=False, log=lambda _: None)
    finally:
        PreTrainedModel.__init__ = real_init  # type: ignore[method-assign]
    assert summary["failed"] == []
    gc.collect()
    assert len(made) >= 2  # at least one model per run was built (and seen)
    alive = [type(ref()).__name__ for ref in made if ref() is not None]
    assert alive == [], alive
