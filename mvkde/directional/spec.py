"""The declaration of directional variables: which are circular (with periods), which pair is a location."""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..errors import InputError
from . import kernels as _dir


@dataclass
class DirectionalSpec:
    """Indices of the circular variables (with periods), of the spherical pair and of
    the linear variables, in the data's column order.

    Parameters
    ----------
    periods : list of float or None
        One entry per variable: its period, or None.
    sphere : (int, int), optional
        Column indices of the latitude and the longitude of a location.
    circular, linear : list of int
        Column indices of the circular and of the linear variables.
    """

    periods: list                      # one entry per variable: period or None
    sphere: tuple | None = None        # (lat index, lon index)
    circular: list = field(default_factory=list)
    linear: list = field(default_factory=list)

    @property
    def directional(self) -> list:
        out = list(self.circular)
        if self.sphere is not None:
            out += list(self.sphere)
        return sorted(out)


def parse(periods, sphere, names, d) -> DirectionalSpec | None:
    """Validate ``periods`` and ``sphere``; None when every variable is linear.

    Parameters
    ----------
    periods : sequence of (float or None), optional
        One entry per variable.
    sphere : (str, str), optional
        Names of the latitude and the longitude variable.
    names : list of str
        The variables' names.
    d : int
        Number of variables.

    Returns
    -------
    DirectionalSpec or None

    Raises
    ------
    InputError
        On a wrong number of periods, a bad period, unknown or repeated sphere
        names, or a period on a spherical variable.
    """
    plist = [None] * d
    if periods is not None:
        try:
            items = list(periods)
        except TypeError:
            raise InputError("periods must be a list with one entry (None or a period) per variable") from None
        if len(items) != d:
            raise InputError(f"periods has {len(items)} entries but the data have {d} variables "
                             f"({', '.join(names)}): give None for each linear variable")
        plist = [None if p is None else _dir.check_period(p, names[j]) for j, p in enumerate(items)]
    pair = None
    if sphere is not None:
        if isinstance(sphere, str) or len(list(sphere)) != 2:
            raise InputError(f"sphere must name two variables (latitude, longitude), got {sphere!r}")
        lat, lon = [str(s) for s in sphere]
        missing = [s for s in (lat, lon) if s not in names]
        if missing:
            raise InputError(f"sphere names {', '.join(repr(m) for m in missing)}, not among the variables "
                             f"{names}: give the latitude and longitude variables' names")
        if lat == lon:
            raise InputError(f"sphere must name two different variables, got {lat!r} twice")
        pair = (names.index(lat), names.index(lon))
        both = [names[j] for j in pair if plist[j] is not None]
        if both:
            raise InputError(f"{', '.join(both)} is part of the spherical location and has a period: "
                             "drop the period (longitude wraps on the sphere anyway)")
    if pair is None and all(p is None for p in plist):
        return None
    circular = [j for j, p in enumerate(plist) if p is not None]
    linear = [j for j in range(d) if j not in circular and (pair is None or j not in pair)]
    return DirectionalSpec(plist, pair, circular, linear)


def check_support(spec: DirectionalSpec, values, box, names, point_masses, mask) -> None:
    """Refuse what a directional estimate cannot honour, before any selection.

    Bounds, point masses or a mask on a directional variable, and latitudes
    outside [-90, 90], raise :class:`~mvkde.errors.InputError`.

    Parameters
    ----------
    spec : DirectionalSpec
    values : ndarray, shape (n, d)
    box : list of (float, float)
        Bounds per variable.
    names : list of str
    point_masses : list, optional
        Point-mass declaration per variable (None entries for none).
    mask : object, optional
        A mask given to :func:`mvkde.fit`, or None.
    """
    for j in spec.directional:
        lo, hi = box[j]
        if math.isfinite(lo) or math.isfinite(hi):
            kind = "circular" if j in spec.circular else "part of the spherical location"
            raise InputError(f"{names[j]} is {kind} and cannot have bounds: remove its entry in bounds= "
                             "(use None)")
    if point_masses is not None and any(point_masses[j] is not None for j in spec.directional
                                        if j < len(point_masses)):
        raise InputError("point_masses on a circular or spherical variable is not supported: "
                         "declare the point mass on a linear variable")
    if mask is not None:
        raise InputError("mask= with circular variables or a spherical location is not supported: "
                         "use bounds= on the linear variables")
    if spec.sphere is not None:
        ilat, _ = spec.sphere
        lat = values[:, ilat]
        bad = (lat < -90.0) | (lat > 90.0)
        if bad.any():
            worst = lat[bad][np.argmax(np.abs(lat[bad]))]
            raise InputError(f"latitude {names[ilat]} must lie in [-90, 90] degrees: {int(bad.sum())} value(s) "
                             f"outside (worst {worst:g}); check the order in sphere=(latitude, longitude)")


def wrap(values, spec: DirectionalSpec) -> np.ndarray:
    """Circular variables taken modulo their period into [0, period); longitudes into [-180, 180).

    Parameters
    ----------
    values : array_like, shape (n, d)
    spec : DirectionalSpec

    Returns
    -------
    ndarray, shape (n, d)
        A wrapped copy.
    """
    out = np.array(values, dtype=float, copy=True)
    for j in spec.circular:
        out[:, j] = np.mod(out[:, j], spec.periods[j])
    if spec.sphere is not None:
        out[:, spec.sphere[1]] = np.mod(out[:, spec.sphere[1]] + 180.0, 360.0) - 180.0
    return out
