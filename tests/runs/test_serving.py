"""Serving cost per run (throughput, single-row latency, model size) and the int8 copy (`eval.int8`).

No timing is checked: speed numbers must exist, be positive and be consistent (p95 >= p50). Outside
references: torch's `quantize_dynamic` (the copy's layers are its quantised Linear), the float model's
own outputs (what the int8 copy must mostly agree with), `os.walk` + `os.path.getsize` (folder size).
"""

from __future__ import annotations

import json
import logging
import os
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from torch import nn

from harness.cli import main
from harness.config import checks as config_checks
from harness.config import config_from_dict, load_config
from harness.data.task import load_task
from harness.errors import HarnessError
from harness.methods.registry import build_method
from harness.models.int8 import QuantizedLinear
from harness.runs import serving
from harness.runs.folders import read_status
from harness.runs.run import execute_run
from harness.runs.serving import folder_bytes, int8_method, single_row_latency
from tests.common import ferry_config, ferry_dict


def _du(folder: Path) -> int:
    return sum(os.path.getsize(os.path.join(root, f)) for root, _, files in os.walk(folder) for f in files)


def _metrics(folder: Path) -> dict[str, Any]:
    return json.loads((folder / "metrics.json").read_text())


def test_latency_times_single_rows_spread_over_the_split_after_a_warm_up() -> None:
    calls: list[list[int]] = []
    items = list(range(200))
    out = single_row_latency(lambda batch: calls.append(list(batch)), items, rows=50, warmup=3)  # type: ignore[arg-type]
    assert all(len(c) == 1 for c in calls) and len(calls) == 3 + 50
    timed = [c[0] for c in calls[3:]]
    assert timed[0] == 0 and timed[-1] == 199 and len(set(timed)) == 50  # first to last row, none twice
    assert out["latency_rows"] == 50 and out["latency_capped"] is False
    assert 0 < out["latency_p50_ms"] <= out["latency_p95_ms"]


def test_latency_on_a_small_split_uses_every_row_and_the_budget_stops_it() -> None:
    small = single_row_latency(lambda batch: None, list(range(7)), rows=50)  # type: ignore[arg-type]
    assert small["latency_rows"] == 7 and not small["latency_capped"]
    capped = single_row_latency(lambda batch: None, list(range(100)), rows=50, budget=0.0)  # type: ignore[arg-type]
    assert capped["latency_rows"] == 1 and capped["latency_capped"] is True
    assert capped["latency_p50_ms"] == capped["latency_p95_ms"] > 0
    empty = single_row_latency(lambda batch: None, [])
    assert empty["latency_rows"] == 0 and empty["latency_p50_ms"] is None


def test_folder_bytes_counts_every_file_below(tmp_path: Path) -> None:
    (tmp_path / "a" / "b").mkdir(parents=True)
    (tmp_path / "a" / "x.bin").write_bytes(b"\0" * 1000)
    (tmp_path / "a" / "b" / "y.json").write_text("{}")
    assert folder_bytes(tmp_path) == _du(tmp_path) == 1002


@pytest.fixture(scope="module")
def int8_run(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("int8")
    cfg = config_from_dict(ferry_dict(out, rows=None, train={"epochs": 2}, eval={"bootstrap": 0, "int8": True}))
    return execute_run(cfg, log=lambda _: None)


def test_every_run_records_its_serving_cost(int8_run: Path) -> None:
    m = _metrics(int8_run)
    s = m["cost"]["serving"]
    rows = m["n"]
    assert s["latency_rows"] == min(50, rows) and s["latency_capped"] is False
    assert 0 < s["latency_p50_ms"] <= s["latency_p95_ms"]
    assert s["rows_per_second"] == pytest.approx(rows / m["cost"]["eval_seconds"])
    assert s["batch_size"] == 64 and s["threads"] == 1
    assert s["model_bytes"] == _du(int8_run / "model") > 0


def test_the_int8_copy_mostly_agrees_with_the_float_model(int8_run: Path) -> None:
    m = _metrics(int8_run)
    q = m["int8"]
    float_pred = [json.loads(line)["predicted"] for line in (int8_run / "predictions.jsonl").read_text().splitlines()]
    assert q["rows"] == len(float_pred) == m["n"]
    # Reference: the float model's own predictions; int8 noise may flip a near-tie, not most rows.
    assert q["agreement"] >= 0.8
    assert q["float_metrics"] == {k: m["metrics"][k] for k in ("macro_f1", "accuracy")}
    for name in ("macro_f1", "accuracy"):
        assert q["delta"][name] == pytest.approx(q["metrics"][name] - q["float_metrics"][name])
    assert q["quantized_layers"] > 0 and 0 < q["quantized_weight_share"] <= 1
    assert 0 < q["state_bytes"] < q["float_state_bytes"]
    assert 0 < q["serving"]["latency_p50_ms"] <= q["serving"]["latency_p95_ms"] and q["serving"]["rows_per_second"] > 0
    assert q["saved"] is False and "measured, not saved" in q["note"]
    assert not list(int8_run.rglob("*int8*"))  # nothing of the copy is written
    report = (int8_run / "report.md").read_text(encoding="utf-8")
    assert "## int8 copy" in report and f"{100 * q['agreement']:.1f}%" in report


@pytest.mark.parametrize("checkpoint,kind", [("toy:encoder", "head"), ("toy:decoder", "head"),
                                             ("toy:decoder", "next_token"), ("toy:encoder-decoder", "prompt")])
def test_every_method_scores_through_quantised_linear_layers(tmp_path: Path, checkpoint: str, kind: str) -> None:
    method_cfg = {"kind": kind, **({"calibrate": True} if kind == "prompt" else {})}
    cfg = config_from_dict(ferry_dict(tmp_path, rows=12, checkpoint=checkpoint, method=method_cfg))
    data = load_task(cfg.task)
    method = build_method(kind, cfg=cfg, data=data)
    items = method.encode(data.test.texts, data.test.labels)
    before = method.predict_proba(items, 8)
    quantized, facts = int8_method(method)
    after = quantized.predict_proba(items, 8)
    layers = list(quantized.model.modules())
    # Reference: torch's quantize_dynamic swaps every nn.Linear (and our converted Conv1D) for its own class.
    assert sum(isinstance(m, QuantizedLinear) for m in layers) == facts["quantized_layers"] > 0
    assert not any(type(m) is nn.Linear for m in layers)
    assert facts["converted_conv1d"] == (8 if checkpoint == "toy:decoder" else 0)  # GPT-2: 4 per block, 2 blocks
    assert any(type(m) is nn.Linear for m in method.model.modules())  # the method itself stays float
    np.testing.assert_array_equal(method.predict_proba(items, 8), before)
    assert np.mean(after.argmax(1) == before.argmax(1)) >= 0.8  # reference: the float model's own outputs
    if kind == "prompt":  # calibration is computed with the int8 model itself, not borrowed from the float one
        assert quantized._p_cf is not method._p_cf  # type: ignore[attr-defined]


def test_without_a_quantised_engine_the_config_is_refused_at_its_line(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]) -> None:
    path = ferry_config(tmp_path, eval={"int8": True})
    monkeypatch.setattr(config_checks, "_quantized_engines", lambda: [])
    with pytest.raises(HarnessError, match=r"'eval.int8' in .*run.yaml line \d+: this torch build has no quantised"):
        load_config(path)
    assert main(["run", str(path)]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "eval.int8" in err
    assert not (tmp_path / "runs").exists()


def test_a_model_with_nothing_to_quantise_is_refused_before_the_run_starts(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]) -> None:
    path = ferry_config(tmp_path, eval={"int8": True})
    monkeypatch.setattr(serving, "linear_weights", lambda modules: (0, 100))  # as a model without linear layers
    assert main(["run", str(path)]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1
    assert "'eval.int8' in" in err and "line" in err and "method 'head' on toy:encoder" in err
    # the run folder, not the claim's `.<run-id>.lock` file beside it (listing order is the file system's)
    (folder,) = [p for p in (tmp_path / "runs" / "ferry").iterdir() if not p.name.startswith(".")]
    assert read_status(folder)["state"] == "failed" and not (folder / "metrics.json").exists()


def test_a_failing_int8_measurement_leaves_the_run_standing(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                                            caplog: pytest.LogCaptureFixture) -> None:
    def broken(modules: Any) -> Any:
        raise RuntimeError("no kernel for this shape")

    monkeypatch.setattr(serving, "int8_copy", broken)
    cfg = config_from_dict(ferry_dict(tmp_path, eval={"bootstrap": 0, "int8": True}))
    with caplog.at_level(logging.WARNING):
        folder = execute_run(cfg, log=lambda _: None)
    assert read_status(folder)["state"] == "finished"
    assert _metrics(folder)["int8"] == {"error": "RuntimeError: no kernel for this shape", "saved": False}
    assert any("int8 copy could not be measured" in r.getMessage() for r in caplog.records)
    assert "could not be measured" in (folder / "report.md").read_text()


def test_a_bf16_run_gets_its_int8_copy_scored_in_float32(tmp_path: Path) -> None:
    cfg = config_from_dict(ferry_dict(tmp_path, train={"bf16": True}, eval={"bootstrap": 0, "int8": True}))
    q = _metrics(execute_run(cfg, log=lambda _: None))["int8"]
    # accelerate's bf16 autocast wrapper would feed bf16 to the int8 kernels, which take float32 only; the run
    # drops it from the trained model before scoring, so the copy has none left to drop
    assert "error" not in q and q["bf16_autocast_removed"] is False
    assert q["agreement"] >= 0.8  # reference: the float32 model's own predictions
