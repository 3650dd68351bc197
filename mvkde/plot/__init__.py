"""Quick-look pictures of density outputs (``mvkde plot``).

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

import re
from pathlib import Path

import numpy as np
import xarray as xr

from ..errors import InputError, closest_names
from ..inspect import OutputLayout, layout, open_output
from .style import COLOUR_MAP, DEFAULT_SIZE, DPI, HDR_MASSES, require_matplotlib
from .fields import (parse_selection, parse_size, _apply_selection, _describe_values, _fix_cell, _index_for, _no_such_dim, _value_text,
                     cell_density, field_values, grid_field_values, hdr_levels, is_grid_product)
from .draw import (PlotResult, _draw_grid_product, _draw_joint, _draw_joint_polar, _draw_line, _draw_map,
                   _font_size, _new_figure, map_size)


__all__ = ["HDR_MASSES", "COLOUR_MAP", "hdr_levels", "parse_selection", "parse_size", "field_values",
           "cell_density", "build_figure", "plot_output", "PlotResult", "require_matplotlib"]

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
    significant = None
    if name == "density_difference" and "density_change_significant" in ds.data_vars:
        significant = ds["density_change_significant"].isel(idx)
        for d in idx:  # a compared label: the density box of that label (window_compared -> window)
            base = d[: -len("_compared")] if d.endswith("_compared") else None
            if base and base in ds["density"].dims:
                density_idx[base] = list(ds[base].values).index(ds[d].values[idx[d]])
    size = tuple(size) if size is not None else DEFAULT_SIZE
    fontsize = _font_size(size)
    title = label.split(" [")[0] + (f" ({_where(chosen)})" if chosen else "")
    with matplotlib.rc_context({"font.size": fontsize}):
        fig = _new_figure(size)
        artists = _draw_grid_product(fig, ds, lay, da, label, density_idx, title, fontsize, significant)
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

