"""Errors a user can cause, kept apart from analysis failures.

The CLI turns :class:`InputError` into exit code 2 with its one-line message and
:class:`AnalysisError` into exit code 1; any other exception is a bug in gapbook.
"""
from __future__ import annotations

import difflib
from dataclasses import dataclass
from typing import Callable, Iterable, Optional, Sequence, Union

from .text import one_line

__all__ = ["OptionName", "InputError", "AnalysisError", "nearest", "did_you_mean", "data_row"]


@dataclass(frozen=True)
class OptionName:
    """Another option named inside an error's text, where the user may act instead of (or beside) the
    error's own option: ``InputError("0 is not one of ", OptionName("visits"), " (1, 2)", option="baseline")``.

    A stage module shows the option's name (``baseline: 0 is not one of visits (1, 2)``); the
    notebook-facing layer (:mod:`gapbook.stage`) shows the params key it came from
    (``design.baseline: 0 is not one of design.visits (1, 2)``). Only these parts are renamed, never
    text from a data or params file.
    """

    name: str

    def __str__(self) -> str:
        return self.name


class InputError(Exception):
    """Bad params, data or paths: the message names the file, key, column or row and what to do.

    The message is kept to one printable line (control characters from a hostile column
    name or value are shown escaped, never sent to the terminal) of at most 2,000 characters.

    A stage module names the option it was given (``InputError("'x' is not a column",
    option="auxiliary")`` reads ``auxiliary: 'x' is not a column``); the notebook-facing
    layer (:mod:`gapbook.stage`) renames that option to the params key it came from. The
    option may carry a dotted item after it, e.g. ``methods.bmi``. The message may be given
    in parts, some of them :class:`OptionName`, when its text names a second option; the
    option ``data`` is the data the module was given, which the notebook-facing layer names
    by the data file.
    """

    def __init__(self, *parts: Union[object, OptionName], option: Optional[str] = None) -> None:
        self.option = option
        self.parts = parts
        self.message = self.text()  # without the option's name
        super().__init__(one_line(f"{option}: {self.message}" if option else self.message, limit=2000))

    def text(self, name: Callable[[str], str] = str) -> str:
        """The message without the option's name, each :class:`OptionName` part shown as ``name(option)``.

        Parameters
        ----------
        name : callable
            The words for an option named in the text (default: the option itself).

        Returns
        -------
        str
            One printable line of at most 2,000 characters.
        """
        return one_line("".join(name(part.name) if isinstance(part, OptionName) else str(part)
                                for part in self.parts), limit=2000)


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


def data_row(position: int, file_rows: Optional[Sequence[int]] = None) -> int:
    """The 1-based row of the data file that a row of the study stands for, for messages.

    Parameters
    ----------
    position : int
        The 0-based position among the study's rows.
    file_rows : sequence of int, optional
        Each study row's 0-based file row when ``data.keep_rows`` left rows out
        (``Study.file_rows``); None when the study holds every row.

    Returns
    -------
    int
    """
    return int(position if file_rows is None else file_rows[position]) + 1
