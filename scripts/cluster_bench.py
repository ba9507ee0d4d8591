"""Cluster benchmark: a sweep's wall time run serially against a local 2-worker Ray cluster, and the cost per run
of going through the cluster.

    python scripts/cluster_bench.py                            # the toy sweep (configs/toy_sweep.yaml)
    python scripts/cluster_bench.py --config configs/bakeoff.yaml --skip-one-worker --repeats 1 --warm-up-steps 1

Every measurement is one `tiltyard sweep` command in a fresh process (start-up included, as a user
sees it), into a fresh output folder, after one warm-up sweep that fills the caches (toy checkpoints,
token caches, the decoder's conversion; `--warm-up-steps N` caps its training, which the caches do
not depend on). The contenders alternate (A B C D, then D C B A, ...) so
that drift in the machine's load hits all alike; the median of the repeats is reported, with the
load average before each measurement (other work on the machine shows there). Measured:
  serial            the sweep as it runs today (each run on all physical cores)
  cluster, 2 x 1    --cluster local --workers 2 --cpus-per-run 1 (two runs at once, one core each)
  serial, 1 thread  and cluster, 1 x 1: the same single-threaded runs one after another, without and with
                    the cluster; their difference per run is the overhead of going through the cluster
                    (starting Ray and its workers, shipping each run there and its folder back).
Writes bench_out/cluster_bench.json (or --out) and prints a Markdown table.
"""

from __future__ import annotations

import argparse
import os
import platform
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

from harness.files import atomic_write_json  # noqa: E402


def sweep_seconds(config: Path, out: Path, cache: Path, extra: list[str]) -> float:
    """Wall seconds of one `tiltyard sweep` in a fresh process; any failed run is an error."""
    env = {**os.environ, "HARNESS_CACHE": str(cache), "HF_HUB_OFFLINE": "1",
           "PYTHONPATH": os.pathsep.join(filter(None, [str(REPO), os.environ.get("PYTHONPATH")]))}
    cmd = [sys.executable, "-m", "harness", "--quiet", "sweep", str(config), "--no-compare",
           "--set", f"output={out}", *extra]
    started = time.perf_counter()
    done = subprocess.run(cmd, cwd=REPO, env=env, capture_output=True, text=True)
    seconds = time.perf_counter() - started
    if done.returncode != 0:
        raise SystemExit(f"{' '.join(cmd)} exited {done.returncode}:\n{done.stderr[-3000:]}")
    return seconds


def _cpu_name() -> str:
    """The CPU model (Linux: /proc/cpuinfo), else what the platform module says."""
    cpuinfo = Path("/proc/cpuinfo")
    if cpuinfo.is_file():
        for line in cpuinfo.read_text(encoding="utf-8", errors="replace").splitlines():
            if line.startswith("model name"):
                return line.split(":", 1)[1].strip()
    return platform.processor() or platform.machine()


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--config", type=Path, default=REPO / "configs" / "toy_sweep.yaml")
    parser.add_argument("--out", type=Path, default=REPO / "bench_out")
    parser.add_argument("--repeats", type=int, default=3, help="measurements of each contender (median reported)")
    parser.add_argument("--warm-up-steps", type=int, default=None,
                        help="cap the warm-up sweep's runs at N training steps (default: the whole sweep)")
    parser.add_argument("--skip-one-worker", action="store_true",
                        help="measure only serial and the 2-worker cluster (the overhead pair doubles the time)")
    args = parser.parse_args()
    from harness.config import load_config
    from harness.experiments.sweep import expand_sweep

    config = args.config.resolve()
    runs = len(expand_sweep(load_config(config)))
    work = Path(tempfile.mkdtemp(prefix="cluster-bench-"))
    cache = work / "cache"
    one_thread = ["--set", "train.threads=1"]
    plan: list[tuple[str, list[str]]] = [("serial", []), ("cluster, 2 workers x 1 CPU",
                                                           ["--cluster", "local", "--workers", "2", "--cpus-per-run", "1"])]
    if not args.skip_one_worker:
        plan += [("serial, 1 thread", one_thread),
                 ("cluster, 1 worker x 1 CPU", [*one_thread, "--cluster", "local", "--workers", "1"])]
    print(f"{config.name}: {runs} runs; warming the caches in {cache}", flush=True)
    sweep_seconds(config, work / "warm-up", cache,
                  [] if args.warm_up_steps is None else ["--set", f"train.max_steps={args.warm_up_steps}"])
    timings: dict[str, list[float]] = {name: [] for name, _ in plan}
    loads: dict[str, list[float]] = {name: [] for name, _ in plan}
    for round_ in range(args.repeats):
        for name, extra in plan if round_ % 2 == 0 else plan[::-1]:
            loads[name].append(round(os.getloadavg()[0], 2))
            timings[name].append(sweep_seconds(config, work / "out", cache, extra))
            shutil.rmtree(work / "out")  # a fresh output folder for every measurement (and no pile of weights)
            print(f"  {name}: {timings[name][-1]:.1f} s (load average before: {loads[name][-1]})", flush=True)
    results = {name: statistics.median(values) for name, values in timings.items()}
    report: dict[str, Any] = {
        "config": str(config.relative_to(REPO)) if REPO in config.parents else str(config), "runs": runs,
        "date": time.strftime("%Y-%m-%d"), "machine": {"processor": _cpu_name(),
                                                       "logical_cpus": os.cpu_count(), "python": platform.python_version()},
        "repeats": args.repeats, "wall_seconds_median": results, "wall_seconds": timings,
        "load_average_before": loads,
    }
    if "cluster, 1 worker x 1 CPU" in results:
        report["overhead_seconds_per_run"] = (results["cluster, 1 worker x 1 CPU"] - results["serial, 1 thread"]) / runs
    atomic_write_json(args.out / f"cluster_bench_{config.stem}.json", report)
    print(f"\n| {config.name} ({runs} runs) | wall time, median of {args.repeats} | vs serial | load average before |"
          "\n|---|---:|---:|---:|")
    for name, seconds in results.items():
        print(f"| {name} | {seconds:.1f} s | {results['serial'] / seconds:.2f}x | "
              f"{' / '.join(f'{x:.1f}' for x in loads[name])} |")
    if "overhead_seconds_per_run" in report:
        print(f"\ncluster overhead per run (1 worker vs serial, both 1 thread): {report['overhead_seconds_per_run']:.2f} s")
    print(f"written to {args.out / f'cluster_bench_{config.stem}.json'}")
    shutil.rmtree(work, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
