"""Unit strings for labelled outputs (CF / UDUNITS syntax)."""

from __future__ import annotations


def density_units(units, *, per_km2: bool = False) -> str:
    """Units of a joint density: the inverse product of the variables' units.

    ``["mm d-1", "K"]`` -> ``"1/(mm d-1 K)"``; dimensionless or unknown
    variables ("", "1", None) contribute nothing.  ``per_km2`` adds a
    location on the Earth's surface (a density per km^2): ``["K"]`` ->
    ``"km-2 K-1"``, ``["mm d-1", "K"]`` -> ``"1/(km2 mm d-1 K)"``.

    Parameters
    ----------
    units : iterable of str or None
    per_km2 : bool

    Returns
    -------
    str
    """
    parts = [str(u).strip() for u in units if u and str(u).strip() not in ("", "1")]
    if per_km2:
        if not parts:
            return "km-2"
        if len(parts) == 1 and " " not in parts[0]:
            return f"km-2 {parts[0]}-1"
        return "1/(km2 " + " ".join(parts) + ")"
    if not parts:
        return "1"
    if len(parts) == 1 and " " not in parts[0]:
        return f"{parts[0]}-1"
    return "1/(" + " ".join(parts) + ")"
