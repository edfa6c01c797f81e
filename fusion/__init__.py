"""Estimation layer: station model (biases, variances, correlated pairs), network magnitudes,
model versions, dry runs, reports and the command line.

magfuse output is advisory; see :data:`fusion.advisory.ADVISORY`.
"""

__version__ = "0.1.0"
