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


class OutputError(TallgamError, OSError):
    """An output cannot be written where it was asked: the folder is missing, is a file or is
    not writable, the path is a folder, the disk is full. The message names the path;
    ``errno`` and ``filename`` are set when a file-system call failed."""

    def __str__(self) -> str:  # the message, not OSError's "[Errno n] ..." layout
        return str(self.args[0]) if self.args else ""


class OutOfMemoryError(TallgamError, MemoryError):
    """The work needs more memory than this machine grants (the message says what to lower)."""


class TallgamWarning(UserWarning):
    """Something was changed or may be wrong, but the work went on (always with counts)."""


class ConvergenceWarning(TallgamWarning):
    """The iterations stopped at their cap before meeting the convergence tolerance."""


def nearest(name: str, candidates) -> str:
    """A ' (did you mean ...?)' hint for a misspelt name, or an empty string."""
    import difflib

    name = str(name)
    if len(name) > VALUE_CHARS:  # no name that long is a typo of a short one (and difflib is slow)
        return ""
    close = difflib.get_close_matches(name, [str(c) for c in candidates if len(str(c)) <= 4 *
                                             VALUE_CHARS], n=1, cutoff=0.6)
    return f" (did you mean {shorten(close[0])}?)" if close else ""


#: longest user value echoed in a message (characters of its repr)
VALUE_CHARS = 160
#: longest message text taken over from a library (DuckDB, pyarrow) into one of ours
MESSAGE_CHARS = 1000


def shorten(value, limit: int = VALUE_CHARS) -> str:
    """``repr(value)``, cut in the middle to about ``limit`` characters with the length said,
    so a message never echoes a huge user value (a 30 MB string, a long list); its start and
    its end (a path's file name) are kept."""
    text = repr(value)
    if len(text) <= limit:
        return text
    head, tail = text[: limit // 3], text[-(limit * 2 // 3):]
    return f"{head}...{tail} ({len(text):,} characters)"


def clip(text, limit: int = MESSAGE_CHARS) -> str:
    """Message text (e.g. a library's error) cut in the middle to about ``limit`` characters;
    its start and end, where libraries put the what and the where, are kept."""
    text = str(text)
    if len(text) <= limit:
        return text
    head, tail = text[: limit * 2 // 3], text[-(limit // 3):]
    return f"{head} [... {len(text) - len(head) - len(tail):,} characters cut ...] {tail}"
