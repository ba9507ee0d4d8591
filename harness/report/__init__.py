"""Reports: the run report and the comparison of many runs, as Markdown, HTML, CSV, JSON and figures.

| module | one idea |
|---|---|
| `run_report` | one run's report (report.md / report.html) |
| `serving_blocks` | the run report's serving rows and int8 section |
| `compare` | many runs -> one table: groups, mean ± sd, intervals, paired tests, cost |
| `compare_files` | the comparison's files and terminal text |
| `tuning` | a sweep's tuning summary -> chosen settings, expected best dev score by number of trials, every trial |
| `compare_serving` | the comparison's serving means, table and summary sentence |
| `plots` | the figures |
| `render` | one document model rendered as Markdown or HTML |
| `cautions` | the cautions printed wherever a verdict is read (reports, comparisons, sweep, compare, predict) |
"""
