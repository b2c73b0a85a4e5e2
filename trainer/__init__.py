"""hashcurve: calibrated response-rate models from hashed Parquet logs (import name ``trainer``)."""

__version__ = "0.1.0"
