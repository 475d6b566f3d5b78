"""estbench: reproducible simulation studies of estimator performance.

The package is cut into stages whose imports point one way:
``core`` <- ``simulate`` <- ``study`` <- ``analyse`` <- ``report`` <- ``app``.
For estimator authors, ``from estbench import per_replicate`` wraps a function
that handles one dataset at a time.
"""

__version__ = "0.2.0"
__all__ = ["__version__", "per_replicate"]


def __getattr__(name):
    # Imported on first use, so `import estbench` stays free of numpy.
    if name == "per_replicate":
        from estbench.simulate.estimator import per_replicate
        return per_replicate
    raise AttributeError(f"module 'estbench' has no attribute {name!r}")
