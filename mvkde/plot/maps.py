"""Maps of a per-cell field: over two cell dims, or as points over one (stations); bit flags as categories."""

from __future__ import annotations

import math

import numpy as np
import xarray as xr

from ..errors import InputError
from .draw import _colour_bar, _coord_label, _font_size, _house_style, _short_label, _wrap, is_constant, nice_levels
from .style import (COLOUR_MAP, CONSTANT_DIGITS, DEFAULT_SIZE, DIVERGING, DPI, FRAME, LATITUDE_NAMES, LINE,
                    MAX_PIXELS, MIN_PIXELS, NO_DATA, cmap_colour)


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
    return [cmap_colour(f) for f in np.linspace(0.1, 0.85, n_flagged)]


def _ratio_mesh(ax, xs, ys, grid):
    """A ratio map: log scale centred on 1 (halving and doubling equally far), diverging colours."""
    from matplotlib.colors import LogNorm

    finite = grid[np.isfinite(grid) & (grid > 0)]
    reach = float(np.nanmax(np.abs(np.log10(finite)))) if finite.size else 1.0
    reach = max(reach, np.log10(1.5))
    return ax.pcolormesh(xs, ys, np.where(grid > 0, grid, np.nan), shading="nearest", cmap=DIVERGING,
                         norm=LogNorm(10 ** -reach, 10 ** reach))


def _map_colour_bar(fig, ax, mesh, levels, label, stretch):
    """The colour bar beside a map (round levels, or a log-scale ratio bar when ``levels`` is None)."""
    if stretch != 1.0:
        ax.set_aspect(stretch)
    ax.apply_aspect()
    box = ax.get_position()
    W, H = fig.get_size_inches() * DPI
    cax = fig.add_axes((box.x1 + 14 / W, box.y0, 16 / W, box.height))
    if levels is None:
        return fig.colorbar(mesh, cax=cax, label="probability ratio (log scale; 1 = no change)")
    return _colour_bar(fig, mesh, levels, _short_label(label), cax=cax)


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
        elif da.name == "probability_ratio":
            mesh, levels = _ratio_mesh(ax, xs, ys, grid), None
        else:
            levels = nice_levels(lo, hi)
            norm_c = BoundaryNorm(levels, 256, extend="neither")
            mesh = ax.pcolormesh(xs, ys, grid, shading="nearest", cmap=COLOUR_MAP, norm=norm_c)
        if categories is None and not constant:
            artists["colour_bar"] = _map_colour_bar(fig, ax, mesh, levels, label, stretch)
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
