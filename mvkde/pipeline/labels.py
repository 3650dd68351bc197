"""Labelled samples: named time windows and sources (``input.windows``, ``input.sources``).

A label is like the season split, with two differences: windows may
overlap, so a sample may carry several labels (a boolean membership per
label combination rather than one split code), and sources are separate
inputs joined along the time dimension, each sample remembering its
source.  The plan carries ``members`` (label combinations, *codes shape); a
block task fits one density per (cell, label combination, season).  The
observations per year of each split (for joint return periods) are worked
out here too.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import xarray as xr

from ..errors import ConfigError, InputError
from . import readers as _io

__all__ = ["prepare_sources", "combine_sources", "label_members", "rates", "rates_by_unique", "note_empty_labels"]


def rates_by_unique(wf, row_times, codes_flat, n_season, where):
    """Observations per year per season of a table: over its distinct dates (stations share them)."""
    times, first = np.unique(row_times, return_index=True)
    return rates(wf, times, None, np.asarray(codes_flat)[first], n_season, 1, where)


def note_empty_labels(plan) -> None:
    """A window (or source) with no sample of the selection: its cells are flagged, not fatal."""
    if plan.members is None:
        return
    flat = plan.members.reshape(plan.members.shape[0], -1)
    sizes = [len(plan.label_names[d]) for d in plan.label_dims]
    for m, idx in enumerate(np.ndindex(*sizes)):
        if not flat[m].any():
            what = ", ".join(f"{d}={plan.label_names[d][i]}" for d, i in zip(plan.label_dims, idx))
            plan.notes.append(f"{what} holds no sample of the selection: its cells get NaN and the "
                              "too_few_samples flag")


def combine_sources(wf, parts: dict, check, select):
    """input.sources: each source checked and selected, then joined along the time dimension.

    Returns (dataset, source index per time step, dims, sample_dims, cell_dims).  Every source must
    hold input.variables with the same units and the same cells.
    """
    inp, src = wf["input"], wf.source
    names, tname = wf.variables, inp["time"]
    selected, index, first = [], [], None
    for k, (name, (ds, origin)) in enumerate(parts.items()):
        where = f"input.sources.{name} ({origin})"
        missing = [v for v in names if v not in ds.data_vars]
        if missing:
            raise InputError(f"{where} has no variable {', '.join(missing)}: every source needs input.variables "
                             f"= {names}; its data variables are {', '.join(map(str, ds.data_vars))}")
        dims, sample_dims, cell_dims = check(wf, ds, where)
        if tname not in sample_dims:
            raise ConfigError(f"{src}: input.sources joins the sources along the time dimension {tname!r}: "
                              "list it in input.sample_dims")
        part = select(ds[names], wf, dims, sample_dims, where)
        if first is None:
            first = (name, part, dims, sample_dims, cell_dims)
        else:
            fname, fpart = first[0], first[1]
            if set(dims) != set(first[2]):
                raise InputError(f"{where} has dims {dims} but input.sources.{fname} has {first[2]}: the sources "
                                 "must share their dimensions")
            for v in names:
                u, fu = part[v].attrs.get("units"), fpart[v].attrs.get("units")
                if u != fu and wf.variable(v)["units"] is None:
                    raise InputError(f"{where}: variable {v} has units {u!r} but input.sources.{fname} has "
                                     f"{fu!r}: convert one source (or set variables.{v}.units if they agree)")
            for c in cell_dims:
                if part.sizes[c] != fpart.sizes[c] or (c in part.coords and c in fpart.coords and not np.allclose(
                        np.asarray(part[c].values, dtype=float), np.asarray(fpart[c].values, dtype=float))):
                    raise InputError(f"{where}: its {c!r} cells differ from those of input.sources.{fname}: the "
                                     "sources must cover the same cells (select them with input.box)")
            part = part.assign_coords({c: fpart[c] for c in cell_dims if c in fpart.coords})
        selected.append(part.chunk({}))  # dask-backed: the join stays lazy
        index.append(np.full(part.sizes[tname], k, dtype=np.int16))
    ds = xr.concat(selected, dim=tname, coords="minimal", compat="override", join="override")
    return ds, np.concatenate(index), first[2], first[3], first[4]


def label_members(wf, times, source_of, source_names, where: str):
    """(label_dims, label_names, label_info, members (M, T) bool) of the windows and sources."""
    inp = wf["input"]
    dims, names, info, layers = [], {}, {}, []
    if inp["windows"]:
        stamps = as_datetimes(times, wf, where, "input.windows")
        dims.append("window")
        names["window"] = list(inp["windows"])
        info["window"] = [f"{a} to {b}" for a, b in inp["windows"].values()]
        rows = []
        for a, b in inp["windows"].values():
            start, end = pd.Timestamp(a), pd.Timestamp(b) + pd.Timedelta(days=1)  # the end day included
            rows.append((stamps >= start) & (stamps < end))
        layers.append(np.array(rows))
    if source_of is not None:
        dims.append("source")
        names["source"] = list(source_names)
        info["source"] = [inp["sources"][n] for n in source_names]
        layers.append(np.array([source_of == k for k in range(len(source_names))]))
    if not dims:
        return [], {}, {}, None
    members = layers[0]
    for more in layers[1:]:
        members = (members[:, None, :] & more[None, :, :]).reshape(-1, members.shape[-1])
    return dims, names, info, members


def as_datetimes(times, wf, where: str, key: str) -> pd.DatetimeIndex:
    values = np.asarray(times)
    if np.issubdtype(values.dtype, np.datetime64):
        return pd.DatetimeIndex(values)
    if values.dtype == object and values.size and hasattr(values.flat[0], "year"):
        return pd.DatetimeIndex([pd.Timestamp(t.year, t.month, t.day) for t in values.ravel()])
    raise ConfigError(f"{wf.source}: {key} selects by date, but the time coordinate "
                      f"{wf['input']['time']!r} of {where} holds plain {values.dtype} numbers: give the "
                      "input a CF time coordinate (units 'days since YYYY-MM-DD')")


def rates(wf, times, members, season_codes, n_season, n_labels, where: str):
    """Observations per year of every split (label combination x season): its samples over the years
    its label spans (over the calendar years holding samples when input.months / seasons select part
    of each year); ``products.observations_per_year`` when given; None when not asked for."""
    prod = wf["products"]
    S = n_labels * n_season
    if not prod["return_periods"]:
        return None
    if prod["observations_per_year"] is not None:
        return np.full(S, float(prod["observations_per_year"]))
    values = np.asarray(times)
    if not (np.issubdtype(values.dtype, np.datetime64) or (values.dtype == object and values.size
                                                            and hasattr(values.flat[0], "year"))):
        raise ConfigError(f"{wf.source}: products.return_periods needs the observations per year, and the time "
                          f"coordinate {wf['input']['time']!r} of {where} holds plain {values.dtype} numbers, "
                          "not dates: set products.observations_per_year (e.g. 365.25 for daily samples, 1 "
                          "for annual maxima)")
    stamps = as_datetimes(values, wf, where, "products.return_periods")
    day = np.asarray(stamps.values, dtype="datetime64[ns]").astype(np.int64) / 86400e9
    members = np.ones((1, day.size), dtype=bool) if members is None else members
    codes = np.zeros(day.size, dtype=int) if season_codes is None else np.asarray(season_codes).ravel()
    out = np.full(S, np.nan)
    # with a month or season selection the samples of a year are one part of it: count the calendar
    # years that hold samples; otherwise the span of the label's samples (one step added) in years
    by_year = bool(wf["input"]["months"] or wf["input"]["seasons"])
    for m in range(n_labels):
        order = np.argsort(day[members[m]])
        t = day[members[m]][order]
        if t.size < 2:
            continue
        if by_year:
            years = float(np.unique(np.asarray(stamps.year)[members[m]]).size)
        else:
            years = (t[-1] - t[0] + float(np.median(np.diff(t)))) / 365.2425  # mean Gregorian year
        for s in range(n_season):
            out[m * n_season + s] = float(np.sum(members[m] & (codes == s))) / years
    return out


def prepare_sources(wf, from_dataset, from_table, read_table, file_chunks):
    """input.sources: each source opened (gridded: lazily) and joined into one plan with a source label.

    The plan is made by ``inputs.plan_from_dataset`` / ``plan_from_table`` (passed in, so the
    import graph stays one-way).
    """
    inp = wf["input"]
    opened, tables, all_files, kinds = {}, [], [], set()
    for name, pattern in inp["sources"].items():
        files = _io.expand_paths(wf.resolve_paths([pattern]))
        kind = _io.input_format(files, inp["format"])
        kinds.add(kind)
        all_files += files
        origin = files[0].name + (f" and {len(files) - 1} more file(s)" if len(files) > 1 else "")
        if kind == "netcdf":
            opened[name] = (_io.open_gridded(files, chunks=None if len(files) == 1 else file_chunks(wf, files)),
                            origin)
        else:
            tables.append((name, files, kind))
    if len(kinds) > 1:
        raise ConfigError(f"{wf.source}: input.sources mix gridded and table inputs ({', '.join(sorted(kinds))}): "
                          "every source must have the same layout")
    if opened:
        return from_dataset(wf, opened, files=all_files, origin=", ".join(o for _, o in opened.values()))
    frames, index = [], []
    for k, (name, files, kind) in enumerate(tables):
        table = read_table(wf, files, kind)
        missing = [v for v in wf.variables if v not in table.columns]
        if missing:
            raise InputError(f"input.sources.{name} ({files[0].name}) has no column {', '.join(missing)}: every "
                             f"source needs input.variables = {wf.variables}")
        frames.append(table)
        index.append(np.full(len(table), k, dtype=np.int16))
    return from_table(wf, pd.concat(frames, ignore_index=True), files=all_files, kind=tables[0][2],
                           origin=tables[0][1][0].name, source_of=np.concatenate(index))
