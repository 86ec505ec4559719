"""evenflag: reproducible fairness benchmarks of anomaly detectors."""

__version__ = "0.1.0"
