"""A starter bake-off config from one labelled data file (`tiltyard draft`).

From the file (and optional dev/test files) it finds the text, label and id columns, reads the
splits as a run would (carving stratified dev/test shares when none are given), runs the data
audit, picks `train.max_length` per arm from the token lengths of the training texts (99% covered,
never above the checkpoint's positions), chooses label words (`harness.experiments.draft_words`),
writes a template that names the options, and renders the four-arm config
(`harness.experiments.draft_yaml`). Nothing is written here: the caller writes `Draft.yaml`.
"""

from __future__ import annotations

import re
import tempfile
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from harness.config import config_from_dict, load_config
from harness.data.audit import audit_data, suggest_max_length, token_counter
from harness.data.readers import read_rows
from harness.data.task import TaskData, load_task
from harness.errors import HarnessError, SettingError
from harness.experiments.draft_words import WordChoice, choose_label_words
from harness.experiments.draft_yaml import ArmLengths, render_draft
from harness.files import atomic_write_text
from harness.methods.templates import parse_template, text_fields, tokenize_label_words, wants_space
from harness.models.backbones import detect_family, positions_of, resolve_source

__all__ = ["Columns", "Draft", "draft_config", "find_columns", "task_name_for"]

_TEXT_NAMES = ("text", "message", "sentence", "content", "body", "review", "comment", "utterance", "query",
               "document", "tweet", "ticket")
_LABEL_NAMES = ("label", "labels", "class", "category", "intent", "topic", "target", "tag", "y")
_ID_NAMES = ("id", "uid", "row_id", "example_id", "message_id")
_MAX_CLASSES = 50  # a column with more distinct values is not taken for a label unless named with --label
_LISTED_OPTIONS = 12  # templates name the options up to this many labels


@dataclass(frozen=True)
class Columns:
    """The columns a starter config reads, and how each was found ('option', 'name' or 'values')."""

    text: str | tuple[str, str]
    label: str
    id: str | None
    how: dict[str, str]


@dataclass(frozen=True)
class Draft:
    """A starter config: its YAML text and the choices behind it (for printing)."""

    yaml: str
    name: str
    columns: Columns
    data: TaskData
    split_origin: dict[str, str]
    words: list[WordChoice]
    lengths: ArmLengths
    template: str
    findings: list[str]


def _columns_of(rows: Sequence[dict[str, Any]]) -> list[str]:
    return list(dict.fromkeys(k for row in rows for k in row))


def _shown(columns: Sequence[str]) -> str:
    return ", ".join(map(repr, columns))


def find_columns(rows: Sequence[dict[str, Any]], path: Path, *, text: str | tuple[str, str] | None = None,
                 label: str | None = None, id_column: str | None = None) -> Columns:
    """Text, label and id columns: the given ones, else found by name, else by their values; one-line errors."""
    columns = _columns_of(rows)
    if len(columns) < 2:
        raise HarnessError(f"{path}: only one column ({_shown(columns)}); a starter config needs a text column and a "
                           "label column (a tab-separated file must end in .tsv)")
    given = [*(text if isinstance(text, tuple) else (text,) if text else ()), *(c for c in (label, id_column) if c)]
    for col in given:
        if col not in columns:
            raise HarnessError(f"{path}: no column {col!r}; the columns are {_shown(columns)}")
    lower = {c.lower(): c for c in columns}
    how: dict[str, str] = {}
    values = {c: [str(r.get(c, "")).strip() for r in rows] for c in columns}
    if id_column is None:
        id_column = next((lower[n] for n in _ID_NAMES if n in lower and len(set(values[lower[n]])) == len(rows)), None)
    how["id"] = "option" if id_column in given else "name"
    if label is None:
        label = next((lower[n] for n in _LABEL_NAMES if n in lower and lower[n] != text), None)
        how["label"] = "name"
        if label is None:
            taken = {id_column, *(text if isinstance(text, tuple) else (text,))}
            like = [c for c in columns if c not in taken and 2 <= len(set(values[c])) <= min(_MAX_CLASSES, len(rows) // 2)
                    and max(map(len, values[c])) <= 40]
            if len(like) != 1:
                what = "no label-like column" if not like else f"several label-like columns ({_shown(like)})"
                raise HarnessError(f"{path}: {what} among {_shown(columns)}; pass --label COLUMN")
            label, how["label"] = like[0], "values"
    else:
        how["label"] = "option"
    classes = sorted(set(values[label]) - {""})
    if len(classes) < 2:
        raise HarnessError(f"{path}: column {label!r} has a single class ({classes[0] if classes else 'empty'!r}); "
                           "a classifier needs two or more")
    if text is None:
        text = next((lower[n] for n in _TEXT_NAMES if n in lower and lower[n] not in (label, id_column)), None)
        how["text"] = "name"
        if text is None:
            rest = [c for c in columns if c not in (label, id_column)]
            if len(rest) != 1:
                what = "no other column" if not rest else f"several ({_shown(rest)})"
                raise HarnessError(f"{path}: cannot tell the text column beside label {label!r}: {what}; pass "
                                   "--text COLUMN, or --text COLUMN_A,COLUMN_B for a pair task")
            text, how["text"] = rest[0], "values"
    else:
        how["text"] = "option"
    if label in (text if isinstance(text, tuple) else (text,)):
        raise HarnessError(f"{path}: column {label!r} cannot be both the text and the label; pass --text or --label")
    return Columns(text, label, id_column, how)


def task_name_for(path: Path) -> str:
    """A task name from the file name (its folder's name for a generic stem such as 'train')."""
    stem = path.stem
    if stem.lower() in {"train", "data", "all", "dataset", "labelled", "labeled"}:
        stem = path.resolve().parent.name or stem
    name = re.sub(r"[^A-Za-z0-9_.-]+", "-", stem).strip("-.") or "task"
    return name if name[0].isalnum() else f"t{name}"


def _tokenizer(checkpoint: str, option: str) -> tuple[Any, int | None, str]:
    """(tokenizer, positions, family) of a checkpoint, weights not loaded; errors name the option."""
    from transformers import AutoConfig, AutoTokenizer  # heavy; the verb's --help must not wait for it

    try:
        source, gguf = resolve_source(checkpoint)
    except SettingError as exc:
        raise HarnessError(f"{option}: {exc.problem}") from None
    tokenizer = AutoTokenizer.from_pretrained(source, gguf_file=gguf)
    config = AutoConfig.from_pretrained(source, gguf_file=gguf)
    return tokenizer, positions_of(config, tokenizer), detect_family(config)


def _title(column: str) -> str:
    title = column.replace("_", " ").strip()
    return (title[:1].upper() + title[1:]).replace("{", "{{").replace("}", "}}")


def _templates(text: str | tuple[str, str], label: str, words: Sequence[str]) -> tuple[str, str]:
    """(template, demo_template): the text part(s) by column title, then the label title and the options."""
    if isinstance(text, tuple):
        body = f"{_title(text[0])}: {{{text[0]}}}\n{_title(text[1])}: {{{text[1]}}}"
    else:
        body = f"{_title(text)}: {{text}}"
    listed = ", ".join(w.replace("{", "{{").replace("}", "}}") for w in words)
    question = f"{_title(label)} ({listed}):" if len(words) <= _LISTED_OPTIONS else f"{_title(label)}:"
    return f"{{demos}}{body}\n{question}", f"{body}\n{question} {{label}}\n\n"


def _prompt_length(data: TaskData, tokenizer: Any, template: str, fields: Sequence[str], label_tokens: int,
                   text_lengths: Sequence[int], positions: int | None) -> tuple[int, int]:
    """(max_length, template tokens) for next_token/prompt: texts (99%) + template + the longest label words."""
    parsed = parse_template(template, key="method.template", allowed=(*fields, "demos"))
    empty = parsed.render({**dict.fromkeys(fields, ""), "demos": ""})
    overhead = len(tokenizer.encode(empty, add_special_tokens=False))
    lengths = [n + overhead + label_tokens for n in text_lengths]
    best = suggest_max_length(lengths)
    return (best if positions is None else min(best, positions)), overhead


def draft_config(train: Path, *, dev: Path | None = None, test: Path | None = None,
                 text: str | tuple[str, str] | None = None, label: str | None = None, id_column: str | None = None,
                 encoder: str = "asset:minilm-l6", decoder: str = "asset:smollm2-135m", seeds: int = 3) -> Draft:
    """Everything `tiltyard draft` decides, checked, with the YAML that records it (not written)."""
    if seeds < 1:
        raise HarnessError(f"--seeds must be 1 or more, got {seeds}")
    rows, _ = read_rows(train)
    if not rows:
        raise HarnessError(f"{train} has no data rows")
    cols = find_columns(rows, train, text=text, label=label, id_column=id_column)
    name = task_name_for(train)
    task: dict[str, Any] = {"name": name, "train": str(train), "text": list(cols.text) if isinstance(cols.text, tuple)
                            else cols.text, "label": cols.label, "id": cols.id}
    origin = {"train": str(train)}
    for split, path in (("dev", dev), ("test", test)):
        if path is not None:
            task[split] = str(path)
            origin[split] = str(path)
    cfg = config_from_dict({"task": task, "model": {"checkpoint": encoder}})
    for split in ("dev", "test"):
        if split not in origin:
            origin[split] = f"carved from train ({getattr(cfg.task, split + '_fraction'):.0%} of every class)"
    data = load_task(cfg.task)
    fields = text_fields(cols.text)
    enc_tok, enc_pos, _ = _tokenizer(encoder, "--encoder")
    dec_tok, dec_pos, dec_family = _tokenizer(decoder, "--decoder")
    if dec_family != "decoder":
        raise HarnessError(f"--decoder: {decoder} is an {dec_family} checkpoint; "
                           "the decoder arms (head on the last token, next_token, prompt) need a causal decoder")
    audit = audit_data(data, count_tokens=token_counter(enc_tok), positions=enc_pos)
    dec_lengths = token_counter(dec_tok)(data.train.texts)
    provisional = _templates(cols.text, cols.label, ["x"])[0]
    tail = parse_template(provisional, key="method.template", allowed=(*fields, "demos")).tail
    space = wants_space("auto", tail, dec_tok)
    words = choose_label_words(data.label_names, dec_tok, context=tail, space=space, source=str(train))
    template, demo_template = _templates(cols.text, cols.label, [w.word for w in words])
    final_tail = parse_template(template, key="method.template", allowed=(*fields, "demos")).tail
    final_space = wants_space("auto", final_tail, dec_tok)
    try:  # the template's own tail, as the run will tokenise it
        tokenize_label_words(dec_tok, [(w.word,) for w in words], data.label_names, context=final_tail,
                             space=final_space)
    except SettingError as exc:
        raise HarnessError(f"{train}: {exc.problem}") from None
    prompt_len, overhead = _prompt_length(data, dec_tok, template, fields, max(w.tokens for w in words),
                                          dec_lengths, dec_pos)
    lengths = ArmLengths(encoder=audit["suggested_max_length"], decoder=min(suggest_max_length(dec_lengths),
                         dec_pos or 1 << 30), prompt=prompt_len, encoder_positions=enc_pos, decoder_positions=dec_pos,
                         template_tokens=overhead)
    yaml_text = render_draft(name=name, task=task, origin=origin, data=data, columns_how=cols.how, words=words,
                             template=template, demo_template=demo_template, lengths=lengths, encoder=encoder,
                             decoder=decoder, seeds=seeds)
    _check_loads(yaml_text)
    return Draft(yaml_text, name, cols, data, origin, words, lengths, template, list(audit["findings"]))


def _check_loads(yaml_text: str) -> None:
    """The drafted text must load like any config (a failure here is a bug in the drafting, not in the data)."""
    with tempfile.TemporaryDirectory(prefix="draft-check-") as tmp:
        path = Path(tmp) / "draft.yaml"
        atomic_write_text(path, yaml_text)
        load_config(path)
