"""Configuration: the schema, YAML reading with key lines, building and checking, `--set` overrides.

| module | one idea |
|---|---|
| `schema` | the config sections as frozen dataclasses; every field has a default and a description |
| `yaml_lines` | YAML reading that keeps each key's line number |
| `dotted` | dotted keys (`train.epochs`): get, set, check against the schema |
| `build` | plain data -> typed, frozen `Config` (and back), sweep block checks |
| `checks` | value ranges and consistency |
| `load` | `load_config(path, overrides)`, the resolved YAML, the field reference |
"""

from harness.config.build import config_from_dict, config_to_dict
from harness.config.dotted import get_dotted, set_dotted
from harness.config.load import (
    config_folder,
    dump_config,
    field_docs,
    key_location,
    load_config,
    parse_override,
)
from harness.config.schema import (
    Config,
    EvalConfig,
    LoraConfig,
    MethodConfig,
    ModelConfig,
    SweepConfig,
    TaskConfig,
    TrainConfig,
    TuneConfig,
)

__all__ = [
    "Config", "EvalConfig", "LoraConfig", "MethodConfig", "ModelConfig", "SweepConfig", "TaskConfig", "TrainConfig", "TuneConfig",
    "config_folder", "config_from_dict", "config_to_dict", "dump_config", "field_docs", "get_dotted", "key_location",
    "load_config", "parse_override", "set_dotted",
]
