"""The serving side of a comparison: per-group means of each run's serving cost, the table, the summary sentence.

Read from each run's `cost["serving"]` (harness.runs.serving). A group's value is the mean over the
seeds that record it; runs from before serving was measured record nothing and show '–'. The summary
names the group quickest to serve by single-row p50 latency (what one waiting user feels, and less
sensitive to the batch size than throughput), with the rule the summary uses for training time: among
the groups quicker than the best, those the paired test cannot tell apart from it (p >= alpha).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from harness.report.render import Table, table

__all__ = ["SERVING_NOTES", "serving_sentence", "serving_summary", "serving_table"]

SERVING_NOTES = (
    "rows/s: test rows per second of each run's timed test scoring pass at its eval.batch_size; p50 / p95: "
    "latency of scoring one row at a time, over up to 50 test rows after a warm-up; model MB: the saved model/ "
    "folder (weights, tokenizer, config). Means over the seeds that record them; '–': runs from before serving "
    "was measured.",
    "Speed depends on the machine, its load and the thread count: compare groups measured on one machine.",
)


def _mean(values: list[Any]) -> float | None:
    known = [float(v) for v in values if v is not None]
    return float(np.mean(known)) if known else None


def serving_summary(costs: list[dict[str, Any]]) -> dict[str, Any]:
    """A group's serving means from its runs' cost blocks."""
    serving = [c.get("serving") or {} for c in costs]
    size = _mean([s.get("model_bytes") for s in serving])
    return {
        "rows_per_second": _mean([s.get("rows_per_second") for s in serving]),
        "latency_p50_ms": _mean([s.get("latency_p50_ms") for s in serving]),
        "latency_p95_ms": _mean([s.get("latency_p95_ms") for s in serving]),
        "model_mb": None if size is None else size / 1e6,
        "serving_runs": sum(s.get("latency_p50_ms") is not None for s in serving),
    }


def serving_sentence(rows: list[dict[str, Any]], display: str, alpha: float) -> tuple[str, bool]:
    """The summary's serving sentence (rows best first, each but the best with its paired `test`), and
    whether it names a group the test cannot tell apart from the best."""
    best = rows[0]
    ms = best.get("latency_p50_ms")
    if not any(r.get("latency_p50_ms") is not None for r in rows):
        return "", False  # no run records serving cost: nothing to say
    if ms is None:
        return (" The best group's runs record no serving latency (they predate its measurement), so no group is "
                "named as quicker to serve.", False)
    quicker = [r for r in rows[1:] if r.get("latency_p50_ms") is not None and r["latency_p50_ms"] < ms]
    if not quicker:
        return f" No other group serves one row faster (single-row p50 latency {ms:.1f} ms).", False
    close = [r for r in quicker if r["test"]["p_value"] >= alpha]
    if not close:
        return (f" Every group that serves one row faster is worse by more than the paired test puts down to "
                f"chance (p < {alpha}): serving faster here costs real {display}.", False)
    fast = min(close, key=lambda r: r["latency_p50_ms"])
    return (f" The quickest to serve that the paired test cannot tell apart from it is {fast['group']} "
            f"(single-row p50 latency {fast['latency_p50_ms']:.1f} ms against {ms:.1f} ms, "
            f"p = {fast['test']['p_value']:.3f}).", True)


def _cell(value: float | None, digits: int) -> str:
    return "–" if value is None else f"{value:.{digits}f}"


def serving_table(result: dict[str, Any]) -> Table:
    """rows/s, p50 / p95 single-row latency and model size per group (seed means)."""
    rows = [[r["group"], _cell(r.get("rows_per_second"), 1), _cell(r.get("latency_p50_ms"), 1),
             _cell(r.get("latency_p95_ms"), 1), _cell(r.get("model_mb"), 1)] for r in result["groups"]]
    return table(["group", "rows/s (mean)", "p50 ms (mean)", "p95 ms (mean)", "model MB (mean)"], rows)
