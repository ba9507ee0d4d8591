"""The `tiltyard` command line: one verb per job, every failure a one-line message, exit 2.

The command was called `harness` before; that name still works for one release, with a notice.
"""

from __future__ import annotations

import argparse
import logging
import os
import sys
from collections.abc import Sequence
from pathlib import Path

from harness.errors import HarnessError
from harness.names import FORMER_PROGRAM, PROGRAM

__all__ = ["main", "main_former_name"]

EXIT_USER_ERROR = 2
EXIT_INTERRUPTED = 130


def _add_set(p: argparse.ArgumentParser) -> None:
    p.add_argument("--set", dest="overrides", action="append", default=[], metavar="KEY=VALUE",
                   help="override a config value by dotted key, e.g. --set train.learning_rate=3e-5 (repeatable)")


def _parser() -> argparse.ArgumentParser:
    top = argparse.ArgumentParser(
        prog=PROGRAM,
        description="Fine-tune small pretrained transformers as text classifiers on a CPU and compare the ways of doing it.",
    )
    top.add_argument("--debug", action="store_true", help="show full tracebacks instead of one-line errors")
    top.add_argument("--quiet", action="store_true", help="print only warnings and the final summary")
    verbs = top.add_subparsers(dest="verb", metavar="VERB")
    verbs.required = True

    p = verbs.add_parser("run", help="train (if the method trains) and evaluate one config")
    p.add_argument("config", type=Path, help="YAML config file")
    _add_set(p)
    p.add_argument("--resume", action="store_true", help="continue an interrupted run from its last checkpoint")
    p.add_argument("--force", action="store_true", help="replace a finished run of the same config")

    p = verbs.add_parser("sweep", help="expand the config's sweep block and run every combination")
    p.add_argument("config", type=Path)
    _add_set(p)
    p.add_argument("--dry-run", action="store_true",
                   help="list the runs with a forecast of their cost on this machine, run none of them")
    p.add_argument("--no-calibrate", action="store_true",
                   help="with --dry-run: do not measure this machine's speed (seconds per checkpoint and method, "
                        "once, then cached); forecast only from cached speeds and finished runs")
    p.add_argument("--budget", default=None, metavar="TIME",
                   help="wall-time budget on this machine, e.g. 15m or 1h30m: a sweep forecast over it is trimmed "
                        "(fewer trials, then fewer seeds) or refused (sweep.over_budget); default: sweep.budget")
    p.add_argument("--shard", default=None, metavar="I/N", help="run only every N-th run starting at I (0-based)")
    p.add_argument("--no-compare", action="store_true", help="skip the comparison report at the end")
    p.add_argument("--cluster", default=None, metavar="WHERE",
                   help="run the runs as tasks on a Ray cluster: 'local' (start one on this machine), a cluster "
                        "address (auto, HOST:PORT, ray://HOST:PORT), or 'none' (here, one after another); "
                        "default: $RAY_ADDRESS when set, else none")
    p.add_argument("--workers", type=int, default=None, metavar="N",
                   help="with --cluster local: runs at once (default: physical cores // --cpus-per-run)")
    p.add_argument("--cpus-per-run", type=int, default=None, metavar="N",
                   help="on a cluster: CPUs (and torch threads) of each run whose config leaves train.threads "
                        "unset (default 1)")
    p.add_argument("--fetch-weights", action="store_true",
                   help="on a cluster: bring each run's model/ back too, not only its results")

    p = verbs.add_parser("compare", help="one comparison table over many run or sweep folders")
    p.add_argument("paths", nargs="+", type=Path, help="run folders, or folders that contain runs")
    p.add_argument("--out", type=Path, default=None, help="where comparison.* go (default: the first path)")
    p.add_argument("--primary", default=None, help="metric to rank by (default: the runs' eval.primary)")

    p = verbs.add_parser("replay", help="re-run a finished run from its saved config and check it matches")
    p.add_argument("run_dir", type=Path)
    p.add_argument("--out", type=Path, default=None, help="where the replayed run goes (default: a temporary folder)")

    p = verbs.add_parser("predict", help="label new rows with a finished run's model")
    p.add_argument("run_dir", type=Path)
    p.add_argument("input", type=Path, help="CSV/TSV/JSONL/Parquet with the run's text column(s)")
    p.add_argument("--out", type=Path, default=None, help="output CSV (default: INPUT stem + .predictions.csv)")

    p = verbs.add_parser("audit", help="data checks only: sizes, balance, duplicates, leakage, lengths")
    p.add_argument("config", type=Path)
    _add_set(p)
    p.add_argument("--out", type=Path, default=None, help="folder for audit.json/audit.md (default: <output>/<task>/)")

    p = verbs.add_parser("agree", help="agreement between two labelings of the same rows")
    p.add_argument("labels_a", type=Path)
    p.add_argument("labels_b", type=Path)
    p.add_argument("--id", default="id", help="id column in both files (default: id)")
    p.add_argument("--label", default="label", help="label column in both files (default: label)")
    p.add_argument("--out", type=Path, default=None, help="write agreement.json/.md here")

    p = verbs.add_parser("assets", help="list, and with --prepare convert, packaged checkpoints and data sets")
    p.add_argument("--prepare", nargs="*", default=None, metavar="NAME", help="prepare these (no names: all installed)")
    p.add_argument("--layers", type=int, default=None, help="with --prepare NAME --out DIR: cut to the first N layers")
    p.add_argument("--out", type=Path, default=None, help="folder for a cut checkpoint")

    p = verbs.add_parser("draft", help="write a starter four-arm bake-off config from one labelled data file")
    p.add_argument("data", type=Path, help="CSV/TSV/JSONL/Parquet file with a text and a label column (the training rows)")
    p.add_argument("--dev", type=Path, default=None, help="a dev file of the same columns (default: carved from DATA)")
    p.add_argument("--test", type=Path, default=None, help="a test file of the same columns (default: carved from DATA)")
    p.add_argument("--text", default=None, metavar="COL[,COL_B]",
                   help="text column, or two columns for a pair task (default: found by name)")
    p.add_argument("--label", default=None, metavar="COL", help="label column (default: found by name or values)")
    p.add_argument("--id", default=None, metavar="COL", help="row id column (default: a unique column named like id)")
    p.add_argument("--out", type=Path, default=None, help="config file to write (default: <task name>.yaml here)")
    p.add_argument("--encoder", default="asset:minilm-l6", metavar="CHECKPOINT", help="encoder of the encoder arm")
    p.add_argument("--decoder", default="asset:smollm2-135m", metavar="CHECKPOINT",
                   help="decoder of the decoder head, next_token and prompt arms")
    p.add_argument("--seeds", type=int, default=3, help="seeds per arm in the sweep grid (default: 3)")
    p.add_argument("--force", action="store_true", help="replace an existing config file")

    p = verbs.add_parser("toy", help="build tiny random-weight checkpoints (encoder, decoder, encoder-decoder)")
    p.add_argument("out_dir", type=Path)
    p.add_argument("--seed", type=int, default=0)
    return top


def _dispatch(args: argparse.Namespace) -> int:
    from harness import commands

    handler = getattr(commands, f"cmd_{args.verb}")
    return int(handler(args) or 0)


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the `tiltyard` command and of `python -m harness`."""
    args = _parser().parse_args(argv)
    logging.basicConfig(
        level=logging.WARNING if args.quiet else logging.INFO,
        format="%(levelname)s %(message)s" if args.debug else "%(message)s",
        stream=sys.stderr,
    )
    os.environ.setdefault("HF_HUB_OFFLINE", "1")
    os.environ.setdefault("TRANSFORMERS_NO_ADVISORY_WARNINGS", "1")
    # The library's own bars (e.g. "Writing model shards") would interleave with ours.
    os.environ.setdefault("HF_HUB_DISABLE_PROGRESS_BARS", "1")
    try:
        return _dispatch(args)
    except HarnessError as exc:
        if args.debug:
            raise
        code = getattr(exc, "exit_code", EXIT_USER_ERROR)
        print(f"{PROGRAM} {args.verb}: error: {exc}", file=sys.stderr)
        return int(code)
    except KeyboardInterrupt:
        print(f"{PROGRAM} {args.verb}: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED


def main_former_name(argv: Sequence[str] | None = None) -> int:
    """Entry point of the old `harness` command: a one-line notice, then the same program."""
    print(f"note: the '{FORMER_PROGRAM}' command is now '{PROGRAM}'; '{FORMER_PROGRAM}' stops working in the "
          "next release", file=sys.stderr)
    return main(argv)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
