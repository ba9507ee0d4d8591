"""Turn the data files carried by packages into `id,text,label` CSVs, with counts on the side.

Each CSV `<name>.csv` has a sidecar `<name>.json` recording the source file, its sha256, the row
and label counts, duplicates, and the text repairs made. `id` is the line number in the source
file, so every row can be traced back.
"""

from __future__ import annotations

import csv
import io
import json
import re
from collections import Counter, defaultdict
from pathlib import Path
from typing import Any

from harness.errors import HarnessError
from harness.files import atomic_write_text, file_sha256

__all__ = ["COARSE_LABELS", "FORMAT_VERSION", "build_csv", "clean_text", "csv_is_current", "read_question_labels", "read_sms"]

FORMAT_VERSION = 1  # bump when the parsing changes, so cached CSVs are rebuilt

# The six coarse answer types of Li & Roth 2002.
COARSE_LABELS = ("ABBR", "DESC", "ENTY", "HUM", "LOC", "NUM")

Row = tuple[int, str, str]  # (source line, text, label)

# str.splitlines() also breaks on these; a CSV reader built on it would split a row in two.
_LINE_BREAKERS = re.compile("[\n\r\x0b\x0c\x1c\x1d\x1e\x85\u2028\u2029]")
_C1 = re.compile("[\x80-\x9f]")
_QUESTION_LABEL = re.compile(r"([A-Z]+):(\S+)")


def _c1_to_cp1252(match: re.Match[str]) -> str:
    # C1 controls in these files are Windows-1252 bytes (curly quotes, dashes) that were decoded as
    # Latin-1 upstream; five of the 32 bytes are undefined in Windows-1252 and are dropped.
    return bytes([ord(match.group())]).decode("cp1252", errors="ignore")


def clean_text(text: str) -> tuple[str, bool]:
    """(text with C1 controls repaired, line breaks turned into spaces, ends stripped; changed?)."""
    cleaned = _LINE_BREAKERS.sub(" ", _C1.sub(_c1_to_cp1252, text)).strip()
    return cleaned, cleaned != text


def _decode(src: Path) -> str:
    raw = src.read_bytes()
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise HarnessError(f"{src} line {line}: not valid UTF-8 ({exc.reason}); reinstall its package") from None
    return text.removeprefix("\ufeff")


def _lines(src: Path) -> list[tuple[int, str]]:
    """Non-blank (line number, line) pairs; only '\\n' ends a line, so odd characters stay in the text."""
    return [(n, line.rstrip("\r")) for n, line in enumerate(_decode(src).split("\n"), 1) if line.strip()]


def read_sms(src: Path) -> tuple[list[Row], dict[str, Any]]:
    """SMS Spam Collection: `label<TAB>message` per line. Duplicates are kept and counted."""
    rows: list[Row] = []
    repaired = 0
    for lineno, line in _lines(src):
        label, sep, body = line.partition("\t")
        if not sep:
            raise HarnessError(f"{src} line {lineno}: no tab between the label and the message")
        label = label.strip()
        if label not in ("ham", "spam"):
            raise HarnessError(f"{src} line {lineno}: label {label!r} is neither 'ham' nor 'spam'")
        text, changed = clean_text(body)
        if not text:
            raise HarnessError(f"{src} line {lineno}: empty message")
        repaired += changed
        rows.append((lineno, text, label))
    labels_of: defaultdict[str, set[str]] = defaultdict(set)
    for _, text, label in rows:
        labels_of[text].add(label)
    counts = Counter(text for _, text, _ in rows)
    stats = {
        # rows whose text already appeared above: the data layer groups them so no text spans two splits
        "duplicate_texts": len(rows) - len(counts),
        "duplicate_groups": sum(1 for n in counts.values() if n > 1),
        "duplicate_label_conflicts": sum(1 for labs in labels_of.values() if len(labs) > 1),
        "texts_repaired": repaired,
    }
    return rows, stats


def read_question_labels(src: Path, *, fine: bool) -> tuple[list[Row], dict[str, Any]]:
    """`COARSE:fine question` per line; repeated questions keep their first occurrence."""
    rows: list[Row] = []
    first_label: dict[str, str] = {}
    conflicts: set[str] = set()
    repaired = removed = 0
    for lineno, line in _lines(src):
        tag, _, question = line.strip().partition(" ")
        match = _QUESTION_LABEL.fullmatch(tag)
        if match is None or match.group(1) not in COARSE_LABELS:
            raise HarnessError(f"{src} line {lineno}: {tag!r} is not a COARSE:fine label with COARSE in "
                               f"{', '.join(COARSE_LABELS)}")
        text, changed = clean_text(question)
        if not text:
            raise HarnessError(f"{src} line {lineno}: label {tag!r} has no question after it")
        label = tag if fine else match.group(1)
        if text in first_label:
            removed += 1
            if first_label[text] != label:
                conflicts.add(text)
            continue
        first_label[text] = label
        repaired += changed
        rows.append((lineno, text, label))
    stats = {
        "duplicates_removed": removed,
        "label_conflicts": len(conflicts),  # repeats labelled differently; the first label was kept
        "texts_repaired": repaired,
        "texts_with_replacement_char": sum(1 for _, text, _ in rows if "\ufffd" in text),  # lost upstream
    }
    return rows, stats


def _read(reader: str, src: Path) -> tuple[list[Row], dict[str, Any]]:
    if reader == "sms":
        return read_sms(src)
    if reader in ("questions-coarse", "questions-fine"):
        return read_question_labels(src, fine=reader == "questions-fine")
    raise HarnessError(f"no reader {reader!r} for {src}")  # a registry typo, not user input


def csv_is_current(csv_path: Path, source_sha256: str | None) -> bool:
    """The CSV and its sidecar exist, in this format, from this source (any source when None)."""
    try:
        stats = json.loads(csv_path.with_suffix(".json").read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return False
    return (csv_path.is_file() and stats.get("format") == FORMAT_VERSION
            and source_sha256 in (None, stats.get("source_sha256")))


def build_csv(name: str, reader: str, src: Path, out_dir: Path, labels: tuple[str, ...] | None) -> Path:
    """Write `<out_dir>/<name>.csv` and its `.json` sidecar unless they are current; return the CSV."""
    csv_path = out_dir / f"{name}.csv"
    digest = file_sha256(src)
    if csv_is_current(csv_path, digest):
        return csv_path
    rows, extra = _read(reader, src)
    if labels is not None:
        stray = sorted({label for _, _, label in rows} - set(labels))
        if stray:
            raise HarnessError(f"{src}: labels {', '.join(stray)} are not among {', '.join(labels)}")
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(("id", "text", "label"))
    writer.writerows(rows)
    stats = {
        "asset": name, "format": FORMAT_VERSION, "source": str(src), "source_sha256": digest,
        "rows": len(rows), "labels": dict(sorted(Counter(label for _, _, label in rows).items())), **extra,
    }
    out_dir.mkdir(parents=True, exist_ok=True)
    atomic_write_text(csv_path, buffer.getvalue())
    atomic_write_text(csv_path.with_suffix(".json"), json.dumps(stats, indent=2, ensure_ascii=False) + "\n")
    return csv_path
