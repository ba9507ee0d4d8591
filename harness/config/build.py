"""From plain data (as read from YAML) to a typed, frozen, checked `Config`, and back.

Types come from the annotations of `harness.config.schema`; every problem names the key as
`where` shows it (file and line, or --set). Value ranges are checked by `harness.config.checks`,
the sweep block here, since checking it builds a config for every value.
"""

from __future__ import annotations

import dataclasses
import difflib
import types
import typing
from typing import Any, Literal, Union, get_args, get_origin

from harness.config.checks import check_values
from harness.config.dotted import check_key, get_dotted, set_dotted, thaw
from harness.config.schema import Config
from harness.config.tune_space import ARM_KEY, arm_space, check_space, parse_duration
from harness.config.yaml_lines import collect_lines
from harness.errors import HarnessError, UnknownKeyError

__all__ = ["Where", "config_from_dict", "config_to_dict"]


class Where:
    """Formats 'key in file line N' for messages."""

    def __init__(self, source: str, lines: dict[str, int]) -> None:
        self.source = source
        self.lines = lines

    def __call__(self, key: str) -> str:
        line = self.lines.get(key)
        if line == 0:  # the value came from the command line, not from the file
            return f"'{key}' in --set (config {self.source})"
        return f"'{key}' in {self.source}" + (f" line {line}" if line else "")


def _type_name(tp: Any) -> str:
    origin = get_origin(tp)
    if origin is Literal:
        return " | ".join(str(a) for a in get_args(tp))
    if origin in (Union, types.UnionType):
        return " or ".join(_type_name(a) for a in get_args(tp))
    if origin is tuple:
        return "a list"
    if origin is dict:
        return "a mapping"
    if tp is type(None):
        return "null"
    if dataclasses.is_dataclass(tp):
        return "a mapping"
    return getattr(tp, "__name__", str(tp))


def _coerce(value: Any, tp: Any, key: str, where: Where) -> Any:
    """Check `value` against the annotation `tp`, converting lists to tuples."""
    origin = get_origin(tp)
    bad = HarnessError(
        f"{where(key)}: expected {_type_name(tp)}, got {value!r}"
        if not isinstance(value, (dict, list))
        else f"{where(key)}: expected {_type_name(tp)}, got a {'mapping' if isinstance(value, dict) else 'list'}"
    )
    if tp is Any:
        return _freeze(value)
    if origin in (Union, types.UnionType):
        args = get_args(tp)
        if value is None:
            if type(None) in args:
                return None
            raise bad
        for arg in args:
            if arg is type(None):
                continue
            try:
                return _coerce(value, arg, key, where)
            except HarnessError:
                continue
        raise bad
    if origin is Literal:
        if value not in get_args(tp):
            allowed = ", ".join(repr(a) for a in get_args(tp))
            raise HarnessError(f"{where(key)}: {value!r} is not allowed; choose one of {allowed}")
        return value
    if origin is tuple:
        args = get_args(tp)
        if not isinstance(value, list):
            raise bad
        if len(args) == 2 and args[1] is Ellipsis:
            return tuple(_coerce(v, args[0], f"{key}[{i}]", where) for i, v in enumerate(value))
        if len(value) != len(args):
            raise HarnessError(f"{where(key)}: expected a list of {len(args)} items, got {len(value)}")
        return tuple(_coerce(v, a, f"{key}[{i}]", where) for i, (v, a) in enumerate(zip(value, args, strict=True)))
    if origin is dict:
        k_tp, v_tp = get_args(tp)
        if not isinstance(value, dict):
            raise bad
        return {str(_coerce(k, k_tp, key, where)): _coerce(v, v_tp, f"{key}.{k}", where) for k, v in value.items()}
    if dataclasses.is_dataclass(tp):
        if not isinstance(value, dict):
            raise bad
        return _build(tp, value, key + ".", where)
    if tp is bool:
        if not isinstance(value, bool):
            raise bad
        return value
    if tp is int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise bad
        return value
    if tp is float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise bad
        return float(value)
    if tp is str:
        if not isinstance(value, str):
            raise bad
        return value
    raise AssertionError(f"unhandled annotation {tp!r} for {key}")  # internal: a schema bug


def _freeze(value: Any) -> Any:
    if isinstance(value, list):
        return tuple(_freeze(v) for v in value)
    if isinstance(value, dict):
        return {k: _freeze(v) for k, v in value.items()}
    return value


def _build(cls: Any, data: dict[str, Any], prefix: str, where: Where) -> Any:
    hints = typing.get_type_hints(cls)
    names = [f.name for f in dataclasses.fields(cls) if f.name != "source"]
    for key in data:
        if key not in names:
            close = difflib.get_close_matches(key, names, n=1, cutoff=0.6)
            hint = f"did you mean '{prefix}{close[0]}'?" if close else f"known keys: {', '.join(names)}"
            raise UnknownKeyError(prefix + key, where(prefix + key), hint)
    kwargs: dict[str, Any] = {}
    for f in dataclasses.fields(cls):
        if f.name == "source":
            continue
        if f.name in data:
            kwargs[f.name] = _coerce(data[f.name], hints[f.name], prefix + f.name, where)
        elif f.default is dataclasses.MISSING and f.default_factory is dataclasses.MISSING:
            section = prefix.rstrip(".") or "the top level"
            raise HarnessError(f"missing required key '{prefix}{f.name}' in {where.source} (section {section})")
    return cls(**kwargs)


def config_from_dict(
    data: dict[str, Any], *, source: str = "<dict>", lines: dict[str, int] | None = None, check_sweep: bool = True
) -> Config:
    """Build and validate a Config from plain data (as read from YAML)."""
    if lines is None:
        lines = {}
        collect_lines(data, "", lines)
    where = Where(source, lines)
    cfg = _build(Config, dict(data), "", where)
    cfg = dataclasses.replace(cfg, source=source)
    check_values(cfg, where)
    if check_sweep:
        _check_sweep(cfg, where)
    return cfg


def _check_settable(key: str, place: str, verb: str) -> None:
    """A key a sweep may set: a real config key outside `sweep` and `output` (`place` names where it was set)."""
    if key.startswith("sweep") or key == "output":
        raise HarnessError(f"{place}: '{key}' cannot be {verb}")
    if key != "method":
        try:
            check_key(key)
        except UnknownKeyError as exc:
            raise HarnessError(f"{place}: '{key}' is not a config key; {exc.hint}") from None


def _check_sweep(cfg: Config, where: Where) -> None:
    base = config_to_dict(cfg)
    for key, values in cfg.sweep.grid.items():
        if not isinstance(values, tuple) or not values:
            raise HarnessError(f"{where('sweep.grid.' + key)}: must be a non-empty list of values")
        _check_settable(key, where("sweep.grid." + key), "swept")
        for value in values:
            trial = set_dotted(base, key, thaw(value), where("sweep.grid." + key))
            try:
                config_from_dict(trial, source=cfg.source, check_sweep=False)
            except HarnessError as exc:
                raise HarnessError(f"{where('sweep.grid.' + key)}: value {thaw(value)!r} is invalid: {exc}") from None
    for i, arm in enumerate(cfg.sweep.arms):
        trial = base
        for key, value in arm.items():
            if key == ARM_KEY:
                continue  # the arm's own search space: checked with the tune block
            _check_settable(key, f"{where('sweep.arms')}: arm {i + 1}", "set by an arm")
            trial = set_dotted(trial, key, thaw(value), where("sweep.arms"))
        try:
            config_from_dict(trial, source=cfg.source, check_sweep=False)
        except HarnessError as exc:
            raise HarnessError(f"{where('sweep.arms')}: arm {i + 1} is invalid: {exc}") from None
    for i, rule in enumerate(cfg.sweep.exclude):
        for key in rule:
            get_dotted(base, key, f"sweep.exclude[{i}] in {cfg.source}")
    if cfg.sweep.budget is not None:
        parse_duration(cfg.sweep.budget, option=where("sweep.budget") + ":")
    _check_tune(cfg, base, where)


def _check_tune(cfg: Config, base: dict[str, Any], where: Where) -> None:
    """Every arm's search space: well formed, and each bound or value valid for the arm it tunes."""
    tune = cfg.sweep.tune
    arms = [dict(arm) for arm in cfg.sweep.arms] or [{}]
    if tune is None:
        for i, arm in enumerate(arms):
            if ARM_KEY in arm:
                raise HarnessError(f"{where('sweep.arms')}: arm {i + 1} has its own '{ARM_KEY}' space but the "
                                   "sweep has no sweep.tune block (add one with `trials:`)")
        return
    if tune.trials < 1:
        raise HarnessError(f"{where('sweep.tune.trials')}: must be at least 1, got {tune.trials}")
    tuned = 0
    for i, arm in enumerate(arms):
        data = base
        for key, value in arm.items():
            if key != ARM_KEY:
                data = set_dotted(data, key, thaw(value), where("sweep.arms"))
        if str(get_dotted(data, "method.kind", "sweep.arms")) == "prompt":
            continue  # nothing trains: nothing to tune
        space = arm_space(thaw(tune.space), arm)
        if space is None:
            continue
        tuned += 1
        own = ARM_KEY in arm

        def locate(key: str | None, own: bool = own, i: int = i) -> str:
            if own:
                return f"{where('sweep.arms')}: arm {i + 1} '{ARM_KEY}'" + (f" key '{key}'" if key else "")
            return where("sweep.tune.space" + (f".{key}" if key else ""))

        def build(key: str, value: Any, data: dict[str, Any] = data) -> None:
            _check_settable(key, locate(key), "tuned")
            config_from_dict(set_dotted(data, key, value, locate(key)), source=cfg.source, check_sweep=False)

        check_space(space, locate, build)
    if not tuned:
        raise HarnessError(f"{where('sweep.tune')}: no arm trains anything to tune (prompt arms have no "
                           "training settings); remove the block")


def config_to_dict(cfg: Config) -> dict[str, Any]:
    """Plain data (lists, not tuples) for YAML/JSON, the inverse of `config_from_dict`."""
    out = thaw(dataclasses.asdict(cfg))
    out.pop("source", None)
    return out
