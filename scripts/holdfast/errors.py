"""The exceptions holdfast raises on purpose, each with its own exit code.

Every message names the key, column or file at fault and says what to do, so a
user sees one line and knows the fix (format: ``<what is wrong>; <what to do>``).
"""

from __future__ import annotations


def first_sentence(exc: BaseException) -> str:
    """What a library's exception says, on one line and up to its first full stop (its class name if it says
    nothing): the reason shown inside holdfast's own one-line message about a file that cannot be read."""
    return " ".join(str(exc).split()).split(". ")[0].rstrip(".") or type(exc).__name__


class HoldfastError(Exception):
    """Base of every deliberate holdfast failure."""

    exit_code = 1
    kind = "error"

    def __init__(self, message: str) -> None:
        super().__init__(message)
        self.message = message

    def format_message(self) -> str:
        """The one line shown to the user."""
        return f"holdfast: {self.kind}: {self.message}"


class BusyError(HoldfastError):
    """Another run of the same experiment is under way: nothing was started."""

    exit_code = 1
    kind = "busy"


class ConfigError(HoldfastError):
    """A config key is missing, misspelt, of the wrong type or inconsistent with another."""

    exit_code = 2
    kind = "config error"


class DataError(HoldfastError):
    """The data file or one of its columns cannot be used as declared."""

    exit_code = 3
    kind = "data error"


class SealedAccessError(HoldfastError):
    """An action would read the sealed test set again, or re-draw it."""

    exit_code = 4
    kind = "sealed test set"


class LedgerError(HoldfastError):
    """The ledger cannot be read or appended as a hash chain."""

    exit_code = 5
    kind = "ledger error"


class FitError(HoldfastError):
    """Every candidate of a family failed to fit on a fold."""

    exit_code = 6
    kind = "fit error"


class ModelFileError(HoldfastError):
    """A saved model is not the one recorded, or holds a type we do not trust."""

    exit_code = 7
    kind = "model file"
