"""YAML reading that keeps the line of every key, so config errors can point at it."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import yaml

from harness.errors import HarnessError

__all__ = ["Located", "collect_lines", "read_yaml"]


class _LineLoader(yaml.SafeLoader):
    """A safe loader that remembers the line of every mapping key."""


def _construct_mapping(loader: _LineLoader, node: yaml.MappingNode) -> dict[str, Any]:
    out: dict[str, Any] = {}
    lines: dict[str, int] = {}
    for key_node, value_node in node.value:
        key = loader.construct_object(key_node, deep=True)
        if not isinstance(key, str):
            raise HarnessError(f"key {key!r} on line {key_node.start_mark.line + 1} is not a string")
        if key in out:
            raise HarnessError(f"key '{key}' appears twice (line {key_node.start_mark.line + 1})")
        out[key] = loader.construct_object(value_node, deep=True)
        lines[key] = key_node.start_mark.line + 1
    return Located(out, lines)


class Located(dict):  # type: ignore[type-arg]
    """A dict that knows the source line of each key."""

    def __init__(self, data: dict[str, Any], lines: dict[str, int]) -> None:
        super().__init__(data)
        self.lines = lines


_LineLoader.add_constructor(yaml.resolver.BaseResolver.DEFAULT_MAPPING_TAG, _construct_mapping)  # type: ignore[arg-type]


def read_yaml(path: Path) -> dict[str, Any]:
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise HarnessError(f"config file {path} does not exist") from None
    except UnicodeDecodeError as exc:
        raise HarnessError(f"config file {path} is not UTF-8 text ({exc.reason} at byte {exc.start})") from None
    try:
        data = yaml.load(text, Loader=_LineLoader)  # noqa: S506 - a SafeLoader subclass
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark
        where = f" line {mark.line + 1}" if mark is not None else ""
        raise HarnessError(f"{path}{where}: not valid YAML: {exc.problem}") from None
    except HarnessError as exc:
        raise HarnessError(f"{path}: {exc}") from None
    if data is None:
        raise HarnessError(f"config file {path} is empty; it needs at least 'task' and 'model' sections")
    if not isinstance(data, dict):
        raise HarnessError(f"config file {path} must be a mapping of sections, got {type(data).__name__}")
    return data


def collect_lines(data: Any, prefix: str, out: dict[str, int]) -> None:
    if isinstance(data, Located):
        for key, value in data.items():
            dotted = f"{prefix}{key}"
            out[dotted] = data.lines[key]
            collect_lines(value, dotted + ".", out)
