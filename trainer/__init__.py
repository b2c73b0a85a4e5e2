"""hashcurve: calibrated response-rate models from hashed Parquet logs (import name ``trainer``)."""

__version__ = "0.1.0"


def __getattr__(name):
    """``trainer.HashedLogisticClassifier`` imports scikit-learn on first use only (extra ``sklearn``)."""
    if name == "HashedLogisticClassifier":
        from trainer.estimator import HashedLogisticClassifier
        return HashedLogisticClassifier
    raise AttributeError(f"module 'trainer' has no attribute {name!r}")
