"""`tiltyard draft`: a starter bake-off config from one data file (harness/experiments/draft*.py)."""

from __future__ import annotations

import csv
import json
import random
from pathlib import Path
from typing import Any

import pytest
from transformers import AutoTokenizer

from harness.cli import main
from harness.config import load_config
from harness.data.audit import suggest_max_length, token_counter
from harness.data.task import load_task, text_key
from harness.experiments.draft_words import choose_label_words, name_words
from harness.experiments.sweep import expand_sweep
from harness.methods.next_token import NextTokenMethod
from tests.common import FERRY, REPLY

TOY = ["--encoder", "toy:encoder", "--decoder", "toy:decoder"]


def draft(args: list[str], capsys: pytest.CaptureFixture[str]) -> tuple[int, str, str]:
    code = main(["draft", *[str(a) for a in args]])
    captured = capsys.readouterr()
    return code, captured.out, captured.err.strip()


def test_ferry_sample_with_its_own_splits(tmp_path: Path, capsys: pytest.CaptureFixture[str],
                                         toy_paths: dict[str, Path]) -> None:
    out = tmp_path / "ferry.yaml"
    code, printed, _ = draft([FERRY / "train.csv", "--dev", FERRY / "dev.csv", "--test", FERRY / "test.csv",
                              *TOY, "--out", out], capsys)
    assert code == 0
    assert "train: 600 rows" in printed and "dev: 150 rows" in printed and "test: 150 rows" in printed
    assert f"tiltyard sweep {out}" in printed and "lost_item -> lost" in printed
    cfg = load_config(out)
    assert (cfg.task.text, cfg.task.label, cfg.task.id) == ("text", "label", "id")
    assert cfg.method.label_words is not None and cfg.method.label_words["lost_item"] == "lost"
    assert "(accessibility, lost, praise, refund, schedule):" in cfg.method.template
    runs = expand_sweep(cfg)
    kinds = sorted({(r.model.checkpoint, r.method.kind) for r in runs})
    assert kinds == [("toy:decoder", "head"), ("toy:decoder", "next_token"), ("toy:decoder", "prompt"),
                     ("toy:encoder", "head")]
    assert sorted({r.train.seed for r in runs}) == [13, 14, 15]
    # train.max_length of the encoder arm: 99% of the training texts, computed here independently
    data = load_task(cfg.task)
    lengths = token_counter(AutoTokenizer.from_pretrained(toy_paths["encoder"]))(data.train.texts)
    assert cfg.train.max_length == suggest_max_length(lengths)
    assert cfg.train.max_length <= 256  # the toy encoder's positions (harness/models/toy.py)
    # a run accepts the drafted template and label words (tokenised in context, all distinct)
    prompt_arm = next(r for r in runs if r.method.kind == "next_token")
    method = NextTokenMethod(cfg=prompt_arm, data=data)
    assert len(set(method.seqs)) == 5
    assert "#" in out.read_text() and "label_words:" in out.read_text()


def test_reply_check_pair_task(tmp_path: Path, capsys: pytest.CaptureFixture[str], toy_paths: dict[str, Path]) -> None:
    out = tmp_path / "reply.yaml"
    code, printed, _ = draft([REPLY / "train.csv", "--dev", REPLY / "dev.csv", "--test", REPLY / "test.csv",
                              "--text", "question,reply", *TOY, "--out", out, "--seeds", "2"], capsys)
    assert code == 0, printed
    cfg = load_config(out)
    assert cfg.task.text == ("question", "reply")
    assert "{question}" in cfg.method.template and "{reply}" in cfg.method.template
    words = cfg.method.label_words or {}
    assert set(words) == {"does_not_resolve", "resolves"} and words["does_not_resolve"] != words["resolves"]
    assert words["does_not_resolve"] != "does"  # a filler word never names a label
    assert cfg.sweep.grid["train.seed"] == (13, 14)


def test_pair_columns_are_not_guessed(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "reply.yaml"
    code, _, err = draft([REPLY / "train.csv", *TOY, "--out", out], capsys)
    assert code == 2 and "'question', 'reply'" in err and "--text COLUMN_A,COLUMN_B" in err
    assert "\n" not in err and not out.exists()


def test_carved_splits_keep_repeated_texts_on_one_side(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "carved.yaml"
    code, printed, _ = draft([FERRY / "train.csv", *TOY, "--out", out], capsys)
    assert code == 0
    cfg = load_config(out)
    assert cfg.task.dev is None and cfg.task.test is None and cfg.task.dev_fraction == 0.15
    data = load_task(cfg.task)
    assert sum(len(s) for s in data.splits()) == 600
    for split in data.splits():
        assert f"{split.name}: {len(split)} rows" in printed
    keys = [{text_key(t) for t in s.texts} for s in data.splits()]
    assert not (keys[0] & keys[1]) and not (keys[0] & keys[2]) and not (keys[1] & keys[2])
    assert "carved from train" in printed


def _invented_help_desk(path: Path, rows: int = 150) -> None:
    """An invented help desk of a bicycle-parts shop: awkward label names (spaces, capitals, a shared first word)."""
    rng = random.Random(7)
    topics = {
        "Billing Question": ["why is there a second charge on my card", "can I pay for the chain by invoice"],
        "Billing Dispute": ["I was charged twice for one saddle, refund it", "this charge for brake pads is wrong"],
        "Shipping Delay": ["my derailleur still has not arrived", "the parcel with the tyres is a week late"],
        "ACCOUNT access": ["cannot log in to my account", "password reset mail never came"],
        "Other": ["do you sell bells", "are you open on Sunday"],
    }
    with path.open("w", encoding="utf-8") as fh:
        for i in range(rows):
            label = list(topics)[i % len(topics)]
            text = f"{rng.choice(topics[label])} (order {rng.randint(1000, 9999)}, note {i})"
            fh.write(json.dumps({"ticket": f"t{i}", "Message": text, "Category": label}) + "\n")


def test_invented_file_with_awkward_label_names(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    data = tmp_path / "help_desk.jsonl"
    _invented_help_desk(data)
    out = tmp_path / "help.yaml"
    code, printed, _ = draft([data, *TOY, "--out", out], capsys)
    assert code == 0, printed
    cfg = load_config(out)
    assert (cfg.task.text, cfg.task.label) == ("Message", "Category")
    words = cfg.method.label_words or {}
    assert set(words) == {"Billing Question", "Billing Dispute", "Shipping Delay", "ACCOUNT access", "Other"}
    # "billing" is shared by two names, so it tells neither apart: each takes its own other word
    assert words["Billing Question"] == "question" and words["Billing Dispute"] == "dispute"
    assert words["ACCOUNT access"] in ("account", "access") and words["Other"] == "other"
    assert all(isinstance(w, str) and w == w.lower() for w in words.values())
    assert len(set(words.values())) == 5
    assert cfg.task.name == "help_desk"


class _Vocab:
    """A tokenizer stand-in: every word is one id, except the words listed in `split` (two ids)."""

    def __init__(self, split: set[str]) -> None:
        self.split = split
        self.ids: dict[str, int] = {}

    def encode(self, text: str, add_special_tokens: bool = False) -> list[int]:
        out: list[int] = []
        for word in text.replace(":", " :").split():
            parts = [word[:2], word[2:]] if word in self.split else [word]
            out += [self.ids.setdefault(p, len(self.ids)) for p in parts]
        return out


def test_single_token_words_are_preferred_over_the_first_word() -> None:
    tok: Any = _Vocab(split={"lost"})
    chosen = choose_label_words(["lost_item", "refund"], tok, context="Topic:", space=True, source="f.csv")
    assert [(c.word, c.tokens) for c in chosen] == [("item", 1), ("refund", 1)]
    assert name_words("Billing  Question/urgent_now") == ["billing", "question", "urgent", "now"]


def _write_csv(path: Path, header: list[str], rows: list[list[str]]) -> Path:
    with path.open("w", newline="", encoding="utf-8") as fh:
        writer = csv.writer(fh)
        writer.writerow(header)
        writer.writerows(rows)
    return path


@pytest.mark.parametrize(("header", "rows", "expected"), [
    (["text"], [[f"message {i}"] for i in range(20)], "only one column ('text')"),
    (["text", "note"], [[f"message {i}", f"note number {i}"] for i in range(20)], "no label-like column"),
    (["text", "label"], [[f"message {i}", "refund"] for i in range(20)], "single class ('refund')"),
    (["text", "label"], [[f"message {i}", "Late" if i % 2 else "late"] for i in range(20)],
     "cannot be given distinct label words"),
])
def test_bad_files_are_one_line_exit_2_and_write_nothing(tmp_path: Path, capsys: pytest.CaptureFixture[str],
                                                         header: list[str], rows: list[list[str]],
                                                         expected: str) -> None:
    data = _write_csv(tmp_path / "data.csv", header, rows)
    out = tmp_path / "out.yaml"
    code, _, err = draft([data, *TOY, "--out", out], capsys)
    assert code == 2
    assert expected in err and "\n" not in err and "Traceback" not in err
    assert not out.exists() and sorted(p.name for p in tmp_path.iterdir()) == ["data.csv"]


def test_existing_config_is_kept_without_force(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "mine.yaml"
    out.write_text("# my own edits\n")
    code, _, err = draft([FERRY / "train.csv", *TOY, "--out", out], capsys)
    assert code == 2 and "pass --force" in err and out.read_text() == "# my own edits\n"
    code, _, _ = draft([FERRY / "train.csv", *TOY, "--out", out, "--force"], capsys)
    assert code == 0 and "label_words:" in out.read_text()


@pytest.mark.parametrize(("args", "expected"), [
    (["--text", "a,b,c"], "give one column, or two columns"),
    (["--label", "topic"], "no column 'topic'"),
    (["--seeds", "0"], "--seeds must be 1 or more"),
])
def test_bad_options_are_one_line_exit_2(tmp_path: Path, capsys: pytest.CaptureFixture[str], args: list[str],
                                         expected: str) -> None:
    out = tmp_path / "x.yaml"
    code, _, err = draft([FERRY / "train.csv", *TOY, *args, "--out", out], capsys)
    assert code == 2 and expected in err and "\n" not in err and not out.exists()


def test_an_encoder_given_as_the_decoder_is_refused(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "x.yaml"
    code, _, err = draft([FERRY / "train.csv", "--encoder", "toy:encoder", "--decoder", "toy:encoder", "--out", out],
                         capsys)
    assert code == 2 and "--decoder" in err and "encoder checkpoint" in err and not out.exists()


@pytest.mark.slow
def test_ferry_sample_with_the_packaged_checkpoints(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "ferry.yaml"
    code, printed, _ = draft([FERRY / "train.csv", "--dev", FERRY / "dev.csv", "--test", FERRY / "test.csv",
                              "--out", out], capsys)
    assert code == 0, printed
    cfg = load_config(out)
    runs = expand_sweep(cfg)
    from transformers import AutoConfig

    from harness.models.backbones import positions_of, resolve_source

    for run in runs:  # every arm stays within the positions its own checkpoint records
        source, gguf = resolve_source(run.model.checkpoint)
        limit = positions_of(AutoConfig.from_pretrained(source, gguf_file=gguf),
                             AutoTokenizer.from_pretrained(source, gguf_file=gguf))
        assert limit is None or run.train.max_length <= limit
    assert cfg.method.label_words is not None and cfg.method.label_words["lost_item"] == "lost"
