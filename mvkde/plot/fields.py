"""What a picture shows, as numbers: the request (size, cell), per-cell fields and one cell's density.

Everything here is testable without drawing: HDR levels, exceedance fields,
the density of one cell with other variables integrated out.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

import numpy as np
import xarray as xr

from ..errors import InputError, closest_names
from ..inspect import OutputLayout
from ..products import grid as _grid
from ..products import node_weights
from ..units import density_units
from .style import DEFAULT_SIZE, DPI, HDR_MASSES, MAX_PIXELS, MIN_PIXELS


# ---------------------------------------------------------------------------
# arguments
# ---------------------------------------------------------------------------

SIZE_PATTERN = re.compile(r"\s*(\d+(?:\.\d+)?)\s*[xX]\s*(\d+(?:\.\d+)?)\s*(in|px)?\s*")


def parse_size(size=None, width=None, height=None) -> tuple[int, int] | None:
    """Pixels (width, height) from ``--size`` or ``--width``/``--height``; None when nothing is given.

    ``--size 1200x900`` is in pixels, ``--size 12x9in`` in inches (at
    ``DPI`` pixels per inch); ``--width``/``--height`` are pixels and the
    missing one takes its default.  Errors name the option the user gave.
    """
    if size is not None and (width is not None or height is not None):
        raise InputError("give --size WxH or --width/--height, not both")
    if size is not None:
        m = SIZE_PATTERN.fullmatch(str(size))
        if not m:
            raise InputError(f"--size {size!r} is not WIDTHxHEIGHT: pixels (--size 1200x900) "
                             f"or inches (--size 12x9in)")
        w, h = float(m.group(1)), float(m.group(2))
        if m.group(3) == "in":
            w, h = w * DPI, h * DPI
        elif w != int(w) or h != int(h):
            raise InputError(f"--size {size}: pixels are whole numbers; for inches write --size {size}in")
        w, h = int(round(w)), int(round(h))
        if not (MIN_PIXELS <= w <= MAX_PIXELS and MIN_PIXELS <= h <= MAX_PIXELS):
            hint = (f"; for inches write --size {m.group(1)}x{m.group(2)}in"
                    if m.group(3) is None and max(w, h) * DPI <= MAX_PIXELS and min(w, h) * DPI >= MIN_PIXELS
                    else "")
            raise InputError(f"--size {size.strip()} is {w}x{h} pixels: each side must be "
                             f"{MIN_PIXELS}..{MAX_PIXELS} pixels{hint}")
        return w, h
    if width is None and height is None:
        return None
    out = []
    for name, value, default in (("width", width, DEFAULT_SIZE[0]), ("height", height, DEFAULT_SIZE[1])):
        if value is None:
            out.append(default)
            continue
        try:
            v = int(str(value).strip())
        except ValueError:
            raise InputError(f"--{name} {value!r} is not a whole number of pixels") from None
        if not MIN_PIXELS <= v <= MAX_PIXELS:
            raise InputError(f"--{name} {v} is outside {MIN_PIXELS}..{MAX_PIXELS} pixels")
        out.append(v)
    return out[0], out[1]


def parse_selection(texts) -> dict:
    """``['lat=60.5,lon=21', 'season=JJA']`` -> ``{'lat': '60.5', 'lon': '21', 'season': 'JJA'}``."""
    out: dict = {}
    for text in texts or ():
        for part in str(text).split(","):
            part = part.strip()
            if not part:
                continue
            if "=" not in part:
                raise InputError(f"--cell: {part!r} is not NAME=VALUE (e.g. --cell lat=60.5,lon=21)")
            key, value = (s.strip() for s in part.split("=", 1))
            if not key or not value:
                raise InputError(f"--cell: {part!r} is not NAME=VALUE (e.g. --cell lat=60.5,lon=21)")
            if key in out and out[key] != value:
                raise InputError(f"--cell gives {key} twice ({out[key]} and {value}): give it once")
            out[key] = value
    return out


def _describe_values(ds, dim: str) -> str:
    n = ds.sizes[dim]
    if dim not in ds.coords:
        return f"an index 0..{n - 1}"
    values = ds[dim].values
    if values.dtype.kind in "iuf":
        if n <= 12:
            return "one of " + ", ".join(f"{v:g}" for v in values.tolist())
        return f"{n} values from {np.nanmin(values):g} to {np.nanmax(values):g} (nearest is taken)"
    labels = [str(v) for v in values.tolist()]
    shown = ", ".join(labels[:20]) + (f" ... ({n} in all)" if n > 20 else "")
    return f"one of {shown}"


def _index_for(ds, dim: str, text: str, notes: list | None = None) -> int:
    """Position along ``dim``: nearest for numbers and dates, exact for labels.

    When the nearest value is not the one asked for, a sentence saying
    which value was used is appended to ``notes``.
    """
    n = ds.sizes[dim]
    if dim not in ds.coords:
        try:
            i = int(text)
        except ValueError:
            i = -1
        if not 0 <= i < n:
            raise InputError(f"--cell {dim}={text}: {dim} has no coordinate; give {_describe_values(ds, dim)}")
        return i
    values = ds[dim].values
    if values.dtype.kind in "iuf":
        try:
            x = float(text)
        except ValueError:
            raise InputError(f"--cell {dim}={text!r}: {dim} is numeric; give {_describe_values(ds, dim)}") from None
        if not math.isfinite(x):
            raise InputError(f"--cell {dim}={text}: give a finite number ({_describe_values(ds, dim)})")
        vals = values.astype(float)
        i = int(np.nanargmin(np.abs(vals - x)))
        if notes is not None and vals[i] != x:
            lo, hi = np.nanmin(vals), np.nanmax(vals)
            where = "" if lo <= x <= hi else f", outside the file's {dim} {lo:g}..{hi:g}"
            notes.append(f"--cell {dim}={text}: used the nearest {dim}, {vals[i]:g}{where}")
        return i
    if values.dtype.kind == "M":
        import pandas as pd

        try:
            t = np.datetime64(pd.Timestamp(text))
        except (ValueError, TypeError):
            raise InputError(f"--cell {dim}={text!r} is not a date; {dim} runs from {values.min()} "
                             f"to {values.max()}") from None
        i = int(np.argmin(np.abs(values - t)))
        if notes is not None and values[i] != t:
            notes.append(f"--cell {dim}={text}: used the nearest {dim}, {values[i]}")
        return i
    labels = [str(v) for v in values.tolist()]
    if text in labels:
        return labels.index(text)
    raise InputError(f"--cell {dim}={text!r}: no such {dim}; give {_describe_values(ds, dim)}"
                     + closest_names(text, labels))


def _no_such_dim(ds, dim, cell_dims) -> InputError:
    return InputError(f"--cell {dim}=...: the file has no dimension {dim}; its cell dimensions are "
                      f"{', '.join(cell_dims) or 'none (one density)'}" + closest_names(dim, list(cell_dims)))


def _apply_selection(obj, ds, selection: dict, allowed, notes=None, cell_dims=()) -> tuple:
    """isel ``obj`` by the selection (dims in ``allowed``); returns (obj, {dim: chosen value text})."""
    chosen = {}
    idx = {}
    for dim, text in selection.items():
        if dim not in ds.dims:
            raise _no_such_dim(ds, dim, cell_dims or allowed)
        if dim not in allowed:
            raise InputError(f"--cell {dim}=...: {dim} is not a dimension to choose here (choose among: "
                             f"{', '.join(allowed) or 'nothing'})" + closest_names(dim, list(allowed)))
        i = _index_for(ds, dim, text, notes)
        idx[dim] = i
        chosen[dim] = _value_text(ds, dim, i)
    return obj.isel(idx), chosen


def _value_text(ds, dim, i) -> str:
    if dim not in ds.coords:
        return str(i)
    v = ds[dim].values[i]
    if isinstance(v, (float, np.floating)):
        return f"{float(v):g}"
    return str(v)


# ---------------------------------------------------------------------------
# numbers drawn (testable without pictures)
# ---------------------------------------------------------------------------

def hdr_levels(density: xr.DataArray, masses=HDR_MASSES, periods=None) -> np.ndarray:
    """Density levels whose upper sets hold ``masses`` of the gridded mass (Hyndman 1996).

    ``density`` is one cell's density on a regular grid (any number of
    dims); the levels are those of :func:`mvkde.products.grid.hdr_levels`
    with the grid's node weights, so they equal the file's ``hdr_level`` and
    ``est.hdr_levels()`` on the same grid.  ``periods`` is accepted for
    callers that know the circular variables (the trapezoid rule on a grid
    spanning one period already is the periodic rule).  Returns one level
    per mass, in the order of ``masses``; NaN nodes count as zero density.
    """
    for dim in density.dims:
        if density.sizes[dim] < 2:
            raise InputError(f"the grid of {dim} has fewer than 2 nodes: no HDR levels")
    return _grid.hdr_levels(density.values, node_weights(density), masses)


def _upper_integral(values: np.ndarray, x: np.ndarray, t: float, axis: int) -> np.ndarray:
    """int_t^{x_end} f dx along ``axis`` for f linear between the nodes (trapezoid rule, exact cut at t)."""
    values = np.moveaxis(values, axis, -1)
    k = int(np.clip(np.searchsorted(x, t, side="right") - 1, 0, x.size - 2))
    w = (t - x[k]) / (x[k + 1] - x[k])
    f_t = (1 - w) * values[..., k] + w * values[..., k + 1]
    part = (x[k + 1] - t) * (f_t + values[..., k + 1]) / 2
    if k + 1 < x.size - 1:
        part = part + np.trapezoid(values[..., k + 1:], x[k + 1:], axis=-1)
    return part


def _exceedance_block(values, axes, thresholds):
    """P(X_j > t_j for the thresholded j) from density values (..., *grid) by quadrature."""
    out = values
    for j in reversed(range(len(axes))):  # the last grid axis is always the trailing one
        if thresholds[j] is None:
            out = np.trapezoid(out, axes[j], axis=-1)
        else:
            out = _upper_integral(out, axes[j], thresholds[j], -1)
    return out


def cd_units(lay, names) -> str:
    """Units of a density of ``names`` in an output's layout."""
    return density_units([lay.units.get(v, "") for v in names]) or "1"


# ---------------------------------------------------------------------------
# per-cell fields
# ---------------------------------------------------------------------------

FIELD_PATTERN = re.compile(r"^\s*(\w+)\s*\[(.*)\]\s*$")
THRESHOLD_PATTERN = re.compile(r"^\s*(\w+)\s*>\s*(\S+)\s*$")


def _field_help(ds, lay) -> str:
    grid = set(lay.names) | {"variable_row", "variable_column"}
    per_cell = [n for n, v in ds.data_vars.items() if not set(v.dims) & grid]
    products = [n for n in ds.data_vars if is_grid_product(ds, lay, n)]
    a, b = lay.names[0], lay.names[-1]
    return (", ".join(per_cell) + f", bandwidth[{a},{b}] (an entry of H), "
            f"exceedance[{a}>VALUE{',' + b + '>VALUE' if lay.d > 1 else ''}] (P(X > value), from the density)"
            + (f"; grids of one cell (with every cell dim chosen): {', '.join(products)}" if products else ""))


def is_grid_product(ds, lay, name: str) -> bool:
    """True for a data variable that is a grid over some of the density's variables in each cell."""
    if name not in ds.data_vars:
        return False
    dims = set(ds[name].dims)
    return bool(dims & set(lay.names)) and not dims & {"variable_row", "variable_column"}


def grid_field_values(ds, lay, name: str) -> tuple[xr.DataArray, str]:
    """A grid product by name (``density``, ``cdf``, ``exceedance``, ``marginal_pr`` ...) with its label."""
    da = ds[name]
    units = str(da.attrs.get("units", ""))
    long = str(da.attrs.get("long_name", name))
    if name == "density":
        units = units or cd_units(lay, [d for d in da.dims if d in lay.names])
    label = name if long == name else f"{name}: {long}"
    return da, label + (f" [{units}]" if units and units != "1" else "")


def field_values(ds: xr.Dataset, lay: OutputLayout, name: str) -> tuple[xr.DataArray, str]:
    """A per-cell field by name: (lazy DataArray over cell dims and any other dims, label with units).

    ``name`` is a data variable without grid dims (``n_samples``,
    ``grid_mass``, ``flags``, ...), ``bandwidth[A,B]`` (entry (A, B) of H)
    or ``exceedance[A>a,B>b]``: the joint exceedance probability
    P(A > a, B > b) integrated from each cell's gridded density (trapezoid
    rule on the piecewise-linear density; mass outside the grid is not
    counted; with a point mass the point-mass part is included unless its
    variable carries a threshold).
    """
    m = FIELD_PATTERN.match(name)
    if m and m.group(1) == "bandwidth" and "bandwidth" in ds.data_vars:
        parts = [p.strip() for p in m.group(2).split(",")]
        if len(parts) != 2 or any(p not in lay.names for p in parts):
            raise InputError(f"--field {name}: write bandwidth[A,B] with A and B among {', '.join(lay.names)}"
                             + closest_names(parts[0] if parts else "", lay.names))
        a, b = parts
        da = ds["bandwidth"].sel(variable_row=a, variable_column=b, drop=True)
        ua, ub = lay.units.get(a, ""), lay.units.get(b, "")
        units = (f"({ua})^2" if a == b else f"({ua}) ({ub})") if (ua or ub) else ""
        return da, f"bandwidth H[{a},{b}]" + (f" [{units}]" if units else "")
    if m and m.group(1) == "exceedance":
        # the bracket syntax always means the computed field, even beside an `exceedance` grid product
        return _exceedance_field(ds, lay, name, m.group(2))
    if name not in ds.data_vars:
        raise InputError(f"--field {name!r} is not in the file; fields: {_field_help(ds, lay)}"
                         + closest_names(name, list(ds.data_vars)))
    da = ds[name]
    grid_dims = [d for d in da.dims if d in lay.names or d in ("variable_row", "variable_column")]
    if grid_dims:
        hint = ("bandwidth[A,B] picks one entry" if name == "bandwidth"
                else "it is a grid per cell: choose one cell with --cell to draw it")
        raise InputError(f"--field {name} has grid dims ({', '.join(grid_dims)}), not one value per cell: {hint}")
    units = str(da.attrs.get("units", ""))
    long = str(da.attrs.get("long_name", name))
    label = name if long == name else f"{name}: {long}"
    return da, label + (f" [{units}]" if units and units != "1" else "")


def _exceedance_field(ds, lay, name, inner):
    thresholds: list = [None] * lay.d
    for part in inner.split(","):
        t = THRESHOLD_PATTERN.match(part)
        if not t:
            raise InputError(f"--field {name}: write exceedance[VAR>VALUE,...], e.g. exceedance[{lay.names[0]}>10]")
        v, text = t.group(1), t.group(2)
        if v not in lay.names:
            raise InputError(f"--field {name}: {v} is not a variable of the density ({', '.join(lay.names)})"
                             + closest_names(v, lay.names))
        try:
            value = float(text)
        except ValueError:
            raise InputError(f"--field {name}: {text!r} is not a number") from None
        ax = ds[v].values
        if not ax[0] <= value <= ax[-1]:
            raise InputError(f"--field {name}: {v} > {value:g} is outside the grid of {v} "
                             f"[{ax[0]:g}, {ax[-1]:g}]: the file has no density there")
        if v in lay.periods:
            raise InputError(f"--field {name}: {v} is circular; an exceedance of a direction has no meaning")
        j = lay.names.index(v)
        if thresholds[j] is not None:
            raise InputError(f"--field {name}: {v} appears twice")
        thresholds[j] = value
    axes = [np.asarray(ds[v].values, dtype=float) for v in lay.names]
    dens = ds["density"]
    total = xr.apply_ufunc(_exceedance_block, dens, kwargs={"axes": axes, "thresholds": thresholds},
                           input_core_dims=[lay.names], output_core_dims=[[]], dask="parallelized",
                           output_dtypes=[float])
    pm_var = next(iter(lay.point_mass), None)
    if pm_var is not None and thresholds[lay.names.index(pm_var)] is None:
        j = lay.names.index(pm_var)
        others = [v for v in lay.names if v != pm_var]
        if others and "density_at_point_mass" in ds.data_vars:
            total = total + xr.apply_ufunc(
                _exceedance_block, ds["density_at_point_mass"],
                kwargs={"axes": [a for k, a in enumerate(axes) if k != j],
                        "thresholds": [t for k, t in enumerate(thresholds) if k != j]},
                input_core_dims=[others], output_core_dims=[[]], dask="parallelized", output_dtypes=[float])
    what = ", ".join(f"{v} > {t:g}" + (f" {lay.units[v]}" if lay.units.get(v) else "")
                     for v, t in zip(lay.names, thresholds) if t is not None)
    return total, f"P({what}) on the grid"


# ---------------------------------------------------------------------------
# one cell
# ---------------------------------------------------------------------------

def _fix_cell(ds, lay, selection, notes=None):
    """Index of the chosen cell (every cell dim fixed) and the text of the choice."""
    for k in selection:        # a dimension the file lacks is the first thing to say
        if k not in ds.dims:
            raise _no_such_dim(ds, k, lay.cell_dims)
        if k not in lay.cell_dims:
            raise InputError(f"--cell {k}=...: {k} is not a cell dimension of the file "
                             f"(cell dimensions: {', '.join(lay.cell_dims) or 'none'})"
                             + closest_names(k, lay.cell_dims))
    missing = [d for d in lay.cell_dims if d not in selection and ds.sizes[d] > 1]
    if missing:
        raise InputError("choose one cell: " + "; ".join(f"--cell {d}=VALUE with {_describe_values(ds, d)}"
                                                         for d in missing)
                         + " (or --field NAME for a map of a per-cell value)")
    idx, chosen = {}, {}
    for d in lay.cell_dims:
        i = _index_for(ds, d, selection[d], notes) if d in selection else 0
        idx[d] = i
        chosen[d] = _value_text(ds, d, i)
    return idx, chosen


def _integrate_to(values: np.ndarray, dims: list, axes: dict, keep: list) -> np.ndarray:
    """Trapezoid integral of ``values`` (dims ``dims``) over every dim not in ``keep``, in ``keep`` order."""
    out, cur = values, list(dims)
    for dim in [d for d in dims if d not in keep]:
        k = cur.index(dim)
        out = np.trapezoid(out, axes[dim], axis=k)
        cur.pop(k)
    return np.transpose(out, [cur.index(d) for d in keep]) if out.ndim > 1 else out


@dataclass
class CellDensity:
    """One cell's density reduced to the variables drawn."""

    names: list
    axes: dict
    values: np.ndarray              # continuous part, dims = names
    on_point_mass: np.ndarray | None = None   # 1-D: density of the other variable on the point mass
    point_mass_probability: float | None = None
    point_mass_var: str | None = None
    n_samples: int | None = None


def cell_density(ds, lay: OutputLayout, idx: dict, variables) -> CellDensity:
    """The chosen cell's density, integrated down to ``variables`` (point-mass part added where it belongs)."""
    keep = list(variables)
    dens = ds["density"].isel(idx)
    values = np.asarray(dens.values, dtype=float)
    if not np.isfinite(values).any():
        flags = ""
        if "flags" in ds.data_vars:
            bits = int(ds["flags"].isel(idx).values)
            masks = np.atleast_1d(ds["flags"].attrs.get("flag_masks", []))
            meanings = str(ds["flags"].attrs.get("flag_meanings", "")).split()
            named = [m for m, b in zip(meanings, masks) if bits & int(b)]
            flags = f" (flags: {', '.join(named)})" if named else ""
        raise InputError(f"the chosen cell has no density{flags}: choose another cell")
    values = np.where(np.isfinite(values), values, 0.0)
    axes = {v: np.asarray(ds[v].values, dtype=float) for v in lay.names}
    reduced = _integrate_to(values, list(dens.dims), axes, keep)
    out = CellDensity(keep, {v: axes[v] for v in keep}, reduced)
    if "n_samples" in ds.data_vars:
        out.n_samples = int(ds["n_samples"].isel({k: v for k, v in idx.items() if k in ds["n_samples"].dims}).values)
    pm = next(iter(lay.point_mass), None)
    if pm is not None and "point_mass_probability" in ds.data_vars:
        out.point_mass_var = pm
        out.point_mass_probability = float(ds["point_mass_probability"].isel(idx).values)
        if pm not in keep and "density_at_point_mass" in ds.data_vars:
            on = ds["density_at_point_mass"].isel(idx)
            on_vals = np.where(np.isfinite(on.values), on.values, 0.0)
            out.values = out.values + _integrate_to(on_vals, list(on.dims), axes, keep)
        elif pm in keep and len(keep) == 2 and "density_at_point_mass" in ds.data_vars:
            other = [v for v in keep if v != pm][0]
            on = ds["density_at_point_mass"].isel(idx)
            on_vals = np.where(np.isfinite(on.values), on.values, 0.0)
            out.on_point_mass = _integrate_to(on_vals, list(on.dims), axes, [other])
    return out


