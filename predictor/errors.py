"""Domain exceptions.

Each subclasses a built-in type so that callers who do not know this module
still catch them. The command line turns them into a single line on stderr
and exit code 2; any other exception is a bug and keeps its traceback.
"""

from __future__ import annotations


class PredictorError(Exception):
    """Base of every error the command line reports as one line."""


class CohortError(PredictorError, ValueError):
    """A cohort table or BIDS folder is malformed; the message names the file and line."""


class ScanError(PredictorError, ValueError):
    """A scan cannot be used; the message names the file and the reason."""


class ConfigError(PredictorError, ValueError):
    """A configuration or scenario file is malformed; the message names the file and key."""


class OutputError(PredictorError, OSError):
    """An output cannot be written (existing file, full disk); previous outputs stay intact."""


class DataError(PredictorError, ValueError):
    """A volume table or forecast request cannot be used; the message names the value."""


class ModelError(PredictorError, ValueError):
    """A model folder or checkpoint cannot be used; the message names the file and the reason."""
