"""The serving parts of the run report: the cost table's serving rows and the int8 copy's section.

Read from metrics.json as the runner writes it (harness.runs.serving): `cost["serving"]` and `int8`.
Runs from before serving was measured show '–'.
"""

from __future__ import annotations

from typing import Any

from harness.metrics.scores import METRICS
from harness.report.render import Block, Heading, Para, fmt, table

__all__ = ["int8_blocks", "latency_text", "megabytes", "serving_rows"]


def _decimals(value: Any, digits: int) -> str:
    return fmt(float(value), digits) if isinstance(value, (int, float)) and not isinstance(value, bool) else fmt(value)


def megabytes(size: Any) -> str:
    """Bytes as megabytes (10^6) with one decimal, '–' when missing."""
    return fmt(size / 1e6, 1) if isinstance(size, (int, float)) and not isinstance(size, bool) else "–"


def latency_text(serving: dict[str, Any]) -> str:
    """'p50 / p95 (N rows one at a time)' in milliseconds, '–' when missing."""
    p50, p95 = serving.get("latency_p50_ms"), serving.get("latency_p95_ms")
    if p50 is None or p95 is None:
        return "–"
    capped = ", stopped by the time cap" if serving.get("latency_capped") else ""
    return f"{fmt(float(p50), 1)} / {fmt(float(p95), 1)} ({serving.get('latency_rows')} rows one at a time{capped})"


def serving_rows(serving: dict[str, Any]) -> list[list[str]]:
    """The serving rows of the cost table; '–' for runs from before they were measured."""
    batch = serving.get("batch_size")
    return [
        [f"scoring rows per second (batch {batch if batch is not None else '–'})",
         _decimals(serving.get("rows_per_second"), 1)],
        ["single-row latency p50 / p95 (ms)", latency_text(serving)],
        ["saved model folder (MB)", megabytes(serving.get("model_bytes"))],
    ]


def int8_blocks(q: dict[str, Any], primary: str, float_serving: dict[str, Any]) -> list[Block]:
    """The int8 copy beside the float model (eval.int8), or why it could not be measured."""
    if "error" in q:
        return [Heading("int8 copy"), Para(f"The int8 copy could not be measured ({q['error']}); the scores above "
                                           "are the float model's and stand.")]
    mine, theirs, delta = q.get("metrics", {}), q.get("float_metrics", {}), q.get("delta", {})

    def signed(name: str) -> str:
        d = delta.get(name)
        return "–" if d is None else f"{d:+.3f}".replace("-", "\u2212")

    serving, agreement, rows = q.get("serving", {}), q.get("agreement"), q.get("rows")
    changed = "–" if agreement is None or rows is None else round((1 - agreement) * rows)
    share = q.get("quantized_weight_share")
    return [
        Heading("int8 copy"),
        table(["measure", "float model", "int8 copy", "change"], [
            [METRICS[primary].display if primary in METRICS else primary, theirs.get(primary), mine.get(primary),
             signed(primary)],
            ["accuracy", theirs.get("accuracy"), mine.get("accuracy"), signed("accuracy")],
            ["predictions equal to the float model's", "–", "–" if agreement is None else f"{100 * agreement:.1f}%",
             f"{changed} of {fmt(rows)} rows differ"],
            ["state_dict size (MB)", megabytes(q.get("float_state_bytes")), megabytes(q.get("state_bytes")), "–"],
        ], caption=f"{q.get('scheme', 'dynamic int8')}; {fmt(q.get('quantized_layers'))} linear layers quantised "
                   f"({'–' if share is None else f'{100 * share:.0f}%'} of the weights), on the test split."),
        table(["serving measure", "float model", "int8 copy"],
              [[a[0], a[1], b[1]] for a, b in zip(serving_rows(float_serving)[:2], serving_rows(serving)[:2], strict=True)]),
        Para(f"The int8 copy is {q.get('note', 'measured, not saved')}. Read the change in the primary metric and "
             "the share of changed predictions before serving it: on a small test split a few changed rows can "
             "hide a larger shift, and dynamic int8 shifts some models' predictions far more than others."),
    ]
