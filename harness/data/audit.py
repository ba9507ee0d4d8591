"""Data checks before any training: sizes, balance, duplicates, leakage, truncation.

`tiltyard audit CONFIG` prints the report and writes it as JSON and Markdown; every run also
stores it in `data.json`, so a comparison can show what each model was trained on.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from harness.data.task import Split, TaskData, text_key
from harness.files import atomic_write_json, atomic_write_text

__all__ = ["audit_data", "render_audit", "suggest_max_length", "token_counter", "write_audit"]

Tokenize = Callable[[Sequence[Any]], list[int]]  # texts -> token counts


def _key(text: Any) -> str:
    return text_key(text)


def token_counter(tokenizer: Any) -> Tokenize:
    """Token counts per text (pairs encoded as pairs) with a checkpoint's tokenizer."""

    def count(texts: Sequence[Any]) -> list[int]:
        # verbose=False: texts longer than the model takes are counted here, not fed to it (runs truncate),
        # so the library's "will result in indexing errors" warning would not be true
        if texts and isinstance(texts[0], tuple):
            enc = tokenizer([t[0] for t in texts], [t[1] for t in texts], add_special_tokens=True, verbose=False)
        else:
            enc = tokenizer(list(texts), add_special_tokens=True, verbose=False)
        return [len(ids) for ids in enc["input_ids"]]

    return count


def suggest_max_length(lengths: Sequence[int], cover: float = 0.99) -> int:
    """Smallest multiple of 8 covering `cover` of the texts (attention cost grows with length squared)."""
    if not lengths:
        return 8
    q = float(np.quantile(np.asarray(lengths), cover, method="inverted_cdf"))  # smallest length covering `cover`
    return int(max(8, 8 * int(np.ceil(q / 8))))


def audit_data(data: TaskData, *, max_length: int | None = None, count_tokens: Tokenize | None = None,
               positions: int | None = None) -> dict[str, Any]:
    """All checks as one JSON-ready dict; `findings` lists every counted warning in plain words.

    `positions` is the longest input the checkpoint takes: a `max_length` above it is cut to it (as the
    run does), so truncation is counted against the length that will be used, and the suggested
    length never exceeds it.
    """
    configured = max_length
    if max_length is not None and positions is not None and max_length > positions:
        max_length = positions
    names = data.label_names
    findings: list[str] = []
    out: dict[str, Any] = {"labels": list(names), "pairs": data.is_pair, "splits": {}, "notes": list(data.notes)}
    train_counts = Counter(data.train.labels)
    for split in data.splits():
        counts = Counter(split.labels)
        keys = [_key(t) for t in split.texts]
        dup = sum(n - 1 for n in Counter(keys).values() if n > 1)
        info: dict[str, Any] = {
            "rows": len(split),
            "label_counts": {names[k]: counts.get(k, 0) for k in range(len(names))},
            "duplicate_texts": dup,
            "imbalance_ratio": _imbalance(counts, len(names)),
        }
        if dup:
            findings.append(f"{split.name}: {dup} repeated texts (case and surrounding space ignored)")
        missing = [names[k] for k in range(len(names)) if counts.get(k, 0) == 0]
        if missing and split.name != "train":
            findings.append(f"{split.name}: no rows of {', '.join(missing)}; per-class scores for them are undefined")
        if split.name != "train":
            unseen = [names[k] for k in counts if train_counts.get(k, 0) == 0]
            if unseen:
                findings.append(f"{split.name}: labels {', '.join(unseen)} are absent from train")
            info["labels_absent_from_train"] = unseen
        if count_tokens is not None:
            lengths = count_tokens(split.texts)
            info["tokens"] = _length_summary(lengths, max_length)
            if max_length and info["tokens"]["truncated"]:
                cut = "" if max_length == configured else f" (train.max_length {configured} is cut to the checkpoint's " \
                                                          f"{positions} positions)"
                findings.append(
                    f"{split.name}: {info['tokens']['truncated']} texts exceed max_length {max_length}{cut} and will be cut"
                )
        out["splits"][split.name] = info
    ratio = out["splits"]["train"]["imbalance_ratio"]
    if ratio is not None and ratio >= 5:
        findings.append(f"train: the largest class is {ratio:.1f}x the smallest; consider class_weights or macro metrics")
    out["leakage"] = _leakage(data.splits())
    for pair, n in out["leakage"].items():
        if n:
            findings.append(f"{pair}: {n} texts appear in both splits; scores on the second are inflated")
    if count_tokens is not None:
        train_len = count_tokens(data.train.texts)
        suggested = suggest_max_length(train_len)
        out["suggested_max_length"] = suggested if positions is None else min(suggested, positions)
        out["max_length"] = max_length
        out["max_length_configured"] = configured
        out["positions"] = positions
    out["findings"] = findings
    return out


def _imbalance(counts: Counter[int], k: int) -> float | None:
    present = [counts.get(i, 0) for i in range(k)]
    low = min(present)
    return None if low == 0 else round(max(present) / low, 2)


def _length_summary(lengths: Sequence[int], max_length: int | None) -> dict[str, Any]:
    arr = np.asarray(lengths, dtype=float)
    pct = {f"p{p}": int(np.percentile(arr, p, method="higher")) for p in (50, 90, 95, 99)}
    return {
        **pct,
        "max": int(arr.max()),
        "mean": round(float(arr.mean()), 1),
        "truncated": int((arr > max_length).sum()) if max_length else 0,
    }


def _leakage(splits: Sequence[Split]) -> dict[str, int]:
    keys = {s.name: {_key(t) for t in s.texts} for s in splits}
    out = {}
    for a, b in (("train", "dev"), ("train", "test"), ("dev", "test")):
        out[f"{a}/{b}"] = len(keys[a] & keys[b])
    return out


def render_audit(report: dict[str, Any], source: str) -> str:
    """The audit as Markdown for the terminal and `audit.md`."""
    labels = report["labels"]
    lines = [f"# Data audit: {source}", ""]
    head = "| split | rows | " + " | ".join(labels) + " | repeats | imbalance |"
    lines += [head, "|" + "---|" * (len(labels) + 4)]
    for name, s in report["splits"].items():
        counts = " | ".join(str(s["label_counts"][lab]) for lab in labels)
        ratio = "n/a" if s["imbalance_ratio"] is None else f"{s['imbalance_ratio']}x"
        lines.append(f"| {name} | {s['rows']} | {counts} | {s['duplicate_texts']} | {ratio} |")
    lines += ["", "Texts shared between splits (leakage): "
              + ", ".join(f"{k} {v}" for k, v in report["leakage"].items()), ""]
    if "suggested_max_length" in report:
        lines += ["| split | tokens p50 | p90 | p95 | p99 | max | truncated |", "|---|---|---|---|---|---|---|"]
        for name, s in report["splits"].items():
            t = s["tokens"]
            lines.append(f"| {name} | {t['p50']} | {t['p90']} | {t['p95']} | {t['p99']} | {t['max']} | {t['truncated']} |")
        configured, used = report.get("max_length_configured", report["max_length"]), report["max_length"]
        setting = f"configured: {configured}" + ("" if used == configured else
                                                 f", used: {used}, the checkpoint's {report['positions']} positions")
        lines += ["", "Suggested max_length (covers 99% of training texts"
                  + (f", within the checkpoint's {report['positions']} positions" if report.get("positions") else "")
                  + f"): {report['suggested_max_length']} ({setting}). "
                  "Attention cost grows with the square of the length.", ""]
    for note in report.get("notes", []):
        lines.append(f"- note: {note}")
    if report["findings"]:
        lines += ["", f"{len(report['findings'])} warnings:"] + [f"- {f}" for f in report["findings"]]
    else:
        lines += ["", "No warnings."]
    return "\n".join(lines) + "\n"


def write_audit(report: dict[str, Any], source: str, folder: Path) -> tuple[Path, Path]:
    """Write audit.json and audit.md into `folder` atomically."""
    folder.mkdir(parents=True, exist_ok=True)
    atomic_write_json(folder / "audit.json", report)
    atomic_write_text(folder / "audit.md", render_audit(report, source))
    return folder / "audit.json", folder / "audit.md"
