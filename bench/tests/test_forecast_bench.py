"""The forecast-accuracy benchmark (bench.forecast) on the toy checkpoints: what it runs, writes and computes.

Nothing is timed: the tests check the report's bookkeeping (one row per run, ratios and shares
computed from the numbers beside them, files written, run folders removed), not the speeds.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from bench.forecast import TOLERANCE, forecast_accuracy, render_forecast, within
from harness.config import load_config
from harness.experiments.sweep import expand_sweep
from harness.runs.folders import run_id
from tests.common import ferry_config


def test_within_is_a_share_of_the_measured_time() -> None:
    assert within(13.5, 10.0) and within(6.5, 10.0) and within(10.0, 10.0)  # +-35 %: 6.5 .. 13.5
    assert not within(13.6, 10.0) and not within(6.4, 10.0) and not within(None, 10.0)
    assert TOLERANCE == 0.35


def test_every_run_of_the_sweep_is_forecast_run_and_compared(tmp_path: Path, toy_paths: dict[str, Path]) -> None:
    sweep = {"arms": [{"method.kind": "head"}, {"model.checkpoint": "toy:decoder", "method.kind": "prompt"}],
             "grid": {"train.seed": [1, 2]}}
    path = ferry_config(tmp_path, "tiny.yaml", rows=16, train={"max_length": 48}, sweep=sweep)
    lines: list[str] = []
    report = forecast_accuracy(path, tmp_path / "docs", log=lines.append)
    ids = [run_id(r) for r in expand_sweep(load_config(path))]
    assert [r["id"] for r in report["runs"]] == ids and len(ids) == 3  # zero-shot prompt: once for both seeds
    assert sum(ln.startswith("measuring this machine's speed") for ln in lines) == 2  # fresh: both families
    for row in report["runs"]:
        f, x = row["forecast"], row["measured"]
        assert row["basis"].startswith("calibrated on this machine ") and f["total"] is not None
        assert f["total"] == pytest.approx(f["train"] + f["score"] + f["overhead"])
        assert x["wall"] > 0 and x["other"] == pytest.approx(x["wall"] - x["train"] - x["score"])
        assert row["ratio"] == pytest.approx(f["total"] / x["wall"]) and row["within"] == within(f["total"], x["wall"])
        assert 0.0 <= row["others_cpu"] <= 1.0  # the share of the CPU other processes used meanwhile
    assert report["runs"][2]["forecast"]["train"] == 0.0 and report["runs"][2]["measured"]["train"] == 0.0
    assert report["within"] == sum(r["within"] for r in report["runs"])
    assert report["share_within"] == pytest.approx(report["within"] / 3)
    assert report["total"]["wall"] == pytest.approx(sum(r["measured"]["wall"] for r in report["runs"]))
    written = json.loads((tmp_path / "docs" / "forecast_accuracy.json").read_text(encoding="utf-8"))
    assert written == json.loads(json.dumps(report))
    markdown = (tmp_path / "docs" / "forecast_accuracy.md").read_text(encoding="utf-8")
    assert markdown == render_forecast(report) and all(f"| {i} |" in markdown for i in ids)
    assert f"{report['within']} of 3 runs within ±35% of their wall time" in markdown
    assert not (tmp_path / "runs").exists()  # the runs went to a fresh folder of the benchmark's, since deleted
