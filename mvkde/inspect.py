"""What an output file holds and how it was made (``mvkde inspect``; pipeline layer).

:func:`open_output` opens a density file written by ``mvkde run`` and
:func:`layout` reads its structure (the variables of the density and their
grids, the cell dimensions, circular variables, the point mass, the
provenance record).  :func:`summarise` collects everything a reader wants to
know into a plain dict (the ``--json`` form) and :func:`format_summary` turns
it into text.  Nothing here reads the density values themselves: the per-cell
diagnostics (``n_samples``, ``bandwidth``, ``grid_mass``, ``flags``) are
enough, so inspecting a large archive is cheap.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import xarray as xr

from .errors import InputError

__all__ = ["OutputLayout", "open_output", "layout", "summarise", "format_summary", "to_json"]

#: what to do about each quality flag written by the runner (keys: flag_meanings words)
FLAG_ADVICE = {
    "too_few_samples": "lower input.min_samples or pool more samples (a longer period, no season split)",
    "fit_failed": "fit that cell's sample with mvkde.fit to see the error",
    "bandwidth_not_converged": "try another estimator.bandwidth selector for these cells",
    "bandwidth_at_edge": "the selector stopped at the edge of its search: check these cells",
    "grid_mass_off_by_more_than_1_percent": "where grid_too_coarse_for_the_bandwidth is flagged too, use more "
                                            "nodes (grid.size); elsewhere mass lies outside the grid: widen "
                                            "grid.limits (or set variable bounds and a boundary method)",
    "subsampled": "input.max_samples subsampled these cells",
    "grid_too_coarse_for_the_bandwidth": "the node spacing exceeds 1.5 kernel standard deviations: products "
                                         "integrated on this grid are biased; use more nodes (grid.size)",
}


@dataclass
class OutputLayout:
    """The structure of a density output."""

    names: list                     # variables of the density, in the order of its grid dims
    cell_dims: list                 # every other dim of the density (cells, seasons, stations)
    units: dict                     # variable -> units ('' when none)
    long_names: dict                # variable -> long_name (the name itself when none)
    periods: dict                   # variable -> period of a circular variable (absent: not circular)
    point_mass: dict = field(default_factory=dict)   # variable -> threshold (at most one entry)
    provenance: dict | None = None
    provenance_error: str | None = None

    @property
    def d(self) -> int:
        return len(self.names)

    def label(self, name: str) -> str:
        """'long name (name) [units]' for an axis."""
        long = self.long_names.get(name, name)
        text = name if long in ("", name) else f"{long} ({name})"
        u = self.units.get(name, "")
        return f"{text} [{u}]" if u else text


def open_output(path) -> xr.Dataset:
    """Open an output (netCDF file or Zarr store, lazily) with a clear error for a missing or unreadable one."""
    p = Path(path)
    if not p.exists():
        raise InputError(f"output file {p} not found")
    if p.is_dir():
        if not any((p / name).exists() for name in ("zarr.json", ".zgroup", ".zattrs")):
            raise InputError(f"{p} is a folder but not a Zarr store: name an output file (.nc) or store (.zarr)")
        try:
            import zarr  # noqa: F401
        except ImportError:
            raise InputError(f"{p} is a Zarr store: reading it needs the zarr package: "
                             "pip install 'mvkde[zarr]'") from None
        try:
            return xr.open_dataset(p, engine="zarr", chunks={})
        except (OSError, ValueError, KeyError) as exc:
            raise InputError(f"cannot open {p} as a Zarr store: {exc}") from None
    try:
        return xr.open_dataset(p, engine="netcdf4", chunks={})
    except (OSError, ValueError) as exc:
        raise InputError(f"cannot open {p} as netCDF: {exc}") from None


def _bytes_on_disk(p: Path) -> int:
    """Size of a file, or of every file in a store (a folder)."""
    if p.is_dir():
        return sum(f.stat().st_size for f in p.rglob("*") if f.is_file())
    return p.stat().st_size


def _provenance(ds: xr.Dataset):
    text = ds.attrs.get("provenance")
    if text is None:
        return None, "the file has no provenance attribute"
    try:
        rec = json.loads(text)
    except (TypeError, ValueError) as exc:
        return None, f"the provenance attribute is not valid JSON ({exc})"
    if not isinstance(rec, dict):
        return None, "the provenance attribute is not a JSON object"
    return rec, None


def layout(ds: xr.Dataset) -> OutputLayout:
    """Variables, cell dimensions, periods and point mass of an output (from its labels and provenance)."""
    if "density" not in ds.data_vars:
        raise InputError("the file has no 'density' variable: it is not a density output of mvkde run "
                         f"(data variables: {', '.join(map(str, ds.data_vars)) or 'none'})")
    rec, err = _provenance(ds)
    dens_dims = list(ds["density"].dims)
    wf_vars = {}
    names = None
    if rec is not None:
        wf = rec.get("workflow") or {}
        wf_vars = wf.get("variables") or {}
        listed = (wf.get("input") or {}).get("variables")
        if listed and all(v in dens_dims for v in listed):
            names = list(listed)
    if names is None and "variable_row" in ds.coords:
        listed = [str(v) for v in ds["variable_row"].values]
        if all(v in dens_dims for v in listed):
            names = listed
    if names is None:
        cell_like = set(ds["n_samples"].dims) if "n_samples" in ds.data_vars else set()
        names = [d for d in dens_dims if d not in cell_like]
    cell_dims = [d for d in dens_dims if d not in names]
    names = [d for d in dens_dims if d in names]  # the density's own order
    units, long_names, periods, point_mass = {}, {}, {}, {}
    for v in names:
        attrs = ds[v].attrs if v in ds.coords else {}
        units[v] = str(attrs.get("units", ""))
        long_names[v] = str(attrs.get("long_name", v))
        table = wf_vars.get(v) or {}
        period = attrs.get("period", table.get("period"))
        if period is not None and _finite_positive(period):
            periods[v] = float(period)
        if table.get("point_mass") is not None and "point_mass_probability" in ds.data_vars:
            point_mass[v] = float(table["point_mass"])
    return OutputLayout(names, cell_dims, units, long_names, periods, point_mass, rec, err)


def _finite_positive(x) -> bool:
    try:
        x = float(x)
    except (TypeError, ValueError):
        return False
    return math.isfinite(x) and x > 0


# ---------------------------------------------------------------------------
# the summary
# ---------------------------------------------------------------------------

def _plain(x):
    """JSON-ready Python value: numpy scalars and arrays unwrapped, NaN -> None."""
    if isinstance(x, dict):
        return {str(k): _plain(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_plain(v) for v in x]
    if isinstance(x, np.ndarray):
        return [_plain(v) for v in x.tolist()]
    if isinstance(x, np.generic):
        x = x.item()
    if isinstance(x, float) and not math.isfinite(x):
        return None
    if isinstance(x, (bytes, bytearray)):
        return x.decode(errors="replace")
    return x


def _range(values) -> dict | None:
    v = np.asarray(values, dtype=float).ravel()
    v = v[np.isfinite(v)]
    if v.size == 0:
        return None
    return {"min": float(v.min()), "median": float(np.median(v)), "max": float(v.max()), "cells": int(v.size)}


def _coord_summary(ds: xr.Dataset, dim: str) -> dict:
    n = int(ds.sizes[dim])
    out = {"size": n}
    if dim not in ds.coords:
        return out
    values = ds[dim].values
    if values.dtype.kind in "iuf":
        out.update({"min": float(np.nanmin(values)), "max": float(np.nanmax(values))})
        if n <= 12:
            out["values"] = values.tolist()
    else:
        out["values"] = [str(v) for v in values.tolist()]
    u = ds[dim].attrs.get("units")
    if u:
        out["units"] = str(u)
    return out


def _flag_table(ds: xr.Dataset, lay: OutputLayout) -> dict | None:
    if "flags" not in ds.data_vars:
        return None
    var = ds["flags"]
    masks = np.atleast_1d(np.asarray(var.attrs.get("flag_masks", []), dtype=np.int64))
    meanings = str(var.attrs.get("flag_meanings", "")).split()
    if masks.size != len(meanings):
        meanings = [f"bit_{int(m)}" for m in masks]
    values = np.asarray(var.values).astype(np.int64)
    counts = {m: int(((values & int(bit)) != 0).sum()) for m, bit in zip(meanings, masks)}
    flagged = values != 0
    examples = []
    # one example cell per flag that occurs: the first cell carrying it
    firsts = sorted({int(np.flatnonzero((values.ravel() & int(bit)) != 0)[0])
                     for bit, m in zip(masks, meanings) if counts[m]})
    for idx in (np.unravel_index(i, values.shape) if values.ndim else () for i in firsts):
        where = {}
        for k, dim in enumerate(var.dims):
            c = ds[dim].values[idx[k]] if dim in ds.coords else idx[k]
            where[dim] = _plain(c if not isinstance(c, np.generic) else c.item())
        bits = int(values[tuple(idx)])
        examples.append({"cell": where, "flags": [m for m, b in zip(meanings, masks) if bits & int(b)]})
    return {"cells": int(values.size), "flagged_cells": int(flagged.sum()), "counts": counts,
            "examples": examples}


def _bandwidth_table(ds: xr.Dataset, lay: OutputLayout) -> dict | None:
    if "bandwidth" not in ds.data_vars:
        return None
    bw = ds["bandwidth"]
    rows = [str(v) for v in ds["variable_row"].values] if "variable_row" in ds.coords else lay.names
    H = np.asarray(bw.values, dtype=float)
    H = H.reshape(-1, H.shape[-2], H.shape[-1])
    entries, sd, corr = {}, {}, {}
    for i, a in enumerate(rows):
        ua = lay.units.get(a, "")
        sd[a] = _range(np.sqrt(np.where(H[:, i, i] >= 0, H[:, i, i], np.nan)))
        if sd[a] is not None:
            sd[a]["units"] = ua
        for j in range(i, len(rows)):
            b = rows[j]
            r = _range(H[:, i, j])
            if r is not None:
                ub = lay.units.get(b, "")
                r["units"] = " ".join(f"({u})" for u in (ua, ub) if u) if (ua or ub) else ""
            entries[f"{a},{b}"] = r
            if j > i:
                with np.errstate(invalid="ignore", divide="ignore"):
                    corr[f"{a},{b}"] = _range(H[:, i, j] / np.sqrt(H[:, i, i] * H[:, j, j]))
    return {"entries": entries, "kernel_sd": sd, "kernel_correlation": corr}


def _warnings(ds: xr.Dataset, lay: OutputLayout, flags: dict | None, n_cells: int) -> list[str]:
    out = []
    if lay.provenance_error:
        out.append(lay.provenance_error)
    if "grid_mass" in ds.data_vars:
        gm = np.asarray(ds["grid_mass"].values, dtype=float)
        empty = int(np.isnan(gm).sum())
        if empty:
            out.append(f"{empty} of {n_cells} cells have no density (NaN): see the flags")
    if flags:
        for meaning, count in flags["counts"].items():
            if count:
                hint = FLAG_ADVICE.get(meaning)
                out.append(f"{count} cells flagged {meaning}" + (f": {hint}" if hint else ""))
    if "failure_reason" in ds.data_vars:
        reasons = np.asarray(ds["failure_reason"].values).astype(str)
        distinct = sorted({r for r in reasons.ravel() if r})
        for r in distinct[:3]:
            out.append(f"{int((reasons == r).sum())} cells refused: {r}")
    # warnings a writer stored explicitly (a global attribute or a provenance entry)
    for source in (ds.attrs.get("warnings"), (lay.provenance or {}).get("warnings")):
        if source is None:
            continue
        if isinstance(source, str):
            try:
                source = json.loads(source)
            except ValueError:
                source = [source]
        out += [str(s) for s in (source if isinstance(source, list) else [source])]
    return out


def _labels(ds: xr.Dataset) -> dict:
    """The labelled samples of an output: windows with their dates, sources with their paths."""
    out = {}
    if "window" in ds.dims:
        starts = ds["window_start"].values if "window_start" in ds.coords else [None] * ds.sizes["window"]
        ends = ds["window_end"].values if "window_end" in ds.coords else [None] * ds.sizes["window"]
        out["window"] = [{"name": str(n), "start": None if a is None else str(a), "end": None if b is None else str(b)}
                         for n, a, b in zip(ds["window"].values, starts, ends)]
    if "source" in ds.dims:
        paths = ds["source_path"].values if "source_path" in ds.coords else [None] * ds.sizes["source"]
        out["source"] = [{"name": str(n), "path": None if p is None else str(p)}
                         for n, p in zip(ds["source"].values, paths)]
    return out


def _comparison(ds: xr.Dataset) -> dict | None:
    """The comparison settings of an output with ``[compare]`` (None without one)."""
    if "density_difference" not in ds.data_vars:
        return None
    a = ds["density_difference"].attrs
    dim = str(a.get("compared_dim", ""))
    compared = next((d for d in ds["density_difference"].dims if d.endswith("_compared")), None)
    return {"reference": a.get("reference"), "dim": dim, "alpha": a.get("alpha"),
            "compared": [str(v) for v in ds[compared].values] if compared else [],
            "common_bandwidth": a.get("common_bandwidth"),
            "outputs": [v for v in ("density_difference", "density_change_significant", "probability_ratio",
                                    "probability_ratio_lower", "probability_ratio_upper",
                                    "point_mass_probability_change", "return_period_and", "return_period_or")
                        if v in ds.data_vars]}


def summarise(ds: xr.Dataset, path=None) -> dict:
    """Everything ``mvkde inspect`` reports, as a JSON-ready dict.

    ``summary["provenance"]`` is the file's ``provenance`` attribute parsed
    as it is (``json.loads``), so it round-trips exactly.
    """
    lay = layout(ds)
    cell_shape = [int(ds.sizes[d]) for d in lay.cell_dims]
    n_cells = int(np.prod(cell_shape)) if cell_shape else 1
    variables = []
    for v in lay.names:
        ax = np.asarray(ds[v].values, dtype=float)
        entry = {"name": v, "units": lay.units[v], "long_name": lay.long_names[v],
                 "grid_size": int(ax.size), "limits": [float(ax[0]), float(ax[-1])]}
        if v in lay.periods:
            entry["period"] = lay.periods[v]
        if v in lay.point_mass:
            entry["point_mass_threshold"] = lay.point_mass[v]
        variables.append(entry)
    rec = lay.provenance or {}
    wf_est = (rec.get("workflow") or {}).get("estimator") or {}
    attrs = ds.attrs
    estimator = {
        "kernel": attrs.get("kernel", wf_est.get("kernel")),
        "form": attrs.get("kernel_form", wf_est.get("form")),
        "bandwidth": attrs.get("bandwidth_method", wf_est.get("bandwidth")),
        "parametrization": attrs.get("bandwidth_parametrization", wf_est.get("parametrization")),
        "boundary": attrs.get("boundary", wf_est.get("boundary")),
        "engine": wf_est.get("engine"),
        "engines_used": rec.get("engines"),
        "min_samples": attrs.get("min_samples"),
    }
    samples = {}
    for name in ("n_samples", "n_missing", "grid_mass", "point_mass_probability"):
        if name in ds.data_vars:
            samples[name] = _range(ds[name].values)
    flags = _flag_table(ds, lay)
    data_vars = {name: {"dims": list(var.dims), "units": str(var.attrs.get("units", "")),
                        "long_name": str(var.attrs.get("long_name", ""))}
                 for name, var in ds.data_vars.items()}
    p = Path(path) if path is not None else None
    summary = {
        "path": str(p.resolve()) if p else None,
        "size_bytes": _bytes_on_disk(p) if p else None,
        "title": attrs.get("title"),
        "dims": {str(k): int(v) for k, v in ds.sizes.items()},
        "cell_dims": lay.cell_dims,
        "cells": {d: _coord_summary(ds, d) for d in lay.cell_dims},
        "n_cells": n_cells,
        "variables": variables,
        "density_units": str(ds["density"].attrs.get("units", "")),
        "data_variables": data_vars,
        "estimator": estimator,
        "per_cell": samples,
        "bandwidth": _bandwidth_table(ds, lay),
        "flags": flags,
        "labels": _labels(ds),
        "comparison": _comparison(ds),
        "warnings": _warnings(ds, lay, flags, n_cells),
        "caution": attrs.get("caution"),
        "attributes": {k: v for k, v in attrs.items() if k not in ("provenance",)},
        "provenance": lay.provenance,
    }
    # the provenance is passed through untouched; everything else is made JSON-ready
    prov = summary.pop("provenance")
    summary = _plain(summary)
    summary["provenance"] = prov
    return summary


def to_json(summary: dict) -> str:
    return json.dumps(summary, indent=2, allow_nan=False)


# ---------------------------------------------------------------------------
# text
# ---------------------------------------------------------------------------

def _num(x) -> str:
    if x is None:
        return "-"
    if isinstance(x, int):
        return str(x)
    return f"{x:.4g}"


def _rng(r, unit="") -> str:
    if r is None:
        return "no finite values"
    u = f" {unit}" if unit else ""
    if r["min"] == r["max"]:
        return f"{_num(r['min'])}{u} in every cell"
    return f"min {_num(r['min'])}, median {_num(r['median'])}, max {_num(r['max'])}{u}"


def _size(n) -> str:
    if n is None:
        return "?"
    for unit in ("B", "kB", "MB", "GB"):
        if n < 1000 or unit == "GB":
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1000
    return str(n)


def _cell_text(name, c) -> str:
    if "values" in c and (len(c["values"]) <= 12):
        vals = ", ".join(_num(v) if isinstance(v, (int, float)) else str(v) for v in c["values"])
        return f"{name} {c['size']} ({vals})"
    if "min" in c:
        return f"{name} {c['size']} ({_num(c['min'])} .. {_num(c['max'])}{' ' + c['units'] if 'units' in c else ''})"
    return f"{name} {c['size']}"


def format_summary(s: dict) -> str:
    """The plain-text report of ``mvkde inspect``."""
    W = 13
    lines = [f"mvkde output {s['path']} ({_size(s['size_bytes'])})"]

    def row(key, text):
        lines.append(f"  {key:<{W}}{text}")

    if s.get("title"):
        row("title", s["title"])
    row("dims", ", ".join(f"{k} {v}" for k, v in s["dims"].items()))
    cells = " x ".join(_cell_text(d, s["cells"][d]) for d in s["cell_dims"]) or "one"
    row("cells", f"{s['n_cells']}: {cells}" if s["cell_dims"] else "1 (a single density)")
    for k, v in enumerate(s["variables"]):
        extra = ""
        if "period" in v:
            extra += f", circular with period {_num(v['period'])}"
        if "point_mass_threshold" in v:
            extra += f", point mass at values <= {_num(v['point_mass_threshold'])}"
        row("variables" if k == 0 else "",
            f"{v['name']} [{v['units'] or 'no units'}] {v['long_name'] if v['long_name'] != v['name'] else ''}".rstrip()
            + f"; grid {v['grid_size']} nodes on [{_num(v['limits'][0])}, {_num(v['limits'][1])}]{extra}")
    row("density", f"units {s['density_units'] or '-'}")
    for dim, items in (s.get("labels") or {}).items():
        for k, item in enumerate(items):
            where = (f"{item['start']} to {item['end']}" if dim == "window" else item.get("path")) or ""
            row(f"{dim}s" if k == 0 else "", f"{item['name']}: {where}".rstrip(": "))
    c = s.get("comparison")
    if c:
        row("comparison", f"{', '.join(c['compared'])} against {c['reference']} (dim {c['dim']}), local test at "
                          f"alpha {c['alpha']} (false discovery rate over each cell's grid); common H per pair")
        row("", "outputs: " + ", ".join(c["outputs"]))
    e = s["estimator"]
    row("estimator", f"kernel {e['kernel']} ({e['form']}), bandwidth selector {e['bandwidth']} "
                     f"({e['parametrization']}), boundary {e['boundary']}, engine {e['engine']}"
        + (f" (used: {', '.join(e['engines_used'])})" if e.get("engines_used") else ""))
    pc = s["per_cell"]
    if "n_samples" in pc:
        row("samples", "valid samples per cell: " + _rng(pc["n_samples"]) + (f"; missing values dropped: {_rng(pc['n_missing'])}"
                                                if pc.get("n_missing") else "")
            + (f"; fewer than {e['min_samples']} -> no density" if e.get("min_samples") is not None else ""))
    if "grid_mass" in pc:
        row("grid mass", _rng(pc["grid_mass"]) + " (integral over the grid; 1 = nothing lost outside)")
    if "point_mass_probability" in pc:
        row("point mass", _rng(pc["point_mass_probability"]) + " (probability)")
    bw = s.get("bandwidth")
    if bw:
        first = True
        for name, r in bw["kernel_sd"].items():
            row("bandwidth" if first else "", f"sqrt(H[{name},{name}]) {_rng(r, r['units'] if r else '')}")
            first = False
        for pair, r in bw["kernel_correlation"].items():
            row("", f"correlation H[{pair}] {_rng(r)}")
    f = s.get("flags")
    if f is not None:
        if f["flagged_cells"] == 0:
            row("flags", f"no cell flagged (of {f['cells']})")
        else:
            row("flags", f"{f['flagged_cells']} of {f['cells']} cells flagged: "
                + ", ".join(f"{k} {v}" for k, v in f["counts"].items() if v))
            for ex in f["examples"]:
                row("", "e.g. " + ", ".join(f"{k}={_num(v) if isinstance(v, float) else v}"
                                           for k, v in ex["cell"].items()) + ": " + ", ".join(ex["flags"]))
    if s["warnings"]:
        for k, w in enumerate(s["warnings"]):
            row("warnings" if k == 0 else "", w)
    else:
        row("warnings", "none")
    p = s.get("provenance")
    lines.append("  provenance")
    if p is None:
        lines.append("    (none recorded)")
    else:
        def prow(key, text):
            lines.append(f"    {key:<{W - 2}}{text}")

        prow("created", f"{p.get('created_utc', '?')} on {p.get('host', '?')}")
        if p.get("command_line"):
            prow("command", " ".join(map(str, p["command_line"])))
        sw = p.get("software") or {}
        prow("software", ", ".join(f"{k} {v}" for k, v in sw.items()))
        wf = p.get("workflow_file")
        if wf:
            prow("workflow", f"{wf.get('path')} (sha256 {wf.get('sha256')})")
        for o in p.get("overrides") or []:
            prow("override", str(o))
        for k, inp in enumerate(p.get("inputs") or []):
            if "dask_token" in inp:  # made by mvkde.densities from an object in memory
                prow("inputs" if k == 0 else "", f"{inp.get('type')} (dask token {inp['dask_token']})")
                continue
            prow("inputs" if k == 0 else "", f"{inp.get('path')} ({_size(inp.get('size_bytes'))}, "
                                             f"sha256 {inp.get('sha256')})")
        for key in ("seed", "scheduler"):
            if key in p:
                prow(key, str(p[key]))
    if s.get("caution"):
        row("caution", s["caution"])
    lines.append("  data variables")
    # the name column is as wide as the longest name, so long names never run into their dims
    width = max([W + 8] + [len(name) + 2 for name in s["data_variables"]])
    for name, v in s["data_variables"].items():
        lines.append(f"    {name:<{width}}({', '.join(v['dims'])})" + (f" [{v['units']}]" if v["units"] else ""))
    return "\n".join(lines)
