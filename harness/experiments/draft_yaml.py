"""The starter config as commented YAML: every drafted choice with a comment saying why and what to edit.

Strings are written JSON-quoted (valid YAML, and never read back as a number or a boolean);
floats with a decimal point and an exponent ('1.0e-04'), the form YAML reads as a float.
The arms' training settings start from the committed four-arm bake-off (configs/bakeoff.yaml).
"""

from __future__ import annotations

import json
from collections import Counter
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from harness.data.task import TaskData
from harness.experiments.draft_words import WordChoice

__all__ = ["ArmLengths", "FIRST_SEED", "render_draft"]

FIRST_SEED = 13


@dataclass(frozen=True)
class ArmLengths:
    """`train.max_length` of each kind of arm, and the limits they were held under."""

    encoder: int
    decoder: int
    prompt: int
    encoder_positions: int | None
    decoder_positions: int | None
    template_tokens: int


def _q(value: Any) -> str:
    return json.dumps(value, ensure_ascii=False)


def _scalar(value: Any) -> str:
    """A YAML scalar: strings quoted, booleans lower-case, floats with a point and an exponent ('1.0e-04')."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return f"{value:.1e}"
    if isinstance(value, int):
        return str(value)
    return _q(value)


def _flow(items: Mapping[str, Any], width: int = 110) -> str:
    """A flow mapping for a list item, wrapped onto indented lines past `width` characters."""
    lines, line = [], "    - {"
    for i, (k, v) in enumerate(items.items()):
        part = f"{k}: {_scalar(v)}" + ("}" if i == len(items) - 1 else ",")
        if len(line) + len(part) + 1 > width and not line.endswith("{"):
            lines.append(line)
            line = "       " + part
        else:
            line += ("" if line.endswith("{") else " ") + part
    return "\n".join([*lines, line])


def _within(positions: int | None) -> str:
    return f"within the checkpoint's {positions} positions" if positions else "the checkpoint records no position limit"


def _found(how: str, option: str) -> str:
    return {"option": f"given with {option}", "name": f"found by its name; {option} to choose another",
            "values": f"found by its values (the only fitting column); {option} to choose another"}[how]


def _task_lines(task: Mapping[str, Any], origin: Mapping[str, str], data: TaskData, how: Mapping[str, str]) -> list[str]:
    sizes = {s.name: len(s) for s in data.splits()}
    lines = ["task:", f"  name: {_q(task['name'])}                # used in run folder paths (runs/<name>/...)",
             f"  train: {_q(task['train'])}   # {sizes['train']} rows for training"]
    for split in ("dev", "test"):
        if split in task:
            lines.append(f"  {split}: {_q(task[split])}   # {sizes[split]} rows, given with --{split}")
        else:
            lines += [f"  # {split}: not given, so {sizes[split]} rows are carved from train: a stratified share of "
                      "every class,", "  # with repeated texts kept on one side (name a file here to use your own)",
                      f"  {split}_fraction: 0.15"]
    lines.append("  split_seed: 0             # seed of the carve-out; change it only before looking at test scores")
    text = task["text"]
    lines.append(f"  text: {_q(text)}   # " + ("the two parts of a pair, " if isinstance(text, list) else "")
                 + _found(how["text"], "--text"))
    lines.append(f"  label: {_q(task['label'])}   # {_found(how['label'], '--label')}")
    lines.append(f"  id: {_q(task['id'])}   # " + ("row ids; " + _found(how["id"], "--id") if task["id"]
                                                  else "no unique id column found: rows are named <split>-<row number>"))
    lines.append("  # train_size: 200          # uncomment to train every arm on the same seeded subsample (faster)")
    return lines


def _label_lines(words: Sequence[WordChoice], data: TaskData) -> list[str]:
    counts = Counter(data.train.labels)
    lines = ["  # The word each label is scored as (next_token, prompt). Drafted from the label names, lower-cased,",
             "  # preferring one token after the template's last line with the decoder's tokenizer; every label's",
             "  # tokens differ from every other's. Edit freely (a word per label, or a list of words); a run",
             "  # checks them again and refuses words that collide.",
             "  label_words:"]
    for k, choice in enumerate(words):
        others = [c for c in choice.candidates if c != choice.word]
        note = f"{choice.tokens} token{'s' if choice.tokens != 1 else ''}, {counts.get(k, 0)} training rows"
        lines.append(f"    {_q(choice.label)}: {_q(choice.word)}   # {note}"
                     + (f"; other candidates: {', '.join(others)}" if others else ""))
    return lines


def render_draft(*, name: str, task: Mapping[str, Any], origin: Mapping[str, str], data: TaskData,
                 columns_how: Mapping[str, str], words: Sequence[WordChoice], template: str, demo_template: str,
                 lengths: ArmLengths, encoder: str, decoder: str, seeds: int) -> str:
    """The whole starter config as YAML text."""
    labels = len(data.label_names)
    seed_list = ", ".join(str(FIRST_SEED + i) for i in range(seeds))
    lines = [
        f"# Starter bake-off for {task['train']} ({labels} labels), drafted by `tiltyard draft`.",
        "# Four ways to build the classifier, each run with every seed of the grid: a fresh head on the encoder,",
        "# a fresh head on the decoder, the decoder trained to write the label words, and the decoder",
        "# prompted zero-shot with calibration (no training). Check the plan with `tiltyard sweep CONFIG --dry-run`.",
        "# The learning rates are not taken on trust: sweep.tune below gives every trained arm the same number",
        "# of trials on dev before the seeds run on test. Fit the whole sweep to your time with --budget 15m.",
        *_task_lines(task, origin, data, columns_how),
        "model:",
        f"  checkpoint: {_q(encoder)}   # the base arm's checkpoint; each arm below names its own",
        "method:",
        "  kind: head",
        "  # next_token and prompt: the text, then the question with the options named (as the label words),",
        "  # so a zero-shot model knows what to answer. Describe your task here (e.g. 'Message to support:').",
        f"  template: {_q(template)}",
        f"  demo_template: {_q(demo_template)}   # prompt with method.shots > 0: how each example is shown",
        *_label_lines(words, data),
        "train:",
        "  epochs: 3",
        "  batch_size: 16",
        "  learning_rate: 1.0e-4",
        f"  # covers 99% of the training texts with the encoder's tokenizer, {_within(lengths.encoder_positions)};",
        "  # the decoder arms below set their own (the prompt arms count the template and label words too)",
        f"  max_length: {lengths.encoder}",
        f"  seed: {FIRST_SEED}",
        "  bf16: false               # bf16 autocast trained ~2x faster on the benchmark's CPU; measure on yours first",
        "eval:",
        "  primary: macro_f1         # every label counts the same, whatever its share of the rows",
        "output: runs/",
        "sweep:",
        "  # Each arm is one way of building the classifier; every arm runs with each seed of the grid.",
        "  arms:",
        _flow({"model.checkpoint": encoder, "method.kind": "head", "method.freeze": "embeddings"}),
        f"    # decoder head: small batches for more steps, a faster-learning head; max_length "
        f"{_within(lengths.decoder_positions)}",
        _flow({"model.checkpoint": decoder, "method.kind": "head", "method.freeze": "embeddings",
                          "train.epochs": 2, "train.batch_size": 8, "train.learning_rate": 5.0e-5,
                          "train.head_learning_rate": 1.0e-3, "train.max_length": lengths.decoder}),
        f"    # next_token and prompt: max_length = texts (99%) + {lengths.template_tokens} template tokens + the "
        "longest label words",
        _flow({"model.checkpoint": decoder, "method.kind": "next_token", "train.epochs": 1,
                          "train.batch_size": 4, "train.learning_rate": 1.0e-4,
                          "train.max_length": lengths.prompt}),
        _flow({"model.checkpoint": decoder, "method.kind": "prompt", "method.calibrate": True,
                          "train.max_length": lengths.prompt}),
        "  # (zero-shot prompting does not use the seed: the sweep runs that arm once, for every seed)",
        "  grid:",
        f"    train.seed: [{seed_list}]",
        "  # The same tuning budget for every trained arm: `trials` settings drawn with one seed, each trained on",
        "  # train and scored on dev only; each arm's best trial then runs with every seed and is scored on test.",
        "  tune:",
        "    trials: 3",
        "    space:",
        "      train.learning_rate: {low: 2.0e-5, high: 3.0e-4, scale: log}",
        "      train.head_learning_rate: {low: 3.0e-4, high: 3.0e-3, scale: log}   # head arms only",
    ]
    return "\n".join(lines) + "\n"
