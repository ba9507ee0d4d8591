"""The benchmark's summary (medians, ratios, FLOP/s, targets) as a dict, and that dict as Markdown tables.

`summarise` takes the raw job results of scripts/benchmark.py; `render_markdown` only formats what
`summarise` computed, so bench.json and bench.md always agree.
"""

from __future__ import annotations

import statistics
from collections.abc import Sequence
from typing import Any

from bench.flops import median, target_verdict, training_flops

__all__ = ["TARGETS", "render_markdown", "summarise"]

# name -> (threshold, higher is better, unit); the scoring targets of an earlier round.
TARGETS = {
    "cached 5x3-token scoring speed-up vs per-label passes": (3.0, True, "x"),
    "single-token scoring cost / head evaluation pass": (1.2, False, "x"),
}
MEMORY_TARGET = 1500.0  # MB: a MiniLM head run (the memory-ablation variants are held against it)
# Training targets, per model and task: the harness (under bf16) against each reference contender.
SPEED_TARGETS = {"trainer_bf16": 2.0, "plain_bf16": 1.5}  # throughput ratio, harness / contender, at least
ACCURACY_TARGET = -1.0  # harness mean accuracy minus a contender's, in points: at most 1 point lower
UTILISATION_TARGET = 0.35  # useful (real-token) training FLOP/s over the bf16 matmul peak, at least
REFERENCES = ("trainer_fp32", "trainer_bf16", "plain_fp32", "plain_bf16")
NAMES = {"harness": "harness", "trainer_fp32": "Trainer, fp32 defaults", "trainer_bf16": "Trainer, bf16 + length groups",
         "plain_fp32": "plain loop, fp32", "plain_bf16": "plain loop, bf16"}


def _mean_sd(values: Sequence[float]) -> tuple[float, float]:
    return statistics.fmean(values), statistics.stdev(values) if len(values) > 1 else 0.0


def _contender(runs: list[dict[str, Any]], peak_matmul: float) -> dict[str, Any]:
    acc = _mean_sd([r["accuracy"] for r in runs])
    facts = runs[0]["model"]
    flops = [training_flops(r["lengths"], facts["nonembedding_parameters"], facts["layers"], facts["hidden"],
                            r["real_tokens"] / max(sum(r["lengths"]), 1)) for r in runs]
    achieved = [f / r["train_seconds"] for f, r in zip(flops, runs, strict=True)]
    return {"examples_per_second": [r["examples_per_second"] for r in runs],
            "median_examples_per_second": median([r["examples_per_second"] for r in runs]),
            "accuracy": [r["accuracy"] for r in runs], "accuracy_mean": acc[0], "accuracy_sd": acc[1],
            "macro_f1_mean": statistics.fmean(r["macro_f1"] for r in runs),
            "peak_rss_mb": max(r["peak_rss_mb"] for r in runs), "train_seconds": [r["train_seconds"] for r in runs],
            "padding_efficiency": sum(r["real_tokens"] for r in runs) / max(sum(r["padded_tokens"] for r in runs), 1),
            "training_flops": flops[0], "achieved_flops_per_second": median(achieved),
            "matmul_fraction": (median(achieved) or 0.0) / peak_matmul, "torch_threads": runs[0]["torch_threads"],
            "train_examples": runs[0]["train_examples"], "test_examples": runs[0]["test_examples"]}


def _training(results: list[dict[str, Any]], peak: float) -> list[dict[str, Any]]:
    groups: dict[tuple[str, str], dict[str, list[dict[str, Any]]]] = {}
    for item in results:
        job, res = item["job"], item["result"]
        if job["kind"] in NAMES and "error" not in res and "memory_variant" not in job:
            key = (job["model"], job["task_name"])
            groups.setdefault(key, {k: [] for k in NAMES})[job["kind"]].append({**res, "seed": job["seed"]})
    rows = []
    for (model, task), runs in groups.items():
        if not runs["harness"]:
            continue
        h = _contender(runs["harness"], peak)
        row: dict[str, Any] = {"model": model, "task": task, "seeds": sorted(x["seed"] for x in runs["harness"]),
                               "harness": h, "versus": {}}
        for ref in REFERENCES:
            if not runs[ref]:
                continue
            r = _contender(runs[ref], peak)
            by_seed = {x["seed"]: x for x in runs[ref]}
            ratios = [x["examples_per_second"] / by_seed[x["seed"]]["examples_per_second"]
                      for x in runs["harness"] if x["seed"] in by_seed]  # same seed, same data, minutes apart
            row[ref] = r
            row["versus"][ref] = {"throughput_ratio": median(ratios), "throughput_ratios": ratios,
                                  "accuracy_gap_points": 100 * (h["accuracy_mean"] - r["accuracy_mean"])}
        rows.append(row)
    return rows


def _memory_runs(results: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """Whole-run peak memory (bench.memory) against each run's ceiling."""
    from bench.memory import MEMORY_RUNS

    rows = []
    for item in results:
        job, res = item["job"], item["result"]
        if job["kind"] == "memory":
            rows.append({"run": job["memory_run"], "ceiling_mb": MEMORY_RUNS[job["memory_run"]][1],
                         **{k: res.get(k) for k in ("peak_rss_mb", "method", "batch_size", "bf16", "accuracy", "error")},
                         "cost": res.get("cost", {})})
    return rows


def _memory(results: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """Memory-ablation runs next to the plain harness run they copy (same task, seed and settings)."""
    rows = []
    for item in results:
        job, res = item["job"], item["result"]
        if "memory_variant" not in job:
            continue
        base = next((x["result"] for x in results if x["job"]["id"] == job["id"].split("-", 2)[2]), None)
        rows.append({"variant": job["memory_variant"], "task": job["task_name"], "seed": job["seed"], **{
            k: res.get(k) for k in ("peak_rss_mb", "examples_per_second", "accuracy", "error")},
            "base_peak_rss_mb": base and base.get("peak_rss_mb"),
            "base_examples_per_second": base and base.get("examples_per_second")})
    return rows


def _scoring(res: dict[str, Any]) -> dict[str, Any]:
    med = {k: statistics.median(v) for k, v in res["seconds"].items()}
    return {**res, "median_seconds": med, "cached_speedup": med["per_label"] / med["cached"],
            "single_token_vs_head": med["single_token"] / med["head_pass"],
            "all_positions_vs_head": med["single_token_all_positions"] / med["head_pass"]}


def _ablations(res: dict[str, Any]) -> dict[str, Any]:
    train = {}
    for name, runs in res["train"].items():
        eps = statistics.fmean(r["examples_per_second"] for r in runs)
        train[name] = {"examples_per_second": eps, "runs": runs,
                       "tokens_per_real_token": sum(r["padded_tokens"] for r in runs) / sum(r["real_tokens"] for r in runs)}
    base = train["base"]["examples_per_second"]
    for row in train.values():
        row["vs_base"] = row["examples_per_second"] / base
    evals = {k: median(v) for k, v in res["eval_seconds"].items()}
    first = next(iter(evals.values()))
    return {"train": train, "eval": {k: {"seconds": v, "vs_harness": (v or 0) / (first or 1)} for k, v in evals.items()},
            "token_cache": res["token_cache"]}


def summarise(results: list[dict[str, Any]], *, matmul: Sequence[float], machine: dict[str, Any],
              settings: dict[str, Any], mode: str, seconds: float) -> dict[str, Any]:
    """Everything bench.json holds besides the raw results: medians, ratios, utilisation, targets."""
    peak = max(matmul)
    bf16_peak = machine.get("bf16_matmul_flops_per_second")
    training = _training(results, peak)
    by_kind = {item["job"]["kind"]: item["result"] for item in results if item["job"]["kind"] in ("ablation", "scoring")}
    scoring = _scoring(by_kind["scoring"]) if "error" not in by_kind.get("scoring", {"error": 1}) else None
    ablations = _ablations(by_kind["ablation"]) if "error" not in by_kind.get("ablation", {"error": 1}) else None
    values: dict[str, float | None] = {name: None for name in TARGETS}
    targets = []
    for row in training:
        where = f"{row['model']} {row['task']}"
        for ref, threshold in SPEED_TARGETS.items():
            vs = row["versus"].get(ref)
            targets.append(_target(f"training throughput, harness / {NAMES[ref]}, {where}",
                                   vs and vs["throughput_ratio"], threshold, True, "x"))
        for ref in SPEED_TARGETS:
            vs = row["versus"].get(ref)
            targets.append(_target(f"accuracy, harness - {NAMES[ref]} (points), {where}",
                                   vs and vs["accuracy_gap_points"], ACCURACY_TARGET, True, ""))
        if bf16_peak and settings.get("train.bf16"):
            row["harness"]["bf16_fraction"] = row["harness"]["achieved_flops_per_second"] / bf16_peak
            targets.append(_target(f"useful training FLOP/s / bf16 matmul peak, harness, {where}",
                                   row["harness"]["bf16_fraction"], UTILISATION_TARGET, True, ""))
    memory_runs = _memory_runs(results)
    targets += [_target(f"peak memory (MB), {r['run']}", r["peak_rss_mb"] if not r.get("error") else None,
                        r["ceiling_mb"], False, "") for r in memory_runs]
    if scoring:
        values["cached 5x3-token scoring speed-up vs per-label passes"] = scoring["cached_speedup"]
        values["single-token scoring cost / head evaluation pass"] = scoring["single_token_vs_head"]
    targets = targets + [_target(name, values[name], *TARGETS[name]) for name in TARGETS] + _variant_targets(
        _memory(results), training)
    return {"mode": mode, "seconds": seconds, "machine": {**machine, "matmul_flops_per_second": list(matmul),
                                                           "matmul_peak_flops_per_second": peak},
            "harness_settings": settings, "targets": targets, "training": training, "memory_runs": memory_runs,
            "memory": _memory(results), "scoring": scoring, "ablations": ablations, "raw": results}


def _variant_targets(memory: list[dict[str, Any]], training: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """For a memory variant run on every seed: its peak memory, throughput and accuracy against the bf16 Trainer."""
    targets = []
    for variant in dict.fromkeys(r["variant"] for r in memory):
        runs = [r for r in memory if r["variant"] == variant and not r.get("error")]
        row = next((t for t in training if t["model"].startswith("minilm") and t["task"] == (runs or [{}])[0].get("task")),
                   None)
        if len(runs) < 2 or row is None or "trainer_bf16" not in row:
            continue  # a one-seed variant says nothing about accuracy; it stays in the memory table only
        ref = row["trainer_bf16"]
        ratio = median([r["examples_per_second"] for r in runs]) / ref["median_examples_per_second"]
        gap = 100 * (statistics.fmean(r["accuracy"] for r in runs) - ref["accuracy_mean"])
        targets += [_target(f"peak memory, MiniLM head training (MB), with {variant}", max(r["peak_rss_mb"] for r in runs),
                            MEMORY_TARGET, False, ""),
                    _target(f"training throughput, harness / {NAMES['trainer_bf16']}, minilm-l6 {row['task']}, "
                            f"with {variant}", ratio, SPEED_TARGETS["trainer_bf16"], True, "x"),
                    _target(f"accuracy, harness - {NAMES['trainer_bf16']} (points), minilm-l6 {row['task']}, "
                            f"with {variant}", gap, ACCURACY_TARGET, True, "")]
    return targets


def _target(name: str, value: float | None, threshold: float, higher: bool, unit: str) -> dict[str, Any]:
    return {"target": name, "value": value, "threshold": threshold,
            "verdict": target_verdict(value, threshold, higher_is_better=higher, unit=unit)}


def _num(value: float | None, fmt: str) -> str:
    return "-" if value is None else fmt.format(value)


def _table(header: Sequence[str], rows: Sequence[Sequence[Any]]) -> list[str]:
    lines = ["| " + " | ".join(header) + " |", "|" + "|".join("---" for _ in header) + "|"]
    lines += ["| " + " | ".join(str(c) for c in row) + " |" for row in rows]
    return lines + [""]


def _accuracy(summary: dict[str, Any]) -> str:
    """Mean test accuracy in %, with its sd over seeds when there are several (one seed has no spread)."""
    mean = f"{100 * summary['accuracy_mean']:.2f}"
    return mean if len(summary["accuracy"]) < 2 else f"{mean} ± {100 * summary['accuracy_sd']:.2f}"


def render_markdown(report: dict[str, Any]) -> str:
    """bench.md: machine, targets, training, utilisation, memory, scoring and ablation tables."""
    m = report["machine"]
    out = [f"# Benchmark ({report['mode']} mode, {report['seconds'] / 60:.1f} min)", "",
           f"Machine: {m['cpu_model']}, {m['physical_cores']} physical / {m['logical_cores']} logical cores, "
           f"{m['memory_gb']} GB, torch {m['torch']} on {m['torch_threads']} threads; load average "
           f"{m['load_average']} at the start, {m.get('load_average_end')} at the end. fp32 matmul "
           f"(2048 x 2048, best of the run): {m['matmul_peak_flops_per_second'] / 1e9:.1f} GFLOP/s; bf16 matmul "
           f"{m.get('bf16_matmul_flops_per_second', float('nan')) / 1e9:.1f} GFLOP/s (CPU bf16 instructions: "
           f"{'yes' if m.get('cpu_bf16') else 'no'}).", "",
           "Harness settings beyond its defaults in the training comparison: "
           + ", ".join(f"`{k}={v}`" for k, v in report["harness_settings"].items()) + ".", ""]
    kept = sum(1 for item in report.get("raw", []) if item["result"].get("reused"))
    if kept:
        out += [f"{kept} of {len(report['raw'])} jobs were kept from an earlier, interrupted run of the same command "
                "(`--resume`); the minutes above are this invocation's, the matmul peak is the best of both.", ""]
    out += ["## Targets", ""]
    out += _table(["target", "value", "verdict"], [(t["target"], "-" if t["value"] is None else f"{t['value']:.2f}",
                                                    t["verdict"]) for t in report["targets"]])
    out += ["## Training: the harness `head` run against the Trainer and a careful plain loop", "",
            "Throughput = training examples seen / seconds of training alone, for every contender: the Trainer's "
            "`train()` (no evaluation, no checkpoint in it), the plain loop's own loop, and the harness's training "
            "call minus its dev scoring and checkpoint writes (`cost.train_dev_seconds`). Ratio = harness / contender, "
            "median over seeds of runs on the same seed and data, minutes apart. Peak MB = peak resident memory (VmHWM) of the "
            "contender's own process.", ""]
    rows: list[tuple[Any, ...]] = []
    for r in report["training"]:
        h = r["harness"]
        rows.append((r["model"], r["task"], f"{h['train_examples']} / {h['test_examples']}", len(r["seeds"]), "harness",
                     f"{h['median_examples_per_second']:.1f}", "1.00x",
                     _accuracy(h), "-",
                     f"{h['padding_efficiency']:.0%}", f"{h['peak_rss_mb']:.0f}"))
        for ref in REFERENCES:
            if ref not in r:
                continue
            c, vs = r[ref], r["versus"][ref]
            rows.append(("", "", "", "", NAMES[ref], f"{c['median_examples_per_second']:.1f}",
                         f"{vs['throughput_ratio']:.2f}x", _accuracy(c),
                         f"{vs['accuracy_gap_points']:+.2f}", f"{c['padding_efficiency']:.0%}", f"{c['peak_rss_mb']:.0f}"))
    out += _table(["model", "task", "train / test", "seeds", "contender", "train ex/s", "harness / contender",
                   "test acc %", "harness - contender (points)", "real / padded tokens", "peak MB"], rows)
    out += ["## Utilisation (real tokens only)", "",
            "FLOPs = sum over examples of 6 N n + 12 L n^2 d (N non-embedding parameters, n real tokens, L layers, "
            "d width; Kaplan et al. 2020 section 2.1, Hoffmann et al. 2022 appendix F), per epoch.", ""]
    bf16_peak = m.get("bf16_matmul_flops_per_second")
    out += _table(["model", "task", "contender", "TFLOPs", "achieved GFLOP/s", "of fp32 matmul peak",
                   "of bf16 matmul peak"],
                  [(r["model"], r["task"], NAMES[who], f"{r[who]['training_flops'] / 1e12:.2f}",
                    f"{r[who]['achieved_flops_per_second'] / 1e9:.1f}", f"{r[who]['matmul_fraction']:.0%}",
                    f"{r[who]['achieved_flops_per_second'] / bf16_peak:.0%}" if bf16_peak else "-")
                   for r in report["training"] for who in ("harness", *REFERENCES) if who in r])
    out += ["The harness and the bf16 contenders run their matrix products in bf16 under autocast (weights and "
            "optimizer states in fp32); the fp32 contenders are held against the fp32 peak.", ""]
    if report.get("memory_runs"):
        out += ["## Peak memory of whole runs (one process each: training, dev scoring, checkpoints, test scoring, "
                "serving measurement, exports)", ""]
        out += _table(["run", "method", "batch", "bf16", "peak MB", "ceiling MB", "test acc %"],
                      [(r["run"], r["method"] or "-", r["batch_size"] or "-", r["bf16"], _num(r["peak_rss_mb"], "{:.0f}"),
                        f"{r['ceiling_mb']:.0f}", r.get("error") or _num(r["accuracy"] and 100 * r["accuracy"], "{:.2f}"))
                       for r in report["memory_runs"]])
    if report.get("memory"):
        out += ["## Memory ablations (one harness run each, its own process; base = the same run unchanged)", ""]
        out += _table(["variant", "task, seed", "peak MB", "base peak MB", "ex/s", "base ex/s", "accuracy %"],
                      [(r["variant"], f"{r['task']}, {r['seed']}", _num(r["peak_rss_mb"], "{:.0f}"),
                        _num(r["base_peak_rss_mb"], "{:.0f}"), _num(r["examples_per_second"], "{:.1f}"),
                        _num(r["base_examples_per_second"], "{:.1f}"),
                        _num(r["accuracy"] and 100 * r["accuracy"], "{:.2f}") if not r.get("error") else r["error"])
                       for r in report["memory"]])
    s = report["scoring"]
    if s:
        out += [f"## Scoring (SmolLM2-135M, {s['layers']} layers, {s['prompts']} prompts of "
                f"{s['mean_prompt_tokens']:.1f} tokens, batch {s['batch_size']})", ""]
        med = s["median_seconds"]
        out += _table(["contender", "median seconds", "ratio"], [
            ("cached prompt, 5 labels x 3 tokens", f"{med['cached']:.2f}", f"{s['cached_speedup']:.2f}x faster"),
            ("one full pass per label, 5 x 3 tokens", f"{med['per_label']:.2f}", "1.00x"),
            ("single-token labels (prompt pass, last position)", f"{med['single_token']:.2f}",
             f"{s['single_token_vs_head']:.2f}x the head pass"),
            ("single-token, output layer on every position", f"{med['single_token_all_positions']:.2f}",
             f"{s['all_positions_vs_head']:.2f}x the head pass"),
            ("head evaluation pass", f"{med['head_pass']:.2f}", "1.00x")])
        out += [f"Largest |cached - per-label| score difference: {s['max_abs_difference']:.2e} (log-prob units).", ""]
    a = report["ablations"]
    if a:
        out += ["## Ablations (MiniLM, sms-spam slice, steady-state steps, each variant run twice ABBA)", ""]
        out += _table(["variant", "ex/s", "vs base", "tokens processed / real tokens"],
                      [(k, f"{v['examples_per_second']:.1f}", f"{v['vs_base']:.2f}x", f"{v['tokens_per_real_token']:.2f}")
                       for k, v in a["train"].items()])
        out += _table(["evaluation variant", "median seconds", "vs harness"],
                      [(k, f"{v['seconds']:.3f}", f"{v['vs_harness']:.2f}x") for k, v in a["eval"].items()])
        c = a["token_cache"]
        out += [f"Token cache, {c['examples']} training texts: tokenising {c['miss_seconds']:.3f} s, "
                f"reading the cache {c['hit_seconds']:.3f} s.", ""]
    return "\n".join(out)
