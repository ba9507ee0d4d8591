"""Metrics: point metrics through scikit-learn, the statistics of intervals and paired tests, tuning curves.

| module | one idea |
|---|---|
| `scores` | the metric registry (`METRICS`), `compute_metrics` for a run |
| `stats` | bootstrap intervals, McNemar, paired bootstrap, Cohen's kappa |
| `expected_max` | expected best dev score of n tuning trials and its sd (Dodge et al. 2019) |
"""
