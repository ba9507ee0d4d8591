"""The command line: help for every verb, one-line errors with exit code 2, audit end to end."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

from harness.cli import _parser, main
from tests.common import ROOT

VERBS = ["run", "sweep", "compare", "replay", "predict", "audit", "agree", "assets", "draft", "toy"]


def test_python_dash_m_help() -> None:
    out = subprocess.run([sys.executable, "-m", "harness", "--help"], capture_output=True, text=True, check=True)
    for verb in VERBS:
        assert verb in out.stdout


@pytest.mark.parametrize("verb", VERBS)
def test_every_verb_has_help(verb: str, capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as stop:
        main([verb, "--help"])
    assert stop.value.code == 0
    assert f"usage: tiltyard {verb}" in capsys.readouterr().out


def test_former_command_name_still_works_with_a_one_line_notice(capsys: pytest.CaptureFixture[str]) -> None:
    from harness.cli import main_former_name

    with pytest.raises(SystemExit) as stop:
        main_former_name(["toy", "--help"])
    assert stop.value.code == 0
    captured = capsys.readouterr()
    assert "usage: tiltyard toy" in captured.out
    notice = captured.err.strip().splitlines()
    assert len(notice) == 1 and "'harness' command is now 'tiltyard'" in notice[0]


def test_config_verbs_take_set() -> None:
    parser = _parser()
    for verb in ("run", "sweep", "audit"):
        args = parser.parse_args([verb, "c.yaml", "--set", "train.epochs=1", "--set", "train.seed=2"])
        assert args.overrides == ["train.epochs=1", "train.seed=2"]


def test_bad_config_is_one_line_exit_2(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    bad = tmp_path / "bad.yaml"
    bad.write_text("task: {name: t, train: x.csv}\nmodel: {checkpoint: toy:encoder}\ntrain: {epochs: 0}\n")
    code = main(["audit", str(bad)])
    err = capsys.readouterr().err.strip()
    assert code == 2
    assert err.count("\n") == 0 and "train.epochs" in err and "bad.yaml line 3" in err
    assert "Traceback" not in err


def test_missing_data_file_is_one_line_exit_2(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    cfg = tmp_path / "c.yaml"
    cfg.write_text(f"task: {{name: t, train: {tmp_path / 'missing.csv'}}}\nmodel: {{checkpoint: toy:encoder}}\n")
    assert main(["audit", str(cfg)]) == 2
    err = capsys.readouterr().err.strip()
    assert "missing.csv does not exist" in err and err.count("\n") == 0


def test_audit_end_to_end(tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]) -> None:
    monkeypatch.chdir(ROOT)
    code = main(["audit", "configs/ferry_head_toy.yaml", "--out", str(tmp_path)])
    assert code == 0
    out = capsys.readouterr().out
    assert "Suggested max_length" in out and "leakage" in out
    report = json.loads((tmp_path / "audit.json").read_text())
    assert report["splits"]["train"]["rows"] == 600
    assert report["leakage"] == {"train/dev": 0, "train/test": 0, "dev/test": 0}
