"""Data files as rows: CSV, TSV, JSON lines and Parquet, each row with its source line.

Structural problems (an undecodable byte, a ragged or malformed row, a repeated column) are
errors naming the file and line. Cells may be long documents, up to `MAX_CELL_CHARS` characters
(they are cut to `train.max_length` tokens later anyway).
"""

from __future__ import annotations

import csv
import json
import math
from collections import Counter
from pathlib import Path
from typing import Any

from harness.errors import HarnessError

__all__ = ["MAX_CELL_CHARS", "cell_text", "read_rows"]

MAX_CELL_CHARS = 16 * 2**20  # 16 Mi characters per CSV/TSV cell (the csv module's own default is 131,072)
_FORMATS = {".csv": "csv", ".tsv": "tsv", ".tab": "tsv", ".jsonl": "jsonl", ".json": "jsonl",
            ".parquet": "parquet", ".pq": "parquet"}


def _format_of(path: Path, fmt: str) -> str:
    if fmt != "auto":
        return fmt
    kind = _FORMATS.get(path.suffix.lower())
    if kind is None:
        raise HarnessError(
            f"{path}: cannot tell the format from the extension '{path.suffix}'; "
            "use .csv, .tsv, .jsonl or .parquet, or set task.format"
        )
    return kind


def _decode(path: Path) -> str:
    raw = path.read_bytes()
    if raw.startswith(b"\xef\xbb\xbf"):
        raw = raw[3:]
    try:
        return raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise HarnessError(
            f"{path} line {line}: byte 0x{raw[exc.start]:02x} is not valid UTF-8; re-save the file as UTF-8"
        ) from None


def read_rows(path: Path, fmt: str = "auto") -> tuple[list[dict[str, Any]], list[int]]:
    """All rows of a data file as dicts, with the source line (or row number) of each."""
    if not path.exists():
        raise HarnessError(f"data file {path} does not exist")
    if path.is_dir():
        raise HarnessError(f"data file {path} is a folder; give the path of a CSV/TSV/JSONL/Parquet file")
    kind = _format_of(path, fmt)
    if kind == "parquet":
        return _read_parquet(path)
    text = _decode(path)
    if kind == "jsonl":
        return _read_jsonl(path, text)
    return _read_delimited(path, text, "\t" if kind == "tsv" else ",")


def _read_delimited(path: Path, text: str, delimiter: str) -> tuple[list[dict[str, Any]], list[int]]:
    if csv.field_size_limit() < MAX_CELL_CHARS:  # a process-wide setting; only ever raised, never lowered
        csv.field_size_limit(MAX_CELL_CHARS)
    reader = csv.reader(text.splitlines(keepends=True), delimiter=delimiter, strict=True)
    try:
        header = next(reader)
    except StopIteration:
        raise HarnessError(f"{path} is empty; it needs a header row and at least one data row") from None
    except csv.Error as exc:
        raise HarnessError(f"{path} line 1: unreadable header ({exc})") from None
    header = [h.strip() for h in header]
    if len(set(header)) != len(header):
        dup = [h for h, n in Counter(header).items() if n > 1]
        raise HarnessError(f"{path} line 1: column {dup[0]!r} appears twice in the header")
    rows, lines = [], []
    while True:
        start = reader.line_num + 1  # a quoted field may run over several lines; name where the row began
        try:
            row = next(reader)
        except StopIteration:
            break
        except csv.Error as exc:
            if "field larger than field limit" in str(exc):
                raise HarnessError(f"{path} line {start}: a cell is longer than {MAX_CELL_CHARS:,} characters, the "
                                   "limit for one cell; shorten it (texts are cut to train.max_length tokens anyway)"
                                   ) from None
            unclosed = "; a quote opened in it is never closed" if "end of data" in str(exc) else ""
            raise HarnessError(f"{path} line {start}: malformed row ({exc}){unclosed}") from None
        if not row or all(not c.strip() for c in row):
            continue  # blank line
        if len(row) != len(header):
            raise HarnessError(
                f"{path} line {reader.line_num}: {len(row)} fields where the header has {len(header)}; "
                "quote fields that contain the delimiter"
            )
        rows.append(dict(zip(header, row, strict=True)))
        lines.append(reader.line_num)
    return rows, lines


def _read_jsonl(path: Path, text: str) -> tuple[list[dict[str, Any]], list[int]]:
    rows, lines = [], []
    for n, line in enumerate(text.splitlines(), start=1):
        if not line.strip():
            continue
        try:
            obj = json.loads(line)
        except json.JSONDecodeError as exc:
            raise HarnessError(f"{path} line {n}: not valid JSON ({exc.msg})") from None
        if not isinstance(obj, dict):
            raise HarnessError(f"{path} line {n}: expected a JSON object per line, got {type(obj).__name__}")
        rows.append(obj)
        lines.append(n)
    return rows, lines


def _read_parquet(path: Path) -> tuple[list[dict[str, Any]], list[int]]:
    # pyarrow directly (what datasets reads Parquet with): no cache folder, and no second line of
    # error logging on stderr for a broken file.
    import pyarrow.parquet as pq

    try:
        table = pq.read_table(path)
    except Exception as exc:  # pyarrow raises many types for a broken file
        reason = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise HarnessError(f"{path}: not a readable Parquet file ({type(exc).__name__}: {reason})") from None
    rows = table.to_pylist()
    return rows, list(range(1, len(rows) + 1))


def cell_text(value: Any, where: str = "", column: str = "") -> str | None:
    """A cell as text; None for missing values (empty, null, NaN). A list or mapping is an error."""
    if isinstance(value, (dict, list, tuple)):
        kind = "a mapping" if isinstance(value, dict) else "a list"
        raise HarnessError(f"{where}: column {column!r} holds {kind} ({json.dumps(value, default=str)[:40]}), "
                           "not text; give one string per cell")
    if value is None:
        return None
    if isinstance(value, float) and math.isnan(value):
        return None
    text = str(value)
    return text if text.strip() else None
