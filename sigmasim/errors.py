"""Project errors.

Every error a user can cause derives from :class:`SigmasimError`; the command
line prints its message as one line and exits with status 2.
"""

__all__ = ["SigmasimError", "ConfigError", "RunFileError", "NumericalError"]


class SigmasimError(Exception):
    """Base class of all errors caused by input or run state."""


class ConfigError(SigmasimError):
    """A run configuration is malformed or out of range."""


class RunFileError(SigmasimError):
    """A run file is missing, foreign, damaged or belongs to another config."""


class NumericalError(SigmasimError):
    """A NaN or inf appeared in the fields or the action."""
