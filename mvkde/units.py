"""Unit strings for labelled outputs (CF / UDUNITS syntax)."""

from __future__ import annotations


def density_units(units) -> str:
    """Units of a joint density: the inverse product of the variables' units.

    ``["mm d-1", "K"]`` -> ``"1/(mm d-1 K)"``; dimensionless or unknown
    variables ("", "1", None) contribute nothing.
    """
    parts = [u.strip() for u in units if u and str(u).strip() not in ("", "1")]
    if not parts:
        return "1"
    if len(parts) == 1 and " " not in parts[0]:
        return f"{parts[0]}-1"
    return "1/(" + " ".join(parts) + ")"
