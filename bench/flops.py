"""Measurement helpers for scripts/benchmark.py: FLOP counts, matmul throughput, padding, verdicts, the table.

Everything here is plain arithmetic or a short timed loop, so it can be unit-tested; the timed
contenders themselves (harness runs, the reference trainer, scoring) are in `bench.jobs`
and run in fresh subprocesses so that their peak memory does not mix.

Training FLOPs per real (unpadded) token, forward plus backward, are `6 * N + 12 * L * n * d`:
- `6 * N`: Kaplan et al. 2020, "Scaling Laws for Neural Language Models", section 2.1 and Table 1:
  a forward pass costs about 2 FLOPs per non-embedding parameter per token, the backward pass
  twice that (C ~ 6N); N excludes the embedding matrices (token, position, segment).
- `12 * L * n * d`: Hoffmann et al. 2022 ("Chinchilla"), Appendix F: per layer and token, the
  attention logits (Q K^T) cost 2 * n * d and the attention-weighted values another 2 * n * d in
  the forward pass (n = sequence length, d = heads * head size = hidden size here); times 3 for
  forward + backward. n is the example's own real length: a token attends to its example only.
"""

from __future__ import annotations

import json
import math
import os
import platform
import statistics
import subprocess
import sys
import time
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

__all__ = ["attention_flops", "machine_info", "matmul_flops_per_second", "median", "nonembedding_parameters",
           "padded_tokens", "run_job", "target_verdict", "training_flops"]


def nonembedding_parameters(model: Any) -> int:
    """Parameters outside `nn.Embedding` modules (Kaplan et al. 2020's N), counted once even when tied."""
    from torch import nn

    embedded = {id(p) for m in model.modules() if isinstance(m, nn.Embedding) for p in m.parameters()}
    seen: set[int] = set()
    total = 0
    for p in model.parameters():
        if id(p) not in embedded and id(p) not in seen:
            seen.add(id(p))
            total += p.numel()
    return total


def attention_flops(length: int, layers: int, hidden: int) -> float:
    """Forward + backward attention FLOPs of one example of `length` real tokens: 12 * L * n^2 * d."""
    return 12.0 * layers * length * length * hidden


def training_flops(lengths: Sequence[int], params: int, layers: int, hidden: int, epochs: float = 1.0) -> float:
    """Training FLOPs over examples of these real lengths: sum of 6 * N * n + 12 * L * n^2 * d, times epochs."""
    per_pass = sum(6.0 * params * n + attention_flops(n, layers, hidden) for n in lengths)
    return per_pass * epochs


def padded_tokens(lengths: Sequence[int], batches: Sequence[Sequence[int]],
                  width: Callable[[int], int] | None = None) -> int:
    """Tokens processed when every batch (index lists into `lengths`) is padded to its longest row, or to
    `width(longest)` (e.g. harness.methods.head.batch_width)."""
    total = 0
    for b in batches:
        if b:
            longest = max(lengths[i] for i in b)
            total += len(b) * (width(longest) if width else longest)
    return total


def matmul_flops_per_second(size: int = 2048, repeats: int = 5, dtype: str = "float32") -> float:
    """Best of `repeats` `size x size` matrix products (fp32 unless `dtype` says otherwise) on torch's current
    threads, in FLOP/s (2 n^3 each)."""
    import torch

    kind = getattr(torch, dtype)
    a, b = torch.randn(size, size, dtype=kind), torch.randn(size, size, dtype=kind)
    a @ b  # warm-up: the first call allocates and picks kernels
    best = math.inf
    for _ in range(repeats):
        start = time.perf_counter()
        a @ b
        best = min(best, time.perf_counter() - start)
    return 2.0 * size**3 / best


def median(values: Sequence[float]) -> float | None:
    """Median of the values that are not None, else None."""
    kept = [v for v in values if v is not None]
    return statistics.median(kept) if kept else None


def target_verdict(value: float | None, target: float, *, higher_is_better: bool, unit: str = "") -> str:
    """'met (2.31x >= 2.00x)' or 'missed by 0.12x (1.88x < 2.00x)', or 'not measured'."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "not measured"
    ok = value >= target if higher_is_better else value <= target
    sign = (">=" if ok else "<") if higher_is_better else ("<=" if ok else ">")
    shown = f"{value:.2f}{unit} {sign} {target:.2f}{unit}"
    return f"met ({shown})" if ok else f"missed by {abs(value - target):.2f}{unit} ({shown})"


def machine_info() -> dict[str, Any]:
    """CPU model (/proc/cpuinfo), physical and logical cores, torch threads and versions, load averages."""
    import psutil
    import torch

    model = platform.processor() or platform.machine()
    cpuinfo = Path("/proc/cpuinfo")
    if cpuinfo.exists():
        for line in cpuinfo.read_text(encoding="utf-8", errors="replace").splitlines():
            if line.startswith("model name"):
                model = line.split(":", 1)[1].strip()
                break
    flags = ""
    if cpuinfo.exists():
        flags = next((ln for ln in cpuinfo.read_text(errors="replace").splitlines() if ln.startswith("flags")), "")
    return {
        "cpu_model": model, "physical_cores": psutil.cpu_count(logical=False), "logical_cores": psutil.cpu_count(),
        "torch_threads": torch.get_num_threads(), "torch": torch.__version__, "python": sys.version.split()[0],
        "platform": platform.platform(), "memory_gb": round(psutil.virtual_memory().total / 2**30, 1),
        "cpu_bf16": "avx512_bf16" in flags.split() or "amx_bf16" in flags.split(),
        "load_average": [round(x, 2) for x in os.getloadavg()] if hasattr(os, "getloadavg") else None,
    }


def run_job(job: dict[str, Any], folder: Path, *, timeout: float = 3600.0, reuse: bool = False) -> dict[str, Any]:
    """Run one `bench.jobs` job in a fresh Python process and return its result dict.

    A fresh process per contender keeps peak resident memory (its own VmHWM) apart and starts every
    contender from the same cold state. A failed job returns {"error": ...} rather than raising,
    so one broken contender does not lose the rest of the benchmark. With `reuse`, a result left
    in `folder` by an earlier, interrupted benchmark for exactly this job is returned instead.
    """
    folder.mkdir(parents=True, exist_ok=True)
    spec = folder / f"{job['id']}.job.json"
    out = folder / f"{job['id']}.result.json"
    text = json.dumps(job, indent=2)
    if reuse and out.exists() and spec.exists() and spec.read_text(encoding="utf-8") == text:
        kept: dict[str, Any] = json.loads(out.read_text(encoding="utf-8"))
        if "error" not in kept:
            return {**kept, "reused": True}
    spec.write_text(text, encoding="utf-8")
    out.unlink(missing_ok=True)
    repo = str(Path(__file__).resolve().parent.parent)  # `bench` is not installed: run it from the checkout
    env = {**os.environ, "HF_HUB_OFFLINE": "1", "TOKENIZERS_PARALLELISM": "false",
           "PYTHONPATH": os.pathsep.join(p for p in (repo, os.environ.get("PYTHONPATH")) if p)}
    started = time.perf_counter()
    try:
        proc = subprocess.run([sys.executable, "-m", "bench.jobs", str(spec), str(out)], env=env,
                              capture_output=True, text=True, timeout=timeout, check=False)
    except subprocess.TimeoutExpired:
        return {"error": f"timed out after {timeout:.0f} s", "wall_seconds": time.perf_counter() - started}
    (folder / f"{job['id']}.log").write_text(proc.stdout + proc.stderr, encoding="utf-8")
    if proc.returncode != 0 or not out.exists():
        tail = (proc.stderr or proc.stdout).strip().splitlines()[-1:] or ["no output"]
        return {"error": f"exit {proc.returncode}: {tail[0]}", "wall_seconds": time.perf_counter() - started}
    result: dict[str, Any] = json.loads(out.read_text(encoding="utf-8"))
    result["wall_seconds"] = time.perf_counter() - started
    out.write_text(json.dumps(result), encoding="utf-8")  # with its wall time, for a later reuse
    return result
