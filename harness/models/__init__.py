"""Models: loading checkpoints, the packaged assets, toy checkpoints and layer cuts.

| module | one idea |
|---|---|
| `backbones` | load a folder / `.gguf` / `asset:` / `toy:` / hub id; family; pad token; position limit |
| `assets` | the checkpoints and data sets that installed packages carry, found and prepared offline |
| `asset_data` | the packaged data sets' source files turned into CSVs |
| `cut` | a checkpoint cut to its first N layers, on disk or in memory |
| `toy` | tiny random-weight checkpoints with a tokenizer trained on the sample tasks |
| `quiet` | one switch for the library's progress bars and load reports |
| `int8` | an int8 copy of a model for CPU serving (torch dynamic quantisation of its linear layers) |
"""
