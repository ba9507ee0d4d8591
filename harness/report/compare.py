"""Many finished runs on one test set -> one table of groups (seeds pooled), paired tests, cost, plots.

Rules, exactly:
- Runs are found as folders holding `status.json`. Runs that are not finished (or lack files) are
  listed with their state and error and never averaged in; a second run with the same settings and
  seed as one already in its group is listed as skipped. Runs scored on different test data (test
  sha256 in `data.json`) are refused.
- A group is (checkpoint, method kind, pooling for `head` or template otherwise, training examples),
  plus any other setting that varies inside it (e.g. learning rate) so a sweep never mixes settings.
  A zero-shot `prompt` run counts 0 training examples.
- Per group: seed mean ± sample sd (ddof=1) of the primary metric, min, max, seed count, and the
  "pooled interval": the mean, over seeds, of each run's own percentile-bootstrap interval bounds.
  It describes the test-row sampling uncertainty of a typical single run; seed spread is the sd.
- Each group is tested against the best group (highest mean, lowest for loss-type metrics). When
  both have the same seed set, runs are paired by seed: an exact McNemar test per seed pair (its
  median p is reported), and one paired bootstrap over test rows of the mean over seed pairs of
  delta = metric(group) - metric(best), the same resampled rows for every pair. Otherwise each group's
  per-row majority vote over its seeds (ties to the lowest label index) stands for it, and the same
  two tests run on that single pair. The decision p-value is the bootstrap one when the primary metric
  is computed from predicted labels, else the McNemar one.
"""

from __future__ import annotations

import json
from collections import defaultdict
from pathlib import Path
from typing import Any

import numpy as np

from harness.errors import HarnessError
from harness.files import read_json
from harness.metrics import stats
from harness.metrics.scores import HEADLINE, METRICS, check_metric_name
from harness.report.compare_files import write_comparison
from harness.report.compare_serving import serving_sentence, serving_summary
from harness.report.run_report import load_run
from harness.runs.folders import read_status

__all__ = ["compare_runs", "find_runs", "paired_test"]

ALPHA = 0.05
RESAMPLES = 1000
# Settings that never change what a run predicts (or are shown elsewhere): ignored when forming groups.
_IGNORED = ("sweep", "output", "task.name", "task.train_size", "train.seed", "train.threads", "train.log_every",
            "train.checkpoint_every", "eval.batch_size", "eval.worst", "eval.primary", "eval.int8", "model.checkpoint",
            "method.kind", "method.pooling", "method.template")


def _swept(path: Path) -> list[Path]:
    """The started runs a sweep folder's sweep.json lists (a sweep's runs live beside it, not below it)."""
    index = read_json(path / "sweep.json")
    listed = index.get("runs") if isinstance(index, dict) else None
    if not isinstance(listed, list):
        raise HarnessError(f"{path / 'sweep.json'} has no 'runs' list; the file is damaged")
    # tuning trials were scored on dev: the sweep's tuning tables show them, the comparison does not
    folders = [Path(str(r.get("path"))) for r in listed if isinstance(r, dict) and r.get("role") != "trial"]
    started = [f for f in folders if (f / "status.json").exists()]
    if not started:
        raise HarnessError(f"sweep folder {path}: none of the {len(folders)} runs its sweep.json lists has started "
                           "(or their folders are not on this machine)")
    return started


def _tuning_of(paths: list[Path]) -> dict[str, Any] | None:
    """The tuning summary a (single) sweep folder among `paths` wrote, if any."""
    found = [Path(p) / "tuning.json" for p in paths if (Path(p) / "tuning.json").is_file()]
    return read_json(found[0]) if len(found) == 1 else None


def find_runs(paths: list[Path]) -> list[Path]:
    """Run folders given directly, listed by a sweep folder's sweep.json, or found below the given folders
    (any depth), without repeats."""
    found: dict[Path, None] = {}
    for path in map(Path, paths):
        if not path.exists():
            raise HarnessError(f"{path} does not exist")
        if (path / "sweep.json").exists() and not (path / "status.json").exists():
            folders = _swept(path)
        else:
            folders = [path] if (path / "status.json").exists() else sorted(s.parent for s in path.rglob("status.json"))
        if not folders:
            raise HarnessError(f"{path} holds no runs (no status.json in it or below it)")
        for folder in folders:
            if not any(parent in folders for parent in folder.parents):  # skip files inside a run
                found.setdefault(folder.resolve(), None)
    return list(found)


def _flat(data: dict[str, Any], prefix: str = "") -> dict[str, str]:
    out: dict[str, str] = {}
    for key, value in data.items():
        if isinstance(value, dict) and value:
            out.update(_flat(value, f"{prefix}{key}."))
        else:
            out[prefix + key] = json.dumps(value, sort_keys=True)
    return out


def _run_record(raw: dict[str, Any]) -> dict[str, Any]:
    """The parts of a loaded run the comparison needs, with predictions as label indices in id order."""
    cfg, data = raw["config"], raw["data"]
    if raw["metrics"].get("scored_on", "test") != "test":
        raise HarnessError(f"{raw['path'].name} was scored on {raw['metrics']['scored_on']} (a tuning trial), not on "
                           "test: it has no test predictions to compare")
    method = cfg.get("method", {})
    labels = list(data.get("labels") or raw["metrics"].get("labels") or [])
    index = {name: i for i, name in enumerate(labels)}
    rows = sorted(raw["predictions"], key=lambda r: str(r.get("id")))
    for r in rows:
        if r.get("gold") not in index or r.get("predicted") not in index:
            raise HarnessError(f"{raw['path'] / 'predictions.jsonl'}: row {r.get('id')!r} has a label outside {labels}")
    kind = str(method.get("kind"))
    if kind == "head":
        detail = f"{raw['method'].get('pooling') or method.get('pooling')} pooling"
    else:
        short = " ".join(str(method.get("template", "")).replace("{demos}", "").split())
        detail = f"{method.get('shots', 0)}-shot " if kind == "prompt" else ""
        detail += f"'{short[:30]}…'" if len(short) > 30 else f"'{short}'"
    zero_shot = kind == "prompt" and not method.get("shots")
    train = 0 if zero_shot else int(data.get("splits", {}).get("train", {}).get("rows", 0))
    checkpoint = str(cfg.get("model", {}).get("checkpoint"))
    test = data.get("splits", {}).get("test", {})
    if "sha256" not in test:
        raise HarnessError(f"{raw['path'] / 'data.json'} has no splits.test.sha256: cannot check the test data")
    return {
        "name": raw["name"], "path": raw["path"], "seed": cfg.get("train", {}).get("seed"), "kind": kind,
        "base": (checkpoint, kind, detail, train), "flat": _flat(cfg), "train_examples": train,
        "series": f"{checkpoint.rstrip('/').split('/')[-1].split(':')[-1]} · {kind} · {detail}",
        "primary_cfg": cfg.get("eval", {}).get("primary", "macro_f1"), "test_sha": test["sha256"],
        "labels": labels, "positive": index.get(raw["metrics"].get("positive"), 1),
        "metrics": raw["metrics"].get("metrics", {}), "intervals": raw["metrics"].get("intervals", {}),
        "cost": raw["metrics"].get("cost", {}), "ids": [str(r.get("id")) for r in rows],
        "gold": np.array([index[r["gold"]] for r in rows]), "pred": np.array([index[r["predicted"]] for r in rows]),
    }


def _load(folders: list[Path]) -> tuple[list[dict[str, Any]], list[dict[str, Any]]]:
    runs, incomplete = [], []
    for folder in folders:
        try:
            runs.append(_run_record(load_run(folder)))
        except HarnessError as exc:
            try:
                status = read_status(folder)
            except HarnessError:
                status = {"state": "unreadable"}
            incomplete.append({"run": folder.name, "path": str(folder), "state": status.get("state"),
                               "error": status.get("error") or status.get("message") or str(exc)})
    return runs, incomplete


def _check_same_test(runs: list[dict[str, Any]]) -> None:
    first = runs[0]
    for run in runs[1:]:
        if run["test_sha"] != first["test_sha"] or run["ids"] != first["ids"] or run["labels"] != first["labels"]:
            raise HarnessError(
                f"runs {first['path']} and {run['path']} were scored on different test data (test sha256 "
                f"{first['test_sha'][:12]} vs {run['test_sha'][:12]}); compare runs on one test split only")


def _choose_primary(runs: list[dict[str, Any]], primary: str | None) -> str:
    if primary is None:
        chosen = {r["primary_cfg"] for r in runs}
        if len(chosen) > 1:
            a = next(r for r in runs if r["primary_cfg"] == sorted(chosen)[0])
            b = next(r for r in runs if r["primary_cfg"] == sorted(chosen)[1])
            raise HarnessError(f"runs disagree on eval.primary ({a['name']}: {a['primary_cfg']}, {b['name']}: "
                               f"{b['primary_cfg']}); pass --primary METRIC")
        primary = chosen.pop()
    check_metric_name(primary, "--primary")
    for r in runs:
        if r["metrics"].get(primary) is None:
            raise HarnessError(f"run {r['path']} has no value for metric {primary!r} in metrics.json")
    return primary


def _seed_order(seed: Any) -> tuple[int, Any]:
    return (0, seed) if isinstance(seed, int) else (1, str(seed))  # numeric order: seed 2 before seed 10


def _group(runs: list[dict[str, Any]]) -> tuple[dict[str, list[dict[str, Any]]], list[dict[str, Any]]]:
    """Group label -> runs sorted by seed; plus runs skipped as repeats of a (group, seed)."""
    by_base: dict[tuple, list[dict[str, Any]]] = defaultdict(list)
    for r in runs:
        by_base[r["base"]].append(r)
    groups: dict[str, list[dict[str, Any]]] = {}
    skipped = []
    for base, members in sorted(by_base.items(), key=lambda kv: str(kv[0])):
        keys = sorted({k for r in members for k in r["flat"]})
        varying = [k for k in keys if not k.startswith(_IGNORED) and len({r["flat"].get(k) for r in members}) > 1]
        for r in sorted(members, key=lambda r: str(r["path"])):
            extra = ", ".join(f"{k.split('.')[-1]}={json.loads(r['flat'].get(k, 'null'))}" for k in varying)
            r["series"] += f" · {extra}" if extra else ""
            label = r["series"] + (f" · {base[3]} examples" if r["kind"] != "prompt" or base[3] else "")
            group = groups.setdefault(label, [])
            twin = next((g for g in group if g["seed"] == r["seed"]), None)
            if twin is not None:
                skipped.append({"run": r["name"], "path": str(r["path"]), "state": "skipped",
                                "error": f"same settings and seed as {twin['path']}"})
            else:
                group.append(r)
    return {k: sorted(v, key=lambda r: _seed_order(r["seed"])) for k, v in groups.items()}, skipped


def _mean_delta(y: np.ndarray, pairs: list[tuple[np.ndarray, np.ndarray]], metric: str, k: int,
                positive: int, resamples: int, seed: int) -> dict[str, float | None]:
    """Paired bootstrap of mean over pairs of metric(b) - metric(a), one set of resampled rows for all pairs."""
    def formula(conf: np.ndarray) -> np.ndarray:
        return stats.batch_positive_f1(conf, positive) if metric == "positive_f1" else stats.COUNT_METRICS[metric](conf)

    def stat(idx: np.ndarray) -> np.ndarray:  # (r, n) -> (r,)
        return np.mean([formula(stats.confusion_stack(y, b, k, idx)) - formula(stats.confusion_stack(y, a, k, idx))
                        for a, b in pairs], axis=0)

    delta = float(stat(np.arange(y.size)[None, :])[0])
    deltas = stats.bootstrap_distribution(stat, y.size, resamples, seed)
    lo, hi = stats.percentile_interval(deltas, 0.95)
    flips = np.mean(deltas <= 0.0) if delta > 0 else np.mean(deltas >= 0.0)  # as stats.paired_bootstrap
    return {"delta": delta, "lo": lo, "hi": hi, "p_value": 1.0 if delta == 0.0 else min(1.0, 2.0 * float(flips))}


def paired_test(best: list[dict[str, Any]], other: list[dict[str, Any]], metric: str, *,
                resamples: int = RESAMPLES, seed: int = 0) -> dict[str, Any]:
    """`other` against `best` by the pairing rule in the module docstring."""
    y, k = best[0]["gold"], len(best[0]["labels"])
    by_a, by_b = {r["seed"]: r for r in best}, {r["seed"]: r for r in other}
    if set(by_a) == set(by_b):
        mode = f"by seed ({len(by_a)} pairs)"
        pairs = [(by_a[s]["pred"], by_b[s]["pred"]) for s in sorted(by_a, key=_seed_order)]
    else:
        mode = "majority vote over seeds"
        pairs = [(stats.majority_vote([r["pred"] for r in best]), stats.majority_vote([r["pred"] for r in other]))]
    mcnemar = [stats.mcnemar_exact(a == y, b == y) for a, b in pairs]
    out: dict[str, Any] = {"pairing": mode, "mcnemar": mcnemar,
                           "p_mcnemar": float(np.median([m["p_value"] for m in mcnemar])),
                           "delta": None, "delta_lo": None, "delta_hi": None, "p_bootstrap": None}
    if metric in stats.COUNT_METRICS or metric == "positive_f1":
        boot = _mean_delta(y, pairs, metric, k, best[0]["positive"], resamples, seed)
        out.update(delta=boot["delta"], delta_lo=boot["lo"], delta_hi=boot["hi"], p_bootstrap=boot["p_value"])
    out["p_value"] = out["p_bootstrap"] if out["p_bootstrap"] is not None else out["p_mcnemar"]
    return out


def _summaries(groups: dict[str, list[dict[str, Any]]], primary: str) -> list[dict[str, Any]]:
    rows = []
    for label, runs in groups.items():
        bounds = [r["intervals"].get(primary) for r in runs]
        pooled = [float(np.mean([b[i] for b in bounds])) if all(b and b[i] is not None for b in bounds) else None
                  for i in (0, 1)]
        others = {m: float(np.mean([r["metrics"][m] for r in runs]))
                  for m in HEADLINE if m != primary and all(r["metrics"].get(m) is not None for r in runs)}
        cost = [r["cost"] for r in runs]
        seconds = [c["train_seconds"] for c in cost if c.get("train_seconds") is not None]
        peak = [c["peak_rss_mb"] for c in cost if c.get("peak_rss_mb") is not None]
        rows.append({
            "group": label, "series": runs[0]["series"], "checkpoint": runs[0]["base"][0], "method": runs[0]["kind"],
            "detail": runs[0]["base"][2], "train_examples": runs[0]["train_examples"],
            "seeds": [r["seed"] for r in runs], "runs": [r["name"] for r in runs],
            "values": [float(r["metrics"][primary]) for r in runs],
            **stats.summarize_seeds([r["metrics"][primary] for r in runs]), "interval": pooled, "others": others,
            "train_seconds": float(np.mean(seconds)) if seconds else None,
            "trainable_parameters": cost[0].get("trainable_parameters"), "peak_rss_mb": max(peak) if peak else None,
            **serving_summary(cost),
        })
    return rows


def _summary_line(rows: list[dict[str, Any]], display: str) -> str:
    best = rows[0]
    head = f"Best: {best['group']} ({display} {best['mean']:.3f} ± {best['sd']:.3f} over {best['n']} seed{'s' if best['n'] != 1 else ''})."
    if len(rows) == 1:
        return head + " It is the only group, so there is nothing to test it against."
    (train, named), (serve, served) = _cheapest_to_train(rows, display), serving_sentence(rows, display, ALPHA)
    caveat = " Not detecting a difference does not prove there is none." if named or served else ""
    return head + train + serve + caveat


def _cheapest_to_train(rows: list[dict[str, Any]], display: str) -> tuple[str, bool]:
    """The training-time sentence, and whether it names a group the paired test cannot tell from the best."""
    secs = rows[0]["train_seconds"]
    cheaper = [r for r in rows[1:] if r["train_seconds"] is not None and secs is not None and r["train_seconds"] < secs]
    if not cheaper:
        return " No other group trains faster.", False
    close = [r for r in cheaper if r["test"]["p_value"] >= ALPHA]
    if not close:
        return (f" Every faster group is worse by more than the paired test puts down to chance "
                f"(p < {ALPHA}): saving training time here costs real {display}.", False)
    cheap = min(close, key=lambda r: r["train_seconds"])
    seconds = cheap["train_seconds"]
    ratio = "without training at all" if seconds <= 0 else f"in {secs / seconds:.1f}× less training time"
    return (f" The cheapest group the paired test cannot tell apart from it is {cheap['group']} "
            f"({display} {cheap['mean']:.3f}, p = {cheap['test']['p_value']:.3f}), {ratio}.", True)


def _efficiency(rows: list[dict[str, Any]]) -> dict[str, Any] | None:
    """Seed summaries per (method series, training examples), if any trained series has two or more sizes."""
    series: dict[str, list[dict[str, Any]]] = defaultdict(list)
    for r in rows:
        if r["method"] != "prompt":
            series[r["series"]].append(r)
    if not any(len({r["train_examples"] for r in s}) > 1 for s in series.values()):
        return None
    lines = [{"name": name, "x": [r["train_examples"] for r in pts], "mean": [r["mean"] for r in pts],
              "sd": [r["sd"] for r in pts], "min": [r["min"] for r in pts], "max": [r["max"] for r in pts],
              "n": [r["n"] for r in pts]}
             for name, s in series.items() for pts in [sorted(s, key=lambda r: r["train_examples"])]]
    baselines = [{"name": r["group"], "mean": r["mean"], "sd": r["sd"], "min": r["min"], "max": r["max"], "n": r["n"]}
                 for r in rows if r["method"] == "prompt"]
    return {"series": lines, "baselines": baselines}


def compare_runs(paths: list[Path], out_dir: Path, *, primary: str | None = None,
                 tuning: dict[str, Any] | None = None) -> dict[str, Any]:
    """Compare every run in `paths`; write comparison.{md,html,csv,json} and plots into `out_dir`.

    `tuning` (the sweep's tuning.json) adds the tuning tables and the expected-best plot; a sweep folder
    among `paths` with a tuning.json brings its own when `tuning` is not given."""
    runs, incomplete = _load(find_runs(paths))
    if not runs:
        raise HarnessError(f"no finished runs among {len(incomplete)} run folders in {', '.join(map(str, paths))}")
    _check_same_test(runs)
    primary = _choose_primary(runs, primary)
    spec = METRICS[primary]
    groups, skipped = _group(runs)
    rows = _summaries(groups, primary)
    sign = -1.0 if spec.higher_is_better else 1.0
    rows.sort(key=lambda r: (sign * r["mean"], r["train_seconds"] or 0.0, r["group"]))
    best = groups[rows[0]["group"]]
    for r in rows:
        r["test"] = None if r is rows[0] else paired_test(best, groups[r["group"]], primary)
    result: dict[str, Any] = {
        "primary": primary, "display": spec.display, "higher_is_better": spec.higher_is_better,
        "runs": len(runs), "test_rows": int(runs[0]["gold"].size), "test_sha256": runs[0]["test_sha"],
        "groups": rows, "incomplete": incomplete + skipped, "summary": _summary_line(rows, spec.display),
        "efficiency": _efficiency(rows), "tuning": tuning if tuning is not None else _tuning_of(paths),
    }
    result["files"] = [str(p) for p in write_comparison(result, Path(out_dir))]
    return result
