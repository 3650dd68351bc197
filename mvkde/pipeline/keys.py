"""Workflow keys: what one key is, and the checkers that validate a value and say what was expected.

:mod:`mvkde.pipeline.workflow` assembles them into ``SCHEMA``; every message
names the key path, the bad value and the valid choices or the closest match.
"""

from __future__ import annotations

import datetime as _dt
import math
from dataclasses import dataclass
from typing import Any, Callable

from .. import boundary, engines, kernels
from ..bandwidth import PARAMETRIZATIONS, SELECTORS
from ..errors import ConfigError, closest_names

SEASONS = ("DJF", "MAM", "JJA", "SON")  # meteorological seasons (common practice)


# ---------------------------------------------------------------------------
# choices: what the library's registries hold
# ---------------------------------------------------------------------------

def estimator_choices() -> dict[str, tuple[str, ...]]:
    """Option names the library accepts, read from its registries (one source of truth).

    Returns
    -------
    dict of str -> tuple of str
        Keys ``kernel``, ``form``, ``bandwidth``, ``parametrization``, ``boundary``, ``engine``.
    """
    return {
        "kernel": tuple(kernels.KERNEL_NAMES) + tuple(kernels.HIGHER_ORDER_NAMES),
        "form": tuple(kernels.FORMS),
        "bandwidth": tuple(SELECTORS),
        "parametrization": tuple(PARAMETRIZATIONS),
        "boundary": tuple(boundary.BOUNDARY_METHODS),
        "engine": tuple(engines.ENGINES),
    }


# ---------------------------------------------------------------------------
# one key and its checkers
# ---------------------------------------------------------------------------

@dataclass(frozen=True)
class Key:
    """One workflow key: its default, a checker and a line of documentation.

    ``check(value, where)`` returns the normalised value or raises ConfigError
    (``where`` prefixes the message with file and key path).
    """

    default: Any
    check: Callable
    doc: str
    choices: Callable | tuple | None = None


def _fail(where: str, value, expected: str, valid=None) -> ConfigError:
    hint = closest_names(value, valid, cutoff=0.5) if valid is not None and isinstance(value, str) else ""
    return ConfigError(f"{where} = {_show(value)} is not valid: expected {expected}{hint}")


def _show(value) -> str:
    if isinstance(value, str):
        return repr(value)
    return str(value)


def _str(value, where):
    if not isinstance(value, str) or not value.strip():
        raise _fail(where, value, "a non-empty string")
    return value


def _opt_str(value, where):
    return None if value is None else _str(value, where)


def _bool(value, where):
    if not isinstance(value, bool):
        raise _fail(where, value, "true or false")
    return value


def _int(lo=None, hi=None, optional=False):
    def check(value, where):
        if value is None and optional:
            return None
        if isinstance(value, bool) or not isinstance(value, int) or (lo is not None and value < lo) \
                or (hi is not None and value > hi):
            rng = f" between {lo} and {hi}" if hi is not None else (f" >= {lo}" if lo is not None else "")
            raise _fail(where, value, f"an integer{rng}")
        return value
    return check


def _float(optional=False, positive=False):
    def check(value, where):
        if value is None and optional:
            return None
        if isinstance(value, bool) or not isinstance(value, (int, float)) or math.isnan(value) \
                or (positive and not (value > 0 and math.isfinite(value))):
            raise _fail(where, value, "a positive finite number" if positive else "a number")
        return float(value)
    return check


def _choice(option):
    def check(value, where):
        valid = estimator_choices()[option]
        key = value.strip().lower() if isinstance(value, str) else value
        if key not in valid:
            raise _fail(where, value, "one of " + ", ".join(valid), valid)
        return key
    return check


def _one_of(*valid, optional=False):
    def check(value, where):
        if value is None and optional:
            return None
        if value not in valid:
            raise _fail(where, value, "one of " + ", ".join(map(str, valid)), valid)
        return value
    return check


def _str_list(optional=False, nonempty=True):
    def check(value, where):
        if value is None and optional:
            return None
        if isinstance(value, str):
            value = [value]
        if not isinstance(value, list) or not all(isinstance(v, str) and v for v in value) \
                or (nonempty and not value):
            raise _fail(where, value, "a list of names, e.g. [\"pr\", \"tasmax\"]")
        if len(set(value)) != len(value):
            raise _fail(where, value, "distinct names")
        return list(value)
    return check


def _fractions(value, where):
    """A list of numbers strictly between 0 and 1 (HDR masses, quantile probabilities)."""
    if not isinstance(value, list) or not all(isinstance(v, (int, float)) and not isinstance(v, bool)
                                              and 0 < v < 1 for v in value):
        raise _fail(where, value, "a list of numbers strictly between 0 and 1, e.g. [0.5, 0.9, 0.99]")
    return [float(v) for v in value]


def _number_list(value, where):
    if not isinstance(value, list) or not all(isinstance(v, (int, float)) and not isinstance(v, bool)
                                              and math.isfinite(v) for v in value) \
            or any(b <= a for a, b in zip(value, value[1:])):
        raise _fail(where, value, "an increasing list of numbers, e.g. [0, 3, 6, 10, 20]")
    return [float(v) for v in value]


def _thresholds(value, where):
    """A list of points (one number per variable) for exceedance probabilities."""
    if not isinstance(value, list) or not all(
            isinstance(r, list) and r and all(isinstance(v, (int, float)) and not isinstance(v, bool)
                                              for v in r) for r in value):
        raise _fail(where, value, "a list of points, one number per variable, e.g. [[10.0, 25.0]]")
    return [[float(v) for v in r] for r in value]


def _paths(value, where):
    if isinstance(value, str):
        value = [value]
    if not isinstance(value, list) or not value or not all(isinstance(v, str) and v for v in value):
        raise _fail(where, value, "a path, a glob or a list of paths")
    return list(value)


def _pair(value, where, *, allow_inf=True, what="[lo, hi]"):
    if not isinstance(value, list) or len(value) != 2 or not all(
            isinstance(v, (int, float)) and not isinstance(v, bool) for v in value):
        raise _fail(where, value, f"a pair {what}")
    lo, hi = float(value[0]), float(value[1])
    if math.isnan(lo) or math.isnan(hi) or not lo < hi or (
            not allow_inf and not (math.isfinite(lo) and math.isfinite(hi))):
        raise _fail(where, value, f"a pair {what} with lo < hi" + ("" if allow_inf else ", both finite"))
    return [lo, hi]


def _time_range(value, where):
    if value is None:
        return None
    if not isinstance(value, list) or len(value) != 2:
        raise _fail(where, value, "[start, end], e.g. [\"2001-01-01\", \"2003-12-31\"] or TOML dates")
    out = []
    for v in value:
        if isinstance(v, (_dt.date, _dt.datetime)):
            out.append(v.isoformat())
        elif isinstance(v, str):
            try:
                _dt.date.fromisoformat(v[:10])
            except ValueError:
                raise _fail(where, value, "ISO dates, e.g. [\"2001-01-01\", \"2003-12-31\"]") from None
            out.append(v)
        else:
            raise _fail(where, value, "[start, end] as ISO date strings or TOML dates")
    if out[0][:10] > out[1][:10]:
        raise _fail(where, value, "start <= end")
    return out


def _months(value, where):
    if value is None:
        return None
    if isinstance(value, int) and not isinstance(value, bool):
        value = [value]
    if not isinstance(value, list) or not value or not all(
            isinstance(m, int) and not isinstance(m, bool) and 1 <= m <= 12 for m in value):
        raise _fail(where, value, "a list of month numbers 1..12")
    return sorted(set(value))


def _seasons(value, where):
    if value is None:
        return None
    if isinstance(value, str):
        value = [value]
    if not isinstance(value, list) or not value:
        raise _fail(where, value, "a list of seasons from " + ", ".join(SEASONS))
    out = []
    for s in value:
        key = s.upper() if isinstance(s, str) else s
        if key not in SEASONS:
            raise _fail(where, s, "one of " + ", ".join(SEASONS), SEASONS)
        out.append(key)
    return [s for s in SEASONS if s in out]


def _box(value, where):
    if value is None:
        return {}
    if not isinstance(value, dict):
        raise _fail(where, value, "a table of coordinate = [lo, hi], e.g. {lat = [60, 61], lon = [20, 22]}")
    return {str(k): _pair(v, f"{where}.{k}", allow_inf=False) for k, v in value.items()}


def _size(value, where):
    if isinstance(value, int) and not isinstance(value, bool):
        value = [value]
    if not isinstance(value, list) or not value or not all(
            isinstance(s, int) and not isinstance(s, bool) and 2 <= s <= 4096 for s in value):
        raise _fail(where, value, "a node count (2..4096) or a list of them, one per variable")
    return list(value)


def _limits(value, where):
    if value is None:
        return {}
    if not isinstance(value, dict):
        raise _fail(where, value, "a table of variable = [lo, hi]")
    return {str(k): _pair(v, f"{where}.{k}", allow_inf=False) for k, v in value.items()}


def _bandwidth(value, where):
    """A selector name, or a given matrix H as a list of rows (checked against d later)."""
    if isinstance(value, list):
        if not value or not all(isinstance(r, list) and r and all(
                isinstance(x, (int, float)) and not isinstance(x, bool) for x in r) for r in value):
            raise _fail(where, value, "a selector name or a d x d matrix of numbers, e.g. [[1.0, 0.2], [0.2, 0.5]]")
        return [[float(x) for x in r] for r in value]
    return _choice("bandwidth")(value, where)


def _scheduler(value, where):
    if not isinstance(value, str):
        raise _fail(where, value, "\"threads\", \"processes\", \"local-cluster\" or \"tcp://HOST:PORT\"")
    if value in ("threads", "processes", "local-cluster", "synchronous"):
        return value
    if value.startswith(("tcp://", "tls://", "ucx://", "inproc://")):
        rest = value.split("://", 1)[1]
        if not rest:
            raise _fail(where, value, "an address like \"tcp://HOST:PORT\"")
        return value
    raise _fail(where, value, "\"threads\", \"processes\", \"local-cluster\", \"synchronous\" or "
                              "\"tcp://HOST:PORT\"", ("threads", "processes", "local-cluster", "synchronous"))


def _block_size(value, where):
    if value == "auto":
        return value
    if isinstance(value, bool) or not isinstance(value, int) or value < 1:
        raise _fail(where, value, "\"auto\" or a positive integer")
    return value


def _bounds(value, where):
    if value is None:
        return None
    if not isinstance(value, list) or len(value) != 2 or not all(
            isinstance(v, (int, float)) and not isinstance(v, bool) for v in value):
        raise _fail(where, value, "[lo, hi] with inf or -inf for an open side, e.g. [0, inf]")
    lo, hi = float(value[0]), float(value[1])
    if math.isnan(lo) or math.isnan(hi) or not lo < hi:
        raise _fail(where, value, "[lo, hi] with lo < hi")
    return [lo, hi]


def _windows(value, where):
    """input.windows: NAME = [start, end] (ISO dates, inclusive); windows may overlap."""
    if value is None:
        return {}
    if not isinstance(value, dict):
        raise _fail(where, value, 'a table of NAME = ["YYYY-MM-DD", "YYYY-MM-DD"], e.g. '
                                  'windows.baseline = ["2001-01-01", "2004-12-31"]')
    out = {}
    for name, pair in value.items():
        here = f"{where}.{name}"
        if not isinstance(pair, list) or len(pair) != 2:
            raise _fail(here, pair, '[start, end] as ISO dates, e.g. ["2001-01-01", "2004-12-31"]')
        dates = []
        for v in pair:
            if isinstance(v, _dt.datetime):
                v = v.date()
            if isinstance(v, _dt.date):
                dates.append(v)
                continue
            try:
                dates.append(_dt.date.fromisoformat(str(v)) if isinstance(v, str) else None)
            except ValueError:
                dates.append(None)
            if dates[-1] is None:
                raise _fail(here, pair, f'ISO dates YYYY-MM-DD ({_show(v)} is not one), e.g. '
                                        '["2001-01-01", "2004-12-31"]')
        if dates[1] < dates[0]:
            raise ConfigError(f"{here} = {_show([d.isoformat() for d in dates])} is not valid: the end "
                              f"{dates[1].isoformat()} is before the start {dates[0].isoformat()}; "
                              "give [start, end] (both days included)")
        out[str(name)] = [d.isoformat() for d in dates]
    return out


def _sources(value, where):
    """input.sources: NAME = "path or glob" (several inputs with the same variables)."""
    if value is None:
        return {}
    if not isinstance(value, dict) or not all(isinstance(v, str) and v for v in value.values()):
        raise _fail(where, value, 'a table of NAME = "path or glob", e.g. sources.observed = '
                                  '"obs/*.nc"')
    return {str(k): v for k, v in value.items()}


def _alpha(value, where):
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not 0 < value < 1:
        raise _fail(where, value, "a number strictly between 0 and 1, e.g. 0.05")
    return float(value)
