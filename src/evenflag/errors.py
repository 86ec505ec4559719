"""User-facing errors.

Every failure a user can cause or fix gets its own type and a one-line
message saying what is wrong and how to fix it. The CLI prints the message
without a traceback; the runner records it on the failed run.
"""


class EvenflagError(Exception):
    """Base class of every error whose message is meant for the user."""


class DatasetError(EvenflagError):
    """A dataset cannot be loaded or does not fit its configuration."""


class UnknownNameError(EvenflagError):
    """A name (dataset, detector, metric, policy) that is not registered."""


class FetchError(DatasetError):
    """A package-mirrored dataset could not be fetched from the package index."""


class ChecksumError(DatasetError):
    """Bytes on disk or from the index do not match their pinned sha256."""


class ProtocolError(EvenflagError):
    """A train/test split cannot be made as configured."""


class ConfigError(EvenflagError):
    """A configuration value is missing, mistyped or out of range."""


class DetectorError(EvenflagError):
    """A detector was misused or failed in a way the user can act on."""


class MetricInputError(EvenflagError):
    """Inputs to a metric are malformed (lengths differ, one group only...)."""


def warn_line(text: str) -> None:
    """A one-line warning on stderr (Python's warnings print the source line too)."""
    import sys

    print(f"evenflag: warning: {text}", file=sys.stderr, flush=True)
