"""One base error for everything a user can fix; the CLI prints it on one line."""

from __future__ import annotations


class ArflowError(Exception):
    """Base class of errors caused by input or configuration (not bugs).

    The message is one line that names what is wrong and how to fix it.
    ``exit_code`` is what the command line returns for it.
    """

    exit_code = 2


class SettingsError(ArflowError):
    """A job file or settings value is missing, unknown, mistyped or impossible."""

    exit_code = 2


class SourceError(ArflowError):
    """The source cannot be read or does not have the expected shape."""

    exit_code = 3


class SchemaError(SourceError):
    """A column is missing or has the wrong type."""


class PublishError(ArflowError):
    """The target warehouse refused the run (locked, unreachable); nothing was changed."""

    exit_code = 3
