"""The production line: board serials, the results index, batch loops and statistics.

- :mod:`~loopwright.production.serials`: serials as scanned, and their folder-safe form.
- :mod:`~loopwright.production.index`: the results index (SQLite file or PostgreSQL).
- :mod:`~loopwright.production.batch`: the operator loop, with the runner injected.
- :mod:`~loopwright.production.stats`: count, mean, std, min, max and Cpk per figure.

Import the submodules directly; this package imports nothing heavy on its own.
"""
