"""Agreement between two labelings of the same rows, matched by id (annotator checks).

Rows are matched by id, never by position, and ids that only one file has are counted and
listed rather than dropped. The verdict uses the Landis & Koch (1977) bands, printed with the
number so a reader can judge the convention for themselves.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from sklearn.metrics import accuracy_score, confusion_matrix

from harness.data.task import read_rows
from harness.errors import HarnessError
from harness.metrics.stats import cohen_kappa, kappa_interval

__all__ = ["LANDIS_KOCH_BANDS", "agreement", "kappa_band", "read_labels", "render_agreement"]

# (upper bound, name): kappa <= bound falls in that band; below 0 is "poor".
LANDIS_KOCH_BANDS: tuple[tuple[float, str], ...] = (
    (0.0, "poor"), (0.20, "slight"), (0.40, "fair"), (0.60, "moderate"), (0.80, "substantial"),
    (1.0, "almost perfect"),
)
LANDIS_KOCH_SOURCE = (
    "Landis & Koch (1977), The measurement of observer agreement for categorical data, Biometrics 33:159-174"
)
_SHOWN_MISSING = 10


def read_labels(path: Path, *, id_column: str = "id", label_column: str = "label") -> dict[str, str]:
    """id -> label from a CSV/TSV/JSONL file, in file order; duplicate ids and blank cells are errors."""
    path = Path(path)
    rows, lines = read_rows(path)
    if not rows:
        raise HarnessError(f"{path} has no data rows")
    for col, flag in ((id_column, "--id"), (label_column, "--label")):
        if col not in rows[0]:
            raise HarnessError(f"{path}: no column {col!r} (set by {flag}); the columns are {', '.join(rows[0])}")
    out: dict[str, str] = {}
    first_line: dict[str, int] = {}
    for row, line in zip(rows, lines, strict=True):
        raw_id, raw_label = row.get(id_column), row.get(label_column)
        row_id = "" if raw_id is None else str(raw_id).strip()
        label = "" if raw_label is None else str(raw_label).strip()
        if not row_id:
            raise HarnessError(f"{path} line {line}: empty id in column {id_column!r}")
        if not label:
            raise HarnessError(f"{path} line {line}: empty label in column {label_column!r} for id {row_id!r}")
        if row_id in out:
            raise HarnessError(
                f"{path} line {line}: id {row_id!r} appears again (first on line {first_line[row_id]}); "
                "ids must be unique in each file"
            )
        out[row_id] = label
        first_line[row_id] = line
    return out


def kappa_band(kappa: float) -> str:
    """The Landis & Koch name for a kappa value ('undefined' for NaN)."""
    if math.isnan(kappa):
        return "undefined"
    if kappa < 0:
        return "poor"
    for bound, name in LANDIS_KOCH_BANDS[1:]:
        # why: the published bands are given to two decimals (0.21-0.40 ...), so round before comparing
        if round(kappa, 2) <= bound:
            return name
    return LANDIS_KOCH_BANDS[-1][1]


def agreement(
    a: dict[str, str], b: dict[str, str], *, resamples: int = 1000, seed: int = 0, ci: float = 0.95
) -> dict[str, Any]:
    """Raw agreement, Cohen's kappa with a bootstrap interval, per-class agreement and the cross-tab."""
    common = [i for i in a if i in b]
    only_a = [i for i in a if i not in b]
    only_b = [i for i in b if i not in a]
    if not common:
        raise HarnessError(
            f"the two files share no ids ({len(a)} and {len(b)} rows); check --id names the same column in both"
        )
    ya = [a[i] for i in common]
    yb = [b[i] for i in common]
    labels = sorted(set(ya) | set(yb))
    with warnings.catch_warnings():
        # why: both files using one label gives a 1x1 table; the report says "undefined" instead
        warnings.filterwarnings("ignore", message="A single label was found", category=UserWarning)
        kappa = cohen_kappa(ya, yb, labels=labels)
        table = confusion_matrix(ya, yb, labels=labels)  # rows: A's label, columns: B's label
    interval = kappa_interval(ya, yb, resamples, seed, ci=ci) if resamples > 0 else [None, None]
    per_class = []
    for k, label in enumerate(labels):
        count_a, count_b, both = int(table[k, :].sum()), int(table[:, k].sum()), int(table[k, k])
        per_class.append({
            "label": label,
            "count_a": count_a,
            "count_b": count_b,
            "either": count_a + count_b - both,
            "both": both,
            # positive-specific agreement; equals the F1 score of B against A for this label
            "specific_agreement": 2 * both / (count_a + count_b),
        })
    band = kappa_band(kappa)
    return {
        "rows_a": len(a),
        "rows_b": len(b),
        "matched": len(common),
        "only_in_a": only_a,
        "only_in_b": only_b,
        "labels": labels,
        "raw_agreement": float(accuracy_score(ya, yb)),
        "kappa": None if math.isnan(kappa) else kappa,
        "kappa_interval": interval,
        "ci": ci,
        "resamples": resamples,
        "seed": seed,
        "per_class": per_class,
        "crosstab": table.tolist(),
        "band": band,
        "bands": {"source": LANDIS_KOCH_SOURCE, "bands": _band_text()},
    }


def _band_text() -> str:
    return "<0 poor, 0-0.20 slight, 0.21-0.40 fair, 0.41-0.60 moderate, 0.61-0.80 substantial, 0.81-1 almost perfect"


def _verdict(report: dict[str, Any]) -> str:
    kappa = report["kappa"]
    if kappa is None:
        return ("Verdict: kappa is undefined (both labelings use one and the same label, so chance agreement is 1); "
                f"raw agreement {report['raw_agreement']:.1%}.")
    lo, hi = report["kappa_interval"]
    span = ""
    if lo is not None and hi is not None:
        low_band, high_band = kappa_band(lo), kappa_band(hi)
        span = f"; the {report['ci']:.0%} interval {lo:.2f} to {hi:.2f} spans " + (
            f"'{low_band}' only" if low_band == high_band else f"'{low_band}' to '{high_band}'")
    return (f"Verdict: {report['band']} agreement (kappa {kappa:.2f}{span}). Bands used: {_band_text()}; "
            f"source: {LANDIS_KOCH_SOURCE}.")


def _ids(ids: Sequence[str]) -> str:
    shown = ", ".join(ids[:_SHOWN_MISSING])
    more = f" ... and {len(ids) - _SHOWN_MISSING} more (all in agreement.json)" if len(ids) > _SHOWN_MISSING else ""
    return shown + more


def render_agreement(report: dict[str, Any], name_a: str, name_b: str) -> str:
    """The report as Markdown: counts, kappa, per-class table, cross-tab, missing ids, verdict."""
    lo, hi = report["kappa_interval"]
    kappa = "undefined" if report["kappa"] is None else f"{report['kappa']:.3f}"
    interval = "" if lo is None or hi is None else f" ({report['ci']:.0%} bootstrap interval {lo:.3f} to {hi:.3f}, " \
        f"{report['resamples']} resamples, seed {report['seed']})"
    out = [
        "# Agreement",
        "",
        f"- A: `{name_a}` ({report['rows_a']} rows)",
        f"- B: `{name_b}` ({report['rows_b']} rows)",
        f"- matched by id: {report['matched']} rows; only in A: {len(report['only_in_a'])}; "
        f"only in B: {len(report['only_in_b'])}",
        f"- raw agreement: {report['raw_agreement']:.3f}",
        f"- Cohen's kappa: {kappa}{interval}",
        "",
        "## Per class",
        "",
        "| label | A gave it | B gave it | either | both | specific agreement |",
        "|---|---:|---:|---:|---:|---:|",
    ]
    for row in report["per_class"]:
        out.append(f"| {row['label']} | {row['count_a']} | {row['count_b']} | {row['either']} | {row['both']} | "
                   f"{row['specific_agreement']:.3f} |")
    out += ["", "Specific agreement = 2 x both / (A gave it + B gave it).", "",
            "## Cross-tab (rows: A, columns: B)", "",
            "| A \\ B | " + " | ".join(report["labels"]) + " |",
            "|---|" + "---:|" * len(report["labels"])]
    for label, counts in zip(report["labels"], report["crosstab"], strict=True):
        out.append(f"| {label} | " + " | ".join(str(c) for c in counts) + " |")
    for side, key in (("A", "only_in_a"), ("B", "only_in_b")):
        if report[key]:
            out += ["", f"Ids only in {side} ({len(report[key])}, not compared): {_ids(report[key])}"]
    out += ["", _verdict(report), ""]
    return "\n".join(out)
