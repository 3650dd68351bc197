"""Bounded supports: per-variable bounds and boundary correction.

This module holds the bounds of the support (the box made by per-variable
lower and upper bounds) and the boundary-correction methods.
"""

from __future__ import annotations

import math

import numpy as np

from .errors import InputError, check_choice

BOUNDARY_METHODS = ("none",)


def parse_bounds(bounds, d: int, names) -> list[tuple[float, float]]:
    """Normalise ``bounds`` to a list of (lo, hi) floats, -inf/inf for an open side.

    ``bounds`` is None, or a sequence of d entries each None or (lo, hi) with
    None (or +-inf) for an open side.
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
    """Refuse data outside declared bounds, naming the variable and the worst value."""
    for j, (lo, hi) in enumerate(bounds):
        col = data[:, j]
        below = col < lo
        above = col > hi
        count = int(below.sum() + above.sum())
        if count:
            worst = col[below].min() if below.any() else col[above].max()
            raise InputError(
                f"{count} value(s) of {names[j]} lie outside its bounds [{lo}, {hi}] "
                f"(worst {worst:.6g}): fix the bounds or the data"
            )


def validate_method(method, bounds) -> str:
    if method is None:
        return "none"
    return check_choice("boundary", method, BOUNDARY_METHODS)


def has_bounds(bounds) -> bool:
    return any(math.isfinite(lo) or math.isfinite(hi) for lo, hi in bounds)
