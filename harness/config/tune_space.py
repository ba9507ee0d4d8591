"""Search spaces of the `sweep.tune` block: checked at load time, and the seeded draws of each trial.

A space maps dotted config keys to a range, `{low: A, high: B, scale: log | linear}` (a whole-number
key such as `train.batch_size` draws whole numbers from A to B, both included), or a list,
`{values: [...]}`. Trial t draws one uniform number per key from a seed made of (tune seed, t, key),
so every arm's trial t gets the same draw for a key it shares with another arm (common random
numbers: arms differ by their method, not by luck of the draw), and adding a key to a space leaves
the other keys' draws as they were. Budgets (`sweep.budget`, `--budget`) are durations: `parse_duration`.
"""

from __future__ import annotations

import math
import re
import zlib
from collections.abc import Callable
from typing import Any

import numpy as np

from harness.errors import HarnessError

__all__ = ["ARM_KEY", "arm_space", "check_space", "draw_settings", "parse_duration"]

ARM_KEY = "tune"  # an arm's own search space (or false: leave the arm untuned), in place of sweep.tune.space
_SCALES = ("linear", "log")
_NOT_TUNABLE = ("task.", "model.", "eval.", "sweep", "output", "train.seed")
_PART = r"(\d+(?:\.\d+)?|\.\d+)"
_DURATION = re.compile(rf"(?:{_PART}h)?(?:{_PART}m)?(?:{_PART}s)?")


def parse_duration(text: str, *, option: str = "--budget") -> float:
    """Seconds in a duration such as '15m', '90s', '1h30m' or '2.5h'; anything else is refused naming `option`."""
    found = _DURATION.fullmatch(re.sub(r"\s+", "", text.lower()))
    if found is None or not any(found.groups()):
        raise HarnessError(f"{option} {text!r}: expected a duration like 15m, 90s or 1h30m")
    hours, minutes, seconds = (float(g) if g else 0.0 for g in found.groups())
    total = hours * 3600 + minutes * 60 + seconds
    if total <= 0:
        raise HarnessError(f"{option} {text!r}: a budget must be longer than 0 s")
    return total


def _is_int(value: Any) -> bool:
    return isinstance(value, int) and not isinstance(value, bool)


def check_space(space: Any, locate: Callable[[str | None], str], build: Callable[[str, Any], None]) -> None:
    """Refuse a malformed space: `locate(key)` names a key of it (`locate(None)` the space) with file and line;
    `build(key, value)` builds a run config with `key` set to `value` and raises HarnessError when the value is
    invalid (a negative learning rate...)."""
    if not isinstance(space, dict) or not space:
        raise HarnessError(f"{locate(None)}: the search space is empty; give at least one key, e.g. "
                           "train.learning_rate: {low: 1.0e-5, high: 3.0e-4, scale: log}")
    for key, spec in space.items():
        here = locate(key)
        if any(key == p or key.startswith(p) for p in _NOT_TUNABLE):
            raise HarnessError(f"{here} cannot be tuned (the data, the checkpoint, the scoring and the seed stay "
                               "fixed across trials; put other checkpoints in sweep.arms)")
        if not isinstance(spec, dict):
            raise HarnessError(f"{here}: expected {{low: A, high: B}} or {{values: [...]}}, got {spec!r}")
        if "values" in spec:
            values = list(spec["values"]) if isinstance(spec["values"], (list, tuple)) else None
            extra = set(spec) - {"values"}
            if values is None or extra:
                raise HarnessError(f"{here}: 'values' takes a list and nothing beside it (got {dict(spec)!r})")
            if not values:
                raise HarnessError(f"{here}: empty list of values; give at least one")
            if len({repr(v) for v in values}) != len(values):
                raise HarnessError(f"{here}: values {values!r} repeat one another")
            for value in values:
                _check_value(build, key, value, here)
            continue
        if set(spec) - {"low", "high", "scale"} or "low" not in spec or "high" not in spec:
            raise HarnessError(f"{here}: expected {{low: A, high: B, scale: log | linear}} or {{values: [...]}}, "
                               f"got keys {sorted(spec)}")
        low, high, scale = spec["low"], spec["high"], spec.get("scale", "linear")
        if scale not in _SCALES:
            raise HarnessError(f"{here}: scale {scale!r} is not allowed; choose 'log' or 'linear'")
        for name, value in (("low", low), ("high", high)):
            if isinstance(value, bool) or not isinstance(value, (int, float)):
                raise HarnessError(f"{here}: {name} must be a number, got {value!r}")
        if not low < high:
            raise HarnessError(f"{here}: empty range: low {low!r} is not below high {high!r} (one value: use "
                               "{values: [..]})")
        if scale == "log" and low <= 0:
            raise HarnessError(f"{here}: a log scale needs low above 0, got {low!r}")
        _check_value(build, key, low, here)
        _check_value(build, key, high, here)


def _check_value(build: Callable[[str, Any], None], key: str, value: Any, here: str) -> None:
    try:
        build(key, value)
    except HarnessError as exc:
        raise HarnessError(f"{here}: value {value!r} is invalid: {exc}") from None


def arm_space(shared: dict[str, Any], arm: dict[str, Any]) -> dict[str, Any] | None:
    """The space an arm tunes: its own `tune:` entry, else the shared one; None when the arm is left untuned."""
    if ARM_KEY not in arm:
        return dict(shared)
    own = arm[ARM_KEY]
    if own is False or own is None or own == "off" or own == {}:
        return None
    return dict(own)


def _uniform(seed: int, trial: int, key: str) -> float:
    # why crc32: a stable number per key (Python's hash() changes between processes)
    sequence = np.random.SeedSequence([seed, trial, zlib.crc32(key.encode("utf-8"))])
    return float(np.random.default_rng(sequence).random())


def _round(value: float) -> float:
    """Three significant figures, so configs, run ids and tables show 0.000123, not 0.00012317..."""
    return float(f"{value:.3g}")


def draw_settings(space: dict[str, Any], seed: int, trial: int) -> dict[str, Any]:
    """Trial `trial`'s value for every key of `space` (see the module docstring)."""
    out: dict[str, Any] = {}
    for key, spec in space.items():
        u = _uniform(seed, trial, key)
        if "values" in spec:
            values = list(spec["values"])
            out[key] = values[min(int(u * len(values)), len(values) - 1)]
            continue
        low, high = spec["low"], spec["high"]
        if _is_int(low) and _is_int(high):
            if spec.get("scale", "linear") == "log":
                value = math.exp(math.log(low) + u * (math.log(high + 1) - math.log(low)))
            else:
                value = low + u * (high + 1 - low)
            out[key] = min(int(math.floor(value)), high)
        elif spec.get("scale", "linear") == "log":
            out[key] = _round(math.exp(math.log(low) + u * (math.log(high) - math.log(low))))
        else:
            out[key] = _round(low + u * (high - low))
    return out
