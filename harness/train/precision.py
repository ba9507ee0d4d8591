"""Whether a run trains under bf16 autocast: `train.bf16` true, false, or "auto" (the default).

"auto" turns bf16 on only on a CPU with bf16 matrix instructions (AVX-512 BF16 or AMX tiles, as
torch's own CPU probes report them) when no accelerator device is in use; everywhere else the run
keeps the fp32 path exactly as with `bf16: false`. Without those instructions bf16 on a CPU is
emulated and usually slower than fp32 (common practice); on a GPU the choice stays the user's.
The resolved choice is written to the run's environment record and shown in its report.
"""

from __future__ import annotations

from typing import Any

import torch

__all__ = ["cpu_has_bf16", "uses_bf16"]


def cpu_has_bf16() -> bool:
    """True when this CPU has bf16 matrix instructions (torch's own probes: AVX-512 BF16 or AMX tiles)."""
    probes = [getattr(torch.cpu, name, None) for name in ("_is_avx512_bf16_supported", "_is_amx_tile_supported")]
    return any(bool(probe()) for probe in probes if probe is not None)


def _accelerator_present() -> bool:
    mps = getattr(torch.backends, "mps", None)
    return torch.cuda.is_available() or bool(mps is not None and mps.is_available())


def uses_bf16(train: Any) -> bool:
    """The resolved `train.bf16` of a TrainConfig: a bool as given, or "auto" decided by this machine."""
    if isinstance(train.bf16, bool):
        return train.bf16
    return cpu_has_bf16() and not _accelerator_present()
