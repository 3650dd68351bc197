"""Errors and warnings of mvkde.

Every error a user can cause by what they pass in is an :class:`MvkdeError`
(a ``ValueError``); the command line turns these into one line on stderr and
exit status 2.  Anything else escaping the library is a bug (exit status 1).
"""

from __future__ import annotations

import difflib
from typing import Iterable


class MvkdeError(ValueError):
    """Base class of errors caused by input or configuration."""


class InputError(MvkdeError):
    """Bad data, bad argument or an impossible combination of options."""


class BandwidthError(MvkdeError):
    """A bandwidth matrix that cannot be used or cannot be chosen from the sample."""


class ConfigError(MvkdeError):
    """A workflow file or key that is invalid."""


class MvkdeWarning(UserWarning):
    """A result that is usable but deserves attention (edge of a search, negative mass)."""


def closest_names(name: str, valid: Iterable[str], cutoff: float = 0.6) -> str:
    """A ' (did you mean ...?)' suffix, or '' when nothing is close (difflib's ratio >= ``cutoff``).

    Parameters
    ----------
    name : str
    valid : iterable of str
    cutoff : float

    Returns
    -------
    str
    """
    match = difflib.get_close_matches(str(name), [str(v) for v in valid], n=1, cutoff=cutoff)
    return f" (did you mean {match[0]!r}?)" if match else ""


def check_choice(argument: str, value, valid: Iterable[str]) -> str:
    """Validate a named option: return the lower-cased value or raise InputError.

    Parameters
    ----------
    argument : str
        The option's name, for the message.
    value : object
        The given value (strings are stripped and lower-cased).
    valid : iterable of str

    Returns
    -------
    str
    """
    valid = tuple(valid)
    key = value.strip().lower() if isinstance(value, str) else value
    if key in valid:
        return key
    raise InputError(
        f"{argument} given an invalid value {value!r}: expected one of {', '.join(map(str, valid))}"
        + closest_names(str(value), valid)
    )
