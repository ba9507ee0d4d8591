"""Every run's cost before a sweep runs anything: its work (harness.experiments.work) at this machine's speed
(harness.experiments.speed).

`forecast_runs` gives one `Forecast` per run, each with its basis:
- "measured (finished)": a finished run reports the seconds its metrics.json recorded (training with
  its dev evaluations, and the test scoring; loading and the report are not recorded there);
- "calibrated on this machine DATE": the family's speed, measured here (once, then cached);
- "from N finished runs, calibrated DATE": that speed, scaled so that it matches what the finished
  runs of the same family took here (training and scoring each by its own factor);
- "from N finished runs": no speed measured, the finished runs' seconds per unit of work;
- "unknown ...": neither (with `calibrate=False` and nothing cached), or the run cannot start.
`parse_duration` reads budgets such as "15m", "90s", "1h30m" or "2.5h".
"""

from __future__ import annotations

import json
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from harness.config import Config, config_folder, config_to_dict, key_location
from harness.config.tune_space import parse_duration
from harness.data.task import TaskData, load_task
from harness.errors import HarnessError, SettingError
from harness.experiments.speed import Speed, SpeedCache, family_key, family_name, measure_speed
from harness.experiments.steps import run_state
from harness.experiments.work import RunWork, count_work, encode_run
from harness.files import read_json
from harness.methods.registry import build_method
from harness.runs.folders import run_folder, run_id
from harness.train.loop import resolve_threads

__all__ = ["Forecast", "forecast_runs", "parse_duration"]

Log = Callable[[str], None]
@dataclass(frozen=True)
class Forecast:
    """One run's forecast cost in seconds (None: unknown) and what it rests on."""

    run_id: str
    train_seconds: float | None  # training with its dev evaluations (0 for a method that does not train)
    score_seconds: float | None  # the final scoring (test, or dev where the run scores dev)
    overhead_seconds: float | None  # loading, audit, files, model export, report (None: not known)
    basis: str
    work: float | None  # FLOPs on real tokens: 6 N x training tokens + 2 N x scored tokens (Kaplan et al. 2020)
    family: str = ""  # the speed family in words

    @property
    def total_seconds(self) -> float | None:
        """Training + scoring + overhead (an unknown overhead counts 0); None when training or scoring is unknown."""
        if self.train_seconds is None or self.score_seconds is None:
            return None
        return self.train_seconds + self.score_seconds + (self.overhead_seconds or 0.0)


def _measured(cfg: Config) -> tuple[float, float] | None:
    """(train_seconds, eval_seconds) from a finished run's metrics.json, or None when not recorded."""
    try:
        cost = read_json(run_folder(cfg) / "metrics.json").get("cost", {})
    except (HarnessError, AttributeError):
        return None
    train, score = cost.get("train_seconds"), cost.get("eval_seconds")
    if isinstance(train, (int, float)) and isinstance(score, (int, float)):
        return float(train), float(score)
    return None


def _encoding_key(cfg: Config, data: TaskData) -> str:
    """Runs whose rows one built method encodes alike: same checkpoint, method settings, length and labels
    (and seed, for a few-shot prompt: its demonstrations are drawn with it)."""
    d = config_to_dict(cfg)
    seed = cfg.train.seed if cfg.method.kind == "prompt" and cfg.method.shots else None
    return json.dumps([d["model"], d["method"], cfg.train.max_length, list(data.label_names), seed], sort_keys=True)


def _count(runs: Sequence[Config], which: Sequence[int]) -> tuple[dict[int, RunWork], dict[int, str]]:
    """Work of the runs `which` (one checkpoint load per group of alike runs), and why a run cannot start."""
    datas: dict[str, TaskData] = {}
    groups: dict[str, list[int]] = {}
    for i in which:
        cfg = runs[i]
        key = json.dumps([config_to_dict(cfg)["task"], cfg.train.seed], sort_keys=True)
        if key not in datas:  # the same base folder as the runner's
            datas[key] = load_task(cfg.task, seed=cfg.train.seed, base=config_folder(cfg))
        groups.setdefault(_encoding_key(cfg, datas[key]), []).append(i)
    works: dict[int, RunWork] = {}
    problems: dict[int, str] = {}
    for members in groups.values():
        first = runs[members[0]]
        try:  # one method (one loaded checkpoint) at a time, dropped when its group is counted
            method = build_method(first.method.kind, cfg=first, data=_data(datas, first))
            for i in members:
                works[i] = count_work(runs[i], method, *encode_run(method, _data(datas, runs[i]), runs[i]))
        except HarnessError as exc:  # the run will fail the same way; the plan says so instead of stopping
            for i in members:
                problems[i] = _located(runs[i], exc)
    return works, problems


def _located(cfg: Config, exc: HarnessError) -> str:
    """The error's first line, a setting placed at its line in the config file (as the runner places it)."""
    if isinstance(exc, SettingError) and exc.where is None and Path(cfg.source).is_file():
        exc = exc.located(key_location(cfg, exc.key))
    return (str(exc).splitlines() or [type(exc).__name__])[0]


def _data(datas: dict[str, TaskData], cfg: Config) -> TaskData:
    return datas[json.dumps([config_to_dict(cfg)["task"], cfg.train.seed], sort_keys=True)]


def _busy(speed: Speed) -> str:
    """A note when other processes used much of the CPU while the speed was measured (a shared machine)."""
    if speed.others is None or speed.others < 0.25:
        return ""
    return (f" (other processes used {speed.others:.0%} of this machine's CPU meanwhile: this is its speed "
            "while shared so, and the runs will be as fast only if it stays so)")


def _units(work: RunWork) -> tuple[float, float]:
    """(training, scoring) padded FLOPs, the dev evaluations counted with training (as train_seconds counts them)."""
    return work.train_flops(padded=True) + work.dev_flops(padded=True), work.test_flops(padded=True)


def _ratio(measured: float, predicted: float) -> float:
    return measured / predicted if predicted > 0 else 1.0


def _forecast(rid: str, name: str, work: RunWork, speed: Speed | None,
              done: Sequence[tuple[RunWork, float, float]], unknown: str, serves: bool = True) -> Forecast:
    trains = bool(work.train.step_tokens)
    flops = work.flops()
    if speed is not None:
        train, score = speed.train_seconds(work), speed.score_seconds(work)
        # a run scored on test then times single rows for its serving cost (harness.runs.serving)
        overhead = speed.overhead + (speed.serving_seconds() if serves else 0.0)
        if not done:
            return Forecast(rid, train, score, overhead, f"calibrated on this machine {speed.date}", flops, name)
        train *= _ratio(sum(t for _, t, _ in done), sum(speed.train_seconds(w) for w, _, _ in done))
        score *= _ratio(sum(s for _, _, s in done), sum(speed.score_seconds(w) for w, _, _ in done))
        return Forecast(rid, train, score, overhead,
                        f"from {len(done)} finished runs, calibrated {speed.date}", flops, name)
    if done:
        train_units, score_units = _units(work)
        per_train = sum(t for _, t, _ in done) / max(sum(_units(w)[0] for w, _, _ in done), 1.0)
        per_score = sum(s for _, _, s in done) / max(sum(_units(w)[1] for w, _, _ in done), 1.0)
        train_s = per_train * train_units if trains else 0.0
        return Forecast(rid, train_s, per_score * score_units, None, f"from {len(done)} finished runs", flops, name)
    return Forecast(rid, None if trains else 0.0, None, None, unknown, flops, name)


def forecast_runs(runs: Sequence[Config], *, log: Log, calibrate: bool = True,
                  speed_folder: Any = None) -> list[Forecast]:
    """One Forecast per run, in order (see the module docstring for the bases).

    With `calibrate`, a family without a cached speed is measured first (a few seconds each, said in the
    log before it starts); without, such runs are forecast from finished runs like them, or unknown.
    `speed_folder` replaces the speed cache folder (`harness.experiments.speed.speed_dir()`).
    """
    states = [str(run_state(run_folder(cfg))["state"]) for cfg in runs]
    threads = [resolve_threads(cfg.train.threads) for cfg in runs]
    fams = [(threads[i], family_key(cfg)) for i, cfg in enumerate(runs)]
    open_fams = {fams[i] for i, state in enumerate(states) if state != "finished"}
    works, problems = _count(runs, [i for i in range(len(runs)) if fams[i] in open_fams])
    caches: dict[int, SpeedCache] = {}
    speeds: dict[tuple[int, str], Speed | None] = {}
    failed: dict[tuple[int, str], str] = {}
    for i, cfg in enumerate(runs):
        fam = fams[i]
        if fam not in open_fams or fam in speeds or states[i] == "finished" or i in problems:
            continue
        if fam[0] not in caches:
            caches[fam[0]] = SpeedCache(fam[0], folder=speed_folder, log=log)
        cache = caches[fam[0]]
        speed = cache.get(fam[1])
        if speed is None and calibrate:
            log(f"measuring this machine's speed for {family_name(cfg)} (once, cached in {cache.path})")
            try:
                speed = measure_speed(cfg)
            except HarnessError as exc:
                failed[fam] = _located(cfg, exc)
                log(f"could not measure {family_name(cfg)}: {failed[fam]}")
            else:
                cache.put(fam[1], speed)
                log(f"measured {family_name(cfg)} in {speed.seconds:.1f} s" + _busy(speed))
        speeds[fam] = speed
    done: dict[tuple[int, str], list[tuple[RunWork, float, float]]] = {}
    for i, cfg in enumerate(runs):
        seconds = _measured(cfg) if states[i] == "finished" else None
        if seconds is not None and i in works:
            done.setdefault(fams[i], []).append((works[i], *seconds))
    out = []
    for i, cfg in enumerate(runs):
        rid, name = run_id(cfg), family_name(cfg)
        if states[i] == "finished":
            seconds = _measured(cfg)
            work = works[i].flops() if i in works else None
            out.append(Forecast(rid, None, None, None, "finished, cost not recorded", work, name) if seconds is None
                       else Forecast(rid, seconds[0], seconds[1], None, "measured (finished)", work, name))
        elif i in problems:
            out.append(Forecast(rid, None, None, None, f"cannot run: {problems[i]}", None, name))
        else:
            why = (f"unknown: measuring failed ({failed[fams[i]]})" if fams[i] in failed
                   else "unknown: not measured on this machine, no finished run like it")
            out.append(_forecast(rid, name, works[i], speeds.get(fams[i]), done.get(fams[i], []), why,
                                 serves=cfg.eval.score_on == "test"))
    return out
