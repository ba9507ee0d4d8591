"""Exact replay of a real (tiny) toy run: identical outputs, and named differences when data drift."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import pytest

from harness.commands import replay_command
from harness.config import load_config
from harness.errors import HarnessError
from harness.experiments.replay import replay_run
from harness.runs.folders import write_status
from harness.runs.run import execute_run
from tests.common import FERRY, ferry_config


@pytest.fixture
def toy_run(tmp_path: Path) -> Path:
    """A finished toy:encoder head run (1 epoch, 30 rows per split) on a private copy of the data."""
    data = tmp_path / "data"
    shutil.copytree(FERRY, data)
    path = ferry_config(tmp_path, data=data, rows=30, train={"seed": 5})
    return execute_run(load_config(path), log=lambda _: None)


def _rows(path: Path) -> list[dict]:
    return [json.loads(line) for line in path.read_text(encoding="utf-8").splitlines() if line.strip()]


def test_replay_of_a_toy_run_is_identical(toy_run: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert replay_command(toy_run, tmp_path / "replay") == 0
    out = capsys.readouterr().out
    assert "replay identical" in out and "warning" not in out
    result = json.loads((tmp_path / "replay" / "ferry" / toy_run.name / "replay.json").read_text(encoding="utf-8"))
    assert result["identical"] and result["warnings"] == []
    # checked here independently of replay.py: the two prediction files hold equal rows, in order
    again = Path(result["replay"])
    assert _rows(again / "predictions.jsonl") == _rows(toy_run / "predictions.jsonl")
    assert len(_rows(toy_run / "predictions.jsonl")) == 30
    metrics = [json.loads((p / "metrics.json").read_text(encoding="utf-8"))["metrics"] for p in (toy_run, again)]
    assert metrics[0] == metrics[1]


def test_changed_data_and_packages_are_named(toy_run: Path, tmp_path: Path,
                                             capsys: pytest.CaptureFixture[str]) -> None:
    test_csv = tmp_path / "data" / "test.csv"
    lines = test_csv.read_text(encoding="utf-8").splitlines(keepends=True)
    first_id = lines[1].split(",", 1)[0]
    lines[1] = f"{first_id},where do I find the timetable for Skarra in winter,schedule\n"  # a changed test row
    test_csv.write_text("".join(lines), encoding="utf-8")
    env_path = toy_run / "environment.json"
    env = json.loads(env_path.read_text(encoding="utf-8"))
    env["packages"]["transformers"] = "0.0.1"  # as if the run had been made with another version
    env_path.write_text(json.dumps(env), encoding="utf-8")

    result = replay_run(toy_run, tmp_path / "replay", log=print)
    out = capsys.readouterr().out
    assert f"warning: data file {test_csv} changed since the run" in out
    assert "warning: split test: content hash differs" in out
    assert "warning: package transformers: 0.0.1 at the run" in out
    assert not result["identical"] and not result["predictions_identical"]
    assert result["prediction_differences"][0]["id"] == first_id
    assert replay_command(toy_run, tmp_path / "replay") == 1
    assert "replay differs" in capsys.readouterr().out


def test_replay_refuses_unfinished_runs_and_its_own_folder(toy_run: Path, tmp_path: Path) -> None:
    with pytest.raises(HarnessError, match="own output folder"):
        replay_run(toy_run, tmp_path / "runs")
    write_status(toy_run, "interrupted")
    with pytest.raises(HarnessError, match="is interrupted, not finished"):
        replay_run(toy_run, tmp_path / "replay")
