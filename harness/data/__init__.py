"""Data: reading split files, the task and its splits, the data audit, the token cache, annotator agreement.

| module | one idea |
|---|---|
| `readers` | CSV/TSV/JSONL/Parquet files as rows, each with its source line |
| `task` | columns, label set, carved dev/test (duplicates on one side), subsample: `load_task` |
| `audit` | counted data warnings: balance, repeats, leakage, truncation, a suggested `max_length` |
| `token_cache` | tokenised splits cached on disk, keyed by tokenizer, data and settings |
| `agreement` | two labelings of the same rows: Cohen's kappa, per class, cross-tab |
"""
