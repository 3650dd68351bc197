"""Drawing on a matplotlib Figure (Agg canvas only): joint, line, polar, map and grid-product pictures."""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import xarray as xr

from ..errors import InputError
from .style import (MAX_PIXELS, MIN_PIXELS, COLOUR_MAP, DIVERGING, CONSTANT_DIGITS, DEFAULT_SIZE, DPI, FIT_MARGIN, FIT_MASS, FRAME, GRID, HALO,
                    LATITUDE_NAMES, LINE, NO_DATA, require_matplotlib)
from .fields import CellDensity, _integrate_to, cd_units, hdr_levels


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


def _draw_difference(fig, lay, da, significant, label, box, fontsize):
    """A density difference of one cell: diverging colours centred on 0, significant nodes outlined."""
    names = [d for d in da.dims if d in lay.names]
    x, y = names
    values = np.asarray(da.transpose(x, y).values, dtype=float)
    axes = {v: np.asarray(da[v].values, dtype=float) for v in names}
    gs = fig.add_gridspec(1, 2, width_ratios=[5, 0.22])
    ax = fig.add_subplot(gs[0, 0])
    cax = fig.add_subplot(gs[0, 1])
    reach = float(np.nanmax(np.abs(values))) or 1.0
    levels = nice_levels(-reach, reach, n=12)
    reach = max(abs(levels[0]), abs(levels[-1]))
    levels = nice_levels(-reach, reach, n=12)
    sx, sy = _within(axes[x], *box[x]), _within(axes[y], *box[y])
    X, Y = axes[x][sx], axes[y][sy]
    fill = ax.contourf(X, Y, values[sx, sy].T, levels=levels, cmap=DIVERGING, vmin=-reach, vmax=reach)
    outline = None
    if significant is not None:
        sig = np.asarray(significant.transpose(x, y).values, dtype=float)[sx, sy].T
        if sig.any():
            outline = ax.contour(X, Y, sig, levels=[0.5], colors=LINE, linewidths=1.6)
    units = label.split(" [")[1].rstrip("]") if " [" in label else ""
    bar = _colour_bar(fig, fill, levels, f"difference [{units}]" if units else "difference", cax=cax)
    note = ("black outline: nodes where the change is significant (local test, false discovery rate "
            f"{significant.attrs.get('alpha', 0.05):g})" if significant is not None else "no significance in the file")
    ax.text(0.01, 0.99, note if outline is not None or significant is None else note + ": none here",
            transform=ax.transAxes, ha="left", va="top", fontsize=fontsize * 0.8, color=LINE,
            bbox=dict(facecolor="white", edgecolor=FRAME, alpha=0.85, boxstyle="round,pad=0.3"))
    ax.set_xlim(*box[x])
    ax.set_ylim(*box[y])
    ax.set_xlabel(lay.label(x))
    ax.set_ylabel(lay.label(y))
    _house_style(ax, grid=False)
    return {"axes": ax, "fill": fill, "outline": outline, "colour_bar": bar, "levels": levels}


def _draw_grid_product(fig, ds, lay, da, label, idx, title, fontsize, significant=None):
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
    if da.name == "density_difference" and len(names) == 2:
        artists = _draw_difference(fig, lay, da, significant, label, box, fontsize)
    elif len(names) == 2:
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


