"""The report of one finished run: computed once as a dict, written as `report.md` and `report.html`.

`build_run_report` reads the run folder (config, data fingerprint, log, predictions, metrics)
into plain JSON-ready data; `report_blocks` turns that into headings, tables and figures; the
renderers in `harness.report.render` write the same blocks as Markdown (figures as PNG files in
`plots/`) and as one self-contained HTML page (figures inlined).
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import yaml

from harness.errors import HarnessError
from harness.files import read_json
from harness.metrics.scores import HEADLINE, METRICS
from harness.report import plots
from harness.report.cautions import CAUTIONS
from harness.report.render import Block, Bullets, Heading, Image, Para, fmt, table, write_documents
from harness.report.serving_blocks import int8_blocks, serving_rows
from harness.runs.folders import require_finished

__all__ = ["build_run_report", "load_run", "read_jsonl", "report_blocks", "write_run_report"]

_TEXT_CHARS = 160  # misclassified examples: characters of text shown


def read_jsonl(path: Path) -> list[dict[str, Any]]:
    """Rows of a JSON-lines file, with a message naming the file and line of a broken row."""
    rows = []
    try:
        lines = path.read_text(encoding="utf-8").splitlines()
    except FileNotFoundError:
        raise HarnessError(f"{path} is missing") from None
    for number, line in enumerate(lines, 1):
        if not line.strip():
            continue
        try:
            row = json.loads(line)
        except json.JSONDecodeError:
            raise HarnessError(f"{path} line {number} is not valid JSON: half-written or edited by hand?") from None
        if not isinstance(row, dict):
            raise HarnessError(f"{path} line {number} is not a JSON object")
        rows.append(row)
    return rows


def load_run(run_dir: Path) -> dict[str, Any]:
    """Every file of a finished run, parsed: status, config, data, metrics, predictions, log, method."""
    run_dir = Path(run_dir)
    status = require_finished(run_dir, need=("config.yaml", "data.json", "metrics.json", "predictions.jsonl"))
    try:
        config = yaml.safe_load((run_dir / "config.yaml").read_text(encoding="utf-8"))
    except yaml.YAMLError as exc:
        raise HarnessError(f"{run_dir / 'config.yaml'} is not valid YAML: {exc}") from None
    if not isinstance(config, dict):
        raise HarnessError(f"{run_dir / 'config.yaml'} does not hold a config mapping")
    optional = {name: read_json(run_dir / name) if (run_dir / name).exists() else {}
                for name in ("method.json", "environment.json")}
    return {
        "path": run_dir,
        "name": run_dir.name,
        "status": status,
        "config": config,
        "data": read_json(run_dir / "data.json"),
        "metrics": read_json(run_dir / "metrics.json"),
        "predictions": read_jsonl(run_dir / "predictions.jsonl"),
        "log": read_jsonl(run_dir / "log.jsonl") if (run_dir / "log.jsonl").exists() else [],
        "method": optional["method.json"],
        "environment": optional["environment.json"],
    }


def _section(config: dict[str, Any], name: str) -> dict[str, Any]:
    value = config.get(name)
    return value if isinstance(value, dict) else {}


def _precision(env: dict[str, Any]) -> str:
    """train.bf16 as resolved on the machine that ran (older runs did not record it)."""
    if "bf16" not in env:
        return "not recorded"
    cpu_bf16 = env.get("cpu_bf16")
    cpu = "" if cpu_bf16 is None else ", CPU has bf16 instructions" if cpu_bf16 else ", CPU without bf16 instructions"
    return ("bf16 autocast" if env["bf16"] else "fp32") + cpu


def _decimals(value: Any, digits: int) -> str:
    return fmt(float(value), digits) if isinstance(value, (int, float)) and not isinstance(value, bool) else fmt(value)


def _config_brief(run: dict[str, Any]) -> list[list[str]]:
    cfg, described = run["config"], run["method"]
    model, method, train, ev = (_section(cfg, s) for s in ("model", "method", "train", "eval"))
    kind = method.get("kind", "?")
    rows = [["checkpoint", str(model.get("checkpoint", "?"))], ["method", str(kind)]]
    if kind == "head":
        pooling = described.get("pooling") or method.get("pooling", "?")
        rows.append(["pooling", str(pooling)])
        rows.append(["frozen", str(method.get("freeze", "none"))])
    else:
        rows.append(["template", json.dumps(method.get("template", ""), ensure_ascii=False)])
        rows.append(["label score", str(method.get("score", "?"))])
    if kind == "prompt":
        rows.append(["demonstrations", str(method.get("shots", 0))])
        rows.append(["calibrated", fmt(bool(method.get("calibrate", False)))])
    else:
        lora = method.get("lora")
        rows.append(["adapters", f"LoRA r={lora.get('r')}, alpha={lora.get('alpha')}" if lora else "none"])
        steps = f", at most {train['max_steps']} steps" if train.get("max_steps") else ""
        rows.append(["epochs", f"{train.get('epochs', '?')}{steps}"])
        rows.append(["batch", f"{train.get('batch_size', '?')} × {train.get('grad_accum', 1)} accumulation"])
        rows.append(["learning rate", f"{train.get('learning_rate', '?')} ({train.get('schedule', '?')}, "
                                      f"warmup {train.get('warmup', '?')})"])
    rows.append(["max length", str(train.get("max_length", "?"))])
    rows.append(["seed", str(train.get("seed", "?"))])
    rows.append(["primary metric", str(ev.get("primary", "?"))])
    return rows


def _curves(run: dict[str, Any], primary: str) -> dict[str, Any]:
    train = [r for r in run["log"] if "loss" in r and "step" in r]
    evals = [r for r in run["log"] if isinstance(r.get("dev"), dict) and r["dev"].get(primary) is not None]
    return {
        "step": [r["step"] for r in train],
        "loss": [r["loss"] for r in train],
        "lr": [r.get("lr") for r in train],
        "dev_step": [r.get("step", i) for i, r in enumerate(evals)],
        "dev": [r["dev"][primary] for r in evals],
    }


def _worst(run: dict[str, Any], labels: list[str], limit: int) -> list[dict[str, Any]]:
    wrong = []
    for row in run["predictions"]:
        if row.get("gold") == row.get("predicted"):
            continue
        probs = row.get("probs") or {}
        raw = row.get("text")
        text = None if raw is None else " ‖ ".join(raw) if isinstance(raw, list) else str(raw)
        wrong.append({
            "id": str(row.get("id", "?")),
            "text": text if text is None or len(text) <= _TEXT_CHARS else text[: _TEXT_CHARS - 1] + "…",
            "gold": row.get("gold"),
            "predicted": row.get("predicted"),
            "p_gold": float(probs.get(row.get("gold"), 0.0)),
        })
    wrong.sort(key=lambda r: (r["p_gold"], r["id"]))
    return wrong[:limit]


def build_run_report(run_dir: Path) -> dict[str, Any]:
    """The whole report of a finished run as JSON-ready data."""
    run = load_run(run_dir)
    m, cfg = run["metrics"], run["config"]
    primary = str(_section(cfg, "eval").get("primary", "macro_f1"))
    kind = _section(cfg, "method").get("kind", "?")
    labels = list(m.get("labels") or run["data"].get("labels") or [])
    headline = []
    for name in HEADLINE:
        if name in m.get("metrics", {}):
            lo, hi = (m.get("intervals", {}).get(name) or [None, None])[:2]
            headline.append({"metric": name, "display": METRICS[name].display, "value": m["metrics"][name],
                             "lo": lo, "hi": hi, "primary": name == primary})
    curves = _curves(run, primary)
    trained = kind != "prompt" and bool(curves["step"])
    audit = run["data"].get("audit") if isinstance(run["data"].get("audit"), dict) else {}
    per_class = m.get("per_class", [])
    weakest = min(per_class, key=lambda c: (c["f1"], c["recall"])) if per_class else None
    return {
        "run": run["name"], "path": str(run["path"]), "task": _section(cfg, "task").get("name", "?"),
        "method": kind, "primary": primary, "config": _config_brief(run), "labels": labels,
        "splits": run["data"].get("splits", {}),
        "notes": list(run["data"].get("notes", [])) + list(audit.get("findings", [])),
        "n": m.get("n"), "positive": m.get("positive") if m.get("binary") else None, "headline": headline, "per_class": per_class, "confusion": m.get("confusion"),
        "reliability": m.get("reliability", []), "ece": m.get("metrics", {}).get("ece"),
        "curves": curves if trained else None,
        "cost": m.get("cost", {}), "worst": _worst(run, labels, int(_section(cfg, "eval").get("worst", 10))),
        "weakest": weakest, "split": str(m.get("scored_on", "test")), "int8": m.get("int8"),
    }


def _caveats(report: dict[str, Any]) -> list[str]:
    items = []
    weak = report["weakest"]
    if weak is not None:
        items.append(
            f"The headline numbers average over {fmt(report['n'])} {report['split']} rows. The weakest class here is "
            f"'{weak['label']}' (precision {fmt(weak['precision'])}, recall {fmt(weak['recall'])}, "
            f"F1 {fmt(weak['f1'])}, {weak['support']} rows): read its row of the confusion matrix and the "
            "misclassified examples before trusting an average."
        )
    never = [c["label"] for c in report["per_class"] if c.get("predicted") == 0 and c["support"] > 0]
    if never:
        items.append(f"The model never predicts {', '.join(repr(n) for n in never)}: every such {report['split']} row is an error, "
                     "whatever the average says.")
    items.append(
        "The test set records no groups of people, sources or dialects, so nothing here shows whether errors "
        "fall evenly across them. If the outputs feed decisions about people, measure errors per class and "
        "per group on data that records those groups, and have a person review, and be able to overturn, "
        "what the classifier decides."
    )
    items += [c for c in CAUTIONS if c.startswith(("Pretrained", "Labels can", "Data drifts"))]
    items.append(
        "The intervals cover the sampling of test rows only. Another seed or another training sample moves "
        "the scores too: run several seeds and put them side by side with `tiltyard compare`."
    )
    items.append(
        f"Read the probabilities as confidence only as far as the reliability diagram supports it "
        f"(expected calibration error {fmt(report['ece'])})."
    )
    return items


def report_blocks(report: dict[str, Any]) -> list[Block]:
    """The report as blocks for `harness.report.render` (figures are drawn here)."""
    labels = report["labels"]
    blocks: list[Block] = [
        Heading(f"Run report: {report['run']}", 1),
        Para(f"Task `{report['task']}`, method `{report['method']}`. Folder: `{report['path']}`."),
        Heading("Settings"), table(["setting", "value"], report["config"]),
        Heading("Data"),
        table(["split", "rows", *labels], [[name, s.get("rows"), *(s.get("label_counts", {}).get(lab) for lab in labels)]
                                           for name, s in report["splits"].items()]),
    ]
    if report["notes"]:
        blocks.append(Bullets(tuple(f"note: {n}" for n in report["notes"])))
    blocks += [
        Heading("Test scores" if report["split"] == "test" else "Dev scores (a tuning trial: the test split was not scored)"),
        table(["metric", "value", "95% interval", "better"],
              [[h["display"] + (" (primary)" if h["primary"] else ""), h["value"],
                "–" if h["lo"] is None else f"{fmt(h['lo'])} to {fmt(h['hi'])}",
                "higher" if METRICS[h["metric"]].higher_is_better else "lower"] for h in report["headline"]],
              caption=f"{fmt(report['n'])} {report['split']} rows; intervals are percentile bootstrap over {report['split']} rows"
                      + (f"; positive label for the binary metrics: '{report['positive']}'." if report["positive"] else ".")),
        Heading("Per class"),
        table(["label", "precision", "recall", "F1", "support", "predicted"],
              [[c["label"], c["precision"], c["recall"], c["f1"], c["support"], c.get("predicted")]
               for c in report["per_class"]]),
    ]
    if report["confusion"]:
        blocks.append(Image("plots/confusion.png", plots.confusion_png(report["confusion"], labels),
                            "confusion matrix heat map"))
    if report["reliability"]:
        blocks += [Heading("Calibration"),
                   Image("plots/reliability.png", plots.reliability_png(report["reliability"]), "reliability diagram")]
    blocks.append(Heading("Training"))
    curves = report["curves"]
    if curves is None:
        blocks.append(Para("This run changed no weights (or logged no training steps), so there are no "
                           "training curves."))
    else:
        steps = [s for s, lr in zip(curves["step"], curves["lr"], strict=True) if lr is not None]
        lrs = [lr for lr in curves["lr"] if lr is not None]
        blocks.append(Image("plots/training.png", plots.curves_png(
            {"step": curves["step"], "loss": curves["loss"], "lr_step": steps, "lr": lrs},
            curves["dev_step"], curves["dev"], report["primary"]), "training curves"))
    cost = report["cost"]
    trainable, total = cost.get("trainable_parameters"), cost.get("total_parameters")
    share = f" ({100 * trainable / total:.2f}% of {fmt(total)})" if trainable is not None and total else ""
    blocks += [
        Heading("Cost"),
        table(["measure", "value"], [
            ["training seconds", _decimals(cost.get("train_seconds"), 1)],
            ["scoring seconds", _decimals(cost.get("eval_seconds"), 1)],
            ["training examples per second", _decimals(cost.get("train_examples_per_second"), 1)],
            ["optimiser steps", cost.get("steps")], ["peak memory (MB)", _decimals(cost.get("peak_rss_mb"), 0)],
            ["precision", _precision(report.get("environment") or {})],
            ["trainable parameters", fmt(trainable) + share], ["total parameters", total],
            *serving_rows(cost.get("serving") or {}),
        ]),
    ]
    if report["int8"]:
        blocks += int8_blocks(report["int8"], report["primary"], cost.get("serving") or {})
    blocks += [
        Heading("Most confident mistakes"),
    ]
    if report["worst"] and any(w["text"] is not None for w in report["worst"]):
        blocks.append(table(["id", "text", "gold", "predicted", "p(gold)"],
                            [[w["id"], w["text"], w["gold"], w["predicted"], w["p_gold"]] for w in report["worst"]],
                            caption=f"Misclassified {report['split']} rows with the lowest probability on the gold label."))
    elif report["worst"]:  # eval.store_texts: false
        blocks.append(table(["id", "gold", "predicted", "p(gold)"],
                            [[w["id"], w["gold"], w["predicted"], w["p_gold"]] for w in report["worst"]],
                            caption=f"Misclassified {report['split']} rows with the lowest probability on the gold label; "
                                    "texts are not stored (eval.store_texts: false), look them up by id."))
    else:
        blocks.append(Para(f"No {report['split']} row was misclassified."))
    blocks += [Heading("Before you rely on this"), Bullets(tuple(_caveats(report)))]
    return blocks


def write_run_report(run_dir: Path) -> tuple[Path, Path]:
    """Write `report.md` (figures in `plots/`) and the self-contained `report.html` into a finished run folder."""
    run_dir = Path(run_dir)
    report = build_run_report(run_dir)
    return write_documents(report_blocks(report), f"Run report: {report['run']}",
                           run_dir / "report.md", run_dir / "report.html")
