"""Experiments: sweeps over a grid of settings, their cost plan, exact replay.

| module | one idea |
|---|---|
| `sweep` | expand the sweep block, run every run (skip finished, resume the rest), compare |
| `plan` | what a sweep will cost before it runs (`sweep --dry-run`) |
| `replay` | re-run a finished run from its saved config and say whether it came out identical |
"""
