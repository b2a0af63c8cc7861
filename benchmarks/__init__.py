"""Benchmark harness: FisherDescent against SGD and Adam on small CPU tasks.

Run ``python -m benchmarks --quick`` from the repository root. Modules, one
concept each:

- :mod:`benchmarks.datasets`: the offline data (digits, mnist1d, synthetic regression)
- :mod:`benchmarks.tasks`: models, losses, targets and budgets of the built-in tasks
- :mod:`benchmarks.optimizers`: the compared optimizers and their lr grids
- :mod:`benchmarks.training`: one timed training run
- :mod:`benchmarks.harness`: the tuning protocol and the medians over seeds
- :mod:`benchmarks.goals`: ratios against the baselines, the goals, what limits them
- :mod:`benchmarks.results`: results.json and the CSV of loss curves
- :mod:`benchmarks.report`: console tables and report.md
- :mod:`benchmarks.plots`: PNG figures
- :mod:`benchmarks.scaling`: step time against layer width and batch size
- :mod:`benchmarks.profiling`: cProfile of one natural-gradient run
- :mod:`benchmarks.attachments`: the ngopt diagnostics logger on benchmark runs
- :mod:`benchmarks.cli`: the command line
"""
