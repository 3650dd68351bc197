"""Quick-look pictures of density outputs (``mvkde plot``; pipeline layer).

Four kinds of picture, chosen from the file and the request:

* ``joint``: one cell of a 2-variable output (or two variables of a larger
  one, the rest integrated out): filled contours of the joint density, the
  50 / 90 / 99 % highest-density-region (HDR) contour lines, each labelled in
  place with its probability, and the two marginal densities on the sides;
* ``line``: one cell of a 1-variable output (or one variable of a larger
  one): the density with its HDRs as labelled bars;
* ``polar``: the same when a variable is circular (a ``period`` on its
  coordinate or in the provenance): the direction goes round the circle;
* ``map``: a per-cell field (``n_samples``, ``grid_mass``, a bandwidth
  entry, an exceedance probability ...) over the two remaining cell
  dimensions, or as points over one (stations); bit flags as categories;
* ``grid``: one cell of a grid product in the file (``cdf``,
  ``exceedance``, ``marginal_A`` ...), drawn like the cell's density.

matplotlib is an optional extra: it is imported inside the functions that
draw, never at module import, and only its Agg canvas is used (no display,
no pyplot global state).  Colours come from ``cividis`` (reversed: pale for
little, dark for much), a perceptually uniform colour map designed to read
the same with red-green colour vision deficiency (Nunez, Anderton & Renslow
2018, PLoS ONE 13, e0199239); HDR contours share one line style and are
told apart by the label written on each.

HDR levels follow Hyndman (1996, The American Statistician 50, 120-126):
the level f_a is the density value for which the region {f >= f_a} holds
probability a; here it is computed from the gridded density
(:func:`mvkde.products.grid.hdr_levels`), i.e. as a fraction of the
mass on the grid.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import xarray as xr

from .errors import InputError, MvkdeError, closest_names
from .inspect import OutputLayout, layout, open_output
from .products import grid as _grid
from .products import node_weights

__all__ = ["HDR_MASSES", "COLOUR_MAP", "hdr_levels", "parse_selection", "parse_size", "field_values",
           "build_figure", "plot_output", "PlotResult", "require_matplotlib"]

HDR_MASSES = (0.5, 0.9, 0.99)
#: cividis reversed: pale where there is little, dark where there is much ("ink" for probability)
COLOUR_MAP = "cividis_r"
LINE = "#202020"          # marginals, contour lines and points: near-black, plain
HALO = "white"            # stroked under each contour line and label so it reads on dark and light fills
NO_DATA = "#c8c8c8"       # map background where a cell has no value
FRAME = "#8a8a8a"         # axis frame and ticks: quiet grey
GRID = "#ebebeb"          # faint grid behind lines and points
FIT_MASS = 0.999          # axis ranges hold at least this share of the grid mass ...
CONSTANT_DIGITS = 6       # a field equal to this many significant digits everywhere is called constant
FIT_MARGIN = 0.05         # ... plus this share of their span (and one grid step) on each side
DEFAULT_SIZE = (900, 700)
MIN_PIXELS, MAX_PIXELS = 200, 8000
DPI = 100
LATITUDE_NAMES = {"lat", "latitude", "rlat", "y", "nav_lat", "grid_latitude"}

INSTALL_HINT = "install the plot extra: pip install 'mvkde[plot]'"


def require_matplotlib():
    """Import matplotlib or raise an MvkdeError saying how to install it."""
    try:
        import matplotlib  # noqa: F401
        from matplotlib.backends.backend_agg import FigureCanvasAgg  # noqa: F401
        from matplotlib.figure import Figure  # noqa: F401
    except ImportError:
        raise MvkdeError(f"plotting needs matplotlib, which is not installed: {INSTALL_HINT}") from None
    return matplotlib


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


# ---------------------------------------------------------------------------
# drawing
# ---------------------------------------------------------------------------

@dataclass
class PlotResult:
    """What was drawn: the file, the picture kind, its size and the HDR levels (mass -> density).

    ``notes`` are sentences for the user about choices made on their behalf
    (the nearest coordinate value taken for a ``--cell`` number, say).
    """

    path: Path | None
    kind: str
    size: tuple
    title: str
    hdr_levels: dict | None = None
    artists: dict = field(default_factory=dict, repr=False)
    notes: list = field(default_factory=list)


def _font_size(size) -> float:
    return float(np.clip(10.0 * min(size[0] / DEFAULT_SIZE[0], size[1] / DEFAULT_SIZE[1]) ** 0.5, 6.0, 16.0))


def _new_figure(size, constrained=True):
    require_matplotlib()
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(size[0] / DPI, size[1] / DPI), dpi=DPI, layout="constrained" if constrained else None)
    FigureCanvasAgg(fig)
    return fig


def _house_style(ax, grid=True):
    """The house look: no top/right frame, light grey frame and ticks, a faint grid behind the data."""
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    for side in ("left", "bottom"):
        ax.spines[side].set_color(FRAME)
    ax.tick_params(color=FRAME)
    if grid:
        ax.grid(True, color=GRID, linewidth=0.6)
        ax.set_axisbelow(True)


def _mass_label(m: float) -> str:
    return f"{100 * m:g} %"


def nice_levels(vmin: float, vmax: float, n: int = 10) -> np.ndarray:
    """Round contour/colour-bar levels (steps of 1, 2, 2.5 or 5 times a power of ten) covering [vmin, vmax]."""
    from matplotlib.ticker import MaxNLocator

    if not vmax > vmin:
        vmax = vmin + (abs(vmin) or 1.0)
    levels = MaxNLocator(nbins=n, steps=[1, 2, 2.5, 5, 10]).tick_values(vmin, vmax)
    # keep the outermost levels that still cover the data, drop the rest
    lo = levels[levels <= vmin].max(initial=levels[0])
    hi = levels[levels >= vmax].min(initial=levels[-1])
    return levels[(levels >= lo) & (levels <= hi)]


def fitted_limits(values: np.ndarray, axes: dict, names: list, mass: float = FIT_MASS,
                  periods=None) -> dict:
    """Axis ranges of the box holding at least ``mass`` of the grid mass, widened by a margin.

    Each axis drops at most ``(1 - mass) / (2 d)`` of the mass on either side
    (so the box keeps at least ``mass`` of it), then widens by ``FIT_MARGIN``
    of its span and one grid step, within the grid.  A circular axis keeps
    its full range.  ``values`` has dims ``names`` (NaN counts as zero).
    """
    v = np.where(np.isfinite(values), np.abs(values), 0.0)
    total = v.sum()
    out = {}
    tail = (1.0 - mass) / (2 * len(names))
    for k, name in enumerate(names):
        x = axes[name]
        full = (float(x[0]), float(x[-1]))
        if total <= 0 or x.size < 3 or (periods and name in periods):
            out[name] = full
            continue
        marginal = v.sum(axis=tuple(j for j in range(v.ndim) if j != k)) / total
        cum = np.cumsum(marginal)
        lo_i = int(np.searchsorted(cum, tail, side="right"))               # first node past the lower tail
        hi_i = int(np.searchsorted(cum, 1.0 - tail, side="left"))          # node where the upper tail starts
        lo_i, hi_i = max(lo_i - 1, 0), min(hi_i + 1, x.size - 1)
        lo, hi = float(x[lo_i]), float(x[hi_i])
        pad = FIT_MARGIN * (hi - lo) + abs(float(x[1] - x[0]))
        out[name] = (max(full[0], lo - pad), min(full[1], hi + pad))
    return out


def _within(axis: np.ndarray, lo: float, hi: float) -> slice:
    """Nodes of ``axis`` inside [lo, hi] plus one on each side (contours and their labels stay in view)."""
    i = max(int(np.searchsorted(axis, lo, side="right")) - 2, 0)
    j = min(int(np.searchsorted(axis, hi, side="left")) + 2, axis.size)
    return slice(i, j)


def _sorted_levels(levels: dict):
    """Increasing distinct levels with their masses (contour needs increasing levels)."""
    pairs = sorted(((lv, m) for m, lv in levels.items() if np.isfinite(lv) and lv > 0), key=lambda p: p[0])
    out, seen = [], set()
    for lv, m in pairs:
        if lv not in seen:
            out.append((lv, m))
            seen.add(lv)
    return [p[0] for p in out], [p[1] for p in out]


def _halo(width=3.0):
    from matplotlib import patheffects

    return [patheffects.withStroke(linewidth=width, foreground=HALO)]


def _contours(ax, X, Y, Z, levels: dict, fontsize):
    """HDR contour lines in one style, each labelled in place with the probability it encloses."""
    lv, masses = _sorted_levels(levels)
    if not lv:
        return None
    fmt = {l: _mass_label(m) for l, m in zip(lv, masses)}
    halo = ax.contour(X, Y, Z, levels=lv, colors=HALO, linewidths=3.2, linestyles="solid")
    cs = ax.contour(X, Y, Z, levels=lv, colors=LINE, linewidths=1.2, linestyles="solid")
    _label_inline(ax, halo, cs, fmt, fontsize)
    return cs


def _label_inline(ax, halo, cs, fmt, fontsize):
    """Label contour lines in place; the halo set is cut at the same spots, its own labels hidden."""
    for t in ax.clabel(halo, fmt=fmt, inline=True, inline_spacing=3, fontsize=fontsize * 0.85):
        t.set_visible(False)
    labels = ax.clabel(cs, fmt=fmt, inline=True, inline_spacing=3, fontsize=fontsize * 0.85, colors=LINE)
    for t in labels:
        t.set_path_effects(_halo(2.5))
    return labels


def _compass(ax, lay, var):
    """Degrees clockwise from north (the meteorological convention) for a period of 360."""
    if abs(lay.periods[var] - 360.0) < 1e-9:
        ax.set_theta_zero_location("N")
        ax.set_theta_direction(-1)


def _colour_bar(fig, mappable, levels, label, **kw):
    """A colour bar whose ticks are round numbers: every level, or every other one when they crowd."""
    ticks = levels if len(levels) <= 8 else levels[::2]
    bar = fig.colorbar(mappable, label=label, ticks=ticks, **kw)
    bar.outline.set_edgecolor(FRAME)
    bar.formatter.set_useOffset(False)          # plain round numbers, never "1e-8 + 1" above the bar
    return bar


def _density_colours(levels):
    """Colours of the density bands: white for the lowest band (next to no density), then cividis."""
    from matplotlib.colors import ListedColormap

    n = max(len(levels) - 1, 2)
    return ListedColormap(["white"] + [_cmap_colour(f) for f in np.linspace(0.12, 1.0, n - 1)])


def _fill_levels(F, vmin=0.0):
    vmax = float(np.nanmax(F)) if np.isfinite(F).any() else 1.0
    return nice_levels(vmin, vmax if vmax > vmin else vmin + 1.0, n=14)


HDR_NOTE = "lines: highest-density regions,\nlabelled with the probability inside"


def _draw_joint(fig, cd: CellDensity, lay, levels, title, fontsize):
    x, y = cd.names
    X, Y, F = cd.axes[x], cd.axes[y], cd.values
    gs = fig.add_gridspec(2, 3, width_ratios=[5, 1.3, 0.22], height_ratios=[1.3, 5])
    ax = fig.add_subplot(gs[1, 0])
    top = fig.add_subplot(gs[0, 0], sharex=ax)
    side = fig.add_subplot(gs[1, 1], sharey=ax)
    cax = fig.add_subplot(gs[1, 2])
    key = fig.add_subplot(gs[0, 1:])
    key.axis("off")
    box = fitted_limits(F, cd.axes, [x, y])
    sx, sy = _within(X, *box[x]), _within(Y, *box[y])
    fill_levels = _fill_levels(F)
    fill = ax.contourf(X[sx], Y[sy], F[sx, sy].T, levels=fill_levels, cmap=_density_colours(fill_levels))
    lines = _contours(ax, X[sx], Y[sy], F[sx, sy].T, levels, fontsize)
    bar = _colour_bar(fig, fill, fill_levels, f"density [{cd_units(lay, cd.names)}]", cax=cax)
    ax.set_xlabel(lay.label(x))
    ax.set_ylabel(lay.label(y))
    mx = np.trapezoid(F, Y, axis=1)
    my = np.trapezoid(F, X, axis=0)
    shade = _cmap_colour(0.3)
    top.fill_between(X, mx, color=shade, alpha=0.45, linewidth=0)
    top.plot(X, mx, color=LINE, linewidth=1.2)
    side.fill_betweenx(Y, my, color=shade, alpha=0.45, linewidth=0)
    side.plot(my, Y, color=LINE, linewidth=1.2)
    note = HDR_NOTE
    if cd.on_point_mass is not None:
        other = [v for v in cd.names if v != cd.point_mass_var][0]
        if other == x:
            top.plot(X, mx + cd.on_point_mass, color=LINE, linewidth=1.0, linestyle="dashed")
        else:
            side.plot(my + cd.on_point_mass, Y, color=LINE, linewidth=1.0, linestyle="dashed")
        note += (f"\ndashed: marginal of {other} with\n{cd.point_mass_var} <= "
                 f"{lay.point_mass[cd.point_mass_var]:g} included")
    key.text(0.05, 0.5, note, transform=key.transAxes, va="center", ha="left", fontsize=fontsize * 0.75,
             color=LINE)
    ax.set_xlim(*box[x])
    ax.set_ylim(*box[y])
    top.set_ylim(bottom=0)
    side.set_xlim(left=0)
    top.set_ylabel(f"marginal\n[{cd_units(lay, [x])}]", fontsize=fontsize * 0.85)
    side.set_xlabel(f"marginal\n[{cd_units(lay, [y])}]", fontsize=fontsize * 0.85)
    top.tick_params(labelbottom=False)
    side.tick_params(labelleft=False)
    for a in (ax, top, side):
        _house_style(a, grid=a is not ax)
    fig.suptitle(title, fontsize=fontsize * 1.1)
    return {"contours": lines, "fill": fill, "axes": ax, "top": top, "side": side, "colour_bar": bar}


def cd_units(lay, names) -> str:
    from .units import density_units

    return density_units([lay.units.get(v, "") for v in names]) or "1"


def _draw_joint_polar(fig, cd: CellDensity, lay, levels, title, fontsize):
    direction = next(v for v in cd.names if v in lay.periods)
    radial = next(v for v in cd.names if v != direction)
    F = cd.values if cd.names[0] == direction else cd.values.T        # (direction, radial)
    box = fitted_limits(F, {direction: cd.axes[direction], radial: cd.axes[radial]}, [direction, radial],
                        periods=lay.periods)
    theta_x = cd.axes[direction]
    R = cd.axes[radial]
    period = lay.periods[direction]
    if theta_x[-1] - theta_x[0] < period * (1 - 1e-9):               # close the circle for drawing
        theta_x = np.append(theta_x, theta_x[0] + period)
        F = np.concatenate([F, F[:1]], axis=0)
    theta = 2 * np.pi * theta_x / period
    gs = fig.add_gridspec(1, 2, width_ratios=[5, 0.2])
    ax = fig.add_subplot(gs[0, 0], projection="polar")
    cax = fig.add_subplot(gs[0, 1])
    _compass(ax, lay, direction)
    fill_levels = _fill_levels(F)
    fill = ax.contourf(theta, R, F.T, levels=fill_levels, cmap=_density_colours(fill_levels))
    lines = _contours(ax, theta, R, F.T, levels, fontsize)
    ax.set_rlim(R[0], box[radial][1])
    ax.grid(True, color=GRID, linewidth=0.6)
    ax.spines["polar"].set_color(FRAME)
    ax.set_title(f"angle: {lay.label(direction)}; radius: {lay.label(radial)}", fontsize=fontsize * 0.9)
    bar = _colour_bar(fig, fill, fill_levels, f"density [{cd_units(lay, cd.names)}]", cax=cax)
    ax.text(-0.12, -0.08, HDR_NOTE.replace("\n", " "), transform=ax.transAxes, fontsize=fontsize * 0.75,
            color=LINE, ha="left", va="top")
    fig.suptitle(title, fontsize=fontsize * 1.1)
    return {"contours": lines, "fill": fill, "axes": ax, "colour_bar": bar}


def _runs(mask: np.ndarray) -> list:
    """(first, last) index of each run of True in ``mask``."""
    edges = np.diff(np.concatenate([[0], mask.astype(int), [0]]))
    return list(zip(np.flatnonzero(edges == 1), np.flatnonzero(edges == -1) - 1))


def _draw_line(fig, cd: CellDensity, lay, levels, title, fontsize, polar: bool):
    (x,) = cd.names
    X, F = cd.axes[x], cd.values
    shade = _cmap_colour(0.3)
    if polar:
        period = lay.periods[x]
        if X[-1] - X[0] < period * (1 - 1e-9):
            X, F = np.append(X, X[0] + period), np.append(F, F[:1])
        ax = fig.add_subplot(projection="polar")
        _compass(ax, lay, x)
        theta = 2 * np.pi * X / period
        ax.fill(theta, F, color=shade, alpha=0.45, linewidth=0)
        ax.plot(theta, F, color=LINE, linewidth=1.4)
        texts = []
        for m, lv in sorted(levels.items()):
            if not (np.isfinite(lv) and lv > 0):
                continue
            # the region itself: an arc at its level over the directions where the density reaches it
            runs = _runs(F >= lv)
            for i, j in runs:
                arc = np.linspace(theta[i], theta[j], max(2, 4 * (j - i)))
                ax.plot(arc, np.full_like(arc, lv), color=LINE, linewidth=1.6)
            i, j = max(runs, key=lambda r: theta[r[1]] - theta[r[0]])
            t = ax.annotate(_mass_label(m), (theta[j], lv), xytext=(4, 0), textcoords="offset points",
                            fontsize=fontsize * 0.85, color=LINE, ha="left", va="center")
            t.set_path_effects(_halo(2.5))
            texts.append(t)
        ax.set_rlim(0, float(np.max(F)) * 1.05)
        ax.grid(True, color=GRID, linewidth=0.6)
        ax.spines["polar"].set_color(FRAME)
        ax.set_title(f"angle: {lay.label(x)}; radius: density [{cd_units(lay, [x])}]; arcs: "
                     "highest-density regions, labelled with the probability inside", fontsize=fontsize * 0.85)
    else:
        ax = fig.add_subplot()
        ax.fill_between(X, F, color=shade, alpha=0.45, linewidth=0)
        ax.plot(X, F, color=LINE, linewidth=1.4)
        box = fitted_limits(F, {x: X}, [x])
        ax.set_xlim(*box[x])
        texts = []
        for m, lv in sorted(levels.items()):
            if not (np.isfinite(lv) and lv > 0):
                continue
            # the region itself: a bar at its level over every stretch where the density reaches it
            runs = _runs(F >= lv)
            ax.hlines([lv] * len(runs), [X[i] for i, _ in runs], [X[j] for _, j in runs], color=LINE,
                      linewidth=1.6)
            ax.vlines([X[i] for i, _ in runs] + [X[j] for _, j in runs], 0, lv, color=LINE, linewidth=0.6,
                      linestyle=(0, (1, 2)))
            i, j = max(runs, key=lambda r: X[r[1]] - X[r[0]])
            t = ax.annotate(_mass_label(m), (X[j], lv), xytext=(4, 0), textcoords="offset points",
                            fontsize=fontsize * 0.85, color=LINE, ha="left", va="center")
            t.set_path_effects(_halo(2.5))
            texts.append(t)
        if cd.point_mass_probability is not None and cd.point_mass_var == x:
            ax.text(0.98, 0.97, f"P({x} <= {lay.point_mass[x]:g}) = {cd.point_mass_probability:.3f} "
                                f"(not drawn)", transform=ax.transAxes, ha="right", va="top", fontsize=fontsize * 0.85)
        ax.set_ylim(bottom=0)
        ax.set_xlabel(lay.label(x))
        ax.set_ylabel(f"density [{cd_units(lay, [x])}]")
        ax.set_title("bars: highest-density regions, labelled with the probability inside",
                     fontsize=fontsize * 0.8, color=LINE)
        _house_style(ax)
    fig.suptitle(title, fontsize=fontsize * 1.1)
    return {"axes": ax, "level_texts": texts}


def _cmap_colour(fraction: float):
    import matplotlib

    return matplotlib.colormaps[COLOUR_MAP](fraction)


def _is_latitude(ds, dim) -> bool:
    if dim.lower() in LATITUDE_NAMES:
        return True
    if dim in ds.coords:
        a = ds[dim].attrs
        return a.get("standard_name") == "latitude" or a.get("units") in ("degrees_north", "degree_north") \
            or a.get("axis") == "Y"
    return False


def _map_axes(ds, da):
    """(ydim, xdim, xs, ys, numeric, y-stretch) of a 2-D per-cell field."""
    ydim, xdim = da.dims
    if _is_latitude(ds, xdim) and not _is_latitude(ds, ydim):
        ydim, xdim = xdim, ydim
    xs = ds[xdim].values if xdim in ds.coords else np.arange(da.sizes[xdim])
    ys = ds[ydim].values if ydim in ds.coords else np.arange(da.sizes[ydim])
    numeric = np.asarray(xs).dtype.kind in "iuf" and np.asarray(ys).dtype.kind in "iuf"
    if not numeric:
        xs, ys = np.arange(len(xs)), np.arange(len(ys))
    stretch = 1.0
    if _is_latitude(ds, ydim) and numeric:
        stretch = 1.0 / max(0.05, math.cos(math.radians(float(np.nanmean(ys)))))
    return ydim, xdim, np.asarray(xs, dtype=float), np.asarray(ys, dtype=float), numeric, stretch


def _extent(v: np.ndarray) -> float:
    """Width covered by cells centred on ``v`` (one spacing added for the half cells at the ends)."""
    if v.size < 2:
        return 1.0
    return float(np.nanmax(v) - np.nanmin(v)) + float(np.nanmin(np.abs(np.diff(np.sort(v)))) or 1.0)


def _map_margins(ds, da, label, fontsize, title="") -> tuple:
    """Pixels (left, right, bottom, top) around a 2-D map: tick labels, axis labels, colour bar or legend."""
    scale = fontsize / 10.0
    _, xdim, _, _, numeric, _ = _map_axes(ds, da)
    left = 95 * scale
    bottom = (60 if numeric else 60 + 6 * max(len(str(v)) for v in ds[xdim].values)) * scale
    values = np.asarray(da.values, dtype=float)
    lines = _wrap(title + ": constant = 0.000000").count("\n") + 1 if title else 1
    lines += 1 if np.isnan(values).any() else 0                     # the note on cells without a value
    top = (30 + 22 * lines) * scale
    categories = flag_categories(da)
    if categories is not None:
        right = (70 + 6.5 * max(len(t) for _, t in categories + [(0, label.split(":")[0])])) * scale
    elif is_constant(float(np.nanmin(da.values)), float(np.nanmax(da.values))):
        right = 25 * scale                                        # constant: no colour bar
    else:
        right = 125 * scale
    return left, right, bottom, top


def map_size(ds, da, label="", title="") -> tuple[int, int]:
    """A canvas in pixels shaped like the map (plus its margins), so no side of it is left blank."""
    if da.ndim != 2:
        return DEFAULT_SIZE
    _, _, xs, ys, _, stretch = _map_axes(ds, da)
    ratio = _extent(ys) * stretch / _extent(xs)               # map height / map width
    if ratio <= 1.0:
        w = 680.0
        h = max(200.0, w * ratio)
    else:
        h = 580.0
        w = max(240.0, h / ratio)
    left, right, bottom, top = _map_margins(ds, da, label, _font_size(DEFAULT_SIZE), title)
    size = (int(round(w + left + right)), int(round(h + bottom + top)))
    return tuple(int(np.clip(s, MIN_PIXELS, MAX_PIXELS)) for s in size)


def flag_categories(da) -> list | None:
    """For a CF bit field (``flag_masks`` + ``flag_meanings``): [(value, label)] of the values present."""
    masks = da.attrs.get("flag_masks")
    meanings = str(da.attrs.get("flag_meanings", "")).split()
    if masks is None or not meanings:
        return None
    masks = [int(b) for b in np.atleast_1d(masks)]
    values = np.asarray(da.values)
    present = sorted({int(v) for v in values[np.isfinite(values.astype(float))].ravel()})
    out = []
    for v in present:
        names = [meaning for meaning, b in zip(meanings, masks) if v & b]
        out.append((v, " + ".join(names) if names else "no flag"))
    return out


def _category_colours(n_flagged: int):
    # "no flag" is white (the quiet state); flagged combinations take well-separated cividis colours
    if n_flagged == 0:
        return []
    return [_cmap_colour(f) for f in np.linspace(0.1, 0.85, n_flagged)]


def _draw_map(fig, ds, da: xr.DataArray, label, title, fontsize):
    values = np.asarray(da.values, dtype=float)
    if not np.isfinite(values).any():
        raise InputError(f"{label}: no finite value in the chosen cells")
    from matplotlib.colors import BoundaryNorm, ListedColormap
    from matplotlib.patches import Patch

    if da.ndim == 2:
        # placed by hand, not by the layout engine: the map keeps its aspect and fills the canvas
        W, H = fig.get_size_inches() * DPI
        left, right, bottom, top = _map_margins(ds, da, label, fontsize, title)
        ax = fig.add_axes((left / W, bottom / H, 1 - (left + right) / W, 1 - (bottom + top) / H))
    else:
        ax = fig.add_subplot()
    ax.set_facecolor(NO_DATA)
    categories = flag_categories(da)
    lo, hi = float(np.nanmin(values)), float(np.nanmax(values))
    constant = categories is None and is_constant(lo, hi)
    artists: dict = {"axes": ax}
    if categories is not None:
        flagged = [c for c in categories if c[0] != 0]
        colours = dict(zip([c[0] for c in flagged], _category_colours(len(flagged))))
        colours[0] = "white"
        codes = {v: k for k, (v, _) in enumerate(categories)}
        coded = np.vectorize(lambda v: codes.get(int(v), np.nan) if np.isfinite(v) else np.nan)(values)
        cmap = ListedColormap([colours[v] for v, _ in categories])
        norm = BoundaryNorm(np.arange(len(categories) + 1) - 0.5, len(categories))
        handles = [Patch(facecolor=colours[v], edgecolor=FRAME, label=text) for v, text in categories]
    if da.ndim == 2:
        ydim, xdim, xs, ys, numeric, stretch = _map_axes(ds, da)
        grid = np.asarray(da.transpose(ydim, xdim).values, dtype=float)
        if categories is not None:
            grid = coded if da.dims == (ydim, xdim) else coded.T
            mesh = ax.pcolormesh(xs, ys, grid, shading="nearest", cmap=cmap, norm=norm, edgecolors=FRAME,
                                 linewidth=0.3)
        elif constant:
            mesh = ax.pcolormesh(xs, ys, np.where(np.isfinite(grid), 0.3, np.nan), shading="nearest",
                                 cmap=COLOUR_MAP, vmin=0, vmax=1)
        else:
            levels = nice_levels(lo, hi)
            norm_c = BoundaryNorm(levels, 256, extend="neither")
            mesh = ax.pcolormesh(xs, ys, grid, shading="nearest", cmap=COLOUR_MAP, norm=norm_c)
            if stretch != 1.0:
                ax.set_aspect(stretch)
            ax.apply_aspect()
            box = ax.get_position()
            W, H = fig.get_size_inches() * DPI
            cax = fig.add_axes((box.x1 + 14 / W, box.y0, 16 / W, box.height))
            artists["colour_bar"] = _colour_bar(fig, mesh, levels, _short_label(label), cax=cax)
        if not numeric:
            ax.set_xticks(xs, [str(v) for v in ds[xdim].values], rotation=60)
            ax.set_yticks(ys, [str(v) for v in ds[ydim].values])
        ax.set_xlabel(_coord_label(ds, xdim))
        ax.set_ylabel(_coord_label(ds, ydim))
        if stretch != 1.0:
            ax.set_aspect(stretch)
        missing = int((~np.isfinite(values)).sum())
        if missing:
            ax.set_title(f"grey: {missing} cell(s) without a value", fontsize=fontsize * 0.85)
        artists["mesh"] = mesh
        for side in ax.spines.values():
            side.set_color(FRAME)
    else:
        (dim,) = da.dims
        pos = np.arange(da.sizes[dim])
        coord = ds[dim].values if dim in ds.coords else pos
        numeric = np.asarray(coord).dtype.kind in "iuf"
        xs = coord if numeric else pos
        ax.set_facecolor("white")
        if categories is not None:
            colours_pts = [cmap(int(c)) if np.isfinite(c) else NO_DATA for c in coded]
            artists["mesh"] = ax.scatter(xs, coded, c=colours_pts, edgecolors=LINE, linewidths=0.6, s=50,
                                         zorder=3)
            ax.set_yticks(range(len(categories)), [t for _, t in categories])
            ax.set_ylim(-0.6, len(categories) - 0.4)
        else:
            artists["mesh"] = ax.plot(xs, values, marker="o", linestyle="none", color=LINE, markersize=5)[0]
        if not numeric:
            ax.set_xticks(pos, [str(v) for v in coord], rotation=45, ha="right")
        ax.set_xlabel(_coord_label(ds, dim))
        ax.set_ylabel(label if categories is None else "")
        _house_style(ax)
    if categories is not None:
        artists["legend"] = ax.legend(handles=handles, title=label.split(":")[0], loc="upper left",
                                      bbox_to_anchor=(1.01, 1.0), frameon=False, fontsize=fontsize * 0.85,
                                      title_fontsize=fontsize * 0.9, alignment="left")
    if constant:
        exact = "" if lo == hi else f" (to {CONSTANT_DIGITS} significant digits: {lo:.10g} to {hi:.10g})"
        lo = float(f"{(lo + hi) / 2:.{CONSTANT_DIGITS}g}")
        text = f"{label.split(' [')[0].split(':')[0]} is constant = {lo:g}" + \
               (f" {label.split(' [')[1].rstrip(']')}" if " [" in label else "") + \
               f" in all {int(np.isfinite(values).sum())} cells" + ("\n" + exact.strip() if exact else "")
        artists["constant"] = ax.text(0.5, 0.5, text, transform=ax.transAxes, ha="center", va="center",
                                      fontsize=fontsize, color=LINE,
                                      bbox=dict(facecolor="white", edgecolor=FRAME, boxstyle="round,pad=0.4"))
        title = title + f": constant = {lo:g}"
    fig.suptitle(_wrap(title), fontsize=fontsize * 1.1)
    artists["title"] = title
    return artists


def is_constant(lo: float, hi: float) -> bool:
    """Equal to ``CONSTANT_DIGITS`` significant digits: a colour bar would only show rounding noise."""
    return hi - lo <= 10.0 ** (-CONSTANT_DIGITS) * max(abs(lo), abs(hi))


def _short_label(label: str) -> str:
    """``name: long name [units]`` -> ``name [units]`` (the long name is in the title)."""
    units = " [" + label.split(" [", 1)[1] if " [" in label else ""
    return label.split(" [", 1)[0].split(": ", 1)[0] + units


def _wrap(title: str, width: int = 80) -> str:
    import textwrap

    return "\n".join(textwrap.fill(line, width) for line in title.split("\n"))


def _coord_label(ds, dim) -> str:
    if dim in ds.coords:
        u = ds[dim].attrs.get("units")
        return f"{dim} [{u}]" if u else dim
    return dim


def _draw_grid_product(fig, ds, lay, da, label, idx, title, fontsize):
    """One cell's grid product (a CDF, an exceedance or a marginal grid) drawn like a density picture."""
    names = [d for d in da.dims if d in lay.names]
    values = np.asarray(da.transpose(*names).values, dtype=float)
    axes = {v: np.asarray(ds[v].values, dtype=float) for v in names}
    units = label.split(" [")[1].rstrip("]") if " [" in label else ""
    short = label.split(":")[0].split(" [")[0]
    # fit the axes to where this cell's density is, when the file has it
    box = None
    if "density" in ds.data_vars:
        dens = np.asarray(ds["density"].isel(idx).values, dtype=float)
        if np.isfinite(dens).any():
            dens = np.where(np.isfinite(dens), dens, 0.0)
            reduced = _integrate_to(dens, list(ds["density"].dims[-lay.d:]), {v: np.asarray(ds[v].values, float)
                                                                                for v in lay.names}, names)
            box = fitted_limits(reduced, axes, names, periods=lay.periods)
    if box is None:
        box = fitted_limits(values, axes, names, periods=lay.periods)
    if not np.isfinite(values).any():
        raise InputError(f"--field {short}: the chosen cell has no value (choose another cell)")
    if len(names) == 2:
        x, y = names
        gs = fig.add_gridspec(1, 2, width_ratios=[5, 0.22])
        ax = fig.add_subplot(gs[0, 0])
        cax = fig.add_subplot(gs[0, 1])
        lo, hi = float(np.nanmin(values)), float(np.nanmax(values))
        probability = units in ("", "1") and lo >= 0 and hi <= 1
        levels = nice_levels(0.0 if probability else lo, hi, n=12)
        sx, sy = _within(axes[x], *box[x]), _within(axes[y], *box[y])
        X, Y, V = axes[x][sx], axes[y][sy], values[sx, sy].T
        fill = ax.contourf(X, Y, V, levels=levels, cmap=COLOUR_MAP)
        inner = levels[1:-1]
        marks = list(inner[::max(1, len(inner) // 3)][:4])           # a few labelled lines, round values
        lines = None
        if marks:
            halo = ax.contour(X, Y, V, levels=marks, colors=HALO, linewidths=3.0)
            lines = ax.contour(X, Y, V, levels=marks, colors=LINE, linewidths=1.0)
            _label_inline(ax, halo, lines, {m: f"{m:g}" for m in marks}, fontsize)
        bar = _colour_bar(fig, fill, levels, "probability" if probability else
                          (f"{short} [{units}]" if units else short), cax=cax)
        ax.set_xlim(*box[x])
        ax.set_ylim(*box[y])
        ax.set_xlabel(lay.label(x))
        ax.set_ylabel(lay.label(y))
        _house_style(ax, grid=False)
        artists = {"axes": ax, "fill": fill, "contours": lines, "colour_bar": bar}
    elif len(names) == 1:
        (x,) = names
        ax = fig.add_subplot()
        ax.fill_between(axes[x], values, color=_cmap_colour(0.3), alpha=0.45, linewidth=0)
        ax.plot(axes[x], values, color=LINE, linewidth=1.4)
        ax.set_xlim(*box[x])
        ax.set_xlabel(lay.label(x))
        ax.set_ylabel(f"{short} [{units}]" if units else short)
        if np.nanmin(values) >= 0:
            ax.set_ylim(bottom=0)
        _house_style(ax)
        artists = {"axes": ax}
    else:
        raise InputError(f"--field {short} is a grid over {', '.join(names)}: only grids over one or two "
                         "variables can be drawn")
    fig.suptitle(_wrap(title), fontsize=fontsize * 1.1)
    return artists


# ---------------------------------------------------------------------------
# the request
# ---------------------------------------------------------------------------

def _choose_variables(lay: OutputLayout, variables) -> list:
    if variables is None:
        return lay.names[:2]
    if isinstance(variables, str):
        variables = [v.strip() for v in variables.split(",") if v.strip()]
    variables = list(variables)
    unknown = [v for v in variables if v not in lay.names]
    if unknown:
        raise InputError(f"--variables: {unknown[0]} is not a variable of the density ({', '.join(lay.names)})"
                         + closest_names(unknown[0], lay.names))
    if not 1 <= len(variables) <= 2 or len(set(variables)) != len(variables):
        raise InputError(f"--variables takes one or two distinct variables, got {', '.join(variables)}")
    return variables


def _where(chosen: dict) -> str:
    return ", ".join(f"{k} {v}" for k, v in chosen.items())


def build_figure(ds: xr.Dataset, *, cell=None, field=None, variables=None, size=None,
                 masses=HDR_MASSES, lay: OutputLayout | None = None):
    """Draw the requested picture on a new figure: returns (figure, PlotResult without a path).

    ``size`` is (width, height) in pixels; None shapes a map's canvas like
    the map and gives other pictures ``DEFAULT_SIZE``.
    """
    require_matplotlib()
    import matplotlib

    lay = lay or layout(ds)
    selection = dict(cell or {})
    notes: list = []
    if field is not None and variables is not None:
        raise InputError("--variables applies to a cell's density, not to --field pictures")
    if field is not None and is_grid_product(ds, lay, field):
        return _build_grid_product(ds, lay, field, selection, size, notes)
    if field is not None:
        da, label = field_values(ds, lay, field)
        free = list(da.dims)
        da, chosen = _apply_selection(da, ds, selection, free, notes, lay.cell_dims)
        rest = [d for d in free if d not in selection and da.sizes[d] > 1]
        da = da.isel({d: 0 for d in da.dims if d not in rest})
        if len(rest) > 2:
            raise InputError(f"--field {field} varies over {', '.join(rest)}: fix all but two with --cell, "
                             f"e.g. --cell {rest[-1]}=... ({_describe_values(ds, rest[-1])})")
        if not rest:
            value = float(np.asarray(da.values))
            raise InputError(f"--field {field}: the selection leaves one cell ({label} = {value:g}); "
                             "drop a --cell choice to get a map")
        da = da.compute() if hasattr(da, "compute") else da
        title = label.split(" [")[0] + (f" ({_where(chosen)})" if chosen else "")
        size = tuple(size) if size is not None else map_size(ds, da, label, title)
        fontsize = _font_size(size)
        with matplotlib.rc_context({"font.size": fontsize}):
            fig = _new_figure(size, constrained=da.ndim != 2)
            artists = _draw_map(fig, ds, da, label, title, fontsize)
        return fig, PlotResult(None, "map", size, artists["title"], None, artists, notes)
    size = tuple(size) if size is not None else DEFAULT_SIZE
    fontsize = _font_size(size)
    keep = _choose_variables(lay, variables)
    idx, chosen = _fix_cell(ds, lay, selection, notes)
    cd = cell_density(ds, lay, idx, keep)
    density = xr.DataArray(cd.values, dims=keep, coords={v: cd.axes[v] for v in keep})
    levels_arr = hdr_levels(density, masses, {v: p for v, p in lay.periods.items() if v in keep})
    levels = {float(m): float(lv) for m, lv in zip(masses, levels_arr)}
    what = "joint density of " + " and ".join(keep) if len(keep) == 2 else f"density of {keep[0]}"
    if set(keep) != set(lay.names):
        what = "marginal " + what
    title = what + (f" ({_where(chosen)})" if chosen else "")
    if cd.n_samples is not None:
        title += f", n = {cd.n_samples}"
    if cd.point_mass_var is not None and cd.point_mass_var in keep:
        title += f"\ncontinuous part {cd.point_mass_var} > {lay.point_mass[cd.point_mass_var]:g}; " \
                 f"P({cd.point_mass_var} <= {lay.point_mass[cd.point_mass_var]:g}) = " \
                 f"{cd.point_mass_probability:.3f}"
    circular = [v for v in keep if v in lay.periods]
    with matplotlib.rc_context({"font.size": fontsize}):
        fig = _new_figure(size)
        if len(keep) == 2:
            if len(circular) == 1:
                artists = _draw_joint_polar(fig, cd, lay, levels, title, fontsize)
                kind = "polar"
            else:
                artists = _draw_joint(fig, cd, lay, levels, title, fontsize)
                kind = "joint"
        else:
            artists = _draw_line(fig, cd, lay, levels, title, fontsize, polar=bool(circular))
            kind = "polar" if circular else "line"
    return fig, PlotResult(None, kind, size, title, levels, artists, notes)


def _build_grid_product(ds, lay, name, selection, size, notes):
    """``--field NAME`` for a grid product: one cell's grid drawn like its density."""
    import matplotlib

    da, label = grid_field_values(ds, lay, name)
    cells = [d for d in da.dims if d not in lay.names]
    for k in selection:
        if k not in ds.dims:
            raise _no_such_dim(ds, k, lay.cell_dims)
        if k not in cells:
            raise InputError(f"--cell {k}=...: {k} is not a cell dimension of {name} "
                             f"({', '.join(cells) or 'none'})" + closest_names(k, cells))
    missing = [d for d in cells if d not in selection and ds.sizes[d] > 1]
    if missing:
        grids = ", ".join(d for d in da.dims if d in lay.names)
        raise InputError(f"--field {name} is a grid per cell ({grids}): choose one cell: "
                         + "; ".join(f"--cell {d}=VALUE with {_describe_values(ds, d)}" for d in missing))
    idx, chosen = {}, {}
    for d in cells:
        i = _index_for(ds, d, selection[d], notes) if d in selection else 0
        idx[d] = i
        chosen[d] = _value_text(ds, d, i)
    da = da.isel(idx)
    density_idx = {d: i for d, i in idx.items() if d in ds["density"].dims} if "density" in ds.data_vars else {}
    size = tuple(size) if size is not None else DEFAULT_SIZE
    fontsize = _font_size(size)
    title = label.split(" [")[0] + (f" ({_where(chosen)})" if chosen else "")
    with matplotlib.rc_context({"font.size": fontsize}):
        fig = _new_figure(size)
        artists = _draw_grid_product(fig, ds, lay, da, label, density_idx, title, fontsize)
    return fig, PlotResult(None, "grid", size, title, None, artists, notes)


def _slug(text: str) -> str:
    return re.sub(r"[^A-Za-z0-9.+-]+", "_", text).strip("_")


def default_picture_path(output: Path, field=None, chosen_text: dict | None = None) -> Path:
    """``OUTPUT_cell_lat60.5_lon21.png`` / ``OUTPUT_map_n_samples.png`` beside the output file."""
    parts = [output.stem, "map" if field else "cell"]
    if field:
        parts.append(_slug(field))
    for k, v in (chosen_text or {}).items():
        parts.append(_slug(f"{k}{v}"))
    return output.with_name("_".join(parts) + ".png")


def plot_output(path, *, cell=None, field=None, variables=None, out=None, size=None,
                masses=HDR_MASSES) -> PlotResult:
    """Open an output file, draw the requested picture and write it as a PNG of ``size`` pixels.

    ``size`` None: a map's canvas is shaped like the map, other pictures
    are ``DEFAULT_SIZE``.
    """
    require_matplotlib()
    path = Path(path)
    ds = open_output(path)
    try:
        lay = layout(ds)
        fig, result = build_figure(ds, cell=cell, field=field, variables=variables, size=size, masses=masses,
                                   lay=lay)
        target = Path(out) if out is not None else default_picture_path(path, field, cell)
        if target.suffix.lower() != ".png":
            raise InputError(f"-o {target}: the picture is written as PNG; name a .png file")
        if not target.parent.exists():
            raise InputError(f"-o {target}: folder {target.parent} does not exist")
        fig.savefig(target, dpi=DPI, format="png")
        result.path = target
        return result
    finally:
        ds.close()
