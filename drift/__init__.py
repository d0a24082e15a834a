"""drift: watch deployed driver-based forecasts for changes in the target-driver relationship."""

__version__ = "0.1.0"
