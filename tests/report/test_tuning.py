"""The tuning tables and figure: chosen settings, expected best by number of trials, every trial listed.

References outside the project: the expected-best cells are checked against
`harness.metrics.expected_max` (itself checked by brute force against Dodge et al. 2019,
arXiv:1909.03004, section 3, in tests/metrics/test_expected_max.py), and the figure is decoded with
matplotlib.image.imread.
"""

from __future__ import annotations

import copy
from io import BytesIO
from typing import Any

import pytest
from matplotlib.image import imread

from harness.errors import HarnessError
from harness.metrics.expected_max import expected_max, expected_max_sd
from harness.report import plots
from harness.report.render import Image, Para, Table, to_markdown
from harness.report.tuning import (
    FIGURE,
    chosen_table,
    expected_best_curves,
    expected_best_figure,
    expected_best_table,
    trials_table,
    tuning_blocks,
    tuning_tables,
)

ALPHA, BETA, GAMMA = "alpha · head · first pooling", "beta · head · mean pooling", "gamma · next_token"
LR, EPOCHS, BATCH = "train.learning_rate", "train.epochs", "train.batch_size"
SECS = "seconds (train + eval)"


def _trial(i: int, dev: float | None, lr: float, epochs: int,
           secs: tuple[float | None, float | None]) -> dict[str, Any]:
    return {"trial": i, "id": f"run-{i}-{dev}", "path": f"/runs/t{i}",
            "state": "failed" if dev is None else "finished",
            "settings": {LR: lr, EPOCHS: epochs, BATCH: 16}, "dev": dev,
            "train_seconds": secs[0], "eval_seconds": secs[1]}


def _summary() -> dict[str, Any]:
    """Three arms of 4 planned trials: one with a failed trial, one with a tie, one where nothing finished."""
    alpha = [_trial(0, 0.71, 3.1e-05, 2, (8.1, 0.6)), _trial(1, None, 5e-04, 3, (2.0, None)),
             _trial(2, 0.80, 0.00012, 2, (8.4, 0.6)), _trial(3, 0.64, 1e-05, 1, (4.0, 0.5))]
    beta = [_trial(0, 0.55, 2e-05, 1, (3.0, 0.5)), _trial(1, 0.60, 6e-05, 2, (6.0, 0.5)),
            _trial(2, 0.60, 9e-05, 2, (6.0, 0.5)), _trial(3, 0.58, 4e-04, 3, (9.0, 0.5))]
    gamma = [_trial(0, None, 1e-04, 1, (None, None)), _trial(1, None, 2e-04, 2, (1.5, None))]
    return {"metric": "macro_f1", "trials_per_arm": 4, "seed": 13, "arms": [
        {"arm": ALPHA, "chosen_trial": 2, "chosen": dict(alpha[2]["settings"]), "trials": alpha},
        {"arm": BETA, "chosen_trial": 1, "chosen": dict(beta[1]["settings"]), "trials": beta},
        {"arm": GAMMA, "chosen_trial": None, "chosen": {}, "trials": gamma},
    ]}


def _rows(t: Table) -> dict[str, dict[str, str]]:
    return {r[0]: dict(zip(t.headers, r, strict=True)) for r in t.rows}


def test_chosen_settings_per_arm() -> None:
    t = chosen_table(_summary())
    assert t.headers == ("arm", "chosen trial", LR, EPOCHS, BATCH, "dev Macro-F1", "trials finished",
                         "trial seconds (train + eval)")
    rows = _rows(t)
    # every trial's train + eval seconds, the failed one's train seconds included (it cost time too)
    assert rows[ALPHA] == {**rows[ALPHA], "chosen trial": "2", LR: "1.2e-04", EPOCHS: "2", BATCH: "16",
                           "dev Macro-F1": "0.800", "trials finished": "3/4",
                           "trial seconds (train + eval)": f"{8.1 + 0.6 + 2.0 + 8.4 + 0.6 + 4.0 + 0.5:.1f}"}
    assert (rows[BETA]["chosen trial"], rows[BETA][LR], rows[BETA]["dev Macro-F1"]) == ("1", "6.0e-05", "0.600")
    assert rows[BETA]["trials finished"] == "4/4"
    # nothing finished: no choice, no settings, no score, but the seconds spent are still shown
    assert [rows[GAMMA][h] for h in ("chosen trial", LR, EPOCHS, BATCH, "dev Macro-F1")] == ["–"] * 5
    assert (rows[GAMMA]["trials finished"], rows[GAMMA]["trial seconds (train + eval)"]) == ("0/4", "1.5")


def test_expected_best_cells_are_the_expected_maximum_of_the_finished_trials() -> None:
    t = expected_best_table(_summary())
    assert t.headers == ("arm", "n=1", "n=2", "n=3", "n=4")
    rows = _rows(t)
    finished = {ALPHA: [0.71, 0.80, 0.64], BETA: [0.55, 0.60, 0.60, 0.58]}  # alpha's failed trial 1 left out
    for arm, scores in finished.items():
        for n in range(1, len(scores) + 1):
            assert rows[arm][f"n={n}"] == f"{expected_max(scores, n):.3f} ± {expected_max_sd(scores, n):.3f}"
    # n=1, by hand: the mean 2.15 / 3 = 0.7167 and the population sd of the three scores,
    # sqrt((0.0067^2 + 0.0833^2 + 0.0767^2) / 3) = sqrt(0.012867 / 3) = 0.06549
    assert rows[ALPHA]["n=1"] == "0.717 ± 0.065"
    assert rows[ALPHA]["n=4"] == "–"  # three finished trials: nothing to say about four
    assert [rows[GAMMA][f"n={n}"] for n in range(1, 5)] == ["–"] * 4


def test_curves_hold_full_precision_and_skip_failed_trials() -> None:
    curves = dict((name, (means, sds)) for name, means, sds in expected_best_curves(_summary()))
    means, sds = curves[ALPHA]
    assert len(means) == len(sds) == 3
    assert means[1] == expected_max([0.71, 0.80, 0.64], 2) and sds[2] == expected_max_sd([0.71, 0.80, 0.64], 3)
    assert curves[GAMMA] == ([], [])


def test_every_trial_is_listed_with_its_state() -> None:
    t = trials_table(_summary())
    assert len(t.rows) == 4 + 4 + 2
    assert t.headers == ("arm", "trial", "chosen", LR, EPOCHS, BATCH, "state", "dev Macro-F1", SECS, "run")
    by_key = {(r[0], r[1]): dict(zip(t.headers, r, strict=True)) for r in t.rows}
    failed = by_key[(ALPHA, "1")]
    assert (failed["state"], failed["dev Macro-F1"], failed[SECS], failed[LR]) == ("failed", "–", "2.0",
                                                                                  "5.0e-04")
    assert by_key[(ALPHA, "2")]["chosen"] == "yes" and by_key[(ALPHA, "0")]["chosen"] == ""
    # a tie (trials 1 and 2 both 0.60): only the kept one is marked
    assert by_key[(BETA, "1")]["chosen"] == "yes" and by_key[(BETA, "2")]["chosen"] == ""
    assert by_key[(ALPHA, "0")][LR] == "3.1e-05" and by_key[(ALPHA, "0")][SECS] == "8.7"
    assert by_key[(GAMMA, "0")][SECS] == "–"
    assert [t.headers[0] for t in tuning_tables(_summary())] == ["arm"] * 3


def test_blocks_place_tables_reading_aid_and_figure() -> None:
    blocks = tuning_blocks(_summary())
    [image] = [b for b in blocks if isinstance(b, Image)]
    assert image.file == FIGURE and image.png[:8] == b"\x89PNG\r\n\x1a\n"
    assert sum(isinstance(b, Table) for b in blocks) == 3
    aid = [b.text for b in blocks if isinstance(b, Para) and "more trials would probably still help" in b.text]
    assert len(aid) == 1 and "\n" not in aid[0]
    text = to_markdown(blocks)
    assert f"]({FIGURE})" in text and "| 0.717 ± 0.065 |" in text


def test_the_figure_is_a_png_of_the_expected_size() -> None:
    png = expected_best_figure(_summary())
    assert png is not None and png.startswith(b"\x89PNG\r\n\x1a\n")
    assert 5_000 < len(png) < 500_000
    assert imread(BytesIO(png), format="png").shape == (480, 800, 4)  # 8 x 4.8 inches at 100 dpi, RGBA


def test_no_finished_trial_means_no_figure() -> None:
    summary = _summary()
    summary["arms"] = [summary["arms"][2]]
    assert expected_best_figure(summary) is None
    assert plots.expected_best_png([], "Macro-F1") is None
    assert not any(isinstance(b, Image) for b in tuning_blocks(summary))
    assert _rows(expected_best_table(summary))[GAMMA]["n=1"] == "–"


def test_for_a_loss_the_best_trial_is_the_lowest() -> None:
    summary = _summary()
    summary["metric"] = "log_loss"
    means, sds = expected_best_curves(summary)[0][1:]
    scores = [0.71, 0.80, 0.64]
    assert means[0] == pytest.approx(sum(scores) / 3, abs=1e-12)  # one trial: the mean, whichever way is best
    assert means[2] == pytest.approx(-expected_max([-s for s in scores], 3), abs=1e-12)
    assert means[2] < means[0] and sds[1] == pytest.approx(expected_max_sd([-s for s in scores], 2), abs=1e-12)
    assert "lowest dev Log loss" in to_markdown(tuning_blocks(summary))


def test_a_finished_trial_without_a_dev_score_is_refused() -> None:
    summary = copy.deepcopy(_summary())
    summary["arms"][1]["trials"][3]["dev"] = None  # still "finished"
    with pytest.raises(HarnessError, match=f"arm '{BETA}' trial 3 is finished but has no dev score"):
        expected_best_table(summary)
