"""streamdet: streaming anomaly detection for operational metrics.

The detection core (:mod:`streamdet.core`) is pure computation over column-wise
numpy state; codecs, replay and the daemon are thin adapters around it.
"""

__version__ = "0.1.0"
