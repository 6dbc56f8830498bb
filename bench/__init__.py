"""upwell's benchmark suite: ``python -m bench [--quick] [--json FILE] [--only ...]``.

It builds its own deterministic corpora in a temporary folder, runs each figure and prints a
table. Every figure is a count or a ratio measured side by side in the same run; absolute times
are printed for information only.
"""
