"""Data layer: bad files give one-line errors naming file and row; splits and subsamples hold up."""

from __future__ import annotations

from collections import Counter
from pathlib import Path

import pytest
from sklearn.model_selection import train_test_split

from harness.config import TaskConfig
from harness.data.audit import audit_data, render_audit, suggest_max_length
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

def test_missing_column(tmp_path: Path) -> None:
    msg = error_of(task(tmp_path, "id,body,label\nr1,hi,a\nr2,yo,b\n", HEADER + ROWS, HEADER + ROWS))
    assert "train.csv" in msg and "no column 'text'" in msg and "task.text" in msg and "body" in msg


def test_empty_split(tmp_path: Path) -> None:
    msg = error_of(task(tmp_path, HEADER + ROWS, HEADER, HEADER + ROWS))
    assert "dev.csv" in msg and "no data rows" in msg


def test_empty_file(tmp_path: Path) -> None:
    msg = error_of(task(tmp_path, "", HEADER + ROWS, HEADER + ROWS))
    assert "train.csv is empty" in msg


def test_empty_text(tmp_path: Path) -> None:
    msg = error_of(task(tmp_path, HEADER + ROWS + "r99,  ,a\n", HEADER + ROWS, HEADER + ROWS))
    assert "train.csv line 22" in msg and "empty text" in msg


def test_nan_label_in_jsonl(tmp_path: Path) -> None:
    body = '{"id": "1", "text": "hi", "label": "a"}\n{"id": "2", "text": "yo", "label": NaN}\n'
    msg = error_of(task(tmp_path, body, body, body, name="train.jsonl"))
    assert "train.jsonl line 2" in msg and "missing label" in msg


def test_label_outside_declared_set(tmp_path: Path) -> None:
    msg = error_of(task(tmp_path, HEADER + ROWS, HEADER + ROWS + "x1,odd one,c\n", HEADER + ROWS, labels=("a", "b")))
    assert "dev.csv line 22" in msg and "'c' is not in task.labels" in msg


def test_ragged_row(tmp_path: Path) -> None:
    msg = error_of(task(tmp_path, HEADER + ROWS + "r50,a text, with comma,b\n", HEADER + ROWS, HEADER + ROWS))
    assert "train.csv line 22" in msg and "4 fields where the header has 3" in msg and "quote" in msg


def test_undecodable_bytes(tmp_path: Path) -> None:
    body = (HEADER + ROWS).encode() + b"r77,caf\xe9 latte,a\n"
    msg = error_of(task(tmp_path, body, HEADER + ROWS, HEADER + ROWS))  # type: ignore[arg-type]
    assert "train.csv line 22" in msg and "not valid UTF-8" in msg


def test_test_label_unseen_in_train(tmp_path: Path) -> None:
    msg = error_of(task(tmp_path, HEADER + ROWS, HEADER + ROWS, HEADER + ROWS + "z1,new kind,c\n"))
    assert "test.csv line 22" in msg and "never occurs in train" in msg and "task.labels" in msg


def test_single_class_train(tmp_path: Path) -> None:
    body = HEADER + "".join(f"r{i},text {i},a\n" for i in range(5))
    msg = error_of(task(tmp_path, body, HEADER + ROWS, HEADER + ROWS))
    assert "single class" in msg and "train.csv" in msg


def test_duplicate_ids(tmp_path: Path) -> None:
    msg = error_of(task(tmp_path, HEADER + ROWS + "r1,again,a\n", HEADER + ROWS, HEADER + ROWS))
    assert "id 'r1' appears 2 times" in msg


def test_missing_file_and_unknown_extension(tmp_path: Path) -> None:
    msg = error_of(TaskConfig(name="t", train=str(tmp_path / "nope.csv")))
    assert "nope.csv does not exist" in msg
    (tmp_path / "x.xlsx").write_text("a")
    msg = error_of(TaskConfig(name="t", train=str(tmp_path / "x.xlsx")))
    assert "'.xlsx'" in msg and "task.format" in msg


def test_bad_json_line(tmp_path: Path) -> None:
    body = '{"id": "1", "text": "hi", "label": "a"}\n{"id": "2", "text": "yo"\n'
    msg = error_of(task(tmp_path, body, body, body, name="train.jsonl"))
    assert "train.jsonl line 2" in msg and "not valid JSON" in msg


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
