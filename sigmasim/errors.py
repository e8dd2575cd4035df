"""Project errors.

Every error a user can cause derives from :class:`SigmasimError`; the command
line prints its message as one line and exits with status 2.
"""

__all__ = ["SigmasimError", "ConfigError", "RunFileError", "NumericalError"]


class SigmasimError(Exception):
    """Base class of all errors caused by input or run state.

    Its message is always one line (the command line prints it as
    ``sigmasim: error: <message>``): line breaks from wrapped messages, e.g.
    h5py's or TOML's, are folded into spaces.
    """

    def __str__(self) -> str:
        return " ".join(super().__str__().split())


class ConfigError(SigmasimError):
    """A run configuration is malformed or out of range."""


class RunFileError(SigmasimError):
    """A run file is missing, foreign, damaged or belongs to another config."""


class NumericalError(SigmasimError):
    """A NaN or inf appeared in the fields or the action."""
