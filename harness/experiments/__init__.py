"""Experiments: sweeps over a grid of settings, tuning trials, budgets, their cost plan, exact replay, starter configs.

| module | one idea |
|---|---|
| `sweep` | expand the sweep block, run every run (skip finished, resume the rest), compare |
| `sweep_index` | the sweep's folder, its sweep.json index, the --shard option |
| `tune` | tuning trials: the same seeded draws for every trained arm, scored on dev; the best one per arm |
| `budget` | fit a sweep to a wall-time budget by its forecast: fewer trials, then fewer seeds, or refuse |
| `steps` | what a sweep does with one run before and after it, wherever it runs |
| `data_checks` | the sweep's data hashes and the checks against them |
| `cluster`, `cluster_task` | runs as Ray tasks: the driver loop and the worker's task |
| `plan` | what a sweep will cost before it runs (`sweep --dry-run`): the table and its total |
| `forecast` | every run's forecast seconds and their basis; `parse_duration` for budgets |
| `work` | a run's work: parameters x its own tokens x the passes its method makes |
| `speed` | this machine's speed per family of runs, measured by a short real run, cached per machine |
| `draft` | a starter bake-off config from one labelled data file (`tiltyard draft`) |
| `draft_words` | label words for it: short, distinct in context, one token where possible |
| `draft_yaml` | the starter config as commented YAML |
| `replay` | re-run a finished run from its saved config and say whether it came out identical |
"""
