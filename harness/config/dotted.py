"""Dotted config keys (`train.learning_rate`): read, set and check them against the schema.

`--set`, the sweep grid and arms all address the config this way; an unknown key gets the same
near-miss suggestion as an unknown key in a file.
"""

from __future__ import annotations

import copy
import dataclasses
import difflib
import re
import typing
from typing import Any, get_args, get_origin

from harness.config.schema import Config
from harness.errors import HarnessError, UnknownKeyError

__all__ = ["check_key", "fix_yaml_numbers", "get_dotted", "set_dotted", "thaw"]

_EXPONENT = re.compile(r"[-+]?\d+(\.\d*)?[eE][-+]?\d+")


def thaw(value: Any) -> Any:
    if isinstance(value, tuple):
        return [thaw(v) for v in value]
    if isinstance(value, dict):
        return {k: thaw(v) for k, v in value.items()}
    return value


def set_dotted(data: dict[str, Any], key: str, value: Any, where: str) -> dict[str, Any]:
    """A copy of `data` with the dotted `key` set; the key must name a known section."""
    out = copy.deepcopy(data)
    parts = key.split(".")
    node = out
    for i, part in enumerate(parts[:-1]):
        child = node.get(part)
        if child is None and part in ("lora",):
            child = node[part] = {}
        if not isinstance(child, dict):
            raise HarnessError(f"{where}: '{'.'.join(parts[: i + 1])}' is not a config section")
        node = child
    node[parts[-1]] = value
    return out


def get_dotted(data: dict[str, Any], key: str, where: str) -> Any:
    node: Any = data
    for part in key.split("."):
        if not isinstance(node, dict) or part not in node:
            raise HarnessError(f"{where}: '{key}' is not a config key")
        node = node[part]
    return node


def check_key(key: str) -> None:
    """Unknown override keys get the same suggestion as unknown file keys."""
    cls: Any = Config
    parts = key.split(".")
    for i, part in enumerate(parts):
        if not dataclasses.is_dataclass(cls):
            if i == len(parts) - 1 or cls is dict:
                return
            break
        names = [f.name for f in dataclasses.fields(cls) if f.name != "source"]
        if part not in names:
            prefix = ".".join(parts[:i])
            close = difflib.get_close_matches(part, names, n=1, cutoff=0.6)
            dotted = f"{prefix}.{close[0]}" if prefix and close else (close[0] if close else "")
            hint = f"did you mean '{dotted}'?" if close else f"known keys: {', '.join(names)}"
            raise UnknownKeyError(key, f"'{key}' in --set", hint)
        hint_tp = typing.get_type_hints(cls)[part]
        args = [a for a in get_args(hint_tp) if dataclasses.is_dataclass(a)]
        cls = args[0] if args else hint_tp
        if get_origin(cls) is dict:
            return


def fix_yaml_numbers(data: Any) -> Any:
    if isinstance(data, dict):
        return {k: fix_yaml_numbers(v) for k, v in data.items()}
    if isinstance(data, list):
        return [fix_yaml_numbers(v) for v in data]
    if isinstance(data, str) and _EXPONENT.fullmatch(data):
        return float(data)
    return data
