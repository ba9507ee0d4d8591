"""Metrics: point metrics through scikit-learn, and the statistics of intervals and paired tests.

| module | one idea |
|---|---|
| `scores` | the metric registry (`METRICS`), `compute_metrics` for a run |
| `stats` | bootstrap intervals, McNemar, paired bootstrap, Cohen's kappa |
"""
