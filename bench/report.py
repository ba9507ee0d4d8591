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

# name -> (threshold, higher is better, unit); the targets.
TARGETS = {
    "training throughput vs reference, MiniLM sms-spam": (2.0, True, "x"),
    "training throughput vs reference, MiniLM question-types": (1.25, True, "x"),
    "cached 5x3-token scoring speed-up vs per-label passes": (3.0, True, "x"),
    "single-token scoring cost / head evaluation pass": (1.2, False, "x"),
    "peak memory, MiniLM head training (MB)": (1500.0, False, ""),
}
ACCURACY_TARGET = -1.0  # harness mean accuracy minus the reference's, in points: at most 1 point lower
UTILISATION_TARGET = 0.5


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
        if job["kind"] in ("harness", "reference") and "error" not in res and "memory_variant" not in job:
            key = (job["model"], job["task_name"])
            groups.setdefault(key, {"harness": [], "reference": []})[job["kind"]].append({**res, "seed": job["seed"]})
    rows = []
    for (model, task), runs in groups.items():
        if not runs["harness"] or not runs["reference"]:
            continue
        h, r = _contender(runs["harness"], peak), _contender(runs["reference"], peak)
        by_seed = {x["seed"]: x for x in runs["reference"]}
        ratios = [x["examples_per_second"] / by_seed[x["seed"]]["examples_per_second"]
                  for x in runs["harness"] if x["seed"] in by_seed]  # each pair ran back to back
        rows.append({"model": model, "task": task, "seeds": sorted(by_seed), "harness": h, "reference": r,
                     "throughput_ratio": median(ratios), "throughput_ratios": ratios,
                     "accuracy_gap_points": 100 * (h["accuracy_mean"] - r["accuracy_mean"])})
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
    training = _training(results, peak)
    by_kind = {item["job"]["kind"]: item["result"] for item in results if item["job"]["kind"] in ("ablation", "scoring")}
    scoring = _scoring(by_kind["scoring"]) if "error" not in by_kind.get("scoring", {"error": 1}) else None
    ablations = _ablations(by_kind["ablation"]) if "error" not in by_kind.get("ablation", {"error": 1}) else None
    values: dict[str, float | None] = {name: None for name in TARGETS}
    targets = []
    for row in training:
        if row["model"].startswith("minilm"):
            values[f"training throughput vs reference, MiniLM {row['task']}"] = row["throughput_ratio"]
            memory = "peak memory, MiniLM head training (MB)"
            values[memory] = max(values[memory] or 0.0, row["harness"]["peak_rss_mb"])
            targets.append(_target(f"training FLOP/s / fp32 matmul peak, MiniLM {row['task']}",
                                   row["harness"]["matmul_fraction"], UTILISATION_TARGET, True, ""))
        targets.append(_target(f"accuracy, harness - reference (points), {row['model']} {row['task']}",
                               row["accuracy_gap_points"], ACCURACY_TARGET, True, ""))
    if scoring:
        values["cached 5x3-token scoring speed-up vs per-label passes"] = scoring["cached_speedup"]
        values["single-token scoring cost / head evaluation pass"] = scoring["single_token_vs_head"]
    targets = [_target(name, values[name], *TARGETS[name]) for name in TARGETS] + targets + _variant_targets(
        _memory(results), training)
    return {"mode": mode, "seconds": seconds, "machine": {**machine, "matmul_flops_per_second": list(matmul),
                                                           "matmul_peak_flops_per_second": peak},
            "harness_settings": settings, "targets": targets, "training": training, "memory": _memory(results),
            "scoring": scoring,
            "ablations": ablations, "raw": results}


def _variant_targets(memory: list[dict[str, Any]], training: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """For a memory variant run on every seed: its peak memory, throughput and accuracy against the reference."""
    targets = []
    for variant in dict.fromkeys(r["variant"] for r in memory):
        runs = [r for r in memory if r["variant"] == variant and not r.get("error")]
        row = next((t for t in training if t["model"].startswith("minilm") and t["task"] == (runs or [{}])[0].get("task")),
                   None)
        if len(runs) < 2 or row is None:
            continue  # a one-seed variant says nothing about accuracy; it stays in the memory table only
        ref = row["reference"]
        ratio = median([r["examples_per_second"] for r in runs]) / ref["median_examples_per_second"]
        gap = 100 * (statistics.fmean(r["accuracy"] for r in runs) - ref["accuracy_mean"])
        targets += [_target(f"peak memory, MiniLM head training (MB), with {variant}", max(r["peak_rss_mb"] for r in runs),
                            *TARGETS["peak memory, MiniLM head training (MB)"]),
                    _target(f"training throughput vs reference, MiniLM {row['task']}, with {variant}", ratio,
                            *TARGETS[f"training throughput vs reference, MiniLM {row['task']}"]),
                    _target(f"accuracy, harness - reference (points), minilm-l6 {row['task']}, with {variant}", gap,
                            ACCURACY_TARGET, True, "")]
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
           "Harness settings beyond its defaults: " + ", ".join(f"`{k}={v}`" for k, v in report["harness_settings"].items())
           + " (each measured switched back below).", ""]
    kept = sum(1 for item in report.get("raw", []) if item["result"].get("reused"))
    if kept:
        out += [f"{kept} of {len(report['raw'])} jobs were kept from an earlier, interrupted run of the same command "
                "(`--resume`); the minutes above are this invocation's, the matmul peak is the best of both.", ""]
    out += ["## Targets", ""]
    out += _table(["target", "value", "verdict"], [(t["target"], "-" if t["value"] is None else f"{t['value']:.2f}",
                                                    t["verdict"]) for t in report["targets"]])
    out += ["## Training: harness `head` run vs the documented Trainer recipe", ""]
    rows = []
    for r in report["training"]:
        h, f = r["harness"], r["reference"]
        rows.append((r["model"], r["task"], f"{h['train_examples']} / {h['test_examples']}", len(r["seeds"]),
                     f"{h['median_examples_per_second']:.1f}", f"{f['median_examples_per_second']:.1f}",
                     f"{r['throughput_ratio']:.2f}x", f"{100 * h['accuracy_mean']:.2f} ± {100 * h['accuracy_sd']:.2f}",
                     f"{100 * f['accuracy_mean']:.2f} ± {100 * f['accuracy_sd']:.2f}", f"{r['accuracy_gap_points']:+.2f}",
                     f"{h['padding_efficiency']:.0%} / {f['padding_efficiency']:.0%}",
                     f"{h['peak_rss_mb']:.0f} / {f['peak_rss_mb']:.0f}"))
    out += _table(["model", "task", "train / test", "seeds", "harness ex/s", "reference ex/s", "ratio (median of pairs)",
                   "harness acc %", "reference acc %", "gap (points)", "real/padded tokens H / R", "peak MB H / R"], rows)
    out += ["Throughput = training examples seen / seconds of the training call (the harness's includes its dev "
            "evaluation and checkpoint after each epoch). Peak MB = ru_maxrss of the contender's own process.", "",
            "## Utilisation (real tokens only)", "",
            "FLOPs = sum over examples of 6 N n + 12 L n^2 d (N non-embedding parameters, n real tokens, L layers, "
            "d width; Kaplan et al. 2020 section 2.1, Hoffmann et al. 2022 appendix F), per epoch.", ""]
    bf16_peak = m.get("bf16_matmul_flops_per_second")
    out += _table(["model", "task", "contender", "TFLOPs", "achieved GFLOP/s", "of fp32 matmul peak",
                   "of bf16 matmul peak"],
                  [(r["model"], r["task"], who, f"{r[who]['training_flops'] / 1e12:.2f}",
                    f"{r[who]['achieved_flops_per_second'] / 1e9:.1f}", f"{r[who]['matmul_fraction']:.0%}",
                    f"{r[who]['achieved_flops_per_second'] / bf16_peak:.0%}" if bf16_peak else "-")
                   for r in report["training"] for who in ("harness", "reference")])
    out += ["The harness trains under bf16 autocast (its matrix products run in bf16); the target is stated "
            "against the fp32 peak, the bf16 column shows the headroom that is left.", ""]
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
