"""The evaluation grid shared by every cell of a run: from ``grid.limits``, or from one pass over the data.

The same pass refuses, before any fit, data outside the declared bounds.
"""

from __future__ import annotations

import math
import warnings

import numpy as np

from ..errors import InputError
from .inputs import Plan, where_files


def resolve_axes(plan: Plan, compute=None, *, check_bounds: bool = True) -> list[np.ndarray]:
    """Evaluation axes shared by every cell: grid.limits, else the pooled data range.

    With ``check_bounds`` the same pass over the data refuses values outside
    declared bounds before any fit; a lazy caller passes False (and asks the
    block tasks to refuse them, ``CellSettings.refuse_outside_bounds``), so
    that with every limit given nothing is read here.

    The pooled range is widened by 20 % each side (the kernel's reach beyond
    the data, common practice for a shared grid) and cut at the bounds; for
    a variable with a point mass the lower limit is the point-mass threshold
    (the continuous part lies above it); a circular variable spans one period.
    """
    wf = plan.workflow
    sizes = wf.grid_size()
    limits = dict(wf["grid"]["limits"])
    sphere = list(wf["estimator"].get("sphere") or [])
    todo = [v for v in plan.names if v not in limits and wf.variable(v)["period"] is None and v not in sphere]
    bounded = [v for v in plan.names if wf.variable(v)["bounds"] is not None] if check_bounds else []
    for v in plan.names:
        if wf.variable(v)["period"] is not None and v not in limits:
            limits[v] = [0.0, wf.variable(v)["period"]]
    for v, whole in zip(sphere, ([-90.0, 90.0], [-180.0, 180.0])):
        limits.setdefault(v, whole)
    if todo or bounded:
        import dask
        import dask.array as da

        # one pass over the data: the range of every variable that needs one (for the
        # default limits, and to refuse data outside declared bounds before any fit)
        stats, keys = [], []
        for v in plan.names:
            if v not in todo and v not in bounded:
                continue
            x = plan.values.sel(variable=v).data
            stats += [_nanmin(x), _nanmax(x)]
            keys += [(v, "min"), (v, "max")]
            t = wf.variable(v)["point_mass"]
            if v in todo and t is not None:
                above = da.where(x > t, x, np.nan)
                stats += [_nanmin(above), _nanmax(above)]
                keys += [(v, "min_above"), (v, "max_above")]
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN slices: reported below
            computed = dict(zip(keys, (compute or dask.compute)(*stats)))
        for v in bounded:
            lo_b, hi_b = wf.variable(v)["bounds"]
            lo, hi = float(computed[(v, "min")]), float(computed[(v, "max")])
            if math.isfinite(lo) and lo < lo_b:
                raise InputError(f"variable {v} has values down to {lo:.6g} in {where_files(plan)}, below "
                                 f"variables.{v}.bounds = {_show_pair(lo_b, hi_b)}: fix the bounds or the data")
            if math.isfinite(hi) and hi > hi_b:
                raise InputError(f"variable {v} has values up to {hi:.6g} in {where_files(plan)}, above "
                                 f"variables.{v}.bounds = {_show_pair(lo_b, hi_b)}: fix the bounds or the data")
        for v in todo:
            t = wf.variable(v)["point_mass"]
            part = "_above" if t is not None else ""
            lo, hi = float(computed[(v, "min" + part)]), float(computed[(v, "max" + part)])
            if not (math.isfinite(lo) and math.isfinite(hi)):
                if not math.isfinite(float(computed[(v, "min")])):
                    raise InputError(f"variable {v} has no valid (finite) values in the selection of "
                                     f"{where_files(plan)}: check the input and input.time_range / months / "
                                     "seasons / box")
                raise InputError(f"variable {v} has no values above its point mass "
                                 f"variables.{v}.point_mass = {t:g}: set grid.limits.{v}")
            if hi <= lo:
                raise InputError(f"variable {v} is constant ({lo:g}) in the selection of {where_files(plan)}: "
                                 f"a density needs spread; set grid.limits.{v} or drop the variable")
            pad = 0.2 * (hi - lo)
            lo, hi = lo - pad, hi + pad
            table = wf.variable(v)
            if table["bounds"]:
                lo, hi = max(lo, table["bounds"][0]), min(hi, table["bounds"][1])
            if table["point_mass"] is not None:
                lo = max(lo, table["point_mass"])
            limits[v] = [lo, hi]
    return [np.linspace(limits[v][0], limits[v][1], s) for v, s in zip(plan.names, sizes)]


def _show_pair(lo, hi) -> str:
    return f"[{lo:g}, {hi:g}]"


def _nanmin(x):
    import dask.array as da

    return da.nanmin(x)


def _nanmax(x):
    import dask.array as da

    return da.nanmax(x)
