"""`tiltyard agree`: agreement between two labelings of the same rows, matched by id."""

from __future__ import annotations

import csv
import json
import random
from pathlib import Path

import numpy as np
import pytest
from scipy.stats import bootstrap
from sklearn.metrics import cohen_kappa_score, f1_score

from harness.cli import main
from harness.commands import agree_command
from harness.data.agreement import agreement, kappa_band, read_labels, render_agreement
from harness.errors import HarnessError


def _write_csv(path: Path, rows: list[tuple[str, str]], header: tuple[str, str] = ("id", "label")) -> Path:
    with path.open("w", encoding="utf-8", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(header)
        w.writerows(rows)
    return path


def _pairs_from_table(cells: dict[tuple[str, str], int]) -> tuple[list[tuple[str, str]], list[tuple[str, str]]]:
    """Two labelings whose cross-tab is `cells` ((label A, label B) -> count); B's rows shuffled."""
    a, b = [], []
    n = 0
    for (la, lb), count in cells.items():
        for _ in range(count):
            n += 1
            a.append((f"item-{n:03d}", la))
            b.append((f"item-{n:03d}", lb))
    random.Random(7).shuffle(b)  # rows must be matched by id, not by position
    return a, b


def test_worked_two_by_two_example(tmp_path: Path) -> None:
    # Source of the definition: Cohen, J. (1960), "A coefficient of agreement for nominal scales",
    # Educational and Psychological Measurement 20(1), 37-46: kappa = (p_o - p_e) / (1 - p_e), p_e the
    # agreement expected from the two raters' marginals (from memory). The counts are a 2x2 worked example
    # computed by hand here:
    # 50 grant proposals, two readers; 20 both yes, 5 A-yes/B-no, 10 A-no/B-yes, 15 both no:
    # p_o = 35/50 = 0.70, p_e = (25/50)(30/50) + (25/50)(20/50) = 0.50, kappa = 0.20/0.50 = 0.40.
    a, b = _pairs_from_table({("yes", "yes"): 20, ("yes", "no"): 5, ("no", "yes"): 10, ("no", "no"): 15})
    ra = read_labels(_write_csv(tmp_path / "a.csv", a))
    rb = read_labels(_write_csv(tmp_path / "b.csv", b))
    report = agreement(ra, rb, resamples=200)
    assert report["kappa"] == pytest.approx(0.40, abs=1e-12)
    assert report["raw_agreement"] == pytest.approx(0.70, abs=1e-12)
    assert report["labels"] == ["no", "yes"]
    assert report["crosstab"] == [[15, 10], [5, 20]]  # rows A, columns B
    yes = next(r for r in report["per_class"] if r["label"] == "yes")
    assert (yes["count_a"], yes["count_b"], yes["both"], yes["either"]) == (25, 30, 20, 35)
    # Positive-specific agreement for two raters equals the F1 score (Girard, "Specific agreement coefficient",
    # https://github.com/jmgirard/mReliability/wiki/Specific-agreement-coefficient); 2*20/(25+30) by hand.
    ya, yb = [ra[i] for i in ra], [rb[i] for i in ra]
    f1 = f1_score(ya, yb, labels=["no", "yes"], average=None)
    assert [r["specific_agreement"] for r in report["per_class"]] == pytest.approx(list(f1))
    assert yes["specific_agreement"] == pytest.approx(40 / 55)
    # 0.40 is "fair" on Landis & Koch (1977), as tabulated in BMC Health Services Research 2016, table 1
    # (https://bmchealthservres.biomedcentral.com/articles/10.1186/s12913-016-1655-4/tables/1).
    assert report["band"] == "fair"


def test_second_worked_example() -> None:
    # Source of the definition: Cohen, J. (1960), "A coefficient of agreement for nominal scales",
    # Educational and Psychological Measurement 20(1), 37-46: kappa = (p_o - p_e) / (1 - p_e), p_e the
    # agreement expected from the two raters' marginals (from memory). The counts are a 2x2 worked example
    # computed by hand here:
    # 20 patients, two doctors: 12 both yes, 2 A-no/B-yes, 4 A-yes/B-no, 2 both no -> p_o = 14/20 = 0.7,
    # p_e = (16/20)(14/20) + (4/20)(6/20) = 0.56 + 0.06 = 0.62, kappa = 0.08 / 0.38 = 0.21.
    a, b = _pairs_from_table({("yes", "yes"): 12, ("no", "yes"): 2, ("yes", "no"): 4, ("no", "no"): 2})
    report = agreement(dict(a), dict(b), resamples=0)
    assert report["kappa"] == pytest.approx(0.08 / 0.38, abs=1e-12)
    assert round(report["kappa"], 2) == 0.21


def test_kappa_matches_sklearn_on_random_labelings(tmp_path: Path) -> None:
    rng = random.Random(3)
    labels = ["schedule", "refund", "praise", "lost_item"]
    for trial in range(5):
        ids = [f"r{i}" for i in range(120)]
        a = {i: rng.choice(labels) for i in ids}
        # B agrees with A about 60% of the time, else picks at random; rows shuffled; some ids on one side only
        b = {i: (a[i] if rng.random() < 0.6 else rng.choice(labels)) for i in ids}
        only_a, only_b = ids[:3], [f"extra{j}" for j in range(2)]
        for i in only_a:
            del b[i]
        b.update({i: "praise" for i in only_b})
        order = list(b)
        rng.shuffle(order)
        pa = _write_csv(tmp_path / f"a{trial}.csv", list(a.items()))
        pb = _write_csv(tmp_path / f"b{trial}.csv", [(i, b[i]) for i in order])
        report = agreement(read_labels(pa), read_labels(pb), resamples=100)
        common = [i for i in ids if i in b]
        # reference: scikit-learn's cohen_kappa_score on the id-aligned rows
        assert report["kappa"] == pytest.approx(cohen_kappa_score([a[i] for i in common], [b[i] for i in common]))
        assert report["matched"] == len(common)
        assert report["only_in_a"] == only_a  # in each file's own row order
        assert report["only_in_b"] == [i for i in order if i in only_b]


def test_bootstrap_interval_close_to_scipy_percentile_bootstrap() -> None:
    rng = np.random.default_rng(0)
    a = rng.integers(0, 3, 200)
    b = np.where(rng.random(200) < 0.7, a, rng.integers(0, 3, 200))
    report = agreement({str(i): str(x) for i, x in enumerate(a)}, {str(i): str(x) for i, x in enumerate(b)},
                       resamples=2000, seed=1)
    # reference: scipy.stats.bootstrap, paired percentile method over the same statistic (different random
    # draws, so the ends agree only to Monte Carlo error)
    ref = bootstrap((a, b), lambda x, y: cohen_kappa_score(x, y), paired=True, vectorized=False,
                    n_resamples=2000, method="percentile", random_state=np.random.default_rng(2))
    lo, hi = report["kappa_interval"]
    assert lo == pytest.approx(ref.confidence_interval.low, abs=0.03)
    assert hi == pytest.approx(ref.confidence_interval.high, abs=0.03)
    assert lo < report["kappa"] < hi


@pytest.mark.parametrize(("kappa", "band"), [
    (-0.05, "poor"), (0.0, "slight"), (0.15, "slight"), (0.20, "slight"), (0.21, "fair"), (0.40, "fair"),
    (0.41, "moderate"), (0.60, "moderate"), (0.61, "substantial"), (0.80, "substantial"), (0.81, "almost perfect"),
    (1.0, "almost perfect"), (float("nan"), "undefined"),
])
def test_landis_koch_bands(kappa: float, band: str) -> None:
    # Bands from Landis & Koch (1977) as tabulated in BMC Health Services Research 2016, table 1:
    # <0.00 poor, 0.00-0.20 slight, 0.21-0.40 fair, 0.41-0.60 moderate, 0.61-0.80 substantial, 0.81-1.00 almost perfect.
    assert kappa_band(kappa) == band


def test_duplicate_id_is_an_error_naming_file_and_id(tmp_path: Path) -> None:
    path = _write_csv(tmp_path / "dup.csv", [("x1", "a"), ("x2", "b"), ("x1", "b")])
    with pytest.raises(HarnessError, match=r"dup\.csv line 4: id 'x1' appears again \(first on line 2\)"):
        read_labels(path)


def test_missing_column_and_blank_label_are_errors(tmp_path: Path) -> None:
    path = _write_csv(tmp_path / "cols.csv", [("x1", "a")], header=("row", "label"))
    with pytest.raises(HarnessError, match=r"cols\.csv: no column 'id' \(set by --id\)"):
        read_labels(path)
    blank = _write_csv(tmp_path / "blank.csv", [("x1", "a"), ("x2", " ")])
    with pytest.raises(HarnessError, match=r"blank\.csv line 3: empty label"):
        read_labels(blank)


def test_no_shared_ids_is_an_error() -> None:
    with pytest.raises(HarnessError, match="share no ids"):
        agreement({"a": "x"}, {"b": "x"}, resamples=0)


def test_command_reads_tsv_and_jsonl_and_writes_reports(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    ids = [f"m{i:02d}" for i in range(30)]
    a_path = tmp_path / "a.tsv"
    a_path.write_text("msg\ttopic\n" + "".join(f"{i}\t{'refund' if n % 3 else 'praise'}\n" for n, i in enumerate(ids)),
                      encoding="utf-8")
    b_path = tmp_path / "b.jsonl"
    b_rows = [{"msg": i, "topic": "refund" if n % 4 else "praise"} for n, i in enumerate(ids[12:])]
    b_path.write_text("".join(json.dumps(r) + "\n" for r in b_rows), encoding="utf-8")
    out = tmp_path / "report"
    assert agree_command(a_path, b_path, id_column="msg", label_column="topic", out=out) == 0
    printed = capsys.readouterr().out
    data = json.loads((out / "agreement.json").read_text(encoding="utf-8"))
    assert data["only_in_a"] == ids[:12]  # all of them in the JSON
    assert data["matched"] == 18 and data["only_in_b"] == []
    md = (out / "agreement.md").read_text(encoding="utf-8")
    assert "Ids only in A (12, not compared): m00, m01" in md and "and 2 more" in md and "m11" not in md
    assert "Landis & Koch (1977)" in printed and "0.21-0.40 fair" in printed
    verdict = [line for line in printed.splitlines() if line.startswith("Verdict:")]
    assert len(verdict) == 1 and data["band"] in verdict[0]


def test_cli_verb(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    a = _write_csv(tmp_path / "a.csv", [("1", "x"), ("2", "y"), ("3", "x")])
    b = _write_csv(tmp_path / "b.csv", [("3", "x"), ("2", "y"), ("1", "y")])
    assert main(["agree", str(a), str(b)]) == 0
    out = capsys.readouterr().out
    assert "matched by id: 3 rows" in out and "raw agreement: 0.667" in out
    dup = _write_csv(tmp_path / "d.csv", [("1", "x"), ("1", "y")])
    assert main(["agree", str(a), str(dup)]) == 2  # a user error: one line on stderr, exit 2
    assert "id '1' appears again" in capsys.readouterr().err


def test_render_mentions_undefined_kappa() -> None:
    report = agreement({"1": "x", "2": "x"}, {"1": "x", "2": "x"}, resamples=0)
    assert report["kappa"] is None
    text = render_agreement(report, "a", "b")
    assert "kappa is undefined" in text and "raw agreement 100.0%" in text
