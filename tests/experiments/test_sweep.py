"""Sweeps: grid expansion, exclusions, shards, resuming a killed sweep, failures, data changes, curves."""

from __future__ import annotations

import csv
import itertools
import json
import re
import shutil
import signal
import textwrap
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import yaml

from harness.cli import main
from harness.commands import sweep_command
from harness.config import Config, load_config
from harness.errors import HarnessError
from harness.experiments import sweep as sweep_module
from harness.experiments.sweep import expand_sweep, parse_shard, run_sweep
from harness.files import file_sha256
from harness.runs import run as runner
from harness.runs.folders import read_status, run_id
from harness.train.checkpoints import Interrupted
from harness.train.precision import cpu_has_bf16
from tests.common import FERRY, ferry_config

_REAL_EXECUTE = runner.execute_run  # kept before any test wraps it

def _write(tmp_path: Path, sweep: str, *, rows: int = 24, data: Path = FERRY, name: str = "grid.yaml") -> Path:
    """The shared small ferry config with this sweep block (YAML text), written to tmp_path/name."""
    return ferry_config(tmp_path, name, data=data, rows=rows, method={"kind": "head", "template": "Q: {text} A:"},
                        sweep=yaml.safe_load(textwrap.dedent(sweep)))


THREE_WAY = """\
grid:
  model.checkpoint: [toy:encoder, toy:decoder]
  method: [{kind: head}, {kind: next_token}, {kind: prompt, shots: 1}]  # few-shot: seed-dependent
  train.seed: [1, 2]
"""


def test_expansion_order_count_and_stable_ids(tmp_path: Path) -> None:
    runs = expand_sweep(load_config(_write(tmp_path, THREE_WAY)))
    # Odometer order, as itertools.product documents: the last key advances fastest (Python docs).
    expected = list(itertools.product(["toy:encoder", "toy:decoder"], ["head", "next_token", "prompt"], [1, 2]))
    assert [(r.model.checkpoint, r.method.kind, r.train.seed) for r in runs] == expected
    assert all(not r.sweep.grid and not r.sweep.exclude for r in runs)
    ids = [run_id(r) for r in runs]
    assert len(set(ids)) == 12
    again = expand_sweep(load_config(_write(tmp_path, THREE_WAY, name="copy.yaml")))
    assert [run_id(r) for r in again] == ids  # same settings -> same ids, whatever the file is called


def test_exclude_drops_exactly_the_matching_runs(tmp_path: Path) -> None:
    all_ids = [run_id(r) for r in expand_sweep(load_config(_write(tmp_path, THREE_WAY)))]
    one_rule = THREE_WAY + "exclude:\n  - {model.checkpoint: toy:encoder, method.kind: next_token}\n"
    runs = expand_sweep(load_config(_write(tmp_path, one_rule)))
    assert len(runs) == 10
    assert not any(r.model.checkpoint == "toy:encoder" and r.method.kind == "next_token" for r in runs)
    assert [run_id(r) for r in runs] == [i for i in all_ids if i in {run_id(r) for r in runs}]
    two_rules = one_rule + "  - {model.checkpoint: toy:encoder, method.kind: prompt}\n"
    runs = expand_sweep(load_config(_write(tmp_path, two_rules)))
    assert [(r.model.checkpoint, r.method.kind) for r in runs].count(("toy:encoder", "head")) == 2
    assert len(runs) == 8
    # a rule can name a default the grid never sets: train.epochs is 1 in every run, so this drops all seed-2 runs only
    seed_rule = THREE_WAY + "exclude:\n  - {train.seed: 2, train.epochs: 1}\n"
    assert [r.train.seed for r in expand_sweep(load_config(_write(tmp_path, seed_rule)))] == [1] * 6


def test_method_block_replaces_the_whole_block(tmp_path: Path) -> None:
    cfg = load_config(_write(tmp_path, "grid:\n  method: [{kind: head, pooling: mean}, {kind: prompt, shots: 2}]\n"))
    head, prompt = expand_sweep(cfg)
    assert (head.method.kind, head.method.pooling) == ("head", "mean")
    # the base file's template is not carried into the blocks: each block is complete on its own
    assert prompt.method.shots == 2 and prompt.method.template != cfg.method.template
    assert head.method.template == prompt.method.template


def test_arms_carry_settings_together_and_cross_the_grid(tmp_path: Path) -> None:
    sweep = """\
arms:
  - {model.checkpoint: toy:encoder, train.learning_rate: 1.0e-3}
  - {model.checkpoint: toy:decoder, method.kind: next_token, train.epochs: 2}
grid:
  train.seed: [1, 2]
"""
    runs = expand_sweep(load_config(_write(tmp_path, sweep)))
    got = [(r.model.checkpoint, r.method.kind, r.train.learning_rate, r.train.epochs, r.train.seed) for r in runs]
    assert got == [("toy:encoder", "head", 1.0e-3, 1.0, 1), ("toy:encoder", "head", 1.0e-3, 1.0, 2),
                   ("toy:decoder", "next_token", 1.0e-3, 2.0, 1), ("toy:decoder", "next_token", 1.0e-3, 2.0, 2)]
    with pytest.raises(HarnessError, match=r"sweep.arms.*arm 2: 'train.epoch' is not a config key"):
        load_config(_write(tmp_path, "arms:\n  - {train.seed: 3}\n  - {train.epoch: 2}\n"))
    with pytest.raises(HarnessError, match=r"arm 1 is invalid: .*train.batch_size"):
        load_config(_write(tmp_path, "arms:\n  - {train.batch_size: 0}\n"))


@pytest.mark.parametrize(("sweep", "words"), [
    ("grid:\n  train.lerning_rate: [1.0e-3]\n", ["sweep.grid.train.lerning_rate", "did you mean 'train.learning_rate'"]),
    ("grid:\n  trian.epochs: [1]\n", ["sweep.grid.trian.epochs", "is not a config key", "did you mean 'train'"]),
    ("grid:\n  method: [{kind: head, polling: mean}]\n", ["sweep.grid.method", "method.polling"]),
    ("grid:\n  train.seed: []\n", ["sweep.grid.train.seed", "non-empty list"]),
    ("grid:\n  train.seed: [1]\nexclude:\n  - {train.sed: 1}\n", ["sweep.exclude[0]", "train.sed"]),
])
def test_bad_sweep_key_is_a_config_error_naming_it(tmp_path: Path, sweep: str, words: list[str]) -> None:
    with pytest.raises(HarnessError) as err:
        load_config(_write(tmp_path, sweep))
    for word in words:
        assert word in str(err.value)


def test_zero_shot_prompt_runs_once_for_every_seed(tmp_path: Path) -> None:
    sweep = """\
    arms:
      - {method.kind: head}
      - {model.checkpoint: toy:decoder, method.kind: prompt}
      - {model.checkpoint: toy:decoder, method.kind: prompt, method.shots: 2}
    grid:
      train.seed: [1, 2, 3]
    """
    cfg = load_config(_write(tmp_path, sweep))
    runs = expand_sweep(cfg)
    kinds = [(r.method.kind, r.method.shots, r.train.seed) for r in runs]
    # zero-shot scoring uses no seed: one run (the first seed); demonstrations are drawn with the seed: three
    assert kinds == [("head", 0, 1), ("head", 0, 2), ("head", 0, 3), ("prompt", 0, 1),
                     ("prompt", 2, 1), ("prompt", 2, 2), ("prompt", 2, 3)]
    lines: list[str] = []
    sweep_module.plan_sweep(cfg, "grid", None, lines.append, calibrate=False)
    assert any("2 zero-shot prompt combinations differ only in train.seed" in line for line in lines)


def test_repeated_combination_is_an_error(tmp_path: Path) -> None:
    with pytest.raises(HarnessError, match="combinations 1 and 2 give the same run"):
        expand_sweep(load_config(_write(tmp_path, "grid:\n  train.seed: [3, 3]\n")))


def test_shard_syntax_is_checked() -> None:
    assert parse_shard("1/3") == (1, 3) and parse_shard(" 0 / 2 ") == (0, 2) and parse_shard(None) is None
    for bad in ("3/2", "2/2", "x", "1/0", "-1/2", "1/2/3", ""):
        with pytest.raises(HarnessError, match="--shard"):
            parse_shard(bad)


# ----- running sweeps -----------------------------------------------------------------------------


def _fake_runner(calls: list[str]) -> Any:
    """Stands in for runner.execute_run where only the sweep's bookkeeping is under test: records the call
    and marks the run finished, with a measured training time of 3.0 s and test scoring time of 0.5 s."""
    from harness.files import atomic_write_json
    from harness.runs.folders import run_folder, write_status

    def execute(cfg: Config, *, resume: bool = False, overwrite: bool = False, log: Any = print, **_: Any) -> Path:
        calls.append(run_id(cfg))
        folder = run_folder(cfg)
        folder.mkdir(parents=True, exist_ok=True)
        atomic_write_json(folder / "metrics.json", {"metrics": {}, "cost": {"train_seconds": 3.0, "eval_seconds": 0.5}})
        write_status(folder, "finished")
        return folder

    return execute


def test_shards_run_every_run_exactly_once(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    path = _write(tmp_path, THREE_WAY)
    cfg = load_config(path)
    calls: list[str] = []
    monkeypatch.setattr(runner, "execute_run", _fake_runner(calls))
    first = run_sweep(cfg, "grid", shard=parse_shard("0/2"), compare=False, log=lambda _: None)
    assert first["picked"] == [0, 2, 4, 6, 8, 10]
    run_sweep(cfg, "grid", shard=parse_shard("1/2"), compare=False, log=lambda _: None)
    ids = [run_id(r) for r in expand_sweep(cfg)]
    assert sorted(calls) == sorted(ids) and len(calls) == len(set(calls))
    index = json.loads((tmp_path / "runs" / "ferry" / "sweeps" / "grid" / "sweep.json").read_text())
    assert [r["id"] for r in index["runs"]] == ids and {r["state"] for r in index["runs"]} == {"finished"}
    with pytest.raises(HarnessError, match="--shard '2/2'"):
        sweep_command(path, [], shard="2/2")


def _seconds(line: str) -> tuple[str, str, str]:
    """The forecast train, scoring and total columns of a dry-run table line."""
    parts = re.search(r" (new|finished) +(\S+) +(\S+) +(\S+)  ", line)
    assert parts, line
    return parts.group(2), parts.group(3), parts.group(4)


def test_dry_run_forecasts_every_run(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                     capsys: pytest.CaptureFixture[str]) -> None:
    from harness.experiments.speed import speed_dir

    shutil.rmtree(speed_dir(), ignore_errors=True)  # this session's speeds: the test measures its own
    sweep = "arms:\n  - {method.kind: head}\n  - {model.checkpoint: toy:decoder, method.kind: prompt}\n" \
            "grid:\n  train.seed: [1, 2, 3]\n"
    path = _write(tmp_path, sweep, rows=24)
    runs = expand_sweep(load_config(path))
    assert main(["sweep", str(path), "--dry-run", "--no-calibrate"]) == 0
    out = capsys.readouterr().out
    lines = {run_id(run): next(ln for ln in out.splitlines() if run_id(run) in ln) for run in runs}
    for run in runs:  # id, checkpoint, method, seed, training rows, state
        assert re.search(rf"{run_id(run)} +{run.model.checkpoint} +{run.method.kind} +{run.train.seed} +24 new ", out)
    assert len(runs) == 4  # 3 head runs and one zero-shot prompt run for all seeds; nothing measured yet:
    assert [_seconds(lines[run_id(r)]) for r in runs] == [("?", "?", "?")] * 3 + [("0.0", "?", "?")]
    assert all(ln.endswith("unknown: not measured on this machine, no finished run like it") for ln in lines.values())
    assert "forecast: ~0.0 min for 0 runs on this machine, plus 4 runs of unknown cost (4 to run" in out
    assert "measuring" not in out and not (tmp_path / "runs").exists()  # a dry run writes no run folder
    calls: list[str] = []
    monkeypatch.setattr(runner, "execute_run", _fake_runner(calls))
    run_sweep(load_config(path), "grid", shard=(0, 4), compare=False, log=lambda _: None)  # the first head run only
    monkeypatch.setattr(runner, "execute_run", _REAL_EXECUTE)  # the speed measurement runs for real
    assert sweep_command(path, [], dry_run=True, calibrate=False) == 0
    out = capsys.readouterr().out
    out_lines = [next(ln for ln in out.splitlines() if k in ln) for k in lines]
    assert _seconds(out_lines[0]) == ("3.0", "0.5", "3.5") and out_lines[0].endswith("measured (finished)")
    # the same 24 rows x 1 epoch in another order: the finished run's seconds per unit of work carry over
    for line in out_lines[1:3]:
        train, score, total = map(float, _seconds(line))
        assert line.endswith("from 1 finished runs") and 2.4 < train < 3.6 and 0.4 < score < 0.6
        assert total == pytest.approx(train + score, abs=0.11)  # no overhead known without a measurement
    assert out_lines[3].endswith("unknown: not measured on this machine, no finished run like it")
    assert sweep_command(path, [], dry_run=True) == 0  # measured by default
    out = capsys.readouterr().out
    bf16 = ", bf16" if cpu_has_bf16() else ""  # train.bf16 is auto here: on where the CPU has bf16 instructions
    assert re.search(rf"measuring this machine's speed for toy:encoder head{bf16}, batch 8 \(once, cached in .+\)", out)
    assert "measuring this machine's speed for toy:decoder prompt, batch 8" in out
    rows = [next(ln for ln in out.splitlines() if k in ln) for k in lines]
    assert all(re.search(r"from 1 finished runs, calibrated \d{4}-\d\d-\d\d$", ln) for ln in rows[1:3])
    assert re.search(r"calibrated on this machine \d{4}-\d\d-\d\d$", rows[3]) and "unknown" not in out
    assert re.search(r"forecast: ~\d+\.\d min for 3 runs on this machine \(3 to run, 48 training examples x "
                     r"epochs; 1 finished, not counted\)", out)
    assert sweep_command(path, [], dry_run=True) == 0 and "measuring" not in capsys.readouterr().out  # cached


def test_no_calibrate_goes_with_dry_run(tmp_path: Path) -> None:
    path = _write(tmp_path, "grid:\n  train.seed: [1, 2]\n")
    with pytest.raises(HarnessError, match="^--no-calibrate goes with --dry-run"):
        sweep_command(path, [], calibrate=False)
    assert not (tmp_path / "runs").exists()


def _counting(calls: list[tuple[str, bool]], hook: Any = None) -> Any:
    """The real runner, with every call recorded as (run id, resume); `hook(n, cfg)` may act on call n (1-based)."""
    def execute(cfg: Config, **kw: Any) -> Path:
        calls.append((run_id(cfg), kw.get("resume", False)))
        if hook is not None:
            kw = hook(len(calls), cfg, kw)
        return _REAL_EXECUTE(cfg, **kw)

    return execute


def _sigint_on_first_step(n: int, cfg: Config, kw: dict[str, Any]) -> dict[str, Any]:
    if n == 3:  # a real Ctrl-C during training of run 3: the runner saves a checkpoint and stops
        kw["on_step"] = lambda step: signal.raise_signal(signal.SIGINT)
    return kw


def test_killed_sweep_resumes_without_redoing_finished_runs(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    path = _write(tmp_path, "grid:\n  train.seed: [1, 2, 3, 4]\n", rows=24)
    cfg = load_config(path)
    ids = [run_id(r) for r in expand_sweep(cfg)]
    folders = [tmp_path / "runs" / "ferry" / i for i in ids]
    calls: list[tuple[str, bool]] = []
    monkeypatch.setattr(runner, "execute_run", _counting(calls, _sigint_on_first_step))
    with pytest.raises(Interrupted):
        run_sweep(cfg, "grid", compare=False, log=lambda _: None)
    assert [c[0] for c in calls] == ids[:3]
    index = json.loads((tmp_path / "runs" / "ferry" / "sweeps" / "grid" / "sweep.json").read_text())
    # written even though the sweep died
    assert [r["state"] for r in index["runs"]] == ["finished", "finished", "interrupted", "new"]
    assert (folders[2] / "checkpoints" / "last.pt").is_file()
    before = [(f / "status.json").read_bytes() for f in folders[:2]]

    calls.clear()
    monkeypatch.setattr(runner, "execute_run", _counting(calls))
    summary = run_sweep(cfg, "grid", compare=False, log=lambda _: None)
    # runs 1-2 were not executed again (not even called), and their status files are byte-identical
    assert [c[0] for c in calls] == ids[2:]
    assert [(f / "status.json").read_bytes() for f in folders[:2]] == before
    assert [c[1] for c in calls] == [True, False]  # the interrupted run resumes from its checkpoint
    assert read_status(folders[2])["resumed"] is True
    assert summary["failed"] == [] and all(read_status(f)["state"] == "finished" for f in folders)


@pytest.mark.parametrize("stop", [KeyboardInterrupt, SystemExit])
def test_sweep_stopped_between_runs_writes_its_index_and_picks_up(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, stop: type[BaseException]
) -> None:
    path = _write(tmp_path, "grid:\n  train.seed: [1, 2, 3, 4]\n")
    cfg = load_config(path)
    ids = [run_id(r) for r in expand_sweep(cfg)]
    calls: list[str] = []
    fake = _fake_runner(calls)

    def stop_on_third(cfg: Config, **kw: Any) -> Path:
        if len(calls) == 2:
            raise stop()  # the process is told to stop between two runs
        return fake(cfg, **kw)

    monkeypatch.setattr(runner, "execute_run", stop_on_third)
    with pytest.raises(stop):
        run_sweep(cfg, "grid", compare=False, log=lambda _: None)
    index = json.loads((tmp_path / "runs" / "ferry" / "sweeps" / "grid" / "sweep.json").read_text())
    assert [r["state"] for r in index["runs"]] == ["finished", "finished", "new", "new"]
    monkeypatch.setattr(runner, "execute_run", fake)
    assert run_sweep(cfg, "grid", compare=False, log=lambda _: None)["failed"] == []
    assert calls == ids  # each run executed exactly once over the two invocations


def test_a_failing_run_does_not_stop_the_others(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                                capsys: pytest.CaptureFixture[str]) -> None:
    path = _write(tmp_path, "grid:\n  train.seed: [1, 2]\n")
    runs = expand_sweep(load_config(path))
    folders = [tmp_path / "runs" / "ferry" / run_id(r) for r in runs]
    calls: list[tuple[str, bool]] = []

    def crash_first(n: int, cfg: Config, kw: dict[str, Any]) -> dict[str, Any]:
        if n == 1:  # training of the first run raises, as a bug in a method would
            kw["on_step"] = lambda step: (_ for _ in ()).throw(RuntimeError("simulated crash"))
        return kw

    monkeypatch.setattr(runner, "execute_run", _counting(calls, crash_first))
    assert sweep_command(path, []) == 1  # documented: 1 when some run failed
    assert [c[0] for c in calls] == [run_id(r) for r in runs]  # the second run still ran
    assert "failed: RuntimeError: simulated crash" in capsys.readouterr().out
    states = [read_status(f) for f in folders]
    assert [s["state"] for s in states] == ["failed", "finished"]
    assert "simulated crash" in states[0]["error"]  # recorded by the runner in status.json
    sweep_dir = tmp_path / "runs" / "ferry" / "sweeps" / "grid"
    assert [r["state"] for r in json.loads((sweep_dir / "sweep.json").read_text())["runs"]] == ["failed", "finished"]
    comparison = json.loads((sweep_dir / "comparison.json").read_text())
    assert comparison["runs"] == 1  # the failed run is listed as left out, never averaged in
    assert [(i["path"], i["state"]) for i in comparison["incomplete"]] == [(str(folders[0]), "failed")]
    # run again: only the failed run is attempted, and now everything finished
    assert sweep_command(path, [], compare=False) == 0
    assert [c[0] for c in calls[2:]] == [run_id(runs[0])]
    assert capsys.readouterr().out.count(" done") == 1


def test_data_file_changed_mid_sweep_is_caught_and_named(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                                         capsys: pytest.CaptureFixture[str]) -> None:
    data = tmp_path / "data"
    shutil.copytree(FERRY, data)
    path = _write(tmp_path, "grid:\n  train.seed: [1, 2, 3]\n", data=data)
    runs = expand_sweep(load_config(path))
    folders = [tmp_path / "runs" / "ferry" / run_id(r) for r in runs]
    train_csv = data / "train.csv"

    def edit_after_first(n: int, cfg: Config, kw: dict[str, Any]) -> dict[str, Any]:
        if n == 2:  # someone re-exports the training file while the sweep runs
            train_csv.write_text(train_csv.read_text(encoding="utf-8").replace(",refund\n", ",schedule\n", 1),
                                 encoding="utf-8")
        return kw

    calls: list[tuple[str, bool]] = []
    monkeypatch.setattr(runner, "execute_run", _counting(calls, edit_after_first))
    assert run_sweep(load_config(path), "grid", compare=False, log=print)["failed"] == [1, 2]
    out = capsys.readouterr().out
    assert f"data file {train_csv.resolve()}" in out and "not mixed into the sweep" in out
    assert f"failed: data file {train_csv.resolve()} changed since the sweep started" in out
    assert [read_status(f)["state"] for f in folders] == ["finished", "failed", "failed"]
    assert str(train_csv.resolve()) in read_status(folders[2])["error"]
    # a fresh sweep on the new file redoes the run made on the old one too, so none are mixed
    calls.clear()
    monkeypatch.setattr(runner, "execute_run", _counting(calls))
    assert run_sweep(load_config(path), "grid", compare=False, log=print)["failed"] == []
    assert "an earlier attempt read other data" in capsys.readouterr().out
    digests = {json.loads((f / "data.json").read_text())["files"][str(train_csv)] for f in folders}
    assert digests == {file_sha256(train_csv)}


def test_train_size_sweep_draws_a_data_efficiency_curve(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    sweep = """\
    grid:
      model.checkpoint: [toy:decoder]
      method: [{kind: head}, {kind: next_token, template: "Q: {text} A:"}]
      task.train_size: [12, 30]
      train.seed: [1, 2]
    """
    path = _write(tmp_path, sweep, rows=40)
    assert sweep_command(path, []) == 0
    printed = capsys.readouterr().out  # the verdict line, and the caution beside it
    assert "Best: " in printed and "do not carry over" in printed and "check error rates per group" in printed
    sweep_dir = tmp_path / "runs" / "ferry" / "sweeps" / "grid"
    png = (sweep_dir / "data_efficiency.png").read_bytes()
    assert png.startswith(b"\x89PNG\r\n\x1a\n")  # the PNG signature (PNG specification, section 5.2)
    with (sweep_dir / "data_efficiency.csv").open(encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == 4 and {int(r["train_examples"]) for r in rows} == {12, 30}
    assert all(int(r["seeds"]) == 2 for r in rows)
    # each point is the seed mean of the runs' own macro-F1 (numpy mean over metrics.json values)
    index = json.loads((sweep_dir / "sweep.json").read_text())
    for row in rows:
        kind = "head" if " head " in f" {row['series']} " else "next_token"
        values = [json.loads((Path(r["path"]) / "metrics.json").read_text())["metrics"]["macro_f1"]
                  for r in index["runs"] if r["method"] == kind and r["train_size"] == int(row["train_examples"])]
        assert len(values) == 2 and float(row["macro_f1_mean"]) == pytest.approx(float(np.mean(values)))


def test_a_data_finding_is_logged_once_per_sweep_but_kept_in_every_run(tmp_path: Path,
                                                                       caplog: pytest.LogCaptureFixture) -> None:
    data = tmp_path / "data"
    shutil.copytree(FERRY, data)
    train = data / "train.csv"
    rows = train.read_text(encoding="utf-8").splitlines()
    train.write_text("\n".join([*rows, rows[1].replace("fm-train-0001", "fm-train-dup")]) + "\n", encoding="utf-8")
    path = _write(tmp_path, "grid:\n  train.seed: [1, 2]\n", data=data, rows=400)
    with caplog.at_level("WARNING", logger="harness"):
        assert sweep_command(path, [], compare=False) == 0
    shown = [r.getMessage() for r in caplog.records if r.getMessage().startswith("data: ")]
    assert len(shown) == len(set(shown)) >= 1  # the repeated training text is reported, once
    for r in expand_sweep(load_config(path)):
        findings = json.loads((tmp_path / "runs" / "ferry" / run_id(r) / "data.json").read_text())["audit"]["findings"]
        assert set(shown) <= {f"data: {f}" for f in findings}  # each run still records it
