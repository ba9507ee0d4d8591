"""Config loading: every bad file names the key and the line; overrides are checked alike."""

from __future__ import annotations

import dataclasses
import textwrap
from pathlib import Path

import pytest

from harness.config import (
    Config,
    config_from_dict,
    config_to_dict,
    dump_config,
    field_docs,
    load_config,
    parse_override,
)
from harness.errors import HarnessError
from tests.common import ROOT

GOOD = """\
task:
  name: ferry-messages
  train: sample_tasks/ferry_messages/train.csv
  dev: sample_tasks/ferry_messages/dev.csv
  test: sample_tasks/ferry_messages/test.csv
  text: text
  label: label
model:
  checkpoint: toy:encoder
method:
  kind: head
  pooling: auto
train: {epochs: 3, batch_size: 16, learning_rate: 5.0e-5, max_length: 128, seed: 13}
output: runs/
"""


def write(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "c.yaml"
    path.write_text(textwrap.dedent(text), encoding="utf-8")
    return path


def test_good_config_loads_typed_and_frozen(tmp_path: Path) -> None:
    cfg = load_config(write(tmp_path, GOOD))
    assert cfg.train.learning_rate == 5.0e-5 and isinstance(cfg.train.epochs, float)
    assert cfg.method.kind == "head" and cfg.model.checkpoint == "toy:encoder"
    with pytest.raises(dataclasses.FrozenInstanceError):
        cfg.train.seed = 1  # type: ignore[misc]


def test_round_trip_through_dump(tmp_path: Path) -> None:
    cfg = load_config(write(tmp_path, GOOD))
    again = load_config(write(tmp_path, dump_config(cfg)))
    assert config_to_dict(again) == config_to_dict(cfg)


# (replacement applied to GOOD, words the message must contain)
BAD = [
    ("  learning_rate: 5.0e-5", None, None),  # placeholder kept so ids stay aligned
    ("train: {epochs: 3,", "train: {epochs: 3, lerning_rate: 1, ", ["train.lerning_rate", "line 13", "did you mean 'train.learning_rate'"]),
    ("  pooling: auto", "  pooling: average", ["method.pooling", "line 12", "'first'", "'average'"]),
    ("  kind: head", "  kind: classifier", ["method.kind", "line 11", "'next_token'"]),
    ("batch_size: 16", "batch_size: 0", ["train.batch_size", "line 13", "at least 1", "0"]),
    ("epochs: 3,", "epochs: three,", ["train.epochs", "line 13", "expected float", "three"]),
    ("  label: label", "  label: [a, b]", ["task.label", "line 7", "expected str"]),
    ("  name: ferry-messages", "  name: ../../x", ["task.name", "line 2", "no '..'"]),
    ("  checkpoint: toy:encoder", "  checkpoint: toy:encoder\n  layrs: 2", ["model.layrs", "line 10", "did you mean 'model.layers'"]),
    ("output: runs/", "output: runs/\nmetods: {}", ["metods", "line 15", "did you mean 'method'"]),
    ("max_length: 128", "max_length: 4", ["train.max_length", "line 13", "at least 8"]),
    ("seed: 13}", "seed: 1.5}", ["train.seed", "line 13", "expected int"]),
    ("seed: 13}", "seed: 13, pieces: 0}", ["train.pieces", "line 13", "at least 1", "0"]),
    ("  text: text", "  text: [question, question]", ["task.text", "line 6", "two different columns"]),
    ("output: runs/", "output: runs/\neval: {primary: f1_macro}", ["eval.primary", "line 15", "did you mean 'macro_f1'"]),
    ("output: runs/", "output: runs/\neval: {ci: 2}", ["eval.ci", "line 15", "between 0.5 and 0.999"]),
    ("  kind: head", "  kind: head\n  lora: {r: 0}", ["method.lora.r", "line 12", "at least 1"]),
    ("output: runs/", "output: runs/\nsweep: {grid: {train.lerning_rate: [1, 2]}}", ["sweep.grid.train.lerning_rate", "line 15"]),
    ("output: runs/", "output: runs/\nsweep: {grid: {train.epochs: [1, -1]}}", ["sweep.grid.train.epochs", "-1"]),
    ("  kind: head", "  kind: head\n  dropout: 1.5", ["method.dropout", "line 12"]),
    ("output: runs/", "output: runs/\ntrain: {}", ["'train' appears twice", "line 15"]),
]


@pytest.mark.parametrize("old,new,words", BAD[1:], ids=[b[2][0] for b in BAD[1:]])
def test_bad_config_names_key_and_line(tmp_path: Path, old: str, new: str, words: list[str]) -> None:
    assert old in GOOD
    path = write(tmp_path, GOOD.replace(old, new, 1))
    with pytest.raises(HarnessError) as err:
        load_config(path)
    message = str(err.value)
    assert "\n" not in message
    for word in words:
        assert word in message, message
    if any(w.startswith("line") for w in words):
        assert str(path) in message


def test_bad_yaml_syntax_names_line(tmp_path: Path) -> None:
    path = write(tmp_path, GOOD.replace("  kind: head", "  kind: [head"))
    with pytest.raises(HarnessError, match=r"c.yaml line \d+: not valid YAML"):
        load_config(path)


def test_missing_required_key(tmp_path: Path) -> None:
    path = write(tmp_path, GOOD.replace("  checkpoint: toy:encoder\n", "  family: encoder\n"))
    with pytest.raises(HarnessError, match=r"missing required key 'model.checkpoint'"):
        load_config(path)


def test_missing_file_and_empty_file(tmp_path: Path) -> None:
    with pytest.raises(HarnessError, match="does not exist"):
        load_config(tmp_path / "nope.yaml")
    with pytest.raises(HarnessError, match="is empty"):
        load_config(write(tmp_path, ""))
    with pytest.raises(HarnessError, match="must be a mapping"):
        load_config(write(tmp_path, "- a\n- b\n"))


def test_yaml_is_loaded_safely(tmp_path: Path) -> None:
    # A python-object tag must not construct anything (yaml.SafeLoader semantics; common practice).
    path = write(tmp_path, GOOD + "extra: !!python/object/apply:os.system ['echo hi']\n")
    with pytest.raises(HarnessError, match="not valid YAML"):
        load_config(path)


def test_overrides_are_typed_and_checked(tmp_path: Path) -> None:
    path = write(tmp_path, GOOD)
    cfg = load_config(path, ["train.learning_rate=3e-5", "method.pooling=mean", "train.epochs=1"])
    assert cfg.train.learning_rate == 3e-5 and cfg.method.pooling == "mean" and cfg.train.epochs == 1.0
    with pytest.raises(HarnessError, match=r"unknown key 'train.lerning_rate' in --set; did you mean 'train.learning_rate'"):
        load_config(path, ["train.lerning_rate=1"])
    with pytest.raises(HarnessError, match=r"'train.batch_size' in .*: must be at least 1"):
        load_config(path, ["train.batch_size=0"])
    with pytest.raises(HarnessError, match=r"'method.kind'.*choose one of"):
        load_config(path, ["method.kind=magic"])
    with pytest.raises(HarnessError, match="expected KEY=VALUE"):
        load_config(path, ["train.epochs"])


def test_parse_override_values() -> None:
    assert parse_override("a.b=3e-5") == ("a.b", 3e-5)
    assert parse_override("a.b=true") == ("a.b", True)
    assert parse_override("a.b=[x, y]") == ("a.b", ["x", "y"])
    assert parse_override("a.b=hello=world") == ("a.b", "hello=world")
    with pytest.raises(HarnessError):
        parse_override("=3")


def test_every_field_is_documented() -> None:
    rows = field_docs(Config)
    assert len(rows) > 60
    for key, _default, doc in rows:
        assert doc.strip(), f"{key} has no description"


def test_config_from_dict_requires_sections() -> None:
    with pytest.raises(HarnessError, match="missing required key 'task'"):
        config_from_dict({"model": {"checkpoint": "x"}})


@pytest.mark.parametrize("path", sorted((ROOT / "configs").glob("*.yaml")), ids=lambda p: p.name)
def test_every_example_config_validates(path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir(ROOT)
    cfg = load_config(path)
    assert cfg.task.name and cfg.model.checkpoint


@pytest.mark.parametrize("template,words", [
    ("Message: {text.__class__}", "attribute"),
    ("Message: {text[0]}", "index"),
    ("Message: {other}", "{other}"),
    ("Message: {text!r}", "conversion"),
    ("Message only", "no {text}"),
])
def test_template_errors_at_load_time(tmp_path: Path, template: str, words: str) -> None:
    body = GOOD.replace("  kind: head", f"  kind: next_token\n  template: {template!r}")
    with pytest.raises(HarnessError) as err:
        load_config(write(tmp_path, body))
    message = str(err.value)
    assert "'method.template'" in message and "line 12" in message, message
    assert words.lower() in message.lower(), message
