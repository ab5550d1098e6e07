"""Exceptions and warnings raised by tallgam.

Every error says what is wrong (which column, file or key, with counts) and what to do.
The command line maps each class to an exit code (see ``tallgam.cli``).
"""

from __future__ import annotations


class TallgamError(Exception):
    """Base class of every error tallgam raises on purpose."""


class SpecError(TallgamError, ValueError):
    """The model specification is invalid (unknown key, bad family, bad term option)."""


class DataError(TallgamError, ValueError):
    """The data cannot be used as asked (missing column, NULLs, values outside support...)."""


class ColumnNotFound(DataError, SpecError):
    """A column the model names is not in the data (a data error and a spec error)."""


class ModelFileError(TallgamError, ValueError):
    """A model file is unreadable, of an unknown schema version, or inconsistent."""


class FitError(TallgamError, RuntimeError):
    """The fit could not be carried out (for example a rank-deficient design)."""


class TallgamWarning(UserWarning):
    """Something was changed or may be wrong, but the work went on (always with counts)."""


class ConvergenceWarning(TallgamWarning):
    """The iterations stopped at their cap before meeting the convergence tolerance."""


def nearest(name: str, candidates) -> str:
    """A ' (did you mean ...?)' hint for a misspelt name, or an empty string."""
    import difflib

    close = difflib.get_close_matches(str(name), [str(c) for c in candidates], n=1, cutoff=0.6)
    return f" (did you mean {close[0]!r}?)" if close else ""
