"""Station layer: record schema, readers, magnitude formulas, station metadata and the store.

Nothing here imports :mod:`fusion`; the estimation layer builds on this one.
"""
