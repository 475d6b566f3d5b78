"""estbench: reproducible simulation studies of estimator performance."""

__version__ = "0.1.0"
