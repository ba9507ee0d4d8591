"""The tuning part of a comparison: chosen settings, expected best dev score by number of trials, every trial.

Input is the plain dict a sweep's tuning phase writes, one entry per arm (a way of building the
classifier), each with the N trials it ran on randomly drawn settings, scored on the dev split:

    {"metric": "macro_f1", "trials_per_arm": 4, "seed": 13,
     "arms": [
       {"arm": "minilm-l6 · head · first pooling",   # display name
        "chosen_trial": 2,                            # index into "trials", or None when none finished
        "chosen": {"train.learning_rate": 0.00012, "train.epochs": 2, "train.batch_size": 16},
        "trials": [{"trial": 0, "id": "run-id", "path": "/abs/run/folder", "state": "finished",
                    "settings": {"train.learning_rate": 3.1e-05, ...}, "dev": 0.71,
                    "train_seconds": 8.1, "eval_seconds": 0.6},
                   ...]}]}                            # a failed trial: "state": "failed", "dev": None

The expected best dev score after n trials is Dodge et al. 2019 (arXiv:1909.03004, section 3) over
each arm's finished trials (`harness.metrics.expected_max`); failed trials are listed, never counted.
For a metric where lower is better, "best" is the lowest score. Everything here is pure: the
summary in, `harness.report.render` blocks (and PNG bytes) out, for the comparison to place.
"""

from __future__ import annotations

from typing import Any

from harness.errors import HarnessError
from harness.metrics.expected_max import expected_max_curve
from harness.metrics.scores import METRICS
from harness.report import plots
from harness.report.render import Block, Heading, Image, Para, Table, fmt

__all__ = [
    "FIGURE",
    "chosen_table",
    "expected_best_curves",
    "expected_best_figure",
    "expected_best_table",
    "reading_aid",
    "trials_table",
    "tuning_blocks",
    "tuning_tables",
]

FIGURE = "expected_best_by_trials.png"  # the figure's file name beside the Markdown


def _display(summary: dict[str, Any]) -> str:
    spec = METRICS.get(summary["metric"])
    return spec.display if spec is not None else summary["metric"]


def _higher_is_better(summary: dict[str, Any]) -> bool:
    spec = METRICS.get(summary["metric"])
    return spec is None or spec.higher_is_better


def _setting(key: str, value: Any) -> str:
    """A searched value as table text: learning rates (and other tiny floats) as 1.2e-04, ints plain."""
    if value is None:
        return "–"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return str(value)  # why: batch size 16 and 1,000 steps read as settings, not as counts
    if isinstance(value, float):
        if "learning_rate" in key or (value != 0 and abs(value) < 1e-3):
            return f"{value:.1e}"
        return f"{value:.4g}"
    return str(value)


def _dev(value: float | None) -> str:
    # why: a score stored as an int (a perfect 1) would otherwise print as a count, "1"
    return fmt(None if value is None else float(value))


def _keys(summary: dict[str, Any]) -> list[str]:
    """Every searched key, in the order the summary first names it (arms may search different keys)."""
    keys: dict[str, None] = {}
    for arm in summary["arms"]:
        for key in arm.get("chosen") or {}:
            keys.setdefault(key)
        for trial in arm["trials"]:
            for key in trial.get("settings") or {}:
                keys.setdefault(key)
    return list(keys)


def _seconds(trial: dict[str, Any]) -> float | None:
    parts = [trial.get("train_seconds"), trial.get("eval_seconds")]
    known = [p for p in parts if p is not None]
    return float(sum(known)) if known else None


def _finished_scores(arm: dict[str, Any]) -> list[float]:
    """Dev scores of the arm's finished trials; a finished trial without one is a broken summary."""
    scores = []
    for trial in arm["trials"]:
        if trial["state"] != "finished":
            continue
        if trial.get("dev") is None:
            raise HarnessError(f"tuning summary: arm '{arm['arm']}' trial {trial['trial']} is finished "
                               "but has no dev score")
        scores.append(float(trial["dev"]))
    return scores


def _total(summary: dict[str, Any], arm: dict[str, Any]) -> int:
    # why: an interrupted tuning phase lists fewer trials than it planned; the plan is the total
    return max(int(summary.get("trials_per_arm") or 0), len(arm["trials"]))


def expected_best_curves(summary: dict[str, Any]) -> list[tuple[str, list[float], list[float]]]:
    """(arm, means, sds) for n = 1..(finished trials) per arm; empty lists for an arm with none finished."""
    sign = 1.0 if _higher_is_better(summary) else -1.0  # the best of a loss is its lowest value
    curves = []
    for arm in summary["arms"]:
        scores = _finished_scores(arm)
        curve = expected_max_curve([sign * s for s in scores]) if scores else []
        curves.append((arm["arm"], [sign * c["mean"] for c in curve], [c["sd"] for c in curve]))
    return curves


def chosen_table(summary: dict[str, Any]) -> Table:
    """Per arm: the chosen trial, its settings, its dev score, trials finished of planned, trial seconds."""
    keys = _keys(summary)
    rows = []
    for arm in summary["arms"]:
        idx = arm.get("chosen_trial")
        chosen = arm["trials"][idx] if idx is not None else None
        values = arm.get("chosen") or {}
        spent = [s for s in (_seconds(t) for t in arm["trials"]) if s is not None]
        rows.append([arm["arm"], "–" if chosen is None else str(chosen["trial"]),
                     *(_setting(k, values.get(k)) if chosen is not None else "–" for k in keys),
                     _dev(None if chosen is None else chosen["dev"]),
                     f"{len(_finished_scores(arm))}/{_total(summary, arm)}",
                     f"{sum(spent):.1f}" if spent else "–"])
    return Table(("arm", "chosen trial", *keys, f"dev {_display(summary)}", "trials finished",
                  "trial seconds (train + eval)"), tuple(tuple(r) for r in rows),
                 caption="Chosen settings: the trial the tuning phase kept in each arm.")


def expected_best_table(summary: dict[str, Any]) -> Table:
    """Rows = arms, columns n = 1..N: best of n trials, "mean ± sd", "–" past its finished count."""
    width = max([_total(summary, arm) for arm in summary["arms"]], default=0)
    rows = []
    for name, means, sds in expected_best_curves(summary):
        cells = [f"{m:.3f} ± {s:.3f}" for m, s in zip(means, sds, strict=True)]
        rows.append((name, *cells, *["–"] * (width - len(cells))))
    return Table(("arm", *(f"n={n}" for n in range(1, width + 1))), tuple(rows),
                 caption=f"Expected best dev {_display(summary)} by number of trials (mean ± sd).")


def reading_aid(summary: dict[str, Any]) -> str:
    """The one line that says how to read the expected-best table and figure."""
    best = "highest" if _higher_is_better(summary) else "lowest"
    return (f"Each cell is the {best} dev {_display(summary)} to expect from n trials drawn at random (with "
            "replacement) from the arm's finished trials, ± its standard deviation (Dodge et al. 2019, "
            "section 3); n=1 is the plain mean of one trial. If a row still improves at its last column, more "
            "trials would probably still help that arm; a flat row means the search has levelled off.")


def trials_table(summary: dict[str, Any]) -> Table:
    """Every trial of every arm: its settings, state, dev score and seconds; the chosen one marked."""
    keys = _keys(summary)
    rows = []
    for arm in summary["arms"]:
        for i, trial in enumerate(arm["trials"]):
            settings = trial.get("settings") or {}
            rows.append([arm["arm"], str(trial["trial"]), "yes" if i == arm.get("chosen_trial") else "",
                         *(_setting(k, settings.get(k)) for k in keys), trial["state"], _dev(trial.get("dev")),
                         fmt(_seconds(trial), 1), trial.get("id") or "–"])
    headers = ("arm", "trial", "chosen", *keys, "state", f"dev {_display(summary)}", "seconds (train + eval)",
               "run")
    return Table(headers, tuple(tuple(r) for r in rows),
                 caption="Every tuning trial; failed ones count in no curve.")


def tuning_tables(summary: dict[str, Any]) -> list[Table]:
    """The three tables: chosen settings, expected best by number of trials, every trial."""
    return [chosen_table(summary), expected_best_table(summary), trials_table(summary)]


def expected_best_figure(summary: dict[str, Any]) -> bytes | None:
    """The expected-best curves as a PNG, or None when no arm finished a trial."""
    return plots.expected_best_png(expected_best_curves(summary), _display(summary))


def tuning_blocks(summary: dict[str, Any]) -> list[Block]:
    """Headings, the tables, the reading aid and the figure (file `FIGURE`), ready to place in a comparison."""
    trials = max([_total(summary, arm) for arm in summary["arms"]], default=0)
    blocks: list[Block] = [
        Heading("Tuning"),
        Para(f"Each arm ran up to {trials} trials with settings drawn at random (seed {summary.get('seed')}), "
             f"each trained on train with one seed and scored by dev {_display(summary)}; the test split played no "
             "part in the choice. The chosen trial's settings then ran with every seed and were scored on test "
             "(the tables above). Every tuned arm had the same number of trials, so no arm won by having been "
             "tuned more."),
        chosen_table(summary),
        Heading("Expected best dev score by number of trials"), expected_best_table(summary),
        Para(reading_aid(summary)),
    ]
    png = expected_best_figure(summary)
    if png is not None:
        blocks.append(Image(FIGURE, png, "expected best dev score by number of tuning trials"))
    blocks += [Heading("Every trial"), trials_table(summary)]
    return blocks
