"""The errors that name a problem with the user's files or settings.

Each is raised with a message that says which file, column or key is wrong and how
to fix it; rule scripts end the job with that message alone, no traceback
(``logs.logged``). They live here, apart from the modules that raise them, so a
job can recognise them without importing those modules.
"""


class ConfigError(ValueError):
    """The configuration cannot be used; the message names the key."""


class CalibrationError(ValueError):
    """A calibration file is malformed; the message names the file and the key."""


class CatalogError(ValueError):
    """A catalog file cannot be read as declared; the message names the file."""


class IngestError(ValueError):
    """A structural problem with the catalog; the message says what and how to fix it."""


class CorruptFileError(RuntimeError):
    """A Parquet file cannot be read (truncated or overwritten); the message names it."""


class StaleInputError(RuntimeError):
    """A stage file does not belong to the shard it is joined with."""


#: every error above: a problem of the user's input, reported without a traceback
STRUCTURAL = (ConfigError, CalibrationError, CatalogError, IngestError, CorruptFileError, StaleInputError)
