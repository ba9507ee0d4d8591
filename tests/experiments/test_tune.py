"""Tuning trials (sweep.tune): load-time refusals, seeded draws, trials on dev only, the choice, the budget."""

from __future__ import annotations

import json
import math
import textwrap
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import yaml

from harness.cli import main
from harness.config import load_config
from harness.config.tune_space import draw_settings
from harness.errors import HarnessError
from harness.experiments.budget import fit_budget, sweep_cost
from harness.experiments.sweep import expand_planned, run_sweep
from harness.experiments.tune import choose_settings, trial_runs
from harness.files import read_json
from harness.runs.folders import run_folder
from tests.common import ferry_config

TUNED = """\
arms:
  - {method.kind: head}
  - {model.checkpoint: "toy:decoder", method.kind: next_token}
  - {model.checkpoint: "toy:decoder", method.kind: prompt}
grid: {train.seed: [1, 2]}
tune:
  trials: 3
  space:
    train.learning_rate: {low: 1.0e-4, high: 1.0e-2, scale: log}
    train.head_learning_rate: {low: 1.0e-3, high: 1.0e-1, scale: log}
    train.batch_size: {values: [4, 8]}
"""


def _write(tmp_path: Path, sweep: str, name: str = "tuned.yaml") -> Path:
    return ferry_config(tmp_path, name, method={"kind": "head", "template": "Q: {text} A:"},
                        sweep=yaml.safe_load(textwrap.dedent(sweep)))


def _line_of(path: Path, text: str) -> int:
    return next(i for i, line in enumerate(path.read_text().splitlines(), 1) if text in line)


@pytest.mark.parametrize(("space", "needle"), [
    ("train.learning_rate: {low: 3.0e-4, high: 1.0e-5}", "empty range"),
    ("train.learning_rate: {low: -1.0e-5, high: 3.0e-4}", "must be greater than 0"),
    ("train.learning_rate: {low: 0.0, high: 3.0e-4, scale: log}", "log scale needs low above 0"),
    ("train.learning_rate: {low: 1.0e-5, high: 3.0e-4, scale: cubic}", "scale 'cubic' is not allowed"),
    ("train.batch_size: {values: []}", "empty list of values"),
    ("train.batch_size: {values: [8, 8]}", "repeat"),
    ("train.batch_size: {values: [8, 0]}", "must be at least 1"),
    ("train.lerning_rate: {values: [0.1]}", "did you mean 'train.learning_rate'"),
    ("model.checkpoint: {values: ['toy:encoder']}", "cannot be tuned"),
    ("train.seed: {values: [1, 2]}", "cannot be tuned"),
    ("train.epochs: {low: 1}", "expected {low: A, high: B"),
])
def test_bad_search_space_refused_at_load_with_key_and_line(tmp_path: Path, space: str, needle: str) -> None:
    path = _write(tmp_path, f"arms: [{{method.kind: head}}]\ntune:\n  trials: 2\n  space:\n    {space}\n")
    key = space.split(":")[0]
    with pytest.raises(HarnessError) as err:
        load_config(path)
    message = str(err.value)
    assert needle in message and "\n" not in message
    assert f"sweep.tune.space.{key}" in message and f"line {_line_of(path, key + ':')}" in message


@pytest.mark.parametrize(("sweep", "needle"), [
    ("arms: [{method.kind: head}]\ntune: {trials: 2, space: {}}\n", "search space is empty"),
    ("arms: [{method.kind: head}]\ntune: {trials: 0, space: {train.epochs: {values: [1]}}}\n", "at least 1"),
    ("arms: [{method.kind: prompt}]\ntune: {trials: 2, space: {train.epochs: {values: [1]}}}\n",
     "no arm trains anything"),
    ("arms: [{method.kind: head, tune: {train.epochs: {values: [1]}}}]\n", "has no sweep.tune block"),
    ("arms: [{method.kind: head}]\nbudget: 15 minutes\n", "expected a duration like 15m"),
])
def test_bad_tune_block_refused_at_load(tmp_path: Path, sweep: str, needle: str) -> None:
    with pytest.raises(HarnessError, match=needle):
        load_config(_write(tmp_path, sweep))


def test_an_arms_own_space_is_checked_too(tmp_path: Path) -> None:
    sweep = ("arms: [{method.kind: head, tune: {train.learning_rate: {low: 1.0, high: 0.5}}}]\n"
             "tune: {trials: 2, space: {train.epochs: {values: [1]}}}\n")
    with pytest.raises(HarnessError, match=r"arm 1 'tune' key 'train.learning_rate'.*empty range"):
        load_config(_write(tmp_path, sweep))


def test_draws_are_seeded_in_range_and_shared_between_arms(tmp_path: Path) -> None:
    space = {"train.learning_rate": {"low": 1e-5, "high": 1e-3, "scale": "log"},
             "train.batch_size": {"low": 4, "high": 6}, "train.epochs": {"values": [1, 2, 3]}}
    draws = [draw_settings(space, 7, t) for t in range(200)]
    assert draws[:5] == [draw_settings(space, 7, t) for t in range(5)]  # the same seed gives the same draws
    assert draws[:5] != [draw_settings(space, 8, t) for t in range(5)]
    assert all(1e-5 <= d["train.learning_rate"] <= 1e-3 for d in draws)
    assert {d["train.batch_size"] for d in draws} == {4, 5, 6}  # whole numbers, both ends included
    assert {d["train.epochs"] for d in draws} == {1, 2, 3}
    # log-uniform: the median of log10(lr) sits near the middle of [-5, -3] (common practice for learning rates)
    assert abs(float(np.median([math.log10(d["train.learning_rate"]) for d in draws])) + 4.0) < 0.25
    # a key's draw does not depend on the other keys of the space (common random numbers across arms)
    alone = [draw_settings({"train.epochs": space["train.epochs"]}, 7, t) for t in range(20)]
    assert [d["train.epochs"] for d in alone] == [d["train.epochs"] for d in draws[:20]]


def test_trials_are_trial_major_on_dev_with_one_seed(tmp_path: Path) -> None:
    cfg = load_config(_write(tmp_path, TUNED))
    trials = trial_runs(cfg)
    assert [(t.arm, t.index) for t in trials] == [(0, 0), (1, 0), (0, 1), (1, 1), (0, 2), (1, 2)]  # prompt: untuned
    assert {t.cfg.train.seed for t in trials} == {1} and {t.cfg.eval.score_on for t in trials} == {"dev"}
    assert "train.head_learning_rate" in trials[0].settings
    assert "train.head_learning_rate" not in trials[1].settings  # next_token has no fresh head
    assert trials[0].settings["train.learning_rate"] == trials[1].settings["train.learning_rate"]  # shared draw
    assert all(t.cfg.train.learning_rate == t.settings["train.learning_rate"] for t in trials)
    assert len(trial_runs(cfg, 2)) == 4 and trial_runs(cfg, 2) == trials[:4]  # a trim keeps the first draws


def test_tuned_sweep_chooses_on_dev_and_runs_every_seed_on_test(tmp_path: Path) -> None:
    path = _write(tmp_path, TUNED)
    cfg = load_config(path)
    logs: list[str] = []
    summary = run_sweep(cfg, "tuned", log=logs.append)
    assert not summary["failed"]
    trials = trial_runs(cfg)
    for trial in trials:  # a trial scored dev, never test: its predictions are the dev rows
        folder = run_folder(trial.cfg)
        ids = [json.loads(line)["id"] for line in (folder / "predictions.jsonl").read_text().splitlines()]
        assert ids and all(i.startswith("fm-dev-") for i in ids)  # the committed ids of dev.csv
        assert read_json(folder / "metrics.json")["scored_on"] == "dev"
        assert "Dev scores (a tuning trial" in (folder / "report.md").read_text()
    tuning = read_json(Path(summary["folder"]) / "tuning.json")
    for arm in tuning["arms"]:
        devs = [t["dev"] for t in arm["trials"]]
        best = max(range(len(devs)), key=lambda i: (devs[i], -i))  # the best dev score, the earlier on a tie
        assert arm["chosen_trial"] == best and arm["chosen"] == arm["trials"][best]["settings"]
    finals = [r for r in summary["runs"] if r["role"] == "run"]
    assert len(finals) == 5  # two tuned arms x two seeds, plus zero-shot prompt once
    for record in finals:
        run = yaml.safe_load(Path(record["path"], "config.yaml").read_text())
        assert run["eval"]["score_on"] == "test"
        arm = next((a for a in tuning["arms"] if a["arm"].split(" · ")[1] == run["method"]["kind"]), None)
        if arm is not None:
            assert run["train"]["learning_rate"] == arm["chosen"]["train.learning_rate"]
    comparison = Path(summary["folder"], "comparison.md").read_text()
    assert "## Tuning" in comparison and "expected_best_by_trials.png" in comparison
    assert summary["comparison"]["runs"] == 5  # the trials are not among the compared runs
    again: list[str] = []
    run_sweep(cfg, "tuned", log=again.append)  # resumable: everything is done
    assert not any(line.endswith("running") for line in again)


def test_an_arm_whose_trials_all_fail_runs_no_seeds(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    from harness.runs import run as runner

    real = runner.execute_run

    def broken_decoder(cfg: Any, **kw: Any) -> Any:
        if cfg.eval.score_on == "dev" and cfg.method.kind == "next_token":
            raise RuntimeError("boom")
        return real(cfg, **kw)

    monkeypatch.setattr(runner, "execute_run", broken_decoder)
    logs: list[str] = []
    summary = run_sweep(load_config(_write(tmp_path, TUNED)), "tuned", log=logs.append)
    assert 1 in summary["held"] and "none of its 3 trials finished" in summary["held"][1]
    assert any("arm 2: none of its 3 trials finished" in line for line in logs)
    kinds = [r["method"] for r in summary["runs"] if r["role"] == "run"]
    assert "next_token" not in kinds and kinds.count("head") == 2


def _fake_forecast(runs: Any) -> list[tuple[float, float]]:
    """(training, total) seconds: 50 + 10 s per trained run, 10 s per prompt run; a stand-in for the machine's."""
    return [(0.0, 10.0) if r.method.kind == "prompt" else (50.0 * r.train.epochs, 60.0 * r.train.epochs) for r in runs]


def test_budget_trims_trials_then_seeds_by_the_stated_rule(tmp_path: Path) -> None:
    sweep = TUNED.replace("train.seed: [1, 2]", "train.seed: [1, 2, 3]").replace("trials: 3", "trials: 4")
    cfg = load_config(_write(tmp_path, sweep))
    # as written: 2 arms x 4 trials x 60 s; seeds 2 and 3 at the dearest trial (2 x 2 x 60 s); the tune seed's
    # runs take over their trial's training (2 x 10 s); the zero-shot prompt once (10 s): 750 s
    assert sweep_cost(cfg, None, _fake_forecast, expand_planned) == pytest.approx(750.0)
    logs: list[str] = []
    fitted = fit_budget(cfg, "10m", logs.append, expand_planned, _fake_forecast)  # 3 trials: 630 s; 2: 510 s
    assert fitted.trials == 2 and len(fitted.cfg.sweep.grid["train.seed"]) == 3
    with pytest.raises(HarnessError, match="even trimmed to 2 trials per arm and 2 seeds"):
        fit_budget(cfg, "6m", logs.append, expand_planned, _fake_forecast)  # the smallest sweep needs 390 s
    fitted = fit_budget(cfg, "6m40s", logs.append, expand_planned, _fake_forecast)
    assert fitted.trials == 2 and fitted.cfg.sweep.grid["train.seed"] == (1, 2)
    assert "trimmed to fit" in (fitted.note or "")
    assert fit_budget(cfg, "13m", logs.append, expand_planned, _fake_forecast).trials == 4  # fits as written


def test_budget_refuse_names_the_trials_key_and_line(tmp_path: Path) -> None:
    path = _write(tmp_path, TUNED + "over_budget: refuse\nbudget: 5m\n")
    cfg = load_config(path)
    with pytest.raises(HarnessError) as err:
        fit_budget(cfg, None, lambda _: None, expand_planned, _fake_forecast)
    assert f"'sweep.tune.trials' in {path} line {_line_of(path, 'trials:')}" in str(err.value)
    assert "over the budget of 5.0 min" in str(err.value)


def test_planned_sweep_shows_tuned_arms_until_they_choose(tmp_path: Path) -> None:
    cfg = load_config(_write(tmp_path, TUNED))
    trials, finals, stand_in = expand_planned(cfg)
    assert len(trials) == 6 and len(finals) == 5 and stand_in == [0, 0, 1, 1, None]
    chosen, held, _ = choose_settings(cfg, trials)
    assert not chosen and set(held) == {0, 1} and "3 of its 3 trials are not finished" in held[0]


def test_cli_bad_budget_is_one_line_and_exit_2(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = _write(tmp_path, TUNED)
    assert main(["sweep", str(path), "--budget", "soon", "--dry-run"]) == 2
    err = capsys.readouterr().err.strip()
    assert "--budget 'soon'" in err and len(err.splitlines()) == 1
    assert not (tmp_path / "runs").exists()  # nothing written


def test_shards_share_the_trials_and_split_the_seeds(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    from harness.experiments.sweep import parse_shard
    from harness.runs import run as runner

    real, ran = runner.execute_run, []

    def counting(cfg: Any, **kw: Any) -> Any:
        ran.append(run_folder(cfg).name)
        return real(cfg, **kw)

    monkeypatch.setattr(runner, "execute_run", counting)
    cfg = load_config(_write(tmp_path, TUNED))
    first = run_sweep(cfg, "tuned", shard=parse_shard("0/2"), compare=False, log=lambda _: None)
    # shard 0 found nobody running shard 1's trials, so it ran them too, then only its own share of the seeds
    assert len(ran) == 6 + 3 and not first["held"]
    second = run_sweep(cfg, "tuned", shard=parse_shard("1/2"), compare=False, log=lambda _: None)
    assert len(ran) == 6 + 5 and len(set(ran)) == 11 and not second["failed"]  # every run exactly once


def test_the_tune_seed_run_takes_over_its_trials_training_and_matches_training_again(tmp_path: Path) -> None:
    import dataclasses

    from harness.runs.run import execute_run

    cfg = load_config(_write(tmp_path, TUNED))
    summary = run_sweep(cfg, "tuned", compare=False, log=lambda _: None)
    taken = []
    for record in summary["runs"]:
        if record["role"] == "run" and record["method"] != "prompt":
            cost = read_json(Path(record["path"], "metrics.json"))["cost"]
            taken.append((record["seed"], cost.get("training_from")))
    # seed 1 is the tune seed: those runs trained nothing themselves; seed 2 trained
    assert sorted(seed for seed, source in taken if source) == [1, 1]
    assert all(source is None for seed, source in taken if seed == 2)
    record = next(r for r in summary["runs"] if r["role"] == "run" and r["method"] == "head" and r["seed"] == 1)
    run = load_config(Path(record["path"], "config.yaml"))
    again = execute_run(dataclasses.replace(run, output=str(tmp_path / "again")), log=lambda _: None)
    assert "training_from" not in read_json(again / "metrics.json")["cost"]

    def probs(folder: Path) -> list[Any]:
        return [json.loads(line)["probs"] for line in (folder / "predictions.jsonl").read_text().splitlines()]

    # training is seeded and never reads the scored split (common practice: seeded training is repeatable on one
    # machine and thread count), so taking the trial's weights equals training again, to the last bit
    assert probs(Path(record["path"])) == probs(again)
    assert read_json(Path(record["path"], "metrics.json"))["cost"]["train_seconds"] > 0  # the trial's own cost
