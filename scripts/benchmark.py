"""Speed benchmark: the harness against the library's Trainer and a careful plain loop; scoring, utilisation, memory.

    python scripts/benchmark.py                 # full: 2,000 train / ~1,000 test, 2 epochs, 3 seeds
    python scripts/benchmark.py --quick         # smoke run: a few hundred examples, 1 seed
    python scripts/benchmark.py --threads 1     # force the thread count of every contender
    python scripts/benchmark.py --resume        # after an interruption: keep the jobs that finished
    python scripts/benchmark.py --only training,memory   # some groups only (training, memory, scoring,
                                                # ablation, memory-ablations; default: all but the last)
    python scripts/benchmark.py --forecast-sweep runs/ferry-bakeoff/sweeps/bakeoff   # forecasts vs a sweep run
    python scripts/benchmark.py --forecast      # forecast accuracy: the bake-off sweep forecast, then run
                                                # (configs/bakeoff.yaml; writes docs/forecast_accuracy.md/.json)

Contenders (bench.jobs.CONTENDERS) run one after another in fresh subprocesses (so peak memory is
per contender), their order rotated by one place from one seed to the next so that machine drift
hits every contender alike. Throughput counts training alone for all of them (examples seen /
seconds of training; evaluation and checkpoint writes excluded). Writes
bench.json (every raw number) and bench.md (the tables) to --out (default bench_out/).
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path
from typing import Any

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

from bench.flops import machine_info, matmul_flops_per_second, run_job  # noqa: E402
from bench.jobs import CONTENDERS  # noqa: E402
from bench.report import render_markdown, summarise  # noqa: E402

# The two packaged data sets, split as configs/sms_spam_minilm.yaml and configs/question_types_minilm.yaml do.
TASKS = {
    "sms-spam": ({"name": "sms-spam", "train": "asset:sms-spam", "test_fraction": 0.18, "dev_fraction": 0.05,
                  "split_seed": 0}, 128),
    "question-types": ({"name": "question-types", "train": "asset:question-types", "dedupe": True,
                        "test_fraction": 0.186, "dev_fraction": 0.05, "split_seed": 0}, 64),
}
# The harness settings under test (beyond its defaults); each is also measured switched back in the ablations.
HARNESS_SETTINGS = {"train.bf16": True, "method.freeze": "embeddings"}
FULL: dict[str, Any] = {"train_size": 2000, "max_rows": None, "epochs": 2, "seeds": (13, 14, 15),
        "decoder": {"layers": 4, "train_size": 800, "max_rows": None, "epochs": 2},
        "ablation_examples": 320, "scoring": {"prompts": 64, "repeats": 5, "layers": None}}
QUICK: dict[str, Any] = {"train_size": 160, "max_rows": 160, "epochs": 1, "seeds": (13,),
         "decoder": {"layers": 2, "train_size": 96, "max_rows": 96, "epochs": 1},
         "ablation_examples": 64, "scoring": {"prompts": 16, "repeats": 2, "layers": 4}}


def training_jobs(plan: dict[str, Any], threads: int | None, decoder_folder: Path) -> list[dict[str, Any]]:
    """Every contender on every model, task and seed; the contender order rotates by one from one seed to the next."""
    jobs = []
    dec = plan["decoder"]
    models = [("minilm-l6", "asset:minilm-l6", plan["train_size"], plan["max_rows"], plan["epochs"]),
              (f"smollm2-135m-{dec['layers']}layers", str(decoder_folder), dec["train_size"], dec["max_rows"],
               dec["epochs"])]
    for model, checkpoint, size, rows, epochs in models:
        for task, (split, max_length) in TASKS.items():
            for i, seed in enumerate(plan["seeds"]):
                common = {"model": model, "task_name": task, "task": {**split, "train_size": size, "max_rows": rows},
                          "checkpoint": checkpoint, "epochs": epochs, "batch_size": 16, "learning_rate": 1e-4,
                          "max_length": max_length, "seed": seed, "threads": threads}
                turn = i % len(CONTENDERS)
                for kind in CONTENDERS[turn:] + CONTENDERS[:turn]:
                    extra = {"settings": HARNESS_SETTINGS} if kind == "harness" else {}
                    jobs.append({**common, "kind": kind, **extra, "id": f"{kind}-{model}-{task}-s{seed}"})
    return jobs


def run_memory_jobs(threads: int | None) -> list[dict[str, Any]]:
    """Whole runs as users launch them (bench.memory): the bake-off's SmolLM2 arms, a MiniLM head at the defaults."""
    from bench.memory import MEMORY_RUNS

    task = {**TASKS["sms-spam"][0], "train_size": FULL["train_size"]}
    return [{"kind": "memory", "id": f"memory-run-{i}", "memory_run": name, "task": task, "threads": threads}
            for i, name in enumerate(MEMORY_RUNS, 1)]


GROUPS = ("training", "memory", "scoring", "ablation", "memory-ablations")
DEFAULT_GROUPS = GROUPS[:4]


# Memory ablations: harness runs on sms-spam with one choice undone or one setting added, each in its own
# process; "every seed" variants run once per seed, so that their accuracy can be held against the reference's.
ATTENTION_OFF = "model.attention_dropout = 0 (a setting, off by default)"
MEMORY_VARIANTS: dict[str, tuple[dict[str, Any], bool]] = {
    "exact batch widths (not rounded up to 8)": ({"pad_multiple": 1}, False),
    "glibc's adaptive heap (no fixed mmap threshold)": ({"heap": "default"}, False),
    ATTENTION_OFF: ({"settings": {**HARNESS_SETTINGS, "model.attention_dropout": 0.0}}, True),
}


def memory_jobs(jobs: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """Copies of the MiniLM sms-spam harness jobs (the first seed, or every seed), each with one MEMORY_VARIANTS patch."""
    bases = [j for j in jobs if j["kind"] == "harness" and j["model"] == "minilm-l6" and j["task_name"] == "sms-spam"]
    # (the base runs are part of the training group: memory-ablations adds them when training is not chosen)
    return [{**base, **patch, "kind": "harness", "memory_variant": name, "id": f"memory-{i}-{base['id']}"}
            for i, (name, (patch, every_seed)) in enumerate(MEMORY_VARIANTS.items(), 1)
            for base in (bases if every_seed else bases[:1])]


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--quick", action="store_true", help="a smoke run: few examples, one seed")
    parser.add_argument("--out", default=None, help="output folder (default bench_out/; docs/ with --forecast)")
    parser.add_argument("--forecast", nargs="?", const=str(REPO / "configs" / "bakeoff.yaml"), default=None,
                        metavar="CONFIG", help="measure forecast accuracy instead: forecast every run of CONFIG's "
                                               "sweep (default configs/bakeoff.yaml), run them, compare")
    parser.add_argument("--forecast-sweep", default=None, metavar="SWEEP_FOLDER",
                        help="measure forecast accuracy of a sweep already run by `tiltyard sweep` (its sweep.json "
                             "times every run): forecast each afresh, compare with its wall time")
    parser.add_argument("--resume", action="store_true",
                        help="keep the results of jobs an interrupted run of the same command finished")
    parser.add_argument("--only", default=",".join(DEFAULT_GROUPS), metavar="GROUPS",
                        help=f"comma-separated job groups: {', '.join(GROUPS)} (default: all but memory-ablations)")
    parser.add_argument("--seeds", type=int, default=None, metavar="N",
                        help="train on the first N of the plan's seeds only (a shorter run; default: all)")
    parser.add_argument("--threads", type=int, default=None,
                        help="torch threads for every contender (default: harness = physical cores, "
                             "reference = torch's default)")
    args = parser.parse_args()
    if args.forecast_sweep is not None:
        from bench.forecast import forecast_of_sweep, render_forecast

        report = forecast_of_sweep(Path(args.forecast_sweep).resolve(), Path(args.out or REPO / "docs").resolve(),
                                   log=lambda line: print(line, flush=True))
        print(render_forecast(report))
        return 0
    if args.forecast is not None:  # its own benchmark: no contenders, one sweep forecast and then run
        from bench.forecast import forecast_accuracy, render_forecast

        report = forecast_accuracy(Path(args.forecast), Path(args.out or REPO / "docs").resolve(),
                                   overrides=[f"train.threads={args.threads}"] if args.threads else [],
                                   log=lambda line: print(line, flush=True))
        print(render_forecast(report))
        return 0
    groups = [g.strip() for g in args.only.split(",") if g.strip()]
    unknown = sorted(set(groups) - set(GROUPS))
    if unknown or not groups:
        parser.error(f"--only: unknown group {', '.join(unknown) or '(none given)'}; choose from {', '.join(GROUPS)}")
    plan = QUICK if args.quick else FULL
    if args.seeds is not None:
        if args.seeds < 1:
            parser.error(f"--seeds: {args.seeds} is not a positive number of seeds")
        plan = {**plan, "seeds": plan["seeds"][:args.seeds]}
    out = Path(args.out or REPO / "bench_out").resolve()
    jobs_dir = out / "jobs"
    started = time.perf_counter()

    import torch

    from harness.models.assets import prepare, resolve_checkpoint
    from harness.models.cut import cut_checkpoint
    from harness.train.loop import set_threads

    set_threads(args.threads)  # the matmul peak is measured on the threads the harness would use
    info = machine_info()
    prepare(["minilm-l6", "smollm2-135m", "sms-spam", "question-types"])  # convert once, not per job
    decoder = cut_checkpoint(resolve_checkpoint("smollm2-135m"), plan["decoder"]["layers"],
                             out / "checkpoints" / f"smollm2-135m-{plan['decoder']['layers']}layers")
    matmul = [matmul_flops_per_second()]
    earlier = out / "bench.json"
    if args.resume and earlier.is_file():  # kept jobs ran against the earlier run's peak: keep its measurements
        matmul = json.loads(earlier.read_text(encoding="utf-8"))["machine"]["matmul_flops_per_second"] + matmul
    print(f"machine: {info['cpu_model']}, {info['physical_cores']} cores, torch threads {torch.get_num_threads()}, "
          f"load {info['load_average']}; fp32 matmul {matmul[0] / 1e9:.1f} GFLOP/s", flush=True)

    every = training_jobs(plan, args.threads, decoder)
    jobs = every if "training" in groups else []
    ablation = {"kind": "ablation", "id": "ablation-minilm-sms-spam", "task_name": "sms-spam",
                "task": {**TASKS["sms-spam"][0], "train_size": max(plan["train_size"], 400), "max_rows": None},
                "checkpoint": "asset:minilm-l6", "epochs": 1, "batch_size": 16, "learning_rate": 1e-4,
                "max_length": TASKS["sms-spam"][1], "seed": 13, "threads": args.threads,
                "settings": HARNESS_SETTINGS, "ablation_examples": plan["ablation_examples"]}
    scoring = {"kind": "scoring", "id": "scoring-smollm2-135m", "checkpoint": "asset:smollm2-135m",
               "task": {**TASKS["question-types"][0]}, "batch_size": 32, "threads": args.threads,
               **plan["scoring"]}
    if "memory" in groups:
        jobs += run_memory_jobs(args.threads)
    if "memory-ablations" in groups:
        variants = memory_jobs(every)
        bases = {v["id"].split("-", 2)[2] for v in variants}
        jobs += [j for j in every if j["id"] in bases and j not in jobs] + variants
    jobs += [job for group, job in (("ablation", ablation), ("scoring", scoring)) if group in groups]
    results = []
    for n, job in enumerate(jobs, 1):
        print(f"[{n}/{len(jobs)}] {job['id']} ...", end=" ", flush=True)
        result = run_job(job, jobs_dir, reuse=args.resume)
        results.append({"job": job, "result": result})
        shown = result.get("error") or (f"{result['examples_per_second']:.1f} ex/s, acc {result['accuracy']:.4f}, "
                                        f"peak {result['peak_rss_mb']:.0f} MB" if "examples_per_second" in result
                                        else f"peak {result['peak_rss_mb']:.0f} MB" if "memory_run" in result
                                        else "done")
        print(f"{shown} ({result['wall_seconds']:.0f} s{', kept from before' if result.get('reused') else ''})",
              flush=True)
        if n % 6 == 0:
            matmul.append(matmul_flops_per_second())  # the peak is the best moment of the whole run
    matmul.append(matmul_flops_per_second())
    info["load_average_end"] = machine_info()["load_average"]
    info["bf16_matmul_flops_per_second"] = max(matmul_flops_per_second(dtype="bfloat16") for _ in range(2))
    report = summarise(results, matmul=matmul, machine=info, settings=HARNESS_SETTINGS,
                       mode="quick" if args.quick else "full", seconds=time.perf_counter() - started)
    out.mkdir(parents=True, exist_ok=True)
    (out / "bench.json").write_text(json.dumps(report, indent=2), encoding="utf-8")
    (out / "bench.md").write_text(render_markdown(report), encoding="utf-8")
    print(render_markdown(report))
    print(f"wrote {out / 'bench.json'} and {out / 'bench.md'} ({report['seconds'] / 60:.1f} min)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
