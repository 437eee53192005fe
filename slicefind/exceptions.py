"""The errors slicefind raises on purpose, and the helpers that word them.

Every message names the argument or column and the bad value; `did_you_mean` adds the
closest valid name, `check_level` words the common "a number strictly between 0 and 1".
"""
from __future__ import annotations

import difflib

import numpy as np

__all__ = ["SlicefindError", "SlicefindValueError", "SlicefindTypeError", "WorkspaceBusyError",
           "did_you_mean", "check_level"]


class SlicefindError(Exception):
    """Base class of every error slicefind raises on purpose."""


class SlicefindValueError(SlicefindError, ValueError):
    """A bad value: the message names the argument or column and the value."""


class SlicefindTypeError(SlicefindError, TypeError):
    """A bad type: the message names the argument or column and the type."""


class WorkspaceBusyError(SlicefindError):
    """Another process held the workspace's database past the retries; nothing was written."""


def did_you_mean(name, options) -> str:
    """' Did you mean ...?' for the closest option, or ''.

    Examples
    --------
    >>> did_you_mean("scaner", ["scanner", "shift"])
    " Did you mean 'scanner'?"
    """
    close = difflib.get_close_matches(str(name), [str(o) for o in options], n=1, cutoff=0.5)
    return f" Did you mean {close[0]!r}?" if close else ""


def check_level(name: str, value) -> float:
    """`value` as a float strictly between 0 and 1, or a `SlicefindValueError` naming `name`.

    Examples
    --------
    >>> check_level("fdr", 0.05)
    0.05
    """
    if isinstance(value, bool) or not isinstance(value, (int, float, np.floating)) or not 0 < value < 1:
        raise SlicefindValueError(f"{name} must be a number strictly between 0 and 1; got {value!r}.")
    return float(value)
