"""Read labelled splits, map columns, fix the label set, carve and subsample splits.

Structural problems (a missing column, a ragged row, an undecodable byte, an empty split, a
missing or undeclared label) are errors naming the file and row. Quality problems that a run
can live with (duplicates, texts shared between splits) are counted by `harness.data.audit`.
"""

from __future__ import annotations

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
from harness.data.readers import cell_text, read_rows
from harness.errors import HarnessError
from harness.files import file_sha256
from harness.models.assets import resolve_data

__all__ = ["Split", "TaskData", "load_task", "read_rows", "split_paths", "stratified_carve", "subsample", "text_key"]

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


@dataclass(frozen=True)
class _RawSplit:
    """One split as read, before the label set is fixed: labels are still names."""

    ids: list[str]
    texts: list[str | tuple[str, str]]
    labels: list[str]
    lines: list[int]
    path: Path


def split_paths(cfg: TaskConfig, base: Path | None = None) -> dict[str, Path]:
    """The file of every split the task names: `asset:NAME` resolved, a relative path looked up in the
    working folder first, then in `base` (the config's folder). Carved splits have no file."""
    base = base or Path.cwd()
    out: dict[str, Path] = {}
    for name in ("train", "dev", "test"):
        text = getattr(cfg, name)
        if text is None:
            continue
        if text.startswith("asset:"):
            out[name] = resolve_data(text[len("asset:"):])
            continue
        path = Path(text)
        if not path.is_absolute() and not path.exists() and (base / path).exists():
            path = base / path
        out[name] = path
    return out


def _read_split(name: str, path: Path, cfg: TaskConfig) -> _RawSplit:
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
    ids: list[str] = []
    texts: list[str | tuple[str, str]] = []
    labels: list[str] = []
    for i, (row, line) in enumerate(zip(rows, lines, strict=True)):
        where = f"{path} line {line}"
        parts: list[str] = []
        for c in text_cols:
            part = cell_text(row.get(c), where, c)
            if part is None:
                raise HarnessError(f"{where}: empty text in column {c!r}; remove the row or fill it in")
            parts.append(part)
        label = cell_text(row.get(cfg.label), where, cfg.label)
        if label is None:
            raise HarnessError(f"{where}: missing label in column {cfg.label!r}")
        row_id = cell_text(row.get(cfg.id), where, cfg.id) if cfg.id else f"{name}-{i + 1}"
        if row_id is None:
            raise HarnessError(f"{path} line {line}: missing id in column {cfg.id!r}")
        ids.append(row_id)
        texts.append((parts[0], parts[1]) if len(parts) == 2 else parts[0])
        labels.append(label.strip())
    dup = [k for k, n in Counter(ids).items() if n > 1]
    if dup:
        raise HarnessError(f"{path}: id {dup[0]!r} appears {Counter(ids)[dup[0]]} times in column {cfg.id!r}; ids must be unique")
    return _RawSplit(ids, texts, labels, lines, path)


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
    files: dict[str, str] = {}
    raw: dict[str, _RawSplit] = {}
    for name, path in split_paths(cfg, base).items():
        raw[name] = _read_split(name, path, cfg)
        files[str(path)] = file_sha256(path)
    notes: list[str] = []
    train_path = raw["train"].path
    if len(set(raw["train"].labels)) < 2:
        raise HarnessError(f"{train_path}: train has a single class ({raw['train'].labels[0]!r}); "
                           "a classifier needs two or more")
    if cfg.labels is not None:
        label_names = tuple(cfg.labels)
        for split in raw.values():
            for lab, line in zip(split.labels, split.lines, strict=True):
                if lab not in label_names:
                    raise HarnessError(
                        f"{split.path} line {line}: label {lab!r} is not in task.labels ({', '.join(label_names)})"
                    )
    else:
        label_names = tuple(sorted(set(raw["train"].labels)))
        for name in ("dev", "test"):
            if name in raw:
                for lab, line in zip(raw[name].labels, raw[name].lines, strict=True):
                    if lab not in label_names:
                        raise HarnessError(
                            f"{raw[name].path} line {line}: label {lab!r} never occurs in train ({train_path}); "
                            "a model cannot learn it: add training rows or declare task.labels"
                        )
    index = {lab: k for k, lab in enumerate(label_names)}
    splits: dict[str, Split] = {}
    for name, r in raw.items():
        splits[name] = Split(name, tuple(r.ids), tuple(r.texts), tuple(index[x] for x in r.labels), str(r.path),
                             tuple(r.lines))
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
