"""What each command-line verb does: parse files, call the library, print where outputs went."""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import Any

from harness.errors import HarnessError

__all__ = [
    "cmd_agree", "cmd_assets", "cmd_audit", "cmd_compare", "cmd_predict", "cmd_replay", "cmd_run",
    "cmd_sweep", "cmd_toy",
]


def cmd_audit(args: argparse.Namespace) -> int:
    from harness.audit import audit_data, render_audit, write_audit
    from harness.config import load_config
    from harness.data import load_task

    cfg = load_config(args.config, args.overrides)
    data = load_task(cfg.task, seed=cfg.train.seed)
    counter = _token_counter(cfg)
    report = audit_data(data, max_length=cfg.train.max_length, count_tokens=counter)
    out = args.out or Path(cfg.output) / cfg.task.name
    print(render_audit(report, str(args.config)), end="")
    json_path, md_path = write_audit(report, str(args.config), out)
    print(f"audit written to {md_path} and {json_path}")
    return 0


def _token_counter(cfg: Any) -> Any:
    """Token counts with the config's tokenizer (the checkpoint's weights are not loaded)."""
    from transformers import AutoTokenizer

    from harness.audit import token_counter
    from harness.backbones import resolve_source

    source, gguf = resolve_source(cfg.model.checkpoint)
    if cfg.model.trust_remote_code:
        import logging

        logging.getLogger(__name__).warning("model.trust_remote_code is on: code shipped with %s will run",
                                            cfg.model.checkpoint)
    tokenizer = AutoTokenizer.from_pretrained(source, gguf_file=gguf, trust_remote_code=cfg.model.trust_remote_code)
    return token_counter(tokenizer)


def cmd_run(args: argparse.Namespace) -> int:
    from harness.config import load_config
    from harness.runner import execute_run

    cfg = load_config(args.config, args.overrides)
    if cfg.sweep.grid or cfg.sweep.arms:
        raise HarnessError(f"{args.config} has a sweep block; run it with 'harness sweep {args.config}'")
    execute_run(cfg, resume=args.resume, overwrite=args.force)
    return 0


def cmd_sweep(args: argparse.Namespace) -> int:
    from harness.sweep import sweep_command

    return sweep_command(args.config, args.overrides, dry_run=args.dry_run, shard=args.shard,
                         compare=not args.no_compare)


def cmd_compare(args: argparse.Namespace) -> int:
    from harness.compare import compare_command

    return int(compare_command(list(args.paths), args.out or args.paths[0], primary=args.primary) or 0)


def cmd_replay(args: argparse.Namespace) -> int:
    from harness.replay import replay_command

    return replay_command(args.run_dir, args.out)


def cmd_predict(args: argparse.Namespace) -> int:
    from harness.runner import predict

    out = args.out or args.input.with_name(args.input.stem + ".predictions.csv")
    predict(args.run_dir, args.input, out)
    print(f"predictions written to {out}")
    return 0


def cmd_agree(args: argparse.Namespace) -> int:
    from harness.agree import agree_command

    return agree_command(args.labels_a, args.labels_b, id_column=args.id, label_column=args.label, out=args.out)


def cmd_assets(args: argparse.Namespace) -> int:
    from harness import assets

    if args.prepare is None:
        assets.print_assets()
        return 0
    if args.layers is not None:
        if len(args.prepare) != 1 or args.out is None:
            raise HarnessError("--layers needs exactly one checkpoint name and --out DIR")
        src = assets.resolve_checkpoint(args.prepare[0])
        out = assets.cut_checkpoint(src, args.layers, args.out)
        print(f"{args.prepare[0]} cut to {args.layers} layers in {out}")
        return 0
    for path in assets.prepare(args.prepare):
        print(f"ready: {path}")
    return 0


def cmd_toy(args: argparse.Namespace) -> int:
    from harness.toy import toy_main

    for path in toy_main(args.out_dir, args.seed):
        print(f"toy checkpoint written to {path}")
    return 0
