"""Benchmark harness: FisherDescent against tuned baselines on small CPU tasks or a task file of your own.

Run ``python -m benchmarks --quick`` from the repository root, or
``python -m benchmarks --task-file FILE.py`` for your own problem. Modules,
one concept each:

- :mod:`benchmarks.datasets`: the offline data (digits, mnist1d, synthetic regression, token corpus)
- :mod:`benchmarks.tasks`: models, losses, targets and budgets of the built-in tasks
- :mod:`benchmarks.task_file`: a task read (and checked) from a user's Python file
- :mod:`benchmarks.pilot`: a target proposed from a pilot run when a task file gives none
- :mod:`benchmarks.optimizers`: the compared optimizers, which are tuned, and their lr grids
- :mod:`benchmarks.schedules`: the lr schedule over a run's step budget (warm-up, cosine decay)
- :mod:`benchmarks.composite`: several torch optimizers stepped as one
- :mod:`benchmarks.muon`: the muon row, torch's Muon on the hidden matrices and AdamW on the rest
- :mod:`benchmarks.evaluation`: when the training loss is evaluated, and the test metrics
- :mod:`benchmarks.training`: one timed training run
- :mod:`benchmarks.coverage`: the share of parameters under FisherDescent's fallback rule, or under each
  part of a composite optimizer
- :mod:`benchmarks.harness`: the tuning protocol and the medians over seeds
- :mod:`benchmarks.comparison`: ratios against the baselines, the best baseline, and where FisherDescent's
  step time goes
- :mod:`benchmarks.verdict`: the one-screen verdict per task
- :mod:`benchmarks.results`: results.json, the CSV of loss curves, atomic file writes
- :mod:`benchmarks.outputs`: the files rewritten as runs finish
- :mod:`benchmarks.report` and :mod:`benchmarks.report_format`: console tables and report.md
- :mod:`benchmarks.plots`: PNG figures
- :mod:`benchmarks.scaling`: step time against layer width and batch size
- :mod:`benchmarks.profiling`: cProfile of one natural-gradient run
- :mod:`benchmarks.attachments`: ngopt's diagnostics logger on the FisherDescent runs
- :mod:`benchmarks.cli`: the command line
"""
