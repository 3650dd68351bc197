"""Quick-look pictures of density outputs (``mvkde plot``; pipeline layer).

Four kinds of picture, chosen from the file and the request:

* ``joint``: one cell of a 2-variable output (or two variables of a larger
  one, the rest integrated out): filled contours of the joint density, the
  50 / 90 / 99 % highest-density-region (HDR) contour lines and the two
  marginal densities on the sides;
* ``line``: one cell of a 1-variable output (or one variable of a larger
  one): the density with its HDR levels;
* ``polar``: the same when a variable is circular (a ``period`` on its
  coordinate or in the provenance): the direction goes round the circle;
* ``map``: a per-cell field (``n_samples``, ``grid_mass``, a bandwidth
  entry, an exceedance probability ...) over the two remaining cell
  dimensions, or as points over one (stations).

matplotlib is an optional extra: it is imported inside the functions that
draw, never at module import, and only its Agg canvas is used (no display,
no pyplot global state).  Colours come from ``cividis``, a perceptually
uniform colour map designed to read the same with red-green colour vision
deficiency (Nunez, Anderton & Renslow 2018, PLoS ONE 13, e0199239); HDR
contours are told apart by line style, not colour.

HDR levels follow Hyndman (1996, The American Statistician 50, 120-126):
the level f_a is the density value for which the region {f >= f_a} holds
probability a; here it is computed from the gridded density
(:func:`mvkde.products.hdr_levels_from_grid`), i.e. as a fraction of the
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
#: line style of each HDR contour (the level is told by the style, so colour is free for the density)
HDR_STYLES = {0.5: "solid", 0.9: "dashed", 0.99: "dotted"}
COLOUR_MAP = "cividis"
LINE = "#202020"          # marginals and points: near-black, plain
HALO = "white"            # drawn under each contour line so it reads on dark and light fills
NO_DATA = "#c8c8c8"       # map background where a cell has no value
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

def parse_size(size=None, width=None, height=None) -> tuple[int, int]:
    """Pixels (width, height) from ``'WxH'`` or separate width/height (defaults fill the rest)."""
    if size is not None and (width is not None or height is not None):
        raise InputError("give --size WxH or --width/--height, not both")
    if size is not None:
        m = re.fullmatch(r"\s*(\d+)\s*[xX]\s*(\d+)\s*", str(size))
        if not m:
            raise InputError(f"--size {size!r} is not WIDTHxHEIGHT in pixels, e.g. --size 1200x900")
        width, height = m.group(1), m.group(2)
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


def _index_for(ds, dim: str, text: str) -> int:
    """Position along ``dim``: nearest for numbers, exact for labels."""
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
        vals = values.astype(float)
        lo, hi = np.nanmin(vals), np.nanmax(vals)
        step = np.nanmax(np.abs(np.diff(np.sort(vals)))) if n > 1 else 0.0
        if not (lo - step <= x <= hi + step) or not math.isfinite(x):
            raise InputError(f"--cell {dim}={text}: outside the values of {dim} ({_describe_values(ds, dim)})")
        return int(np.nanargmin(np.abs(vals - x)))
    if values.dtype.kind == "M":
        import pandas as pd

        try:
            t = np.datetime64(pd.Timestamp(text))
        except (ValueError, TypeError):
            raise InputError(f"--cell {dim}={text!r} is not a date; {dim} runs from {values.min()} "
                             f"to {values.max()}") from None
        return int(np.argmin(np.abs(values - t)))
    labels = [str(v) for v in values.tolist()]
    if text in labels:
        return labels.index(text)
    raise InputError(f"--cell {dim}={text!r}: no such {dim}; give {_describe_values(ds, dim)}"
                     + closest_names(text, labels))


def _apply_selection(obj, ds, selection: dict, allowed) -> tuple:
    """isel ``obj`` by the selection (dims in ``allowed``); returns (obj, {dim: chosen value text})."""
    chosen = {}
    idx = {}
    for dim, text in selection.items():
        if dim not in allowed:
            raise InputError(f"--cell {dim}=...: {dim} is not a dimension to choose here (choose among: "
                             f"{', '.join(allowed) or 'nothing'})" + closest_names(dim, list(allowed)))
        i = _index_for(ds, dim, text)
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
    a, b = lay.names[0], lay.names[-1]
    return (", ".join(per_cell) + f", bandwidth[{a},{b}] (an entry of H), "
            f"exceedance[{a}>VALUE{',' + b + '>VALUE' if lay.d > 1 else ''}] (P(X > value), from the density)")


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
    if m and m.group(1) == "exceedance" and "exceedance" not in ds.data_vars:
        return _exceedance_field(ds, lay, name, m.group(2))
    if name not in ds.data_vars:
        raise InputError(f"--field {name!r} is not in the file; fields: {_field_help(ds, lay)}"
                         + closest_names(name, list(ds.data_vars)))
    da = ds[name]
    grid_dims = [d for d in da.dims if d in lay.names or d in ("variable_row", "variable_column")]
    if grid_dims:
        hint = ("bandwidth[A,B] picks one entry" if name == "bandwidth"
                else "it is a grid per cell: plot one cell without --field")
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

def _fix_cell(ds, lay, selection):
    """Index of the chosen cell (every cell dim fixed) and the text of the choice."""
    missing = [d for d in lay.cell_dims if d not in selection and ds.sizes[d] > 1]
    if missing:
        raise InputError("choose one cell: " + "; ".join(f"--cell {d}=VALUE with {_describe_values(ds, d)}"
                                                         for d in missing)
                         + " (or --field NAME for a map of a per-cell value)")
    idx, chosen = {}, {}
    for d in lay.cell_dims:
        i = _index_for(ds, d, selection[d]) if d in selection else 0
        idx[d] = i
        chosen[d] = _value_text(ds, d, i)
    extra = [k for k in selection if k not in lay.cell_dims]
    if extra:
        raise InputError(f"--cell {extra[0]}=...: {extra[0]} is not a cell dimension of the file "
                         f"(cell dimensions: {', '.join(lay.cell_dims) or 'none'})"
                         + closest_names(extra[0], lay.cell_dims))
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
    """What was drawn: the file, the picture kind, its size and the HDR levels (mass -> density)."""

    path: Path | None
    kind: str
    size: tuple
    title: str
    hdr_levels: dict | None = None
    artists: dict = field(default_factory=dict, repr=False)


def _font_size(size) -> float:
    return float(np.clip(10.0 * min(size[0] / DEFAULT_SIZE[0], size[1] / DEFAULT_SIZE[1]) ** 0.5, 6.0, 16.0))


def _new_figure(size):
    require_matplotlib()
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(size[0] / DPI, size[1] / DPI), dpi=DPI, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def _hdr_key(ax, masses, fontsize):
    from matplotlib.lines import Line2D

    handles = [Line2D([], [], color=LINE, linestyle=HDR_STYLES.get(m, "solid"),
                      label=f"{100 * m:g} % highest-density region") for m in masses]
    return handles


def _sorted_levels(levels: dict):
    """Increasing distinct levels with their masses (contour needs increasing levels)."""
    pairs = sorted(((lv, m) for m, lv in levels.items() if np.isfinite(lv) and lv > 0), key=lambda p: p[0])
    out, seen = [], set()
    for lv, m in pairs:
        if lv not in seen:
            out.append((lv, m))
            seen.add(lv)
    return [p[0] for p in out], [p[1] for p in out]


def _contours(ax, X, Y, Z, levels: dict):
    lv, masses = _sorted_levels(levels)
    if not lv:
        return None
    styles = [HDR_STYLES.get(m, "solid") for m in masses]
    # a light halo with the same dash pattern keeps each style readable on dark and light fills
    import matplotlib

    with matplotlib.rc_context({"lines.scale_dashes": False}):
        ax.contour(X, Y, Z, levels=lv, colors=HALO, linewidths=3.0, linestyles=styles)
        return ax.contour(X, Y, Z, levels=lv, colors=LINE, linewidths=1.3, linestyles=styles)


def _compass(ax, lay, var):
    """Degrees clockwise from north (the meteorological convention) for a period of 360."""
    if abs(lay.periods[var] - 360.0) < 1e-9:
        ax.set_theta_zero_location("N")
        ax.set_theta_direction(-1)


def _draw_joint(fig, cd: CellDensity, lay, levels, title, fontsize):
    x, y = cd.names
    X, Y, F = cd.axes[x], cd.axes[y], cd.values
    gs = fig.add_gridspec(2, 3, width_ratios=[5, 1.4, 0.22], height_ratios=[1.4, 5])
    ax = fig.add_subplot(gs[1, 0])
    top = fig.add_subplot(gs[0, 0], sharex=ax)
    side = fig.add_subplot(gs[1, 1], sharey=ax)
    cax = fig.add_subplot(gs[1, 2])
    key = fig.add_subplot(gs[0, 1:])
    key.axis("off")
    fmax = float(np.max(F))
    fill = ax.contourf(X, Y, F.T, levels=np.linspace(0.0, fmax if fmax > 0 else 1.0, 13), cmap=COLOUR_MAP)
    lines = _contours(ax, X, Y, F.T, levels)
    fig.colorbar(fill, cax=cax, label=f"density [{cd_units(lay, cd.names)}]")
    ax.set_xlabel(lay.label(x))
    ax.set_ylabel(lay.label(y))
    mx = np.trapezoid(F, Y, axis=1)
    my = np.trapezoid(F, X, axis=0)
    top.plot(X, mx, color=LINE, linewidth=1.3)
    side.plot(my, Y, color=LINE, linewidth=1.3)
    handles = _hdr_key(key, [m for m in levels], fontsize)
    if cd.on_point_mass is not None:
        other = [v for v in cd.names if v != cd.point_mass_var][0]
        target, axis_vals = (top, X) if other == x else (side, Y)
        if other == x:
            top.plot(X, mx + cd.on_point_mass, color=LINE, linewidth=1.0, linestyle="dashed")
        else:
            side.plot(my + cd.on_point_mass, Y, color=LINE, linewidth=1.0, linestyle="dashed")
        from matplotlib.lines import Line2D

        handles.append(Line2D([], [], color=LINE, linestyle="dashed", linewidth=1.0,
                              label=f"marginal incl. {cd.point_mass_var} <= {lay.point_mass[cd.point_mass_var]:g}"))
    top.set_ylim(bottom=0)
    side.set_xlim(left=0)
    top.set_ylabel("marginal")
    side.set_xlabel("marginal")
    top.tick_params(labelbottom=False)
    side.tick_params(labelleft=False)
    key.legend(handles=handles, loc="center", frameon=False, fontsize=fontsize * 0.85)
    fig.suptitle(title, fontsize=fontsize * 1.1)
    return {"contours": lines, "fill": fill, "axes": ax}


def cd_units(lay, names) -> str:
    from .units import density_units

    return density_units([lay.units.get(v, "") for v in names]) or "1"


def _draw_joint_polar(fig, cd: CellDensity, lay, levels, title, fontsize):
    direction = next(v for v in cd.names if v in lay.periods)
    radial = next(v for v in cd.names if v != direction)
    F = cd.values if cd.names[0] == direction else cd.values.T        # (direction, radial)
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
    fmax = float(np.max(F))
    fill = ax.contourf(theta, R, F.T, levels=np.linspace(0.0, fmax if fmax > 0 else 1.0, 13), cmap=COLOUR_MAP)
    lines = _contours(ax, theta, R, F.T, levels)
    ax.set_rlim(R[0], R[-1])
    ax.set_title(f"angle: {lay.label(direction)}; radius: {lay.label(radial)}", fontsize=fontsize * 0.9)
    fig.colorbar(fill, cax=cax, label=f"density [{cd_units(lay, cd.names)}]")
    ax.legend(handles=_hdr_key(ax, list(levels), fontsize), loc="lower left", bbox_to_anchor=(-0.12, -0.12),
              frameon=False, fontsize=fontsize * 0.8)
    fig.suptitle(title, fontsize=fontsize * 1.1)
    return {"contours": lines, "fill": fill, "axes": ax}


def _draw_line(fig, cd: CellDensity, lay, levels, title, fontsize, polar: bool):
    (x,) = cd.names
    X, F = cd.axes[x], cd.values
    if polar:
        period = lay.periods[x]
        if X[-1] - X[0] < period * (1 - 1e-9):
            X, F = np.append(X, X[0] + period), np.append(F, F[:1])
        ax = fig.add_subplot(projection="polar")
        _compass(ax, lay, x)
        theta = 2 * np.pi * X / period
        ax.fill(theta, F, color=_cmap_colour(0.75), alpha=0.6, linewidth=0)
        ax.plot(theta, F, color=LINE, linewidth=1.4)
        circle = np.linspace(0, 2 * np.pi, 361)
        for m, lv in levels.items():
            if np.isfinite(lv):
                ax.plot(circle, np.full_like(circle, lv), color=LINE, linewidth=1.0,
                        linestyle=HDR_STYLES.get(m, "solid"))
        ax.set_rlim(0, float(np.max(F)) * 1.05)
        ax.set_title(f"angle: {lay.label(x)}; radius: density [{cd_units(lay, [x])}]", fontsize=fontsize * 0.9)
        ax.legend(handles=_level_key(levels), loc="lower left", bbox_to_anchor=(-0.15, -0.12), frameon=False,
                  fontsize=fontsize * 0.8)
    else:
        ax = fig.add_subplot()
        ax.fill_between(X, F, color=_cmap_colour(0.75), alpha=0.6, linewidth=0)
        ax.plot(X, F, color=LINE, linewidth=1.4)
        for m, lv in levels.items():
            if np.isfinite(lv):
                ax.axhline(lv, color=LINE, linewidth=1.0, linestyle=HDR_STYLES.get(m, "solid"))
        if cd.point_mass_probability is not None and cd.point_mass_var == x:
            ax.text(0.98, 0.95, f"P({x} <= {lay.point_mass[x]:g}) = {cd.point_mass_probability:.3f} "
                                f"(not drawn)", transform=ax.transAxes, ha="right", va="top", fontsize=fontsize * 0.85)
        ax.set_ylim(bottom=0)
        ax.set_xlabel(lay.label(x))
        ax.set_ylabel(f"density [{cd_units(lay, [x])}]")
        ax.legend(handles=_level_key(levels), loc="upper left", frameon=False, fontsize=fontsize * 0.85)
    fig.suptitle(title, fontsize=fontsize * 1.1)
    return {"axes": ax}


def _level_key(levels):
    from matplotlib.lines import Line2D

    return [Line2D([], [], color=LINE, linestyle=HDR_STYLES.get(m, "solid"), linewidth=1.0,
                   label=f"level of the {100 * m:g} % highest-density region") for m in levels]


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


def _draw_map(fig, ds, da: xr.DataArray, label, title, fontsize):
    values = np.asarray(da.values, dtype=float)
    if not np.isfinite(values).any():
        raise InputError(f"{label}: no finite value in the chosen cells")
    ax = fig.add_subplot()
    ax.set_facecolor(NO_DATA)
    if da.ndim == 2:
        ydim, xdim = da.dims
        if _is_latitude(ds, xdim) and not _is_latitude(ds, ydim):
            ydim, xdim = xdim, ydim
        grid = da.transpose(ydim, xdim)
        xs = ds[xdim].values if xdim in ds.coords else np.arange(da.sizes[xdim])
        ys = ds[ydim].values if ydim in ds.coords else np.arange(da.sizes[ydim])
        numeric = np.asarray(xs).dtype.kind in "iuf" and np.asarray(ys).dtype.kind in "iuf"
        if not numeric:
            xs, ys = np.arange(len(xs)), np.arange(len(ys))
        mesh = ax.pcolormesh(xs, ys, np.asarray(grid.values, dtype=float), shading="nearest", cmap=COLOUR_MAP)
        if not numeric:
            ax.set_xticks(xs, [str(v) for v in ds[xdim].values], rotation=60)
            ax.set_yticks(ys, [str(v) for v in ds[ydim].values])
        fig.colorbar(mesh, ax=ax, label=label)
        ax.set_xlabel(_coord_label(ds, xdim))
        ax.set_ylabel(_coord_label(ds, ydim))
        if _is_latitude(ds, ydim) and numeric:
            ax.set_aspect(1.0 / max(0.05, math.cos(math.radians(float(np.nanmean(ys))))))
        missing = int((~np.isfinite(values)).sum())
        if missing:
            ax.set_title(f"grey: {missing} cell(s) without a value", fontsize=fontsize * 0.85)
        artist = mesh
    else:
        (dim,) = da.dims
        pos = np.arange(da.sizes[dim])
        coord = ds[dim].values if dim in ds.coords else pos
        numeric = np.asarray(coord).dtype.kind in "iuf"
        xs = coord if numeric else pos
        ax.set_facecolor("white")
        artist = ax.plot(xs, values, marker="o", linestyle="none", color=LINE, markersize=5)[0]
        if not numeric:
            ax.set_xticks(pos, [str(v) for v in coord], rotation=45, ha="right")
        ax.set_xlabel(_coord_label(ds, dim))
        ax.set_ylabel(label)
        ax.grid(True, color="#e0e0e0", linewidth=0.6)
    fig.suptitle(title, fontsize=fontsize * 1.1)
    return {"axes": ax, "mesh": artist}


def _coord_label(ds, dim) -> str:
    if dim in ds.coords:
        u = ds[dim].attrs.get("units")
        return f"{dim} [{u}]" if u else dim
    return dim


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


def build_figure(ds: xr.Dataset, *, cell=None, field=None, variables=None, size=DEFAULT_SIZE,
                 masses=HDR_MASSES, lay: OutputLayout | None = None):
    """Draw the requested picture on a new figure: returns (figure, PlotResult without a path)."""
    require_matplotlib()
    import matplotlib

    lay = lay or layout(ds)
    selection = dict(cell or {})
    fontsize = _font_size(size)
    with matplotlib.rc_context({"font.size": fontsize}):
        fig = _new_figure(size)
        if field is not None:
            if variables is not None:
                raise InputError("--variables applies to a cell's density, not to --field maps")
            da, label = field_values(ds, lay, field)
            free = list(da.dims)
            da, chosen = _apply_selection(da, ds, selection, free)
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
            artists = _draw_map(fig, ds, da, label, title, fontsize)
            return fig, PlotResult(None, "map", tuple(size), title, None, artists)
        keep = _choose_variables(lay, variables)
        idx, chosen = _fix_cell(ds, lay, selection)
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
        return fig, PlotResult(None, kind, tuple(size), title, levels, artists)


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


def plot_output(path, *, cell=None, field=None, variables=None, out=None, size=DEFAULT_SIZE,
                masses=HDR_MASSES) -> PlotResult:
    """Open an output file, draw the requested picture and write it as a PNG of ``size`` pixels."""
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
