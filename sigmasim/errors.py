"""Project errors.

Every error a user can cause derives from :class:`SigmasimError`; the command
line prints its message as one line and exits with status 2.
"""

import re

__all__ = ["SigmasimError", "ConfigError", "RunFileError", "NumericalError", "shown"]


def _cut(m) -> str:
    text = m.group(0)
    return f"{text[:150]}...{text[-30:]} ({len(text)} characters)"


def shown(value, limit: int = 200) -> str:
    """``repr`` of a value (a path as its string) for an error line, cut to about ``limit`` characters."""
    text = repr(str(value)) if hasattr(value, "__fspath__") else repr(value)
    return text if len(text) <= limit else f"{text[:limit - 30]}... ({len(text)} characters)"


class SigmasimError(Exception):
    """Base class of all errors caused by input or run state.

    Its message is always one line (the command line prints it as
    ``sigmasim: error: <message>``): line breaks from wrapped messages, e.g.
    h5py's or TOML's, are folded into spaces.
    """

    def __str__(self) -> str:
        # one line, and no value (a 5000-character path, say) quoted at more than ~200 characters
        return re.sub(r"\S{201,}", _cut, " ".join(super().__str__().split()))


class ConfigError(SigmasimError):
    """A run configuration is malformed or out of range."""


class RunFileError(SigmasimError):
    """A run file is missing, foreign, damaged or belongs to another config."""


class NumericalError(SigmasimError):
    """A NaN or inf appeared in the fields or the action."""
