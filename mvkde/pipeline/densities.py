"""The per-cell job from Python: :func:`densities`, and the lazy assembly of block tasks.

``mvkde run`` and :func:`densities` share one path::

    a Workflow (TOML file, or built here from keyword arguments by workflow.from_arguments)
    inputs.plan_from_dataset / plan_from_table      the Plan: values, cells, splits, blocks
    blocks.check_settings, inputs.resolve_axes, blocks.settings_for
    schedule.block_tasks                            one delayed blocks.process_block per block
      run:       schedule.execute gathers them (progress, resume store) -> output.build_dataset
      densities: lazy_dataset labels each block with output.build_dataset inside its task and
                 stacks the blocks into dask arrays (da.from_delayed + da.block)
    output.global_attributes                        title, provenance, caution, estimator settings

No library module imports this one.
"""

from __future__ import annotations

import dataclasses
import functools
import math
import operator
import re
import warnings

import numpy as np
import pandas as pd
import xarray as xr

from ..errors import InputError, MvkdeError, closest_names
from . import provenance as _prov
from .blocks import _probe_sample, check_settings, process_block, settings_for
from .inputs import Plan, plan_from_dataset, plan_from_table, resolve_axes
from .output import build_dataset, global_attributes
from .schedule import block_tasks
from .workflow import from_arguments

__all__ = ["densities", "lazy_dataset"]

SOURCE = "mvkde.densities"


def densities(ds, *, variables=None, sample_dims=("time",), group_by=None, split_by=None, windows=None,
              bounds=None, point_masses=None, periods=None, sphere=None, units=None,
              kernel="gaussian", form="product", bandwidth="plugin", parametrization="full", boundary=None,
              engine="auto", grid=None, products=None, min_samples=30, max_samples=None, time="time",
              seed=0, compare=None) -> xr.Dataset:
    """One joint density per cell of a Dataset (or per group of a DataFrame), as ``mvkde run`` writes them.

    Parameters
    ----------
    ds : xarray.Dataset or pandas.DataFrame
        Gridded data (every dimension not in ``sample_dims`` is a cell
        dimension), in memory or dask-backed; or a table with one row per
        sample and a ``group_by`` column.
    variables : list of str, optional
        Variables (columns) whose joint density is estimated, in order;
        default every data variable (every numeric column but ``group_by``).
    sample_dims : sequence of str
        Dimensions pooled into each cell's sample (``input.sample_dims``).
    group_by : str, optional
        Tables: the column whose values each get a density (an output
        dimension named after it).
    split_by : {"season", "month"}, optional
        One density per meteorological season or month of ``time``.
    windows : dict, optional
        Named time windows ``{NAME: (start, end)}`` (ISO dates, inclusive; the
        workflow's ``input.windows``): an output dimension ``window``.
    compare : dict, optional
        The workflow's ``[compare]`` table, e.g. ``{"reference": "baseline",
        "alpha": 0.05}``: density differences, local significance and
        probability ratios of every other window against the reference.
    bounds, point_masses, periods, units : dict, optional
        Keyed by variable name: ``(lo, hi)`` support (None or inf for an
        open side), point-mass threshold (values <= it count as the bound),
        circular period (as ``periods`` in :func:`mvkde.fit`), units.
    sphere : (str, str), optional
        Latitude and longitude variables forming one location on the Earth.
    kernel, form, bandwidth, parametrization, boundary, engine
        As in :func:`mvkde.fit` and the workflow's ``[estimator]``; ``boundary``
        None means the workflow default.
    grid : dict, optional
        ``{"size": n or [n1, n2, ...], "limits": {name: (lo, hi)}}``.  Without
        limits for a variable (not circular), its limits come from the data
        range, which is then computed at once: give every limit to stay lazy.
    products : dict, optional
        The workflow's ``[products]`` (``thresholds``, ``hdr_masses``, ...).
    min_samples, max_samples, time, seed
        As ``input.min_samples``, ``input.max_samples``, ``input.time`` and
        ``estimator.seed``.

    Returns
    -------
    xarray.Dataset
        The variables, dimensions, coordinates and attributes ``mvkde run``
        writes for the same settings; the ``provenance`` attribute records
        the settings and ``dask.base.tokenize`` of the input instead of file
        hashes.  When ``ds`` is dask-backed and every grid limit is given,
        nothing is computed until ``.compute()``, ``.to_netcdf()`` or
        ``.to_zarr()``: each chunk of cells of ``ds`` (its chunks along the
        cell dimensions) is one task that fits all its cells through the
        library's batch door, run by the active dask client or the default
        scheduler.  Values outside ``bounds`` then raise when computed.  An
        in-memory Dataset or a DataFrame is computed at once.

    Examples
    --------
    >>> ds = xr.open_dataset("sample_grids/basin_daily.nc", chunks={"lat": 4, "lon": 4})
    >>> out = mvkde.densities(ds, variables=["pr", "tasmax"], split_by="season", min_samples=40,
    ...                       bounds={"pr": (0, None)}, point_masses={"pr": 1.0}, boundary="reflect",
    ...                       grid={"size": 64, "limits": {"pr": (1, 60), "tasmax": (-20, 40)}})
    >>> out.to_netcdf("basin.nc")          # the work happens here
    """
    if windows is not None and not isinstance(windows, dict):
        raise InputError(f"{SOURCE}: windows= must be a dict {{name: (start, end)}} of ISO dates, got {windows!r}")
    ds, names, table = _check_arguments(ds, variables, sample_dims, group_by, split_by, time,
                                        bounds=bounds, point_masses=point_masses, periods=periods, units=units,
                                        limits=(grid or {}).get("limits"))
    raw = _raw_workflow(names, sample_dims, group_by, split_by, bounds, point_masses, periods, sphere, units,
                        kernel, form, bandwidth, parametrization, boundary, engine, grid, products,
                        min_samples, max_samples, time, seed, table)
    if windows:
        raw["input"]["windows"] = {str(k): [str(v) for v in pair] for k, pair in windows.items()}
    if compare:
        raw["compare"] = dict(compare)
    lazy = (not table) and any(_is_dask(ds[v]) for v in names)
    try:
        wf = from_arguments(raw, SOURCE)
        if table:
            plan = plan_from_table(wf, ds, origin="the DataFrame")
        else:
            plan = plan_from_dataset(wf, ds, origin="the Dataset",
                                     tile=_tile_from_chunks(ds[names[0]], wf["input"]["sample_dims"]))
        check_settings(wf, plan)
        import dask

        axes = resolve_axes(plan, dask.compute, check_bounds=not lazy)
        settings = dataclasses.replace(settings_for(plan, axes), refuse_outside_bounds=lazy)
        out = lazy_dataset(plan, settings)
    except MvkdeError as exc:
        raise type(exc)(_argument_names(str(exc))) from None

    out.attrs.update(_attributes(ds, wf, plan, settings, lazy))
    if not lazy:
        out = out.compute()
        _refuse_if_nothing_fitted(plan, out["flags"].values)
    return out


def _attributes(ds, wf, plan, settings, lazy) -> dict:
    """The global attributes of ``mvkde run``; the input is recorded by its dask token, not file hashes."""
    import dask.base

    rec = _prov.record(wf, [], command_line=[SOURCE], extra={
        "inputs": [{"type": f"{type(ds).__module__}.{type(ds).__name__}", "dask_token": dask.base.tokenize(ds)}],
        "scheduler": "the caller's dask scheduler (computed lazily)" if lazy else "dask's default scheduler",
        "engines": None, "batch": None,
        "grid_limits": {v: [float(a[0]), float(a[-1])] for v, a in zip(plan.names, settings.axes)}})
    return global_attributes(wf, settings, plan.names, rec)


# ---------------------------------------------------------------------------
# the lazy Dataset: block tasks assembled into dask arrays
# ---------------------------------------------------------------------------

def lazy_dataset(plan: Plan, settings) -> xr.Dataset:
    """The labelled output of a plan as dask arrays: one task per block of cells, nothing computed.

    Each block's :func:`~mvkde.pipeline.blocks.process_block` result is labelled
    inside a task by :func:`~mvkde.pipeline.output.build_dataset` (the grid
    products are per cell, so a block labelled alone gives the numbers of the
    whole run), and the blocks are stacked along the cell dims.  Names, dims,
    dtypes and trailing sizes are told to dask from a template: the same
    labelling of one synthetic cell fitted with the run's settings.
    """
    import dask
    import dask.array as da
    import dask.base

    light = dataclasses.replace(plan, values=None, codes=None, cell_coords={})
    template = _template(light, settings)
    nd = len(plan.cell_dims)
    cell_dims = tuple(plan.cell_dims)
    # variables over the cell dims come from the block tasks; the others (per label, such as
    # observations_per_year) are properties of the plan, the same in the template
    specs = {name: (var.dims, var.dtype, var.shape[nd:], dict(var.attrs)) for name, var in template.data_vars.items()
             if var.dims[:nd] == cell_dims}
    plan_level = {name: var for name, var in template.data_vars.items() if name not in specs}
    token = dask.base.tokenize(plan.values.data.name, plan.codes, settings, sorted(specs))
    tiles = list(plan.tiles())
    label = functools.partial(_label_block, plan=light, settings=settings, specs=specs)
    grid_shape = tuple(math.ceil(n / t) for n, t in zip(plan.cell_shape, plan.tile)) if nd else ()
    pieces = {name: np.empty(grid_shape, dtype=object) for name in specs}
    for b, (task, tile) in enumerate(zip(block_tasks(plan, settings, token=token), tiles)):
        tshape = tuple(t.stop - t.start for t in tile)
        labelled = dask.delayed(label, pure=True)(task, tshape, dask_key_name=f"mvkde-label-{b}-{token}")
        where = np.unravel_index(b, grid_shape) if nd else ()
        for name, (dims, dtype, rest, attrs) in specs.items():
            part = dask.delayed(operator.getitem, pure=True)(labelled, name,
                                                            dask_key_name=f"mvkde-{name}-{b}-{token}")
            pieces[name][where] = da.from_delayed(part, shape=tshape + rest, dtype=dtype)
    data_vars = dict(plan_level)
    for name, (dims, dtype, rest, attrs) in specs.items():
        arr = _stack(pieces[name].tolist(), 0, nd) if nd else pieces[name][()]
        data_vars[name] = (dims, arr, attrs)
    coords = {}
    for dname in plan.cell_dims:
        if dname in plan.cell_coords:
            c = plan.cell_coords[dname]
            coords[dname] = (dname, np.asarray(c.values), dict(getattr(c, "attrs", {})))
    coords.update({k: v for k, v in template.coords.items()})
    return xr.Dataset(data_vars, coords=coords)


def _stack(nested, axis: int, nd: int):
    """Blocks over the leading ``nd`` axes (nested lists) joined along those axes (da.block joins the last)."""
    import dask.array as da

    if axis == nd - 1:
        return da.concatenate(nested, axis=axis)
    return da.concatenate([_stack(part, axis + 1, nd) for part in nested], axis=axis)


def _label_block(result, tile_shape, *, plan, settings, specs) -> dict:
    """A block's result labelled as the output (numpy arrays over the block's cells)."""
    arrays = {name: a.reshape(tuple(tile_shape) + a.shape[1:]) for name, a in result.arrays.items()}
    block = build_dataset(plan, settings, {"arrays": arrays})
    out = {}
    for name, (dims, dtype, rest, attrs) in specs.items():
        if name in block:
            out[name] = np.asarray(block[name].transpose(*dims).values, dtype=dtype)
        else:  # a product no cell of this block could give (no cell fitted)
            out[name] = np.full(tuple(tile_shape) + rest, np.nan if dtype.kind == "f" else 0, dtype=dtype)
    return out


def _template(plan: Plan, settings) -> xr.Dataset:
    """The labelled output of one synthetic cell (inside the support) fitted with the run's settings."""
    nd = len(plan.cell_dims)
    S = settings.n_splits
    n = max(60, settings.min_samples + 1)
    sample = np.concatenate([_probe_sample(settings, n) for _ in range(S)])  # every split gets a sample
    codes = np.repeat(np.arange(S, dtype=np.int16), n)
    probe = dataclasses.replace(settings, refuse_outside_bounds=False)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = process_block(sample.reshape((1,) * nd + sample.shape), codes.reshape((1,) * nd + codes.shape),
                               0, (1,) * nd, probe)
    arrays = {name: a.reshape((1,) * nd + a.shape[1:]) for name, a in result.arrays.items()}
    return build_dataset(plan, settings, {"arrays": arrays})


def _tile_from_chunks(var: xr.DataArray, sample_dims) -> tuple | None:
    """The caller's dask chunks along the cell dims (first chunk of each), or None when not dask-backed."""
    if var.chunks is None:
        return None
    return tuple(c[0] for dname, c in zip(var.dims, var.chunks) if dname not in sample_dims)


def _is_dask(var) -> bool:
    return getattr(var, "chunks", None) is not None


def _refuse_if_nothing_fitted(plan: Plan, flags) -> None:
    from .run import _refuse_if_nothing_fitted as refuse

    try:
        refuse(plan, np.asarray(flags), [])
    except MvkdeError as exc:
        raise type(exc)(_argument_names(str(exc))) from None


# ---------------------------------------------------------------------------
# arguments
# ---------------------------------------------------------------------------

def _check_arguments(ds, variables, sample_dims, group_by, split_by, time, **by_variable):
    """(ds, variable names, is_table): refuse, naming the argument, what the workflow schema cannot name."""
    table = isinstance(ds, pd.DataFrame)
    if isinstance(ds, xr.DataArray):
        ds = ds.to_dataset(name=ds.name or "x0")
    if not table and not isinstance(ds, xr.Dataset):
        raise InputError(f"{SOURCE}: ds must be an xarray.Dataset or a pandas.DataFrame, got {type(ds).__name__}")
    names = _variables(ds, variables, group_by, table)
    if not table:
        _check_sample_dims(ds, names, sample_dims)
        if group_by is not None:
            raise InputError(f"{SOURCE}: group_by applies to DataFrames; for a Dataset every dimension not "
                             "in sample_dims is a cell dimension")
    else:
        ds = _check_columns(ds, names, group_by, time, split_by)
    for argument, given in by_variable.items():
        for v in (given or {}):
            if v not in names:
                argument = "grid['limits']" if argument == "limits" else argument
                raise InputError(f"{SOURCE}: {argument} names {v!r}, which is not one of variables = {names}"
                                 + closest_names(v, names))
    return ds, names, table


def _variables(ds, variables, group_by, table) -> list:
    if table:
        available = [c for c in ds.columns if c != group_by and pd.api.types.is_numeric_dtype(ds[c])]
        where = "columns"
    else:
        available = [str(v) for v in ds.data_vars]
        where = "data variables"
    if variables is None:
        if not available:
            raise InputError(f"{SOURCE}: ds has no numeric {where}: pass variables=[...]")
        return list(available)
    if isinstance(variables, str):
        variables = [variables]
    variables = list(variables)
    everything = list(ds.columns) if table else [str(v) for v in ds.data_vars]
    for v in variables:
        if v not in everything:
            raise InputError(f"{SOURCE}: variables names {v!r}, which is not among the {where} of ds "
                             f"({', '.join(map(str, everything))})" + closest_names(v, everything))
    if not variables:
        raise InputError(f"{SOURCE}: variables is empty: name at least one of the {where} of ds")
    return variables


def _check_sample_dims(ds: xr.Dataset, names, sample_dims) -> None:
    if isinstance(sample_dims, str):
        sample_dims = [sample_dims]
    dims = ds[names[0]].dims
    for s in sample_dims:
        if s not in dims:
            raise InputError(f"{SOURCE}: sample_dims names {s!r}, which is not a dimension of {names[0]} "
                             f"(dims: {', '.join(map(str, dims))})" + closest_names(s, dims))


def _check_columns(df: pd.DataFrame, names, group_by, time, split_by) -> pd.DataFrame:
    if group_by is not None and group_by not in df.columns:
        raise InputError(f"{SOURCE}: group_by names {group_by!r}, which is not a column of ds "
                         f"({', '.join(map(str, df.columns))})" + closest_names(group_by, df.columns))
    if split_by is not None and time not in df.columns:
        if df.index.name == time or isinstance(df.index, pd.DatetimeIndex):
            df = df.rename_axis(time).reset_index()
        else:
            raise InputError(f"{SOURCE}: split_by needs the time column time={time!r}, which is not a column "
                             f"of ds ({', '.join(map(str, df.columns))})")
    return df


def _pair(value):
    lo, hi = value
    return [-math.inf if lo is None else float(lo), math.inf if hi is None else float(hi)]


def _raw_workflow(names, sample_dims, group_by, split_by, bounds, point_masses, periods, sphere, units, kernel,
                  form, bandwidth, parametrization, boundary, engine, grid, products, min_samples, max_samples,
                  time, seed, table) -> dict:
    """The keyword arguments as a workflow (the TOML layout), validated by the same schema."""
    inp = {"path": "<pandas.DataFrame>" if table else "<xarray.Dataset>", "variables": list(names),
           "sample_dims": [sample_dims] if isinstance(sample_dims, str) else list(sample_dims),
           "min_samples": min_samples, "time": time}
    if table:
        inp["sample_dims"] = ["time"]  # ignored for tables, as in a workflow
    for key, value in (("group_by", group_by), ("split_by", split_by), ("max_samples", max_samples)):
        if value is not None:
            inp[key] = value
    variables = {}
    for v in names:
        t = {}
        if bounds and bounds.get(v) is not None:
            t["bounds"] = _pair(bounds[v])
        if point_masses and point_masses.get(v) is not None:
            t["point_mass"] = point_masses[v]
        if periods and periods.get(v) is not None:
            t["period"] = periods[v]
        if units and units.get(v) is not None:
            t["units"] = units[v]
        if t:
            variables[v] = t
    est = {"kernel": kernel, "form": form, "parametrization": parametrization, "engine": engine, "seed": seed,
           "bandwidth": np.asarray(bandwidth, dtype=float).tolist() if not isinstance(bandwidth, str) else bandwidth}
    if boundary is not None:
        est["boundary"] = boundary
    if sphere is not None:
        est["sphere"] = list(sphere)
    raw_grid = {}
    if grid:
        unknown = set(grid) - {"size", "limits"}
        if unknown:
            raise InputError(f"{SOURCE}: grid has unknown key(s) {sorted(unknown)}: give \"size\" and \"limits\"")
        if "size" in grid:
            size = grid["size"]
            raw_grid["size"] = int(size) if np.ndim(size) == 0 else [int(s) for s in size]
        if grid.get("limits"):
            raw_grid["limits"] = {v: [float(a) for a in pair] for v, pair in grid["limits"].items()}
    raw_products = {}
    for key, value in (products or {}).items():
        raw_products[key] = np.asarray(value).tolist() if isinstance(value, np.ndarray) else value
    return {"input": inp, "variables": variables, "estimator": est, "grid": raw_grid, "products": raw_products,
            "output": {"path": "<returned to the caller>"}}


#: workflow key paths in messages -> the keyword arguments of densities
_ARGUMENTS = [
    (re.compile(r"\[?variables\.([\w-]+)\.bounds\]?"), r"bounds['\1']"),
    (re.compile(r"\[?variables\.([\w-]+)\.point_mass\]?"), r"point_masses['\1']"),
    (re.compile(r"\[?variables\.([\w-]+)\.period\]?"), r"periods['\1']"),
    (re.compile(r"\[?variables\.([\w-]+)\.units\]?"), r"units['\1']"),
    (re.compile(r"\[variables\.([\w-]+)\]"), r"variable \1"),
    (re.compile(r"\bgrid\.limits\.([\w-]+)"), r"grid['limits']['\1']"),
    (re.compile(r"\bgrid\.(size|limits)\b"), r"grid['\1']"),
    (re.compile(r"\bproducts\.(\w+)"), r"products['\1']"),
    (re.compile(r"\b(?:input|estimator)\.(\w+)"), r"\1"),
    (re.compile(r"the \[estimator\] and \[variables\] settings"), "the estimator arguments"),
]


def _argument_names(message: str) -> str:
    """A message written for workflow keys, with the keyword arguments of :func:`densities` instead."""
    for pattern, repl in _ARGUMENTS:
        message = pattern.sub(repl, message)
    return message
