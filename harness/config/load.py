"""Typed, frozen run configuration, built by `load_config` and nowhere else.

A config file is YAML with the sections `task`, `model`, `method`, `train`, `eval`, `sweep`
and `output`, whose fields are declared in `harness.config.schema`. This module reads the YAML
(keeping every key's line), applies `--set` overrides, and writes the resolved config back out;
`harness.config.build` turns the data into a checked `Config`.
"""

from __future__ import annotations

import dataclasses
import json
import re
import typing
from pathlib import Path
from typing import Any, get_args

import yaml

from harness.config.build import config_from_dict, config_to_dict
from harness.config.dotted import check_key, fix_yaml_numbers, get_dotted, set_dotted, thaw
from harness.config.schema import Config
from harness.config.yaml_lines import collect_lines, read_yaml
from harness.errors import HarnessError

__all__ = ["config_folder", "dump_config", "field_docs", "key_location", "load_config", "parse_override"]

_EXPONENT = re.compile(r"[-+]?\d+(\.\d*)?[eE][-+]?\d+")


def load_config(path: str | Path, overrides: typing.Sequence[str] = ()) -> Config:
    """Read a YAML config, apply `--set key=value` overrides and validate everything."""
    path = Path(path)
    data: dict[str, Any] = read_yaml(path)
    lines: dict[str, int] = {}
    collect_lines(data, "", lines)
    plain = fix_yaml_numbers(data)
    for text in overrides:
        key, value = parse_override(text)
        check_key(key)
        plain = set_dotted(plain, key, value, f"--set {key}")
        lines = {k: v for k, v in lines.items() if k != key and not k.startswith(key + ".")}
        lines[key] = 0  # Where says "in --set"
    return config_from_dict(plain, source=str(path), lines=lines)


def parse_override(text: str) -> tuple[str, Any]:
    """Split `a.b=value`; the value is read as YAML (so 3e-5, true, [a, b] work)."""
    if "=" not in text:
        raise HarnessError(f"--set {text!r}: expected KEY=VALUE with a dotted key, e.g. train.learning_rate=3e-5")
    key, raw = text.split("=", 1)
    key = key.strip()
    if not key or not all(part.isidentifier() for part in key.split(".")):
        raise HarnessError(f"--set {text!r}: '{key}' is not a dotted key like train.epochs")
    try:
        value = yaml.safe_load(raw) if raw.strip() else ""
    except yaml.YAMLError:
        value = raw
    # YAML 1.1 reads 3e-5 (no dot) as a string; accept it as the number it obviously is.
    if isinstance(value, str):
        try:
            value = float(value) if _EXPONENT.fullmatch(value) else value
        except ValueError:
            pass
    return key, value


def key_location(cfg: Config, key: str) -> str:
    """"'key' in FILE line N" for a value found wrong after loading (a checkpoint that does not load...).

    The line is the key's line in the config file when the file holds the value the run uses;
    a value from --set or a sweep is said to be so, since no line of the file shows it.
    """
    path = Path(cfg.source)
    if not path.is_file():
        return f"'{key}'"
    try:
        data = read_yaml(path)
    except HarnessError:
        return f"'{key}' in {cfg.source}"
    lines: dict[str, int] = {}
    collect_lines(data, "", lines)
    missing = object()
    try:
        in_file = get_dotted(fix_yaml_numbers(data), key, "")
    except HarnessError:
        in_file = missing
    try:  # a run of a sweep has an empty sweep block: its sweep keys are not the file's
        used = get_dotted(config_to_dict(cfg), key, "")
    except HarnessError:
        used = missing
    if in_file is not missing and thaw(in_file) == used and key in lines:
        return f"'{key}' in {cfg.source} line {lines[key]}"
    if in_file is missing and key not in lines:
        return f"'{key}' (its default) in {cfg.source}"
    return f"'{key}' (set by --set or the sweep) in {cfg.source}"


def config_folder(cfg: Config) -> Path | None:
    """The folder of the config file (relative data paths are also looked up there); None for a config
    not read from a file."""
    path = Path(cfg.source)
    return path.parent if path.is_file() else None


def dump_config(cfg: Config) -> str:
    """The resolved config as YAML text, as saved in every run folder."""
    return yaml.safe_dump(config_to_dict(cfg), sort_keys=False, allow_unicode=True)


def field_docs(cls: Any = Config, prefix: str = "") -> list[tuple[str, str, str]]:
    """(dotted key, default, description) for every field: the reference in the README."""
    rows: list[tuple[str, str, str]] = []
    hints = typing.get_type_hints(cls)
    for f in dataclasses.fields(cls):
        if f.name == "source":
            continue
        sub = [a for a in (get_args(hints[f.name]) or (hints[f.name],)) if dataclasses.is_dataclass(a)]
        if sub:
            rows.extend(field_docs(sub[0], prefix + f.name + "."))
            continue
        if f.default is not dataclasses.MISSING:
            default = json.dumps(thaw(f.default))
        elif f.default_factory is not dataclasses.MISSING:
            default = json.dumps(thaw(f.default_factory()))
        else:
            default = "required"
        rows.append((prefix + f.name, default, f.metadata.get("doc", "")))
    return rows
