"""The files of a comparison: Markdown, HTML, CSV and JSON tables, and its figures.

`harness.report.compare` computes the comparison as one dict; this module only lays it out. The
Markdown and HTML come from the same blocks (`harness.report.render`); the CSV files carry full
precision for anyone who wants to redo a plot or a test.
"""

from __future__ import annotations

import csv
import io
from pathlib import Path
from typing import Any

from harness.files import atomic_write_json, atomic_write_text
from harness.metrics.scores import HEADLINE, METRICS
from harness.report import plots
from harness.report.cautions import CAUTIONS, SHORT_CAUTION
from harness.report.compare_serving import SERVING_NOTES, serving_table
from harness.report.render import (
    Block,
    Bullets,
    Heading,
    Image,
    Para,
    Table,
    table,
    to_markdown,
    write_documents,
)
from harness.report.tuning import FIGURE as TUNING_FIGURE
from harness.report.tuning import tuning_blocks

__all__ = ["terminal_text", "write_comparison"]


_SERVING_KEYS = ("rows_per_second", "latency_p50_ms", "latency_p95_ms", "model_mb")  # seed means, CSV columns


def _csv(header: list[str], rows: list[list[Any]]) -> str:
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(header)
    writer.writerows([["" if v is None else v for v in row] for row in rows])
    return buf.getvalue()


def _signed(x: float) -> str:
    return f"{x:+.3f}".replace("-", "\u2212")


def _span(lo: float | None, hi: float | None) -> str:
    return "–" if lo is None or hi is None else f"{lo:.3f} to {hi:.3f}"


def _p(p: float) -> str:
    return "<0.001" if p < 0.001 else f"{p:.3f}"


def _others(result: dict[str, Any]) -> list[str]:
    return [m for m in HEADLINE if any(m in r["others"] for r in result["groups"])]


def quality_table(result: dict[str, Any]) -> Table:
    """Primary metric per group with its spread, interval and paired test against the best group."""
    rows = []
    for r in result["groups"]:
        t = r["test"]
        if t is None:
            delta, p, p_mc = "best", "–", "–"
        else:
            delta = "–" if t["delta"] is None else f"{_signed(t['delta'])} [{_signed(t['delta_lo'])}, {_signed(t['delta_hi'])}]"
            p, p_mc = _p(t["p_value"]), _p(t["p_mcnemar"])
        rows.append([r["group"], r["n"], f"{r['mean']:.3f} ± {r['sd']:.3f}", _span(*r["interval"]),
                     _span(r["min"], r["max"]), delta, p, p_mc])
    return table(["group", "seeds", f"{result['display']} mean ± sd", "pooled 95% interval", "min to max",
                  "Δ vs best [95%]", "p (decides)", "p McNemar (median)"], rows)


def cost_table(result: dict[str, Any]) -> Table:
    rows = [[r["group"], "–" if r["train_seconds"] is None else f"{r['train_seconds']:.1f}",
             "–" if r["trainable_parameters"] is None else plots.human(r["trainable_parameters"]),
             "–" if r["peak_rss_mb"] is None else f"{r['peak_rss_mb']:.0f}"] for r in result["groups"]]
    return table(["group", "train seconds (mean)", "trainable parameters", "peak MB (max)"], rows)


def _other_table(result: dict[str, Any]) -> Table:
    names = _others(result)
    header = ["group"] + [METRICS[m].display + ("" if METRICS[m].higher_is_better else " ↓") for m in names]
    return table(header, [[r["group"], *(r["others"].get(m) for m in names)] for r in result["groups"]],
                 caption="Seed means; ↓ marks metrics where lower is better.")


def _blocks(result: dict[str, Any], figures: dict[str, bytes]) -> list[Block]:
    blocks: list[Block] = [
        Heading(f"Comparison of {result['runs']} runs on {result['test_rows']} test rows", 1),
        Para(result["summary"]), Para(SHORT_CAUTION + " More under 'Before you act on this' below."),
        Heading(f"{result['display']} by group, best first"), quality_table(result),
        Bullets((
            "mean ± sd: over seeds, sample standard deviation (ddof=1); min to max: the seeds' extremes.",
            "pooled 95% interval: the mean over seeds of each run's own bootstrap interval over test rows; "
            "it shows the test-sample uncertainty of one run, not of the seed mean.",
            "Δ vs best and p: paired bootstrap over test rows (1,000 resamples) of the mean, over seed pairs, "
            "of metric(group) − metric(best); when two groups do not share the same seeds, each group's per-row "
            "majority vote over its seeds stands in for it. p McNemar: exact test on the rows one gets right "
            "and the other wrong, median over seed pairs. 'p (decides)' is the bootstrap p when the metric is "
            "computed from predicted labels (else the McNemar p); the summary line calls groups with "
            "p >= 0.05 indistinguishable from the best.",
        )),
    ]
    if "metric_by_group.png" in figures:
        blocks.append(Image("metric_by_group.png", figures["metric_by_group.png"], "primary metric per group"))
    blocks += [Heading("Cost"), cost_table(result),
               Image("quality_vs_cost.png", figures["quality_vs_cost.png"], "quality against training cost"),
               Heading("Serving"), serving_table(result), Bullets(SERVING_NOTES)]
    if "data_efficiency.png" in figures:
        blocks += [Heading("Data efficiency"),
                   Image("data_efficiency.png", figures["data_efficiency.png"], "data efficiency curve")]
    if result.get("tuning"):  # a tuned sweep: how each arm's settings were chosen, on dev only
        blocks += tuning_blocks(result["tuning"])
    blocks += [Heading("Before you act on this"), Bullets(CAUTIONS)]
    if _others(result):
        blocks += [Heading("Other metrics"), _other_table(result)]
    if result["incomplete"]:
        blocks += [Heading("Runs left out"),
                   Para("These runs are not in any average above."),
                   table(["run", "state", "reason", "folder"],
                         [[i["run"], i["state"], i["error"], i["path"]] for i in result["incomplete"]])]
    return blocks


def _figures(result: dict[str, Any]) -> dict[str, bytes]:
    rows, metric = result["groups"], result["display"]
    names, means = [r["group"] for r in rows], [r["mean"] for r in rows]
    figures = {
        "metric_by_group.png": plots.groups_png(names, means, [r["interval"] for r in rows],
                                                [r["values"] for r in rows], metric),
        "quality_vs_cost.png": plots.cost_quality_png(names, means, [r["sd"] for r in rows],
                                                      [r["train_seconds"] for r in rows],
                                                      [r["trainable_parameters"] for r in rows], metric),
    }
    eff = result["efficiency"]
    if eff is not None:
        figures["data_efficiency.png"] = plots.efficiency_png(eff["series"], eff["baselines"], metric)
    return figures


def write_comparison(result: dict[str, Any], out_dir: Path) -> list[Path]:
    """Write comparison.{md,html,csv,json}, the figures and (for train-size sweeps) data_efficiency.csv."""
    primary, rows, others = result["primary"], result["groups"], _others(result)
    figures = _figures(result)
    files = [out_dir / n for n in ("comparison.md", "comparison.html", "comparison.csv", "comparison.json")]
    eff = result["efficiency"]
    if eff is not None:
        eff_rows = [[s["name"], x, n, mean, sd, lo, hi] for s in eff["series"]
                    for x, n, mean, sd, lo, hi in zip(s["x"], s["n"], s["mean"], s["sd"], s["min"], s["max"], strict=True)]
        eff_rows += [[b["name"], 0, b["n"], b["mean"], b["sd"], b["min"], b["max"]] for b in eff["baselines"]]
        atomic_write_text(out_dir / "data_efficiency.csv", _csv(
            ["series", "train_examples", "seeds", f"{primary}_mean", f"{primary}_sd", f"{primary}_min",
             f"{primary}_max"], eff_rows))
        files.append(out_dir / "data_efficiency.csv")
    blocks = _blocks(result, figures)
    files += [out_dir / n for n in figures]
    files += [out_dir / b.file for b in blocks if isinstance(b, Image) and b.file == TUNING_FIGURE]
    tests = ("pairing", "delta", "delta_lo", "delta_hi", "p_value", "p_mcnemar")
    csv_rows = [[r["group"], r["checkpoint"], r["method"], r["detail"], r["train_examples"], r["n"],
                 " ".join(map(str, r["seeds"])), r["mean"], r["sd"], r["min"], r["max"], *r["interval"],
                 *(r["others"].get(m) for m in others), r["train_seconds"], r["trainable_parameters"],
                 r["peak_rss_mb"], *([None] * len(tests) if r["test"] is None else [r["test"][k] for k in tests]),
                 *(r.get(k) for k in _SERVING_KEYS)]
                for r in rows]
    atomic_write_text(out_dir / "comparison.csv", _csv(
        ["group", "checkpoint", "method", "pooling_or_template", "train_examples", "seeds", "seed_list",
         f"{primary}_mean", f"{primary}_sd", f"{primary}_min", f"{primary}_max", "interval_lo", "interval_hi",
         *(f"{m}_mean" for m in others), "train_seconds", "trainable_parameters", "peak_rss_mb", "pairing",
         "delta_vs_best", "delta_lo", "delta_hi", "p_value", "p_mcnemar_median", *_SERVING_KEYS], csv_rows))
    write_documents(blocks, f"Comparison: {result['display']}", out_dir / "comparison.md",
                    out_dir / "comparison.html")
    atomic_write_json(out_dir / "comparison.json", {**result, "files": [str(f) for f in files]})
    return files


def terminal_text(result: dict[str, Any]) -> str:
    """What `tiltyard compare` prints: the quality, cost and serving tables and the summary line, as Markdown."""
    return to_markdown([quality_table(result), cost_table(result), serving_table(result), Para(result["summary"]),
                        Para(SHORT_CAUTION)])
