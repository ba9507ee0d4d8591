"""scripts/slurm_sweep.sh, run here: a stand-in `sbatch` runs each job at once, in the order Slurm would.

The stand-in runs the array's tasks one after another with SLURM_ARRAY_TASK_ID set (as Slurm sets it
in each task: https://slurm.schedmd.com/job_array.html), then the dependent job, and answers
`--parsable` with `JOBID;CLUSTER` (the sbatch manual's form, from memory). So the script's own
commands run unchanged: the dry run that finds the sweep folder, `tiltyard sweep --shard I/N` per
task, and `tiltyard compare` at the end.
"""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
import textwrap
from pathlib import Path

from harness.config import load_config
from harness.experiments.sweep import expand_sweep
from harness.runs.folders import read_status, run_folder, run_id
from tests.common import ROOT, ferry_config

SBATCH = textwrap.dedent("""\
    #!{python}
    # Stand-in for sbatch: runs the job now (array tasks in index order) and records it in $SBATCH_LOG.
    import json, os, subprocess, sys
    args, opts, n = sys.argv[1:], {{}}, 0
    while args and args[0].startswith("--"):
        key, _, value = args.pop(0)[2:].partition("=")
        opts[key] = args.pop(0) if key == "wrap" else value
    log = os.environ["SBATCH_LOG"]
    job = str(100 + sum(1 for _ in open(log)) if os.path.exists(log) else 100)
    runs = []
    if "array" in opts:
        first, last = map(int, opts["array"].split("-"))
        for i in range(first, last + 1):
            env = {{**os.environ, "SLURM_ARRAY_TASK_ID": str(i), "SLURM_ARRAY_JOB_ID": job}}
            done = subprocess.run(["bash", *args], env=env, capture_output=True, text=True)
            runs.append({{"task": i, "code": done.returncode, "out": done.stdout, "err": done.stderr[-2000:]}})
    else:
        done = subprocess.run(["bash", "-c", opts["wrap"]], capture_output=True, text=True)
        runs.append({{"code": done.returncode, "out": done.stdout, "err": done.stderr[-2000:]}})
    with open(log, "a") as fh:
        fh.write(json.dumps({{"job": job, "opts": opts, "args": args, "runs": runs}}) + "\\n")
    print(f"{{job}};testcluster" if "parsable" in opts else f"Submitted batch job {{job}}")
    """)


def test_the_slurm_script_runs_every_shard_then_the_comparison(tmp_path: Path) -> None:
    bin_dir = tmp_path / "bin"
    bin_dir.mkdir()
    (bin_dir / "sbatch").write_text(SBATCH.format(python=sys.executable))
    (bin_dir / "tiltyard").write_text(f"#!/usr/bin/env bash\nexec {sys.executable} -m harness \"$@\"\n")
    for tool in bin_dir.iterdir():
        tool.chmod(0o755)
    config = ferry_config(tmp_path, "grid.yaml", rows=24, sweep={"grid": {"train.seed": [1, 2, 3]}})
    env = {**os.environ, "PATH": f"{bin_dir}{os.pathsep}{os.environ['PATH']}", "SBATCH_LOG": str(tmp_path / "jobs.jsonl"),
           "PYTHONPATH": os.pathsep.join(filter(None, [str(ROOT), os.environ.get("PYTHONPATH")]))}
    done = subprocess.run(["bash", str(ROOT / "scripts" / "slurm_sweep.sh"), str(config), "2"], cwd=tmp_path, env=env,
                          capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stderr[-3000:]

    array, last = [json.loads(line) for line in (tmp_path / "jobs.jsonl").read_text().splitlines()]
    assert array["opts"]["array"] == "0-1" and array["args"][-2:] == [str(config), "2"]
    assert last["opts"]["dependency"] == f"afterany:{array['job']}"  # after every task, failed or not
    runs = expand_sweep(load_config(config))
    for task in array["runs"]:  # shard I of 2 ran runs I, I + 2, ... and no other
        assert task["code"] == 0, task["err"]
        ran = re.findall(r"#(\d+) (\S+): running", task["out"])
        assert ran == [(str(i), run_id(runs[i])) for i in range(task["task"], len(runs), 2)]
    assert all(read_status(run_folder(r))["state"] == "finished" for r in runs)
    sweep_dir = tmp_path / "runs" / "ferry" / "sweeps" / "grid"
    assert last["runs"][0]["code"] == 0, last["runs"][0]["err"]
    assert f"comparison written to {sweep_dir}" in last["runs"][0]["out"]
    assert json.loads((sweep_dir / "comparison.json").read_text())["runs"] == 3
    assert f"submitted 2 shards of {config} (job {array['job']};testcluster) and the comparison into {sweep_dir}" \
        in done.stdout


def test_the_slurm_script_submits_nothing_for_a_config_without_a_sweep(tmp_path: Path) -> None:
    bin_dir = tmp_path / "bin"
    bin_dir.mkdir()
    (bin_dir / "sbatch").write_text("#!/usr/bin/env bash\necho called >> \"$SBATCH_LOG\"\n")
    (bin_dir / "tiltyard").write_text(f"#!/usr/bin/env bash\nexec {sys.executable} -m harness \"$@\"\n")
    for tool in bin_dir.iterdir():
        tool.chmod(0o755)
    config = ferry_config(tmp_path, "single.yaml", rows=24)
    env = {**os.environ, "PATH": f"{bin_dir}{os.pathsep}{os.environ['PATH']}", "SBATCH_LOG": str(tmp_path / "jobs"),
           "PYTHONPATH": os.pathsep.join(filter(None, [str(ROOT), os.environ.get("PYTHONPATH")]))}
    done = subprocess.run(["bash", str(ROOT / "scripts" / "slurm_sweep.sh"), str(config)], cwd=tmp_path, env=env,
                          capture_output=True, text=True, timeout=300)
    assert done.returncode == 2
    assert done.stderr.strip().splitlines() == [f"tiltyard sweep: error: {config} has no sweep.grid or sweep.arms; "
                                                f"run a single config with 'tiltyard run {config}'"]
    assert not (tmp_path / "jobs").exists()  # nothing was submitted
