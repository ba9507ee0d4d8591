"""Label new rows with a finished run's exported model (`predict RUN_DIR INPUT`)."""

from __future__ import annotations

import csv
import io
import json
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import yaml

from harness.data.task import read_rows
from harness.errors import HarnessError
from harness.files import atomic_write_text, read_json
from harness.methods.head_export import load_head_model
from harness.methods.registry import load_builtin_methods
from harness.runs.folders import require_finished

__all__ = ["Labelled", "label_rows", "load_exported", "predict"]


def load_exported(run_dir: Path | str) -> Any:
    """The exported model of a finished run, with `label_names` and `predict_proba(texts)`.

    `head` runs are read by harness.methods.head_export.load_head_model; another method provides a
    `load_exported(folder)` on its registered class.
    """
    run_dir = Path(run_dir)
    # the whole folder must be sound, not only the files read here: a damaged run is not one to trust
    require_finished(run_dir, need=("config.yaml", "metrics.json", "predictions.jsonl", "method.json", "model"))
    kind = read_json(run_dir / "method.json").get("kind")
    loader: Any
    if kind == "head":
        loader = load_head_model
    else:
        loader = getattr(load_builtin_methods().get(str(kind)), "load_exported", None)
    if loader is None:
        raise HarnessError(f"{run_dir}: runs of method {kind!r} cannot be reloaded for prediction")
    try:
        return loader(run_dir / "model")
    except (json.JSONDecodeError, KeyError, OSError, ValueError) as exc:  # a damaged or hand-edited export
        raise HarnessError(f"{run_dir / 'model'} cannot be reloaded ({type(exc).__name__}: "
                           f"{str(exc).splitlines()[0] if str(exc) else ''}); half-written or edited by hand?") from None


def _saved_task(path: Path) -> dict[str, Any]:
    """The task section of a run's saved config.yaml, with a message naming the file when it is damaged."""
    try:
        saved = yaml.safe_load(path.read_text(encoding="utf-8"))
    except yaml.YAMLError:
        raise HarnessError(f"{path} is not valid YAML: half-written or edited by hand?") from None
    task = saved.get("task") if isinstance(saved, dict) else None
    if not isinstance(task, dict) or "text" not in task:
        raise HarnessError(f"{path} has no task section with a 'text' key: half-written or edited by hand?")
    return task


@dataclass(frozen=True)
class Labelled:
    """What `label_rows` did: where the CSV went, how many rows, and the seconds the model took on them."""

    path: Path
    rows: int
    seconds: float  # tokenising and scoring the rows; loading the model and reading/writing files not counted

    @property
    def rows_per_second(self) -> float | None:
        return self.rows / self.seconds if self.seconds > 0 else None


def predict(run_dir: Path | str, input_path: Path | str, output_path: Path | str) -> Path:
    """Label new rows: the input's columns plus `predicted` and `prob_<label>` for every label (CSV out)."""
    return label_rows(run_dir, input_path, output_path).path


def label_rows(run_dir: Path | str, input_path: Path | str, output_path: Path | str) -> Labelled:
    """`predict`, also saying how many rows the model labelled and how fast."""
    run_dir, input_path, output_path = Path(run_dir), Path(input_path), Path(output_path)
    exported = load_exported(run_dir)
    task = _saved_task(run_dir / "config.yaml")
    columns = task["text"] if isinstance(task["text"], list) else [task["text"]]
    rows, lines = read_rows(input_path)
    if not rows:
        raise HarnessError(f"{input_path} has no data rows to label")
    texts: list[Any] = []
    for row, line in zip(rows, lines, strict=True):
        cells = []
        for col in columns:
            value = row.get(col)
            if value is None or not str(value).strip():
                raise HarnessError(f"{input_path} line {line}: no text in column {col!r} (the run's task.text)")
            cells.append(str(value))
        texts.append(tuple(cells) if len(cells) == 2 else cells[0])
    started = time.perf_counter()
    probs = exported.predict_proba(texts)
    seconds = time.perf_counter() - started
    names = list(exported.label_names)
    out = io.StringIO()
    fields = [*rows[0].keys(), "predicted", *(f"prob_{n}" for n in names)]
    writer = csv.DictWriter(out, fieldnames=list(dict.fromkeys(fields)), lineterminator="\n", extrasaction="ignore")
    writer.writeheader()
    for row, p in zip(rows, probs, strict=True):
        writer.writerow({**row, "predicted": names[int(p.argmax())], **{f"prob_{n}": f"{v:.6f}" for n, v in zip(names, p, strict=True)}})
    atomic_write_text(output_path, out.getvalue())
    return Labelled(output_path, len(rows), seconds)
