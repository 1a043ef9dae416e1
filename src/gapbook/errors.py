"""Errors a user can cause, kept apart from analysis failures.

The CLI turns :class:`InputError` into exit code 2 with its one-line message and
:class:`AnalysisError` into exit code 1; any other exception is a bug in gapbook.
"""
from __future__ import annotations

import difflib
from typing import Iterable, Optional

from .text import one_line

__all__ = ["InputError", "AnalysisError", "nearest", "did_you_mean"]


class InputError(Exception):
    """Bad params, data or paths: the message names the file, key, column or row and what to do.

    The message is kept to one printable line (control characters from a hostile column
    name or value are shown escaped, never sent to the terminal) of at most 2,000 characters.

    A stage module names the option it was given (``InputError("'x' is not a column",
    option="auxiliary")`` reads ``auxiliary: 'x' is not a column``); the notebook-facing
    layer (:mod:`gapbook.stage`) renames that option to the params key it came from. The
    option may carry a dotted item after it, e.g. ``methods.bmi``.
    """

    def __init__(self, message: object = "", *, option: Optional[str] = None) -> None:
        self.option = option
        self.message = one_line(message, limit=2000)  # without the option's name
        super().__init__(one_line(f"{option}: {message}" if option else message, limit=2000))


class AnalysisError(Exception):
    """The analysis could not be carried out on valid input (e.g. a model did not converge)."""


def nearest(word: str, choices: Iterable[str]) -> str | None:
    """The valid word closest to ``word``, or None when nothing is close.

    Parameters
    ----------
    word : str
        What the user wrote.
    choices : iterable of str
        The valid words.

    Returns
    -------
    str or None
        The closest valid word by difflib's ratio, if close enough.
    """
    found = difflib.get_close_matches(str(word), [str(c) for c in choices], n=1, cutoff=0.6)
    return found[0] if found else None


def did_you_mean(word: str, choices: Iterable[str]) -> str:
    """A ``; did you mean 'x'?`` suffix for an error message, or an empty string.

    Parameters
    ----------
    word : str
        What the user wrote.
    choices : iterable of str
        The valid words.

    Returns
    -------
    str
        The suffix, or ``""`` when no valid word is close.
    """
    best = nearest(word, choices)
    return f"; did you mean '{best}'?" if best else ""
