"""Whether a run trains under bf16 autocast: `train.bf16` true, false, or "auto" (the default).

"auto" turns bf16 on only on a CPU with bf16 matrix instructions (AVX-512 BF16 or AMX tiles, as
torch's own CPU probes report them) when no accelerator device is in use; everywhere else the run
keeps the fp32 path exactly as with `bf16: false`. Without those instructions bf16 on a CPU is
emulated and usually slower than fp32 (common practice); on a GPU the choice stays the user's.
The resolved choice is written to the run's environment record and shown in its report.

Only training (and the dev scoring inside it) runs under autocast. Once trained, the model is put
back in float32 (`drop_autocast`) before the test split is scored, so the reported predictions,
the serving figures and the exported model (float32 weights, loaded by `predict` or the library's
own classes) are one and the same model.
"""

from __future__ import annotations

from typing import Any

import torch

__all__ = ["cpu_has_bf16", "drop_autocast", "uses_bf16"]


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


def drop_autocast(root: torch.nn.Module) -> int:
    """Drop accelerate's mixed-precision wrapper from `root`'s modules; returns how many had one.

    `accelerator.prepare` under bf16 replaces a model's `forward` by one that runs in bf16 autocast
    and keeps the class's own as `_original_forward`; without it the module runs in float32 again.
    """
    found = 0
    for module in root.modules():
        if "_original_forward" in vars(module):
            vars(module).pop("forward", None)  # the class's own forward again
            del module._original_forward
            found += 1
    return found
