"""Runs: one config and one seed, end to end, and what is done with a finished run.

| module | one idea |
|---|---|
| `run` | `execute_run`: inputs checked, train, score the test split, write the run folder |
| `folders` | run ids, run folders, status, environment facts |
| `predict` | a finished run's model applied to new rows |
| `serving` | what serving the run's model costs (rows/s, single-row latency, size), and its int8 copy |
"""
