"""Read labelled splits, map columns, fix the label set, carve and subsample splits.

Structural problems (a missing column, a ragged row, an undecodable byte, an empty split, a
missing or undeclared label) are errors naming the file and row. Quality problems that a run
can live with (duplicates, texts shared between splits) are counted by `harness.data.audit`.
"""

from __future__ import annotations

import csv
import hashlib
import json
import math
import random
from collections import Counter, defaultdict
from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

from harness.config import TaskConfig
from harness.errors import HarnessError
from harness.files import file_sha256

__all__ = ["Split", "TaskData", "text_key", "load_task", "read_rows", "stratified_carve", "subsample"]

_FORMATS = {".csv": "csv", ".tsv": "tsv", ".tab": "tsv", ".jsonl": "jsonl", ".json": "jsonl",
            ".parquet": "parquet", ".pq": "parquet"}


@dataclass(frozen=True)
class Split:
    """One split: parallel lists of ids, texts (a string or a pair) and label indices."""

    name: str
    ids: tuple[str, ...]
    texts: tuple[str | tuple[str, str], ...]
    labels: tuple[int, ...]
    source: str = ""
    lines: tuple[int, ...] = ()  # source line (CSV/JSONL) or row number of every example

    def __len__(self) -> int:
        return len(self.ids)

    def content_hash(self) -> str:
        """SHA-256 over ids, texts and labels: equal hashes mean equal data."""
        h = hashlib.sha256()
        for i, t, y in zip(self.ids, self.texts, self.labels, strict=True):
            h.update(json.dumps([i, t, y], ensure_ascii=False).encode("utf-8"))
            h.update(b"\n")
        return h.hexdigest()

    def select(self, idx: Sequence[int], name: str | None = None) -> Split:
        """The rows at `idx`, in that order."""
        return Split(
            name or self.name,
            tuple(self.ids[i] for i in idx),
            tuple(self.texts[i] for i in idx),
            tuple(self.labels[i] for i in idx),
            self.source,
            tuple(self.lines[i] for i in idx) if self.lines else (),
        )


@dataclass(frozen=True)
class TaskData:
    """The three splits, the label names (index order) and where they came from."""

    train: Split
    dev: Split
    test: Split
    label_names: tuple[str, ...]
    is_pair: bool
    files: dict[str, str] = field(default_factory=dict)  # path -> sha256
    notes: tuple[str, ...] = ()

    def splits(self) -> tuple[Split, Split, Split]:
        return self.train, self.dev, self.test

    def fingerprint(self) -> dict[str, Any]:
        """What `data.json` records: sizes, label counts and content hashes."""
        out: dict[str, Any] = {"labels": list(self.label_names), "files": dict(self.files), "splits": {}}
        for s in self.splits():
            counts = Counter(s.labels)
            out["splits"][s.name] = {
                "rows": len(s),
                "label_counts": {self.label_names[k]: counts.get(k, 0) for k in range(len(self.label_names))},
                "sha256": s.content_hash(),
            }
        out["notes"] = list(self.notes)
        return out


def text_key(text: str | tuple[str, str]) -> str:
    """What counts as the same text: case and runs of white space ignored (pairs part by part).

    The carve-out split, `dedupe` and the audit's duplicate and leakage counts all use this one key,
    so a message repeated with other capitals cannot land in train and test at once.
    """
    parts = text if isinstance(text, tuple) else (text,)
    return json.dumps([" ".join(p.split()).casefold() for p in parts], ensure_ascii=False)


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


def _cell(value: Any, where: str = "", column: str = "") -> str | None:
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


def _read_split(name: str, path_text: str, cfg: TaskConfig, base: Path) -> tuple[list[str], list[Any], list[str], list[int], Path]:
    path = Path(path_text)
    if not path.is_absolute():
        path = (base / path) if not path.exists() and (base / path).exists() else path
    rows, lines = read_rows(path, cfg.format)
    if not rows:
        raise HarnessError(f"{path}: split '{name}' has no data rows")
    columns = list(rows[0].keys())
    text_cols = list(cfg.text) if isinstance(cfg.text, tuple) else [cfg.text]
    for col, k in [*((c, "task.text") for c in text_cols), (cfg.label, "task.label"),
                   *(((cfg.id, "task.id"),) if cfg.id else ())]:
        if col not in columns:
            raise HarnessError(f"{path}: no column {col!r} (set by {k}); the columns are {', '.join(map(repr, columns))}"
                               + _delimiter_hint(columns, path))
    ids, texts, labels = [], [], []
    for i, (row, line) in enumerate(zip(rows, lines, strict=True)):
        where = f"{path} line {line}"
        parts = [_cell(row.get(c), where, c) for c in text_cols]
        for c, p in zip(text_cols, parts, strict=True):
            if p is None:
                raise HarnessError(f"{where}: empty text in column {c!r}; remove the row or fill it in")
        label = _cell(row.get(cfg.label), where, cfg.label)
        if label is None:
            raise HarnessError(f"{where}: missing label in column {cfg.label!r}")
        row_id = _cell(row.get(cfg.id), where, cfg.id) if cfg.id else f"{name}-{i + 1}"
        if row_id is None:
            raise HarnessError(f"{path} line {line}: missing id in column {cfg.id!r}")
        ids.append(row_id)
        texts.append((parts[0], parts[1]) if len(parts) == 2 else parts[0])
        labels.append(label.strip())
    dup = [k for k, n in Counter(ids).items() if n > 1]
    if dup:
        raise HarnessError(f"{path}: id {dup[0]!r} appears {Counter(ids)[dup[0]]} times in column {cfg.id!r}; ids must be unique")
    return ids, texts, labels, lines, path


def _delimiter_hint(columns: Sequence[str], path: Path) -> str:
    """A hint when the whole header landed in one column: the file uses another delimiter."""
    if len(columns) != 1:
        return ""
    for delimiter, name in (("\t", "tab"), (";", "semicolon"), ("|", "pipe"), (",", "comma")):
        if delimiter in columns[0]:
            fix = "name it .tsv or set task.format: tsv" if delimiter == "\t" else "re-save it as CSV or TSV"
            return f"; the header looks {name}-separated: {fix}"
    return ""


def stratified_carve(labels: Sequence[int], groups: Sequence[str], fraction: float, seed: int) -> tuple[list[int], list[int]]:
    """Split row indices into (kept, carved) with about `fraction` of every class carved.

    Rows with the same group key (the text) always land on the same side, so a collection
    that repeats messages verbatim cannot leak a text from train into dev or test.
    """
    rng = random.Random(seed)
    by_group: dict[str, list[int]] = defaultdict(list)
    for i, g in enumerate(groups):
        by_group[g].append(i)
    by_class: dict[int, list[str]] = defaultdict(list)
    for g, idx in by_group.items():
        by_class[labels[idx[0]]].append(g)
    carved: list[int] = []
    for c in sorted(by_class):
        gs = sorted(by_class[c])
        rng.shuffle(gs)
        total = sum(len(by_group[g]) for g in gs)
        target = round(fraction * total)
        taken = 0
        for g in gs:
            if taken >= target:
                break
            carved.extend(by_group[g])
            taken += len(by_group[g])
    carved_set = set(carved)
    kept = [i for i in range(len(labels)) if i not in carved_set]
    return kept, sorted(carved)


def subsample(labels: Sequence[int], size: int, seed: int) -> list[int]:
    """A seeded stratified subsample of `size` rows (largest-remainder quotas, >= 1 per class)."""
    if size >= len(labels):
        return list(range(len(labels)))
    rng = random.Random(seed)
    by_class: dict[int, list[int]] = defaultdict(list)
    for i, y in enumerate(labels):
        by_class[y].append(i)
    n = len(labels)
    quota = {c: size * len(v) / n for c, v in by_class.items()}
    take = {c: max(1, math.floor(q)) for c, q in quota.items()}
    rest = sorted(by_class, key=lambda c: (-(quota[c] - math.floor(quota[c])), c))
    for c in rest:
        if sum(take.values()) >= size:
            break
        if take[c] < len(by_class[c]):
            take[c] += 1
    chosen: list[int] = []
    for c in sorted(by_class):
        idx = list(by_class[c])
        rng.shuffle(idx)
        chosen.extend(idx[: take[c]])
    return sorted(chosen)


def load_task(cfg: TaskConfig, *, seed: int = 0, base: Path | None = None) -> TaskData:
    """Read and check all splits; carve dev/test from train when they are not given."""
    base = base or Path.cwd()
    files: dict[str, str] = {}
    raw: dict[str, tuple[list[str], list[Any], list[str], list[int], str]] = {}
    for name in ("train", "dev", "test"):
        path_text = getattr(cfg, name)
        if path_text is None:
            continue
        if path_text.startswith("asset:"):
            from harness.models.assets import resolve_data

            path_text = str(resolve_data(path_text[len("asset:"):]))
        ids, texts, labels, lines, path = _read_split(name, path_text, cfg, base)
        files[str(path)] = file_sha256(path)
        raw[name] = (ids, texts, labels, lines, str(path))
    notes: list[str] = []
    train_path = raw["train"][4]
    if len(set(raw["train"][2])) < 2:
        raise HarnessError(f"{train_path}: train has a single class ({raw['train'][2][0]!r}); a classifier needs two or more")
    if cfg.labels is not None:
        label_names = tuple(cfg.labels)
        for _, _, labels, lines, src in raw.values():
            for lab, line in zip(labels, lines, strict=True):
                if lab not in label_names:
                    raise HarnessError(
                        f"{src} line {line}: label {lab!r} is not in task.labels ({', '.join(label_names)})"
                    )
    else:
        label_names = tuple(sorted(set(raw["train"][2])))
        for name in ("dev", "test"):
            if name in raw:
                _, _, labels, lines, src = raw[name]
                for lab, line in zip(labels, lines, strict=True):
                    if lab not in label_names:
                        raise HarnessError(
                            f"{src} line {line}: label {lab!r} never occurs in train ({train_path}); "
                            "a model cannot learn it: add training rows or declare task.labels"
                        )
    index = {lab: k for k, lab in enumerate(label_names)}
    splits: dict[str, Split] = {}
    for name, (ids, texts, labels, lines, src) in raw.items():
        splits[name] = Split(name, tuple(ids), tuple(texts), tuple(index[x] for x in labels), src, tuple(lines))
    train = splits["train"]
    if cfg.dedupe:
        seen: set[str] = set()
        keep = []
        for i, t in enumerate(train.texts):
            if text_key(t) not in seen:
                seen.add(text_key(t))
                keep.append(i)
        if len(keep) < len(train):
            notes.append(f"dedupe: dropped {len(train) - len(keep)} repeated texts from train")
        train = train.select(keep)
    for name, fraction in (("test", cfg.test_fraction), ("dev", cfg.dev_fraction)):
        if name in splits:
            continue
        if fraction <= 0:
            raise HarnessError(f"task.{name} is not set and task.{name}_fraction is 0: there is no {name} split")
        groups = [text_key(t) for t in train.texts]
        kept, carved = stratified_carve(train.labels, groups, fraction, cfg.split_seed + (1 if name == "dev" else 0))
        splits[name] = train.select(carved, name)
        train = train.select(kept)
        notes.append(f"{name}: carved {len(carved)} rows ({fraction:.0%} per class) from train, seed {cfg.split_seed}")
    if cfg.train_size is not None:
        if cfg.train_size > len(train):
            notes.append(f"train_size {cfg.train_size} exceeds the {len(train)} training rows; using all")
        idx = subsample(train.labels, cfg.train_size, seed)
        train = train.select(idx)
        notes.append(f"train_size: stratified subsample of {len(train)} rows, seed {seed}")
    if cfg.max_rows is not None:
        train = train.select(range(min(cfg.max_rows, len(train))))
        splits = {k: v.select(range(min(cfg.max_rows, len(v)))) for k, v in splits.items()}
    splits["train"] = train
    for s in splits.values():
        if len(s) == 0:
            raise HarnessError(f"split '{s.name}' is empty after splitting ({s.source}); give more rows or a smaller fraction")
    return TaskData(
        replace(splits["train"], name="train"), splits["dev"], splits["test"], label_names,
        isinstance(cfg.text, tuple), files, tuple(notes),
    )
