"""What each command-line verb does: call the library, print its results and where the outputs went.

Every verb body is here, one function each, in the order of `cli.py`; the library modules return
values (and log progress through a callback) but never print. The library is imported inside each
verb so that `--help` and a typo answer before torch and transformers load.
"""

from __future__ import annotations

import argparse
import logging
import tempfile
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from harness.errors import HarnessError
from harness.names import PROGRAM
from harness.report.cautions import SHORT_CAUTION

__all__ = [
    "agree_command", "cluster_spec", "cmd_agree", "cmd_assets", "cmd_audit", "cmd_compare", "cmd_draft",
    "cmd_predict", "cmd_replay", "cmd_run", "cmd_sweep", "cmd_toy", "compare_command", "replay_command",
    "sweep_command",
]

logger = logging.getLogger(__name__)


def cmd_run(args: argparse.Namespace) -> int:
    """`run CONFIG`: train (if the method trains), evaluate on test, write the run folder."""
    from harness.config import load_config
    from harness.runs.run import execute_run

    cfg = load_config(args.config, args.overrides)
    if cfg.sweep.grid or cfg.sweep.arms:
        raise HarnessError(f"{args.config} has a sweep block; run it with '{PROGRAM} sweep {args.config}'")
    execute_run(cfg, resume=args.resume, overwrite=args.force, log=print)
    return 0


def cmd_sweep(args: argparse.Namespace) -> int:
    """`sweep CONFIG`: every combination of the sweep block, then the comparison."""
    return sweep_command(args.config, args.overrides, dry_run=args.dry_run, shard=args.shard,
                         compare=not args.no_compare, calibrate=not args.no_calibrate, cluster=args.cluster,
                         workers=args.workers, cpus_per_run=args.cpus_per_run, fetch_weights=args.fetch_weights,
                         budget=args.budget)


def cluster_spec(cluster: str | None, *, workers: int | None = None, cpus_per_run: int | None = None,
                 fetch_weights: bool = False) -> Any:
    """The ClusterSpec the sweep options ask for (None: run here), with $RAY_ADDRESS as the default address."""
    import os

    from harness.experiments.cluster import ClusterSpec

    where = cluster if cluster is not None else (os.environ.get("RAY_ADDRESS") or None)
    for option, value in (("--workers", workers), ("--cpus-per-run", cpus_per_run)):
        if value is not None and value < 1:
            raise HarnessError(f"{option} {value}: expected a whole number of at least 1")
    if where is None or where.strip().lower() == "none":
        given = [o for o, v in (("--workers", workers), ("--cpus-per-run", cpus_per_run),
                                ("--fetch-weights", fetch_weights or None)) if v is not None]
        if given:
            raise HarnessError(f"{', '.join(given)} only apply to a cluster sweep: add --cluster local "
                               "(or a cluster address)")
        return None
    where = where.strip()
    if workers is not None and where != "local":
        raise HarnessError(f"--workers applies to --cluster local only; the cluster at {where} has its own "
                           "machines (use --cpus-per-run to size each run)")
    from harness.experiments.cluster import import_ray
    from harness.train.processes import is_launched

    import_ray()  # missing: say so (naming the extra) before anything is read or written
    if is_launched():
        raise HarnessError("--cluster runs every run as one task of its own; start the sweep without "
                           "'accelerate launch'")
    return ClusterSpec(where, workers=workers, cpus_per_run=cpus_per_run, weights=fetch_weights)


def sweep_command(
    config_path: Path, overrides: Sequence[str] = (), *, dry_run: bool = False, shard: str | None = None,
    compare: bool = True, cluster: str | None = None, workers: int | None = None, cpus_per_run: int | None = None,
    fetch_weights: bool = False, calibrate: bool = True, budget: str | None = None,
) -> int:
    """Exit 0 when every run (of the shard) finished, 1 when some failed.

    A data file that changed while the sweep ran is a HarnessError (exit 2) naming it, after the index
    is written: the runs after the change were refused, and the sweep must be run again. `cluster` and
    the options after it choose where the runs go (see `cluster_spec`).
    """
    from harness.config import load_config
    from harness.experiments.sweep import parse_shard, plan_sweep, run_sweep
    from harness.train.processes import is_main_process

    parts = parse_shard(shard)
    if not calibrate and not dry_run:
        raise HarnessError("--no-calibrate goes with --dry-run: a sweep that runs measures nothing beforehand")
    spec = None if dry_run else cluster_spec(cluster, workers=workers, cpus_per_run=cpus_per_run,
                                             fetch_weights=fetch_weights)
    if spec is not None and cluster is None:
        print(f"RAY_ADDRESS is set: the runs go to the Ray cluster at {spec.address} (--cluster none runs them here)")
    cfg = load_config(config_path, overrides)
    if not cfg.sweep.grid and not cfg.sweep.arms:
        raise HarnessError(f"{config_path} has no sweep.grid or sweep.arms; run a single config with "
                           f"'{PROGRAM} run {config_path}'")
    name = Path(config_path).stem
    if dry_run:
        plan_sweep(cfg, name, parts, print, calibrate=calibrate, budget=budget)
        return 0
    # the other processes of a launch walk the sweep silently
    summary = run_sweep(cfg, name, shard=parts, compare=compare, log=print if is_main_process() else _silent,
                        cluster=spec, budget=budget)
    if summary["data_changed"]:  # not a broken run but changed input: the user must re-run, as for a bad config
        raise HarnessError(f"{summary['data_changed']}; {len(summary['failed'])} runs were not run on one version "
                           f"of it (listed in {Path(summary['folder']) / 'sweep.json'}): run '{PROGRAM} sweep "
                           f"{config_path}' again to redo them on the new version")
    if "comparison" in summary and is_main_process():
        print(summary["comparison"]["summary"])
        print(SHORT_CAUTION)
    return 1 if summary["failed"] else 0


def _silent(_: str) -> None:
    pass


def cmd_compare(args: argparse.Namespace) -> int:
    """`compare DIRS...`: one comparison table over many runs."""
    return compare_command(list(args.paths), args.out or args.paths[0], primary=args.primary)


def compare_command(paths: list[Path], out_dir: Path, *, primary: str | None = None) -> int:
    """Write the comparison, print its table and summary, and say where the files went."""
    from harness.report.compare import compare_runs
    from harness.report.compare_files import terminal_text

    result = compare_runs(paths, out_dir, primary=primary)
    print(terminal_text(result), end="")
    for item in result["incomplete"]:
        print(f"left out: {item['run']} ({item['state']}): {item['error']}")
    print(f"comparison written to {out_dir}: " + ", ".join(Path(f).name for f in result["files"]))
    return 0


def cmd_replay(args: argparse.Namespace) -> int:
    """`replay RUN_DIR`: re-run from the saved config; 0 when identical, 1 when not."""
    return replay_command(args.run_dir, args.out)


def replay_command(run_dir: Path, out: Path | None = None) -> int:
    """Print the replay's verdict and where the replayed run went; 0 when identical, 1 when not."""
    from harness.experiments.replay import replay_run, replay_verdict

    out_dir = Path(out) if out is not None else Path(tempfile.mkdtemp(prefix=f"{PROGRAM}-replay-"))
    result = replay_run(Path(run_dir), out_dir, log=print)
    print(replay_verdict(result))
    print(f"replayed run in {result['replay']}; details in {Path(result['replay']) / 'replay.json'}")
    return 0 if result["identical"] else 1


def cmd_predict(args: argparse.Namespace) -> int:
    """`predict RUN_DIR INPUT`: label new rows with a finished run's model."""
    from harness.runs.predict import label_rows

    out = args.out or args.input.with_name(args.input.stem + ".predictions.csv")
    done = label_rows(args.run_dir, args.input, out)
    speed = "–" if done.rows_per_second is None else f"{done.rows_per_second:,.1f}"
    print(f"predictions written to {out}")
    print(f"{done.rows} rows labelled in {done.seconds:.2f} s: {speed} rows/s (tokenising and scoring; "
          "loading the model not counted)")
    print(SHORT_CAUTION)
    return 0


def cmd_audit(args: argparse.Namespace) -> int:
    """`audit CONFIG`: data checks only."""
    from harness.config import load_config
    from harness.data.audit import audit_data, render_audit, write_audit
    from harness.data.task import load_task

    cfg = load_config(args.config, args.overrides)
    data = load_task(cfg.task, seed=cfg.train.seed)
    counter, positions = _token_counter(cfg)
    report = audit_data(data, max_length=cfg.train.max_length, count_tokens=counter, positions=positions)
    out = args.out or Path(cfg.output) / cfg.task.name
    print(render_audit(report, str(args.config)), end="")
    json_path, md_path = write_audit(report, str(args.config), out)
    print(f"audit written to {md_path} and {json_path}")
    return 0


def _token_counter(cfg: Any) -> tuple[Any, int | None]:
    """Token counts with the config's tokenizer, and the checkpoint's position limit (weights are not loaded)."""
    from transformers import AutoConfig, AutoTokenizer

    from harness.data.audit import token_counter
    from harness.models.backbones import positions_of, resolve_source

    source, gguf = resolve_source(cfg.model.checkpoint)
    if cfg.model.trust_remote_code:
        logger.warning("model.trust_remote_code is on: code shipped with %s will run", cfg.model.checkpoint)
    remote = cfg.model.trust_remote_code
    tokenizer = AutoTokenizer.from_pretrained(source, gguf_file=gguf, trust_remote_code=remote)
    config = AutoConfig.from_pretrained(source, gguf_file=gguf, trust_remote_code=remote)
    return token_counter(tokenizer), positions_of(config, tokenizer)


def cmd_agree(args: argparse.Namespace) -> int:
    """`agree A B`: agreement between two labelings."""
    return agree_command(args.labels_a, args.labels_b, id_column=args.id, label_column=args.label, out=args.out)


def agree_command(
    a: Path, b: Path, *, id_column: str = "id", label_column: str = "label", out: Path | None = None
) -> int:
    """Print the agreement report; with `out`, also write agreement.json/.md there."""
    from harness.data.agreement import agreement, read_labels, render_agreement
    from harness.files import atomic_write_json, atomic_write_text

    labels_a = read_labels(Path(a), id_column=id_column, label_column=label_column)
    labels_b = read_labels(Path(b), id_column=id_column, label_column=label_column)
    report = {"a": str(a), "b": str(b), **agreement(labels_a, labels_b)}
    text = render_agreement(report, str(a), str(b))
    print(text, end="")
    if out is not None:
        out = Path(out)
        atomic_write_json(out / "agreement.json", report)
        atomic_write_text(out / "agreement.md", text)
        print(f"agreement written to {out / 'agreement.md'} and {out / 'agreement.json'}")
    return 0


def cmd_assets(args: argparse.Namespace) -> int:
    """`assets`: list, prepare or cut the packaged checkpoints and data sets."""
    from harness.models import assets
    from harness.models.cut import cut_checkpoint

    if args.prepare is None:
        print(assets.format_assets())
        return 0
    if args.layers is not None:
        if len(args.prepare) != 1 or args.out is None:
            raise HarnessError("--layers needs exactly one checkpoint name and --out DIR")
        src = assets.resolve_checkpoint(args.prepare[0])
        out = cut_checkpoint(src, args.layers, args.out)
        print(f"{args.prepare[0]} cut to {args.layers} layers in {out}")
        return 0
    for path in assets.prepare(args.prepare, log=print):
        print(f"ready: {path}")
    return 0


def cmd_draft(args: argparse.Namespace) -> int:
    """`draft DATA`: a starter four-arm bake-off config from one labelled file; prints the choices and what next."""
    from harness.experiments.draft import draft_config
    from harness.files import atomic_write_text

    text = args.text
    if text is not None and "," in text:
        parts = [p.strip() for p in text.split(",")]
        if len(parts) != 2 or not all(parts):
            raise HarnessError(f"--text {text!r}: give one column, or two columns as COL_A,COL_B")
        text = (parts[0], parts[1])
    out = args.out
    if out is not None:
        _check_new_file(out, args.force)
    draft = draft_config(args.data, dev=args.dev, test=args.test, text=text, label=args.label, id_column=args.id,
                         encoder=args.encoder, decoder=args.decoder, seeds=args.seeds)
    if out is None:
        out = Path(f"{draft.name}.yaml")
        _check_new_file(out, args.force)
    cols = draft.columns
    shown = "+".join(cols.text) if isinstance(cols.text, tuple) else cols.text
    print(f"columns: text {shown}, label {cols.label}, id {cols.id or '(none: <split>-<row>)'}")
    for split in draft.data.splits():
        print(f"{split.name}: {len(split)} rows ({draft.split_origin[split.name]})")
    print("label words: " + ", ".join(f"{w.label} -> {w.word} ({w.tokens} token{'s' * (w.tokens != 1)})"
                                      for w in draft.words))
    lengths = draft.lengths
    print(f"train.max_length: encoder head {lengths.encoder}, decoder head {lengths.decoder}, "
          f"next_token/prompt {lengths.prompt} (99% of training texts, within the checkpoints' positions)")
    print(f"template: {draft.template!r}")
    for finding in draft.findings:
        print(f"audit: {finding}")
    atomic_write_text(out, draft.yaml)
    print(f"config written to {out}; read its comments, then run: {PROGRAM} sweep {out}")
    return 0


def _check_new_file(out: Path, force: bool) -> None:
    if out.is_dir():
        raise HarnessError(f"--out {out} is a folder; give the path of the YAML file to write")
    if out.exists() and not force:
        raise HarnessError(f"{out} exists; pass --force to replace it, or --out another file")


def cmd_toy(args: argparse.Namespace) -> int:
    """`toy OUT_DIR`: build the tiny random-weight checkpoints."""
    from harness.models.toy import toy_main

    for path in toy_main(args.out_dir, args.seed):
        print(f"toy checkpoint written to {path}")
    return 0
