"""Data layer: bad files give one-line errors naming file and row; splits and subsamples hold up."""

from __future__ import annotations

from collections import Counter
from pathlib import Path

import pytest
from sklearn.model_selection import train_test_split

from harness.config import TaskConfig
from harness.data.audit import audit_data, render_audit, suggest_max_length
from harness.data.readers import MAX_CELL_CHARS
from harness.data.task import load_task, read_rows, stratified_carve, subsample
from harness.errors import HarnessError
from tests.common import ROOT

HEADER = "id,text,label\n"
ROWS = "".join(f"r{i},message number {i} about {'boats' if i % 2 else 'tickets'},{'a' if i % 2 else 'b'}\n" for i in range(20))


def task(tmp_path: Path, train: str, dev: str | None = None, test: str | None = None, name: str = "train.csv",
         **kw: object) -> TaskConfig:
    paths = {}
    for split, body in (("train", train), ("dev", dev), ("test", test)):
        if body is None:
            continue
        p = tmp_path / (name if split == "train" else f"{split}{Path(name).suffix}")
        p.write_bytes(body.encode("utf-8") if isinstance(body, str) else body)
        paths[split] = str(p)
    return TaskConfig(name="t", train=paths["train"], dev=paths.get("dev"), test=paths.get("test"), id="id", **kw)  # type: ignore[arg-type]


def error_of(cfg: TaskConfig) -> str:
    with pytest.raises(HarnessError) as err:
        load_task(cfg)
    assert "\n" not in str(err.value)
    return str(err.value)


def test_sample_tasks_load() -> None:
    cfg = TaskConfig(name="f", train=str(ROOT / "sample_tasks/ferry_messages/train.csv"),
                     dev=str(ROOT / "sample_tasks/ferry_messages/dev.csv"),
                     test=str(ROOT / "sample_tasks/ferry_messages/test.csv"), id="id")
    data = load_task(cfg)
    assert data.label_names == ("accessibility", "lost_item", "praise", "refund", "schedule")
    assert len(data.train) >= 500 and len(data.dev) >= 100 and len(data.test) >= 100
    pairs = TaskConfig(name="r", train=str(ROOT / "sample_tasks/reply_check/train.csv"),
                       dev=str(ROOT / "sample_tasks/reply_check/dev.csv"),
                       test=str(ROOT / "sample_tasks/reply_check/test.csv"), text=("question", "reply"), id="id")
    pdata = load_task(pairs)
    assert pdata.is_pair and isinstance(pdata.train.texts[0], tuple) and len(pdata.label_names) == 2


# --- bad data: each a one-line error naming the file and the row -------------------------------

_JSONL_NAN = '{"id": "1", "text": "hi", "label": "a"}\n{"id": "2", "text": "yo", "label": NaN}\n'
_JSONL_CUT = '{"id": "1", "text": "hi", "label": "a"}\n{"id": "2", "text": "yo"\n'
_GOOD = HEADER + ROWS
# (case, train, dev, test, file name of train, extra TaskConfig settings, words the one-line error must hold)
BAD_DATA = [
    ("missing column", "id,body,label\nr1,hi,a\nr2,yo,b\n", _GOOD, _GOOD, "train.csv", {},
     ["train.csv", "no column 'text'", "task.text", "body"]),
    ("empty split", _GOOD, HEADER, _GOOD, "train.csv", {}, ["dev.csv", "no data rows"]),
    ("empty file", "", _GOOD, _GOOD, "train.csv", {}, ["train.csv is empty"]),
    ("empty text", _GOOD + "r99,  ,a\n", _GOOD, _GOOD, "train.csv", {}, ["train.csv line 22", "empty text"]),
    ("NaN label in JSONL", _JSONL_NAN, _JSONL_NAN, _JSONL_NAN, "train.jsonl", {}, ["train.jsonl line 2", "missing label"]),
    ("label outside the declared set", _GOOD, _GOOD + "x1,odd one,c\n", _GOOD, "train.csv", {"labels": ("a", "b")},
     ["dev.csv line 22", "'c' is not in task.labels"]),
    ("ragged row", _GOOD + "r50,a text, with comma,b\n", _GOOD, _GOOD, "train.csv", {},
     ["train.csv line 22", "4 fields where the header has 3", "quote"]),
    ("undecodable bytes", (_GOOD).encode() + b"r77,caf\xe9 latte,a\n", _GOOD, _GOOD, "train.csv", {},
     ["train.csv line 22", "not valid UTF-8"]),
    ("test label unseen in train", _GOOD, _GOOD, _GOOD + "z1,new kind,c\n", "train.csv", {},
     ["test.csv line 22", "never occurs in train", "task.labels"]),
    ("single class in train", HEADER + "".join(f"r{i},text {i},a\n" for i in range(5)), _GOOD, _GOOD, "train.csv", {},
     ["single class", "train.csv"]),
    ("duplicate ids", _GOOD + "r1,again,a\n", _GOOD, _GOOD, "train.csv", {}, ["id 'r1' appears 2 times"]),
    ("broken JSON line", _JSONL_CUT, _JSONL_CUT, _JSONL_CUT, "train.jsonl", {}, ["train.jsonl line 2", "not valid JSON"]),
    ("cell over the length limit", HEADER + "r1,\"" + "x" * (MAX_CELL_CHARS + 1) + "\",a\n" + ROWS, _GOOD, _GOOD,
     "train.csv", {}, ["train.csv line 2", f"longer than {MAX_CELL_CHARS:,} characters", "shorten it"]),
]


@pytest.mark.parametrize("case, train, dev, test, name, extra, words", BAD_DATA, ids=[c[0] for c in BAD_DATA])
def test_bad_data_is_one_line_naming_file_and_row(tmp_path: Path, case: str, train: str, dev: str, test: str,
                                                  name: str, extra: dict, words: list[str]) -> None:
    msg = error_of(task(tmp_path, train, dev, test, name=name, **extra))
    for word in words:
        assert word in msg, msg


def test_a_long_document_in_one_cell_is_read_whole(tmp_path: Path) -> None:
    # 200,000 characters: over the csv module's own 131,072-character field limit (its documented default)
    long = "a long report about the crossing " * 6061
    assert len(long) > 131_072
    cfg = task(tmp_path, HEADER + f'doc1,"{long}",a\n' + ROWS, _GOOD, _GOOD)
    data = load_task(cfg)
    assert data.train.texts[0] == long


def test_missing_file_and_unknown_extension(tmp_path: Path) -> None:
    msg = error_of(TaskConfig(name="t", train=str(tmp_path / "nope.csv")))
    assert "nope.csv does not exist" in msg
    (tmp_path / "x.xlsx").write_text("a")
    msg = error_of(TaskConfig(name="t", train=str(tmp_path / "x.xlsx")))
    assert "'.xlsx'" in msg and "task.format" in msg


def test_leakage_and_duplicates_are_counted_warnings(tmp_path: Path) -> None:
    train = HEADER + ROWS + "d1,message number 3 about boats,a\n"
    cfg = task(tmp_path, train, HEADER + "q1,message number 5 about boats,a\nq2,fresh text,b\n", HEADER + ROWS)
    report = audit_data(load_task(cfg), max_length=4, count_tokens=lambda ts: [len(str(t).split()) for t in ts])
    assert report["splits"]["train"]["duplicate_texts"] == 1
    assert report["leakage"]["train/dev"] == 1 and report["leakage"]["train/test"] == 20
    assert any("appear in both splits" in f for f in report["findings"])
    assert report["splits"]["train"]["tokens"]["truncated"] == 21  # every text has 5 words > 4
    assert "Suggested max_length" in render_audit(report, "c.yaml")


def test_parquet_split(tmp_path: Path) -> None:
    import pyarrow as pa
    import pyarrow.parquet as pq

    table = pa.table({"id": ["1", "2", "3"], "text": ["a b", "c d", "e f"], "label": ["x", "y", None]})
    pq.write_table(table, tmp_path / "train.parquet")
    rows, _ = read_rows(tmp_path / "train.parquet")
    assert rows[0] == {"id": "1", "text": "a b", "label": "x"}
    msg = error_of(TaskConfig(name="t", train=str(tmp_path / "train.parquet"), id="id"))
    assert "train.parquet line 3" in msg and "missing label" in msg


# --- splitting and subsampling ----------------------------------------------------------------

def test_stratified_carve_matches_sklearn_proportions() -> None:
    # Reference: sklearn.model_selection.train_test_split(stratify=...) on the same labels.
    labels = [0] * 50 + [1] * 30 + [2] * 13 + [3] * 7
    groups = [f"t{i}" for i in range(len(labels))]
    kept, carved = stratified_carve(labels, groups, 0.2, seed=3)
    assert sorted(kept + carved) == list(range(len(labels)))
    _, ref = train_test_split(labels, test_size=0.2, stratify=labels, random_state=3)
    ours, theirs = Counter(labels[i] for i in carved), Counter(ref)
    for c in range(4):
        assert abs(ours[c] - theirs[c]) <= 1, (c, ours, theirs)


def test_carve_keeps_repeated_texts_together() -> None:
    labels = [0, 1] * 40
    groups = [f"t{i % 10}" for i in range(80)]  # every text repeated 8 times
    kept, carved = stratified_carve(labels, groups, 0.3, seed=0)
    assert not ({groups[i] for i in kept} & {groups[i] for i in carved})


def test_carved_dev_test_have_no_shared_texts(tmp_path: Path) -> None:
    rows = "".join(f"r{i},text {i % 30},{'a' if (i % 30) % 3 else 'b'}\n" for i in range(120))
    data = load_task(task(tmp_path, HEADER + rows))
    report = audit_data(data)
    assert report["leakage"] == {"train/dev": 0, "train/test": 0, "dev/test": 0}
    assert len(data.train) + len(data.dev) + len(data.test) == 120


def test_subsample_is_stratified_seeded_and_sized() -> None:
    labels = [0] * 60 + [1] * 30 + [2] * 10
    a, b, c = subsample(labels, 20, 1), subsample(labels, 20, 1), subsample(labels, 20, 2)
    assert a == b and a != c and len(a) == 20
    assert Counter(labels[i] for i in a) == {0: 12, 1: 6, 2: 2}


def test_train_size_in_load_task(tmp_path: Path) -> None:
    data = load_task(task(tmp_path, HEADER + ROWS, HEADER + ROWS, HEADER + ROWS, train_size=6), seed=5)
    assert len(data.train) == 6 and Counter(data.train.labels) == {0: 3, 1: 3}
    assert any("train_size" in n for n in data.notes)


def test_fingerprint_changes_with_content(tmp_path: Path) -> None:
    a = load_task(task(tmp_path, HEADER + ROWS, HEADER + ROWS, HEADER + ROWS)).fingerprint()
    b = load_task(task(tmp_path, HEADER + ROWS.replace("number 3", "number three"), HEADER + ROWS, HEADER + ROWS)).fingerprint()
    assert a["splits"]["train"]["sha256"] != b["splits"]["train"]["sha256"]
    assert a["splits"]["test"]["sha256"] == b["splits"]["test"]["sha256"]


def test_suggest_max_length() -> None:
    assert suggest_max_length([10] * 99 + [500]) == 16
    assert suggest_max_length(list(range(1, 101))) == 104


def test_case_variants_count_as_one_text_everywhere(tmp_path: Path) -> None:
    # A collection that repeats a message with other capitals (seen in the SMS Spam Collection:
    # "... later in meeting." / "... later In meeting.") must not put the two copies in two splits.
    rows = "".join(f"r{i},{'Call Later In Meeting' if i % 2 else 'call later  in meeting'} {i // 2},"
                   f"{'a' if (i // 2) % 3 else 'b'}\n" for i in range(120))
    data = load_task(task(tmp_path, HEADER + rows))
    assert audit_data(data)["leakage"] == {"train/dev": 0, "train/test": 0, "dev/test": 0}
    deduped = load_task(task(tmp_path, HEADER + rows, HEADER + ROWS, HEADER + ROWS, dedupe=True))
    assert len(deduped.train) == 60


def test_audit_counts_truncation_against_the_length_the_checkpoint_allows(tmp_path: Path) -> None:
    # A checkpoint with 256 positions and train.max_length 992: the run cuts every text to 256 tokens,
    # so the audit must count against 256 and never suggest more.
    data = load_task(task(tmp_path, _GOOD, _GOOD, _GOOD))
    lengths = {t: 300 + i for i, t in enumerate(data.train.texts)}  # every text longer than 256 tokens

    def count(texts):
        return [lengths.get(t, 300) for t in texts]

    report = audit_data(data, max_length=992, count_tokens=count, positions=256)
    assert report["max_length"] == 256 and report["max_length_configured"] == 992
    assert report["splits"]["train"]["tokens"]["truncated"] == len(data.train)
    assert report["suggested_max_length"] <= 256
    assert any("exceed max_length 256 (train.max_length 992 is cut to the checkpoint's 256 positions)" in f
               for f in report["findings"])
    text = render_audit(report, "c.yaml")
    assert "used: 256" in text and "configured: 992" in text
    unbounded = audit_data(data, max_length=992, count_tokens=count)  # no limit known: the configured length
    assert unbounded["max_length"] == 992 and unbounded["splits"]["train"]["tokens"]["truncated"] == 0
    assert unbounded["suggested_max_length"] > 256


def test_counting_long_texts_does_not_warn_about_indexing_errors(toy_paths: dict[str, Path],
                                                                caplog: pytest.LogCaptureFixture) -> None:
    from transformers import AutoTokenizer

    from harness.data.audit import token_counter

    tok = AutoTokenizer.from_pretrained(toy_paths["encoder"])
    long = "the ferry was late again " * 200  # far over the toy's 256 positions
    with caplog.at_level("WARNING"):
        assert token_counter(tok)([long])[0] > tok.model_max_length
    assert not any("indexing errors" in r.getMessage() for r in caplog.records)
