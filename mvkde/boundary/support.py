"""The support: per-variable bounds (a box) and the data's place in it."""

from __future__ import annotations

import math

import numpy as np

from ..errors import InputError

def parse_bounds(bounds, d: int, names) -> list[tuple[float, float]]:
    """Normalise ``bounds`` to a list of (lo, hi) floats, -inf/inf for an open side.

    ``bounds`` is None, or a sequence of d entries each None or (lo, hi) with
    None (or +-inf) for an open side.

    Parameters
    ----------
    bounds : sequence or None
    d : int
    names : list of str

    Returns
    -------
    list of (float, float)

    Raises
    ------
    InputError
        Wrong length, an entry that is not a pair, or lo >= hi.
    """
    if bounds is None:
        return [(-math.inf, math.inf)] * d
    try:
        items = list(bounds)
    except TypeError:
        raise InputError("bounds must be a list of (lo, hi) pairs, one per variable") from None
    if len(items) != d:
        raise InputError(f"bounds has {len(items)} entries but the data have {d} variables ({', '.join(names)})")
    out = []
    for name, item in zip(names, items):
        if item is None:
            out.append((-math.inf, math.inf))
            continue
        try:
            lo, hi = item
        except (TypeError, ValueError):
            raise InputError(f"bounds for {name} must be a pair (lo, hi), got {item!r}") from None
        lo = -math.inf if lo is None else float(lo)
        hi = math.inf if hi is None else float(hi)
        if math.isnan(lo) or math.isnan(hi) or not lo < hi:
            raise InputError(f"bounds for {name} must satisfy lo < hi, got ({lo}, {hi})")
        out.append((lo, hi))
    return out


def check_inside(data: np.ndarray, bounds, names) -> None:
    """Refuse data outside declared bounds, naming the variable, the count and the worst value
    (the one farthest from its bound).

    Parameters
    ----------
    data : ndarray, shape (n, d)
    bounds : list of (float, float)
    names : list of str

    Raises
    ------
    InputError
        If a value lies outside its bounds.
    """
    for j, (lo, hi) in enumerate(bounds):
        col = data[:, j]
        below = col < lo
        above = col > hi
        count = int(below.sum() + above.sum())
        if count:
            gap = np.where(below, lo - col, np.where(above, col - hi, -np.inf))
            worst = col[int(np.argmax(gap))]
            raise InputError(
                f"{count} value(s) of {names[j]} lie outside its bounds [{lo}, {hi}] "
                f"(worst {worst:.6g}): fix the bounds or the data, or pass outside='drop' "
                "to drop them (the count dropped is recorded)"
            )


def outside_rows(data: np.ndarray, bounds) -> np.ndarray:
    """Boolean (n,): rows with a value outside its variable's bounds.

    Parameters
    ----------
    data : ndarray, shape (n, d)
    bounds : list of (float, float)

    Returns
    -------
    ndarray of bool, shape (n,)
    """
    out = np.zeros(data.shape[0], dtype=bool)
    for j, (lo, hi) in enumerate(bounds):
        out |= (data[:, j] < lo) | (data[:, j] > hi)
    return out


def has_bounds(bounds) -> bool:
    """Whether some variable has a finite bound.

    Parameters
    ----------
    bounds : list of (float, float)

    Returns
    -------
    bool
    """
    return any(math.isfinite(lo) or math.isfinite(hi) for lo, hi in bounds)
