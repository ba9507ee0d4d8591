"""Forecasts: the work of a run from its real tokens, the passes the loop makes, the speed cache, durations.

Nothing here is timed: the speed measurement runs for real on the toy checkpoints, and the tests
check what it reads and writes (log lines, cache files), never how fast it was.
"""

from __future__ import annotations

import csv
import json
import math
from pathlib import Path

import pytest

from harness.config import Config, load_config
from harness.data.task import load_task
from harness.errors import HarnessError
from harness.experiments.forecast import Forecast, forecast_runs, parse_duration
from harness.experiments.speed import Speed, SpeedCache, family_key
from harness.experiments.work import (
    RunWork,
    Tokens,
    TrainPlan,
    count_work,
    encode_run,
    scoring_tokens,
    simulate_training,
)
from harness.files import read_json
from harness.methods.prompt import CONTENT_FREE
from harness.methods.registry import build_method
from harness.runs.run import execute_run
from harness.train.precision import uses_bf16
from tests.common import ferry_config

TRAIN = ["Where is my bag", "The ferry to the island was late again this morning and I missed work",
         "refund please", "Lovely crew, thank you all", "Can I bring a wheelchair on board the early sailing",
         "Lost a blue coat on deck"]
LABELS = ["lost", "schedule", "refund", "praise", "accessibility", "lost"]


def _tiny_task(folder: Path) -> Path:
    """Six training rows, two dev rows, three test rows, written as the ferry task's CSV columns."""
    folder.mkdir(parents=True, exist_ok=True)
    splits = {"train": list(zip(TRAIN, LABELS, strict=True)),
              "dev": [("Is the 9am boat running", "schedule"), ("my phone is lost", "lost")],
              "test": [("thanks for the help", "praise"), ("money back for the cancelled trip", "refund"),
                       ("is there a lift from the car deck to the lounge", "accessibility")]}
    for name, rows in splits.items():
        with open(folder / f"{name}.csv", "w", newline="", encoding="utf-8") as fh:
            writer = csv.writer(fh)
            writer.writerow(["id", "text", "label"])
            writer.writerows([(f"{name}-{i}", text, label) for i, (text, label) in enumerate(rows)])
    return folder


def _config(tmp_path: Path, name: str = "run.yaml", **sections: object) -> Config:
    data = _tiny_task(tmp_path / "data")
    train = {"epochs": 1, "batch_size": 2, "max_length": 8, "batching": "random", **sections.pop("train", {})}  # type: ignore[dict-item]
    return load_config(ferry_config(tmp_path, name, data=data, rows=None, train=train, **sections))


def _work(cfg: Config) -> RunWork:
    data = load_task(cfg.task, seed=cfg.train.seed, base=Path(cfg.source).parent)
    method = build_method(cfg.method.kind, cfg=cfg, data=data)
    return count_work(cfg, method, *encode_run(method, data, cfg))


# ----- work -----------------------------------------------------------------------------------------


def test_work_is_parameters_times_the_real_tokens_counted_by_hand(tmp_path: Path, toy_paths: dict[str, Path]) -> None:
    from transformers import AutoModel, AutoTokenizer

    cfg = _config(tmp_path)
    work = _work(cfg)
    tok = AutoTokenizer.from_pretrained(toy_paths["encoder"])

    def tokens(texts: list[str]) -> int:  # the tokenizer's own count, special tokens in, cut at max_length 8
        return sum(min(len(tok(t)["input_ids"]), 8) for t in texts)

    assert tokens(TRAIN) < sum(len(tok(t)["input_ids"]) for t in TRAIN)  # the long rows are really cut
    assert work.train.real == tokens(TRAIN)  # one epoch: every training row once
    assert work.dev.real == tokens(["Is the 9am boat running", "my phone is lost"])
    assert work.test.real == tokens(["thanks for the help", "money back for the cancelled trip",
                                     "is there a lift from the car deck to the lounge"])
    assert work.train.evaluations == 1  # eval_every 0: one dev evaluation per epoch
    # N: the library's count of non-embedding parameters (PreTrainedModel.num_parameters(exclude_embeddings=True)),
    # less the pooler the head method does not run, plus the fresh head Linear(64, 5) with its bias.
    bare = AutoModel.from_pretrained(toy_paths["encoder"])
    pooler = sum(p.numel() for p in bare.pooler.parameters())
    n = bare.num_parameters(exclude_embeddings=True) - pooler + 64 * 5 + 5
    assert work.params == n
    # Kaplan et al. 2020 (arXiv:2001.08361), section 2.1: 6 N per training token, 2 N per scored token
    assert work.flops() == 6 * n * work.train.real + 2 * n * (work.dev.real + work.test.real)


def test_doubling_epochs_doubles_the_training_work(tmp_path: Path) -> None:
    one = _work(_config(tmp_path, "one.yaml"))
    two = _work(_config(tmp_path, "two.yaml", train={"epochs": 2}))
    assert two.train.real == 2 * one.train.real and two.train_flops() == 2 * one.train_flops()
    assert two.train.evaluations == 2 and len(two.train.step_tokens) == 2 * len(one.train.step_tokens) == 6
    capped = _work(_config(tmp_path, "capped.yaml", train={"epochs": 2, "max_steps": 2}))
    assert len(capped.train.step_tokens) == 2 and capped.train.real < one.train.real  # 4 of the 6 rows


def test_scoring_tokens_by_hand() -> None:
    # lengths sorted [2, 3, 5, 7], batches of 2: [2, 3] padded to 3 -> 6 tokens, [5, 7] padded to 7 -> 14;
    # each row adds 1 real and 2 padded continuation tokens: real 17 + 4, padded 20 + 8
    assert scoring_tokens([3, 5, 2, 7], 2, lambda n: n, Tokens(1, 2)) == Tokens(21, 28)
    assert scoring_tokens([3, 5, 2, 7], 2, lambda n: 8 * math.ceil(n / 8)) == Tokens(17, 32)  # rounded widths


def test_simulated_training_matches_the_steps_and_evaluations_of_the_loop(tmp_path: Path) -> None:
    # epochs 1.5 over 3 batches (6 rows, batch 2): 5 steps; dev after epoch 1 and once at the end (step 5)
    cfg = _config(tmp_path, train={"epochs": 1.5, "batching": "grouped", "log_every": 1})
    plan = _work(cfg).train
    folder = execute_run(cfg, log=lambda _: None)
    lines = [json.loads(ln) for ln in (folder / "log.jsonl").read_text(encoding="utf-8").splitlines()]
    assert len(plan.step_tokens) == read_json(folder / "metrics.json")["cost"]["steps"] == 5
    assert plan.evaluations == sum("dev" in ln for ln in lines) == 2
    cfg = _config(tmp_path, "every.yaml", train={"epochs": 2.5, "eval_every": 2, "grad_accum": 2})
    # 3 batches, accumulating 2: steps after batches 2 and 3 (an epoch's end steps too) -> 2 per epoch, 5 in
    # all; dev at steps 2 and 4 and at the end
    assert simulate_training([4] * 6, [0] * 6, cfg, lambda n: n) == TrainPlan((16, 8, 16, 8, 16), 4 * 6 * 2 + 16, 3)


def test_rank_scoring_counts_the_content_free_inputs_of_calibration(tmp_path: Path, toy_paths: dict[str, Path]) -> None:
    method = {"kind": "prompt", "template": "Message: {text}\nTopic:", "label_words": {
        "lost": "lost item", "schedule": "timetable", "refund": "refund", "praise": "thanks", "accessibility": "lift"}}
    long = {"max_length": 48}  # the template and label words take a dozen toy tokens
    plain = _config(tmp_path, "plain.yaml", checkpoint="toy:decoder", method=method, train=long)
    calibrated = _config(tmp_path, "calibrated.yaml", checkpoint="toy:decoder", method={**method, "calibrate": True},
                         train=long)
    data = load_task(calibrated.task, seed=1, base=tmp_path)
    m = build_method("prompt", cfg=calibrated, data=data)
    _, _, test = encode_run(m, data, calibrated)
    extra = sum(len(s) - 1 for s in m.seqs)  # every label's tokens after the first, after every prompt
    assert max(len(s) for s in m.seqs) > 1  # some label words take two tokens: the continuation pass runs
    free = m.encode(list(CONTENT_FREE), [-1] * 3)  # the content-free inputs, written like a row
    without, with_cf = _work(plain), _work(calibrated)
    assert without.test.real == sum(it.extra["prompt_len"] + extra for it in test)  # type: ignore[index]
    assert with_cf.test.real - without.test.real == sum(it.extra["prompt_len"] + extra for it in free)  # type: ignore[index]
    assert with_cf.train == TrainPlan() and with_cf.train_flops() == 0  # prompt does not train, nor score dev


def test_speed_turns_work_into_seconds_by_hand() -> None:
    work = RunWork(params=10, train=TrainPlan((100, 50), 120, 2), dev=Tokens(30, 40), test=Tokens(20, 25))
    speed = Speed(score_rate=1e-3, overhead=2.0, measured="2026-12-02T10:00:00+0000", seconds=3.0,
                  train_rate=1e-4, first_step=0.5, per_eval=0.25)
    # first step 0.5 + 1e-4 s x 6 x 10 x 150 padded tokens + 2 x (0.25 + 1e-3 x 2 x 10 x 40)
    assert speed.train_seconds(work) == pytest.approx(0.5 + 0.9 + 2 * (0.25 + 0.8))
    assert speed.score_seconds(work) == pytest.approx(1e-3 * 2 * 10 * 25) and speed.date == "2026-12-02"


# ----- the speed cache ------------------------------------------------------------------------------


def _measuring(lines: list[str]) -> list[str]:
    return [ln for ln in lines if ln.startswith("measuring this machine's speed")]


def test_a_cached_speed_is_reused_and_another_machine_measures_again(tmp_path: Path) -> None:
    cfg = _config(tmp_path)
    speeds = tmp_path / "speed"
    lines: list[str] = []
    first = forecast_runs([cfg], log=lines.append, speed_folder=speeds)[0]
    bf16 = ", bf16" if uses_bf16(cfg.train) else ""  # train.bf16 is auto: on where this CPU has bf16 instructions
    assert _measuring(lines) == [f"measuring this machine's speed for toy:encoder head{bf16}, batch 2 (once, cached in "
                                 f"{SpeedCache(1, folder=speeds, log=print).path})"]
    assert first.basis.startswith("calibrated on this machine ") and first.total_seconds is not None
    assert first.total_seconds == first.train_seconds + first.score_seconds + first.overhead_seconds  # type: ignore[operator]
    lines.clear()
    again = forecast_runs([cfg], log=lines.append, speed_folder=speeds)[0]
    assert _measuring(lines) == [] and again == first  # read from the cache: the same numbers, nothing measured
    # Another thread count is another fingerprint: measured again, in a file of its own
    other = _config(tmp_path, "two-threads.yaml", train={"threads": 2})
    assert family_key(other) == family_key(cfg)
    forecast_runs([other], log=lines.append, speed_folder=speeds)
    assert len(_measuring(lines)) == 1 and len(list(speeds.glob("*.json"))) == 2
    # A file copied from another machine (its fingerprint inside) is not this machine's speed
    path = SpeedCache(1, folder=speeds, log=print).path
    data = json.loads(path.read_text(encoding="utf-8"))
    path.write_text(json.dumps({**data, "machine": {**data["machine"], "cpu_model": "another CPU"}}), encoding="utf-8")
    lines.clear()
    forecast_runs([cfg], log=lines.append, speed_folder=speeds)
    assert len(_measuring(lines)) == 1 and read_json(path)["machine"]["cpu_model"] != "another CPU"


def test_a_corrupt_cache_file_is_measured_again_with_a_log_line(tmp_path: Path) -> None:
    cfg = _config(tmp_path)
    speeds = tmp_path / "speed"
    path = SpeedCache(1, folder=speeds, log=print).path
    path.parent.mkdir(parents=True)
    machine = SpeedCache(1, folder=speeds, log=print).machine
    for damage in ('{"format": 1, "machi', json.dumps({"format": 1, "machine": machine, "families": {"x": {"oops": 1}}})):
        path.write_text(damage, encoding="utf-8")
        lines: list[str] = []
        forecast = forecast_runs([cfg], log=lines.append, speed_folder=speeds)[0]
        assert any(ln.startswith(f"speed cache {path} cannot be used") and ln.endswith("measuring again")
                   for ln in lines), lines
        assert len(_measuring(lines)) == 1 and forecast.total_seconds is not None
        assert family_key(cfg) in read_json(path)["families"]  # rewritten whole


def test_without_calibration_nor_finished_runs_the_cost_is_unknown(tmp_path: Path) -> None:
    head = _config(tmp_path)
    prompt = _config(tmp_path, "prompt.yaml", checkpoint="toy:decoder", method={"kind": "prompt"},
                     train={"max_length": 48})
    lines: list[str] = []
    out = forecast_runs([head, prompt], log=lines.append, calibrate=False, speed_folder=tmp_path / "speed")
    assert lines == [] and not (tmp_path / "speed").exists()
    assert [(f.train_seconds, f.score_seconds, f.total_seconds) for f in out] == [(None, None, None), (0.0, None, None)]
    assert all(f.basis == "unknown: not measured on this machine, no finished run like it" for f in out)
    assert all(isinstance(f, Forecast) and f.work and f.work > 0 for f in out)  # the work is known all the same


def test_a_run_that_cannot_start_is_said_so_not_raised(tmp_path: Path) -> None:
    cfg = _config(tmp_path, method={"kind": "prompt"})  # toy:encoder has no next-token layer
    out = forecast_runs([cfg], log=lambda _: None, speed_folder=tmp_path / "speed")[0]
    # the setting placed at its line, as the runner places it
    assert out.basis.startswith(f"cannot run: 'model.checkpoint' in {cfg.source} line ") and "an encoder" in out.basis
    assert out.total_seconds is None and out.work is None


# ----- durations ------------------------------------------------------------------------------------


@pytest.mark.parametrize(("text", "seconds"), [("15m", 900), ("90s", 90), ("1h30m", 5400), ("2.5h", 9000),
                                               ("1h 5m 3s", 3903), (" 45M ", 2700), (".5m", 30)])
def test_durations(text: str, seconds: float) -> None:
    assert parse_duration(text) == seconds


@pytest.mark.parametrize("text", ["15x", "", "15", "m", "1m1h", "-5m", "1.2.3h", "0m", "0s"])
def test_bad_durations_are_refused_naming_the_option(text: str) -> None:
    with pytest.raises(HarnessError) as err:
        parse_duration(text)
    message = str(err.value)
    assert message.startswith(f"--budget {text!r}: ") and "\n" not in message
    assert ("longer than 0" in message) if text in ("0m", "0s") else message.endswith(
        "expected a duration like 15m, 90s or 1h30m")
    with pytest.raises(HarnessError, match="^--time-limit "):
        parse_duration(text, option="--time-limit")


def test_a_failed_measurement_leaves_the_run_unknown_with_the_reason(tmp_path: Path,
                                                                      monkeypatch: pytest.MonkeyPatch) -> None:
    from harness.runs import run as runner

    def refuse(cfg: Config, **_: object) -> Path:
        raise HarnessError("data file vanished")

    monkeypatch.setattr(runner, "execute_run", refuse)  # looked up at call time by the measurement
    lines: list[str] = []
    cfg = _config(tmp_path)
    out = forecast_runs([cfg], log=lines.append, speed_folder=tmp_path / "speed")[0]
    bf16 = ", bf16" if uses_bf16(cfg.train) else ""  # train.bf16 is auto: on where this CPU has bf16 instructions
    assert lines[-1] == f"could not measure toy:encoder head{bf16}, batch 2: data file vanished"
    assert out.basis == "unknown: measuring failed (data file vanished)" and out.total_seconds is None
    assert not (tmp_path / "speed").exists()  # nothing cached: the next dry run measures again


def test_a_finished_run_reports_what_it_took_or_that_it_was_not_recorded(tmp_path: Path) -> None:
    from harness.files import atomic_write_json
    from harness.runs.folders import run_folder, write_status

    done, bare = _config(tmp_path), _config(tmp_path, "bare.yaml", train={"seed": 2})
    for cfg, cost in ((done, {"train_seconds": 4.0, "eval_seconds": 0.25}), (bare, {"steps": 3})):
        folder = run_folder(cfg)
        folder.mkdir(parents=True)
        atomic_write_json(folder / "metrics.json", {"metrics": {}, "cost": cost})
        write_status(folder, "finished")
    lines: list[str] = []
    out = forecast_runs([done, bare], log=lines.append, speed_folder=tmp_path / "speed")
    assert (out[0].train_seconds, out[0].score_seconds, out[0].total_seconds) == (4.0, 0.25, 4.25)
    assert out[0].basis == "measured (finished)" and out[1].basis == "finished, cost not recorded"
    assert out[1].total_seconds is None and lines == []  # nothing left to run: nothing measured


def test_the_share_of_the_cpu_other_processes_used_while_measuring() -> None:
    import psutil

    from harness.experiments.speed import others_share

    cores = psutil.cpu_count() or 1
    # the machine was busy 30 CPU seconds in 10 s of wall time, 10 of them this process's: others used 20
    assert others_share((100.0, 10.0), (130.0, 20.0), 10.0) == pytest.approx(min(1.0, 20 / (10 * cores)))
    assert others_share((100.0, 10.0), (105.0, 15.0), 10.0) == 0.0  # only this process: an idle machine
    assert others_share((0.0, 0.0), (1.0, 0.0), 0.0) is None
