"""The support of each variable, described once: bounds, period, spherical pair, point mass.

:func:`mvkde.fit` builds a :class:`Support` from its arguments and the
estimate carries it (``est.support``); the boundary methods, the directional
model, the products and the pictures read it instead of probing the
estimate's attributes.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from .units import density_units

__all__ = ["PointMass", "Support"]


@dataclass(frozen=True)
class PointMass:
    """A point mass at the lower bound of one variable: values <= ``threshold`` count as ``bound``.

    Parameters
    ----------
    index : int
        Column of the variable.
    name : str
    threshold, bound : float
    """

    index: int
    name: str
    threshold: float
    bound: float


@dataclass(frozen=True)
class Support:
    """Where each variable lives.

    Attributes
    ----------
    names : tuple of str
        Variable names, in column order.
    bounds : tuple of (float, float)
        (lo, hi) per variable, ``-inf``/``inf`` for an open side.
    periods : tuple of float or None
        Period of each circular variable, None for the others.
    sphere : (str, str) or None
        Latitude and longitude names (degrees) of a location on the Earth.
    point_mass : PointMass or None
        A point mass at the lower bound of one variable.
    """

    names: tuple
    bounds: tuple
    periods: tuple
    sphere: tuple | None = None
    point_mass: PointMass | None = None

    @classmethod
    def linear(cls, names, bounds=None) -> "Support":
        """Every variable linear, with the given (lo, hi) bounds (default unbounded).

        Parameters
        ----------
        names : sequence of str
        bounds : sequence of (float, float), optional

        Returns
        -------
        Support
        """
        d = len(names)
        box = tuple(tuple(b) for b in bounds) if bounds is not None else ((-math.inf, math.inf),) * d
        return cls(tuple(names), box, (None,) * d)

    @property
    def d(self) -> int:
        return len(self.names)

    @property
    def circular(self) -> list[int]:
        """Indices of the circular variables."""
        return [j for j, p in enumerate(self.periods) if p is not None]

    @property
    def sphere_axes(self) -> tuple[int, int] | None:
        """Indices (latitude, longitude) of the spherical pair, or None."""
        if self.sphere is None:
            return None
        return self.names.index(self.sphere[0]), self.names.index(self.sphere[1])

    @property
    def directional(self) -> list[int]:
        """Indices of the circular variables and of the spherical pair."""
        return sorted(self.circular + list(self.sphere_axes or ()))

    @property
    def linear_axes(self) -> list[int]:
        """Indices of the linear variables (bounded or not)."""
        directional = set(self.directional)
        return [j for j in range(self.d) if j not in directional]

    @property
    def is_directional(self) -> bool:
        return bool(self.directional)

    @property
    def has_bounds(self) -> bool:
        return any(math.isfinite(lo) or math.isfinite(hi) for lo, hi in self.bounds)

    def density_units(self, units, names=None) -> str:
        """Units of a density of ``names`` (default all variables) with ``units``: per km^2 over a location.

        Parameters
        ----------
        units : sequence of str
            Units of the variables in ``names``.
        names : sequence of str, optional

        Returns
        -------
        str
            See :func:`mvkde.units.density_units`.
        """
        names = list(self.names if names is None else names)
        sphere = set(self.sphere or ())
        rest = [u for n, u in zip(names, units) if n not in sphere]
        return density_units(rest, per_km2=bool(sphere & set(names)))

    def subset(self, idx) -> "Support":
        """The support of the variables ``idx`` (a point mass or sphere pair kept only when inside).

        Parameters
        ----------
        idx : sequence of int

        Returns
        -------
        Support
        """
        idx = list(idx)
        names = tuple(self.names[j] for j in idx)
        pm = self.point_mass
        if pm is not None and pm.index in idx:
            pm = PointMass(idx.index(pm.index), pm.name, pm.threshold, pm.bound)
        else:
            pm = None
        sphere = self.sphere if self.sphere is not None and all(s in names for s in self.sphere) else None
        return Support(names, tuple(self.bounds[j] for j in idx), tuple(self.periods[j] for j in idx), sphere, pm)
