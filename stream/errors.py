"""Every exception sapwood raises on purpose, each with the exit code the CLI maps it to.

Exit codes (a contract other tools rely on): 0 done, 1 bad usage or configuration,
2 input could not be read, 3 a result could not be written (the summary still is),
4 superseded: a later learner of the same Redis stream has started (nothing more is
written; a supervisor should not restart this one). Messages say *where*: the source, the line or offset, the
field and the bad value, e.g. ``line 1042, field 'supply_temp': 'abc' is not a number``.
"""

from __future__ import annotations

EXIT_OK = 0
EXIT_USAGE = 1
EXIT_INPUT = 2
EXIT_OUTPUT = 3
EXIT_SUPERSEDED = 4


class SapwoodError(Exception):
    """Base class; ``exit_code`` tells the CLI how to end. ``summary``: the summary of a
    run that learned something before the error (printed before the message)."""

    exit_code = EXIT_USAGE
    summary: dict | None = None


class ConfigError(SapwoodError):
    """A setting or option has a value sapwood cannot use."""


class SchemaError(SapwoodError):
    """The schema (declared or inferred) does not fit the stream."""


class InputError(SapwoodError):
    """A source could not be opened or read at all."""

    exit_code = EXIT_INPUT


class RecordError(InputError):
    """One record is malformed; raised only in strict mode (otherwise quarantined)."""


class ModelFileError(InputError):
    """A saved model, snapshot or checkpoint is missing, corrupt or of another version."""


class NewerFileError(ModelFileError):
    """A model or checkpoint written by a newer sapwood: valid, but not readable here."""


class OutputError(SapwoodError):
    """The run learned, but a result (saved model, checkpoint) could not be written.

    ``summary`` holds the run's summary, which is always produced; ``cause`` the error.
    """

    exit_code = EXIT_OUTPUT

    def __init__(self, message: str, summary: dict | None = None) -> None:
        super().__init__(message)
        self.summary = summary


class SupersededError(SapwoodError):
    """A later learner of the same stream took a new fencing epoch: this one must stop
    without acknowledging or checkpointing (see :mod:`connectors.fencing`)."""

    exit_code = EXIT_SUPERSEDED
