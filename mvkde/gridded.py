"""Densities per cell: blocks of cells on dask, one fit + grid per cell.

The runner turns a validated :class:`~mvkde.workflow.Workflow` into

1. a :class:`Plan` (:func:`prepare`): the inputs opened lazily, the selection
   applied (time range, months or seasons, coordinate box), the cell
   dimensions, the optional split (season or month) and the tiling of the
   cells into blocks;
2. the shared evaluation grid (:func:`resolve_axes`): from ``grid.limits``
   or from the pooled data range;
3. one dask task per block (:func:`process_block`): the block's hyperslab
   is read, missing values are dropped per cell and counted, and every
   cell is fitted and evaluated on the grid by :func:`fit_and_evaluate`,
   the single place where the library is called;
4. a labelled :class:`xarray.Dataset` (:func:`build_dataset`).

Memory per task is bounded by the block: ``compute.block_size`` cells with
all their samples, plus their output grids.
"""

from __future__ import annotations

import inspect
import logging
import math
import sys
import time
import warnings
from contextlib import contextmanager
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import xarray as xr

from . import io as _io
from .errors import ConfigError, InputError, MvkdeError
from .workflow import SEASONS, Workflow

__all__ = ["Plan", "CellSettings", "prepare", "resolve_axes", "process_block", "fit_and_evaluate",
           "build_dataset", "run", "FLAGS"]

log = logging.getLogger("mvkde.run")

#: bit flags of the ``flags`` output variable (CF flag_masks / flag_meanings)
FLAGS = {
    "too_few_samples": 1,
    "fit_failed": 2,
    "bandwidth_not_converged": 4,
    "bandwidth_at_edge": 8,
    "grid_mass_off_by_more_than_1_percent": 16,
    "subsampled": 32,
}
GRID_MASS_TOLERANCE = 0.01
SAMPLE_DIM = "sample"  # the pooled dimension of tables


# ---------------------------------------------------------------------------
# the plan
# ---------------------------------------------------------------------------

@dataclass
class Plan:
    """What will be computed, before any density is."""

    workflow: Workflow
    kind: str                                  # "netcdf" | "csv" | "parquet"
    files: list
    values: xr.DataArray                       # (*cell_dims, *sample_dims, variable), lazy
    codes: np.ndarray                          # split code per sample (-1: not a sample), broadcastable
    cell_dims: list
    cell_coords: dict                          # dim -> coordinate DataArray (or labels)
    split_dim: str | None
    split_labels: list
    tile: tuple                                # block shape over the cell dims
    names: list
    units: list
    variable_attrs: dict
    sample_counts: tuple = (0, 0, 0)           # min, median, max samples per cell before dropping NaN
    notes: list = field(default_factory=list)

    @property
    def cell_shape(self) -> tuple:
        return tuple(self.values.sizes[d] for d in self.cell_dims)

    @property
    def n_cells(self) -> int:
        return int(np.prod(self.cell_shape)) if self.cell_dims else 1

    @property
    def n_splits(self) -> int:
        return max(1, len(self.split_labels)) if self.split_dim else 1

    def tiles(self):
        """Slices over the cell dims, one tuple per block."""
        if not self.cell_dims:
            yield ()
            return
        starts = [range(0, n, t) for n, t in zip(self.cell_shape, self.tile)]
        for corner in np.ndindex(*[len(s) for s in starts]):
            yield tuple(slice(starts[k][i], min(starts[k][i] + self.tile[k], self.cell_shape[k]))
                        for k, i in enumerate(corner))

    @property
    def n_blocks(self) -> int:
        if not self.cell_dims:
            return 1
        return int(np.prod([math.ceil(n / t) for n, t in zip(self.cell_shape, self.tile)]))


AUTO_BLOCK_MAX = 64
#: "auto" blocks hold at most this many bytes of samples (as float64): the input
#: of a task stays bounded however long the record of each cell is
AUTO_BLOCK_BYTES = 128 * 2**20


def block_cells(wf: Workflow, n_cells: int, cell_bytes: int = 0) -> int:
    """Cells per block: ``compute.block_size``, or for "auto" about four blocks per worker.

    ``cell_bytes`` (the float64 samples of one cell) caps "auto" blocks at
    :data:`AUTO_BLOCK_BYTES`, so long records give smaller blocks.
    """
    import os

    size = wf["compute"]["block_size"]
    if size != "auto":
        return int(size)
    workers = wf["compute"]["workers"] or os.cpu_count() or 1
    cells = max(1, min(AUTO_BLOCK_MAX, math.ceil(n_cells / (4 * workers))))
    if cell_bytes > 0:
        cells = max(1, min(cells, AUTO_BLOCK_BYTES // cell_bytes))
    return cells


def _tile_shape(shape, block_size) -> tuple:
    """Block shape over the cell dims: whole trailing dims first, at most ``block_size`` cells."""
    tile = [1] * len(shape)
    room = max(1, int(block_size))
    for k in range(len(shape) - 1, -1, -1):
        tile[k] = max(1, min(shape[k], room))
        room = max(1, room // tile[k])
        if tile[k] < shape[k]:
            break
    return tuple(tile)


def prepare(wf: Workflow) -> Plan:
    """Open the inputs lazily, apply the selection and tile the cells."""
    inp = wf["input"]
    files = _io.expand_paths(wf.input_paths())
    kind = _io.input_format(files, inp["format"])
    if kind == "netcdf":
        plan = _prepare_gridded(wf, files)
    else:
        plan = _prepare_table(wf, files, kind)
    _check_estimator(wf, plan)
    _check_memory(plan)
    return plan


def available_memory() -> int:
    """Bytes of memory available to this process (MemAvailable, else physical memory)."""
    import os

    try:
        with open("/proc/meminfo") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    try:
        return int(os.sysconf("SC_PHYS_PAGES") * os.sysconf("SC_PAGE_SIZE"))
    except (ValueError, OSError, AttributeError):
        return 0


def _check_memory(plan: Plan) -> None:
    """Refuse, before any work, a run whose grids cannot fit in this machine's memory.

    The run holds the output of every cell for writing (float64), and each
    task holds its block's samples and grids.
    """
    avail = available_memory()
    if avail <= 0:
        return
    wf = plan.workflow
    sizes = estimate_sizes(plan)
    held = sizes["output_bytes"] * (8 // (4 if wf["output"]["dtype"] == "float32" else 8))
    workers = 1 if str(wf["compute"]["scheduler"]).startswith(("tcp", "tls", "ucx", "inproc")) else (
        wf["compute"]["workers"] or __import__("os").cpu_count() or 1)
    need = held + sizes["task_bytes"] * workers
    if need > avail:
        nodes = int(np.prod(wf.grid_size()))
        raise ConfigError(
            f"{wf.source}: grid.size = {wf['grid']['size']} gives {nodes:,} nodes per density: the run needs "
            f"about {_human(need)} ({plan.n_cells * plan.n_splits:,} output grids plus {_human(sizes['task_bytes'])} "
            f"per task) but {_human(avail)} of memory is available: use fewer grid nodes, fewer cells "
            "(input.box) or a smaller compute.block_size")


def _months_of(times) -> np.ndarray:
    return np.asarray(xr.DataArray(times).dt.month.values)


def _split_codes(months: np.ndarray, split_by, seasons_wanted):
    """(codes, labels): codes index labels; the labels present in the data, in calendar order."""
    if split_by is None:
        return np.zeros(months.shape, dtype=np.int16), []
    if split_by == "month":
        labels = sorted(set(int(m) for m in np.unique(months)))
        lookup = {m: i for i, m in enumerate(labels)}
        return np.array([lookup[int(m)] for m in months.ravel()], dtype=np.int16).reshape(months.shape), labels
    season = _season_names(months)
    labels = [s for s in SEASONS if s in set(season.ravel().tolist())]
    lookup = {s: i for i, s in enumerate(labels)}
    return np.array([lookup[s] for s in season.ravel()], dtype=np.int16).reshape(months.shape), labels


def _season_names(months) -> np.ndarray:
    names = np.array(["DJF", "DJF", "MAM", "MAM", "MAM", "JJA", "JJA", "JJA", "SON", "SON", "SON", "DJF"])
    return names[np.asarray(months, dtype=int) - 1]


def _month_filter(inp) -> set | None:
    if inp["months"] is not None:
        return set(inp["months"])
    if inp["seasons"] is not None:
        return {m for m in range(1, 13) if _season_names([m])[0] in inp["seasons"]}
    return None


def _prepare_gridded(wf: Workflow, files) -> Plan:
    inp, src = wf["input"], wf.source
    names = wf.variables
    if inp["group_by"] is not None:
        raise ConfigError(f"{src}: input.group_by applies to tables (.csv, .parquet); for gridded inputs "
                          "every dimension not in input.sample_dims is a cell dimension")
    # one file: opened without dask, so the selection below stays lazy indexing and each
    # block's dask chunk becomes one hyperslab read (a file chunked along time is never
    # rechunked in memory); several files: dask chunks of whole cell columns per file
    ds = _io.open_gridded(files, chunks=None if len(files) == 1 else _file_chunks(wf, files))
    missing = [v for v in names if v not in ds.data_vars]
    if missing:
        raise InputError(f"input.variables: {', '.join(missing)} not in {files[0].name}"
                         f"{' and the other files' if len(files) > 1 else ''}; data variables there: "
                         f"{', '.join(map(str, ds.data_vars))}")
    for v in names:
        if ds[v].dtype.kind not in "fiu":
            raise InputError(f"input.variables: {v} in {files[0].name} holds {ds[v].dtype} values, not "
                             "numbers: choose a numeric variable")
    if len(files) > 1:
        _io.check_units_agree(files, names)
    dims = ds[names[0]].dims
    for v in names[1:]:
        if set(ds[v].dims) != set(dims):
            raise InputError(f"input.variables: {v} has dims {ds[v].dims} but {names[0]} has {dims}: "
                             "the variables must share their dimensions")
    for s in inp["sample_dims"]:
        if s not in dims:
            raise ConfigError(f"{src}: input.sample_dims names {s!r}, which is not a dimension of "
                              f"{names[0]} (dims: {', '.join(dims)})")
    sample_dims = list(inp["sample_dims"])
    cell_dims = [d for d in dims if d not in sample_dims]
    clash = set(names) & set(cell_dims)
    if clash:
        raise InputError(f"variable name(s) {sorted(clash)} equal cell dimension names: rename them")
    ds = ds[names]
    tname = inp["time"]
    needs_time = inp["time_range"] or inp["months"] or inp["seasons"] or inp["split_by"]
    if needs_time and tname not in ds.coords:
        raise ConfigError(f"{src}: input.time = {tname!r} is not a coordinate of the input "
                          f"(coordinates: {', '.join(map(str, ds.coords))}); time selection and "
                          "input.split_by need it")
    if inp["split_by"] and tname not in sample_dims:
        raise ConfigError(f"{src}: input.split_by needs the time dimension {tname!r} in input.sample_dims")
    if inp["time_range"]:
        start, end = inp["time_range"]
        try:
            ds = ds.sel({tname: slice(start, end)})
        except (KeyError, TypeError, ValueError) as exc:
            raise ConfigError(f"{src}: input.time_range = {inp['time_range']} cannot select along "
                              f"{tname!r}: {exc}") from None
    keep_months = _month_filter(inp)
    if keep_months is not None:
        months = _months_of(ds[tname].values)
        ds = ds.isel({tname: np.flatnonzero(np.isin(months, list(keep_months)))})
    for coord, (lo, hi) in inp["box"].items():
        if coord not in ds.coords:
            raise ConfigError(f"{src}: input.box.{coord}: no coordinate {coord!r} in the input "
                              f"(coordinates: {', '.join(map(str, ds.coords))})")
        c = ds[coord]
        if c.ndim != 1:
            raise ConfigError(f"{src}: input.box.{coord}: the coordinate is {c.ndim}-dimensional; a box "
                              "needs 1-D coordinates")
        keep = np.flatnonzero((c.values >= lo) & (c.values <= hi))
        ds = ds.isel({c.dims[0]: keep})
    for dname in dims:
        if ds.sizes[dname] == 0:
            raise InputError(f"the selection (input.time_range / months / seasons / box) leaves no data "
                             f"along {dname!r}: widen it")

    cell_shape = tuple(ds.sizes[d] for d in cell_dims)
    n_per_cell = int(np.prod([ds.sizes[d] for d in sample_dims]))
    tile = _tile_shape(cell_shape, block_cells(wf, int(np.prod(cell_shape)), n_per_cell * len(names) * 8))
    # chunk so that one block reads exactly its own hyperslab, all samples at once
    chunks = {d: t for d, t in zip(cell_dims, tile)}
    chunks.update({d: -1 for d in sample_dims})
    with warnings.catch_warnings():
        # blocks of whole cell columns cut across a file chunked along time: intended
        warnings.filterwarnings("ignore", message=".*separate the stored chunks.*")
        ds = ds.chunk(chunks)
    arr = ds.to_dataarray("variable").transpose(*cell_dims, *sample_dims, "variable")
    arr = arr.chunk({"variable": -1})

    if tname in sample_dims:
        months = _months_of(ds[tname].values)
        codes_1d, labels = _split_codes(months, inp["split_by"], inp["seasons"])
        shape = [1] * (len(cell_dims) + len(sample_dims))
        shape[len(cell_dims) + sample_dims.index(tname)] = len(codes_1d)
        codes = codes_1d.reshape(shape)
    else:
        codes, labels = np.zeros([1] * (len(cell_dims) + len(sample_dims)), dtype=np.int16), []
    n = int(np.prod([ds.sizes[d] for d in sample_dims]))
    units = [wf.variable(v)["units"] or str(ds[v].attrs.get("units", "")) for v in names]
    attrs = {v: {k: ds[v].attrs[k] for k in ("standard_name", "long_name") if k in ds[v].attrs} for v in names}
    counts = (n, n, n)
    if inp["split_by"]:
        per = np.bincount(codes.ravel()[codes.ravel() >= 0], minlength=len(labels))
        per = per * (n // max(1, codes.size))
        counts = (int(per.min()), int(np.median(per)), int(per.max()))
    return Plan(wf, "netcdf", files, arr, codes, cell_dims, {d: ds[d] for d in cell_dims if d in ds.coords},
                inp["split_by"], labels, tile, list(names), units, attrs, counts)


def _file_chunks(wf: Workflow, files) -> dict:
    """Dask chunks for opening several files: whole sample columns, cells tiled as for the run."""
    first = _io.open_gridded(files[:1], chunks=None)
    names = [v for v in wf.variables if v in first.data_vars]
    if not names:
        return {}
    dims = first[names[0]].dims
    sample_dims = [d for d in wf["input"]["sample_dims"] if d in dims]
    cell_dims = [d for d in dims if d not in sample_dims]
    shape = tuple(first.sizes[d] for d in cell_dims)
    n = int(np.prod([first.sizes[d] for d in sample_dims])) * len(files)
    tile = _tile_shape(shape, block_cells(wf, int(np.prod(shape)), n * len(names) * 8))
    first.close()
    return {**{d: t for d, t in zip(cell_dims, tile)}, **{d: -1 for d in sample_dims}}


def _prepare_table(wf: Workflow, files, kind) -> Plan:
    inp, src = wf["input"], wf.source
    names = wf.variables
    header = _io.table_columns(files, kind)
    group = inp["group_by"]
    tname = inp["time"]
    needs_time = bool(inp["time_range"] or inp["months"] or inp["seasons"] or inp["split_by"])
    wanted = list(names) + ([group] if group else []) + ([tname] if needs_time else []) + list(inp["box"])
    wanted = list(dict.fromkeys(wanted))
    for col in wanted:
        if col not in header:
            what = ("input.variables" if col in names else "input.group_by" if col == group
                    else "input.time" if col == tname else f"input.box.{col}")
            raise ConfigError(f"{src}: {what} names column {col!r}, which is not in {files[0].name} "
                              f"(columns: {', '.join(header)})")
    table = _io.read_table(files, kind, wanted)
    for v in names:
        if not pd.api.types.is_numeric_dtype(table[v]):
            raise InputError(f"input.variables: column {v!r} of {files[0].name} is not numeric: list numeric "
                             "columns only, or clean the column")
    if needs_time:
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", UserWarning)  # format inference; failures raise below
                times = pd.to_datetime(table[tname])
        except (ValueError, TypeError) as exc:
            raise InputError(f"input.time: column {tname!r} cannot be read as dates: {exc}") from None
        keep = np.ones(len(table), dtype=bool)
        if inp["time_range"]:
            start, end = (pd.Timestamp(t) for t in inp["time_range"])
            if len(inp["time_range"][1]) <= 10:  # a date: the whole end day is in
                end = end + pd.Timedelta(days=1) - pd.Timedelta(1, "ns")
            keep &= ((times >= start) & (times <= end)).to_numpy()
        months_filter = _month_filter(inp)
        if months_filter is not None:
            keep &= times.dt.month.isin(list(months_filter)).to_numpy()
        table = table[keep]
        times = times[keep]
    for col, (lo, hi) in inp["box"].items():
        table = table[(table[col] >= lo) & (table[col] <= hi)]
    if len(table) == 0:
        raise InputError("the selection (input.time_range / months / seasons / box) leaves no rows: widen it")

    if needs_time and inp["split_by"]:
        codes_flat, labels = _split_codes(pd.to_datetime(table[tname]).dt.month.to_numpy(),
                                          inp["split_by"], inp["seasons"])
    else:
        codes_flat, labels = np.zeros(len(table), dtype=np.int16), []
    if group:
        keys, uniques = pd.factorize(table[group], sort=True)
    else:
        keys, uniques = np.zeros(len(table), dtype=int), [None]
    n_groups = len(uniques)
    sizes = np.bincount(keys, minlength=n_groups)
    width = int(sizes.max())
    values = np.full((n_groups, width, len(names)), np.nan)
    codes = np.full((n_groups, width), -1, dtype=np.int16)
    order = np.argsort(keys, kind="stable")
    pos = np.arange(len(keys)) - np.repeat(np.cumsum(sizes) - sizes, sizes)
    values[keys[order], pos] = table[names].to_numpy(dtype=float)[order]
    codes[keys[order], pos] = codes_flat[order]

    cell_dims = [group] if group else []
    if not group:
        values, codes = values[0], codes[0]
    tile = _tile_shape((n_groups,) if group else (), block_cells(wf, n_groups))
    import dask.array as da

    dims = cell_dims + [SAMPLE_DIM, "variable"]
    data = da.from_array(values, chunks=(tile + (-1, -1)) if group else (-1, -1))
    arr = xr.DataArray(data, dims=dims, coords={"variable": names})
    cell_coords = {group: xr.DataArray(np.asarray(uniques), dims=group)} if group else {}
    units = [wf.variable(v)["units"] or "" for v in names]
    counts = (int(sizes.min()), int(np.median(sizes)), int(sizes.max()))
    plan = Plan(wf, kind, files, arr, codes, cell_dims, cell_coords, inp["split_by"], labels, tile,
                list(names), units, {v: {} for v in names}, counts)
    if inp["sample_dims"] != ["time"]:
        plan.notes.append("input.sample_dims is ignored for tables: every row of a group is a sample")
    if not any(units):
        plan.notes.append("tables carry no units: set variables.NAME.units to label the output")
    return plan


# ---------------------------------------------------------------------------
# estimator settings
# ---------------------------------------------------------------------------

@dataclass
class CellSettings:
    """Everything a block task needs to fit a cell (small and picklable)."""

    names: list
    units: list
    kernel: str
    form: str
    bandwidth: str
    parametrization: str
    bounds: list | None
    boundary: str | None
    point_masses: list | None
    periods: list | None
    engine: str
    axes: list
    min_samples: int
    max_samples: int | None
    seed: int
    n_splits: int
    n_cell_dims: int
    sphere: list | None = None
    products: dict = field(default_factory=dict)

    @property
    def d(self) -> int:
        return len(self.names)

    @property
    def per_cell_products(self) -> bool:
        """Products that need each cell's fitted estimate (not just its gridded density)."""
        p = self.products
        return bool(len(p.get("thresholds", ())) or p.get("samples") or p.get("points") is not None
                    or p.get("bootstrap") or p.get("standard_error") or p.get("sectors"))

    @property
    def point_mass_index(self) -> int | None:
        if self.point_masses is None:
            return None
        for j, t in enumerate(self.point_masses):
            if t is not None:
                return j
        return None

    def fit_kwargs(self) -> dict:
        kw = dict(kernel=self.kernel, form=self.form, bandwidth=self.bandwidth,
                  parametrization=self.parametrization, engine=self.engine,
                  names=self.names, units=self.units)
        if self.bounds is not None:
            kw["bounds"] = self.bounds
            kw["boundary"] = self.boundary
        if self.periods is not None:
            kw["periods"] = self.periods
        if self.sphere is not None:
            kw["sphere"] = tuple(self.sphere)
        if self.point_masses is not None:
            kw["point_masses"] = self.point_masses
        return kw


def settings_for(plan: Plan, axes) -> CellSettings:
    wf = plan.workflow
    est, inp = wf["estimator"], wf["input"]
    vars_ = [wf.variable(v) for v in plan.names]
    bounds = [tuple(t["bounds"]) if t["bounds"] else None for t in vars_]
    periods = [t["period"] for t in vars_]
    masses = [t["point_mass"] for t in vars_]
    has_bounds = any(b is not None for b in bounds)
    return CellSettings(
        names=plan.names, units=plan.units, kernel=est["kernel"], form=est["form"],
        bandwidth=est["bandwidth"], parametrization=est["parametrization"],
        bounds=bounds if has_bounds else None,
        boundary=est["boundary"] if has_bounds else None,
        point_masses=masses if any(m is not None for m in masses) else None,
        periods=periods if any(p is not None for p in periods) else None,
        engine=est["engine"], axes=[np.asarray(a, dtype=float) for a in axes] if axes else [],
        min_samples=inp["min_samples"], max_samples=inp["max_samples"], seed=est["seed"],
        n_splits=plan.n_splits, n_cell_dims=len(plan.cell_dims), sphere=est.get("sphere"),
        products=_cell_products(wf, plan))


def _cell_products(wf: Workflow, plan: Plan) -> dict:
    """The [products] that are computed per cell from its fitted estimate."""
    prod = wf["products"]
    points = None
    if prod["points"] is not None:
        points = _io.read_points(prod["points"], plan.names, wf.source)
    return {"thresholds": np.asarray(prod["thresholds"], dtype=float).reshape(-1, len(plan.names)),
            "samples": int(prod["samples"]), "points": points, "bootstrap": int(prod["bootstrap"]),
            "band_level": float(prod["band_level"]), "standard_error": bool(prod["standard_error"]),
            "seed": int(wf["estimator"]["seed"]), "sectors": int(prod["sectors"]),
            "speed_classes": list(prod["speed_classes"])}


def _check_estimator(wf: Workflow, plan: Plan) -> None:
    """Refuse, before any work, settings this installation of the library cannot honour."""
    from . import fit
    from .workflow import _library_choices

    src = wf.source
    lib = _library_choices()
    settings = settings_for(plan, None)
    for option in ("kernel", "form", "bandwidth", "parametrization", "engine"):
        value = wf["estimator"][option]
        if isinstance(value, str) and value not in lib[option]:
            raise ConfigError(f"{src}: estimator.{option} = {value!r} is not available in this installation "
                              f"of mvkde (available: {', '.join(lib[option])})")
    if settings.bounds is not None and settings.boundary not in lib["boundary"]:
        raise ConfigError(f"{src}: estimator.boundary = {settings.boundary!r} is not available in this "
                          f"installation of mvkde (available: {', '.join(lib['boundary'])})")
    if settings.point_masses is not None and "point_masses" not in inspect.signature(fit).parameters:
        v = plan.names[settings.point_mass_index]
        raise ConfigError(f"{src}: variables.{v}.point_mass needs point-mass support in mvkde.fit "
                          "(fit(point_masses=...)), which this installation lacks")
    # a dry run on a small synthetic sample inside the declared support surfaces any
    # combination the library refuses, named by the workflow keys
    probe = _probe_sample(settings)
    try:
        fit(probe, **{**settings.fit_kwargs(), "bandwidth": "normal"})
    except MvkdeError as exc:
        raise ConfigError(f"{src}: the [estimator] and [variables] settings are refused by mvkde.fit: "
                          f"{exc}") from None


def _probe_sample(settings: CellSettings, n: int = 60) -> np.ndarray:
    rng = np.random.default_rng(0)
    cols = []
    for j in range(settings.d):
        lo, hi = (settings.bounds[j] if settings.bounds and settings.bounds[j] else (-math.inf, math.inf))
        t = settings.point_masses[j] if settings.point_masses else None
        period = settings.periods[j] if settings.periods else None
        sphere = list(settings.sphere or [])
        if settings.names[j] in sphere:
            span = 60.0 if sphere.index(settings.names[j]) == 0 else 180.0
            col = rng.uniform(-span, span, n)
        elif period is not None:
            col = rng.uniform(0, period, n)
        elif math.isfinite(lo) and math.isfinite(hi):
            base = lo if t is None else t
            col = base + (hi - base) * rng.uniform(0.1, 0.9, n)
        elif math.isfinite(lo):
            col = (lo if t is None else t) + rng.exponential(1.0, n) + 1e-3
        elif math.isfinite(hi):
            col = hi - rng.exponential(1.0, n) - 1e-3
        else:
            col = rng.normal(size=n)
        if t is not None:
            col[: n // 4] = t
        cols.append(col)
    return np.column_stack(cols)


# ---------------------------------------------------------------------------
# the shared grid
# ---------------------------------------------------------------------------

def resolve_axes(plan: Plan, compute=None) -> list[np.ndarray]:
    """Evaluation axes shared by every cell: grid.limits, else the pooled data range.

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
    bounded = [v for v in plan.names if wf.variable(v)["bounds"] is not None]
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
                raise InputError(f"variable {v} has values down to {lo:.6g} in {_where_files(plan)}, below "
                                 f"variables.{v}.bounds = {_show_pair(lo_b, hi_b)}: fix the bounds or the data")
            if math.isfinite(hi) and hi > hi_b:
                raise InputError(f"variable {v} has values up to {hi:.6g} in {_where_files(plan)}, above "
                                 f"variables.{v}.bounds = {_show_pair(lo_b, hi_b)}: fix the bounds or the data")
        for v in todo:
            t = wf.variable(v)["point_mass"]
            part = "_above" if t is not None else ""
            lo, hi = float(computed[(v, "min" + part)]), float(computed[(v, "max" + part)])
            if not (math.isfinite(lo) and math.isfinite(hi)):
                if not math.isfinite(float(computed[(v, "min")])):
                    raise InputError(f"variable {v} has no valid (finite) values in the selection of "
                                     f"{_where_files(plan)}: check the input and input.time_range / months / "
                                     "seasons / box")
                raise InputError(f"variable {v} has no values above its point mass "
                                 f"variables.{v}.point_mass = {t:g}: set grid.limits.{v}")
            if hi <= lo:
                raise InputError(f"variable {v} is constant ({lo:g}) in the selection of {_where_files(plan)}: "
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


def _where_files(plan: Plan) -> str:
    return plan.files[0].name + (f" and {len(plan.files) - 1} more file(s)" if len(plan.files) > 1 else "")


def _show_pair(lo, hi) -> str:
    return f"[{lo:g}, {hi:g}]"


def _nanmin(x):
    import dask.array as da

    return da.nanmin(x)


def _nanmax(x):
    import dask.array as da

    return da.nanmax(x)


# ---------------------------------------------------------------------------
# the per-block work
# ---------------------------------------------------------------------------

def _trapezoid_weights(axes) -> np.ndarray:
    w = None
    for a in axes:
        wa = np.empty_like(a)
        dx = np.diff(a)
        wa[0], wa[-1] = dx[0] / 2, dx[-1] / 2
        wa[1:-1] = (dx[:-1] + dx[1:]) / 2
        w = wa if w is None else np.multiply.outer(w, wa)
    return w


@dataclass
class CellResult:
    density: np.ndarray
    H: np.ndarray
    converged: bool
    at_edge: bool
    engine: str
    point_mass_probability: float = float("nan")
    density_at_point_mass: np.ndarray | None = None
    extras: dict = field(default_factory=dict)


def _sector_names(settings: CellSettings):
    """(direction, speed): the circular variable and the other one."""
    di = next(k for k, per in enumerate(settings.periods) if per is not None)
    return settings.names[di], settings.names[1 - di]


def _speed_edges(settings: CellSettings) -> np.ndarray:
    edges = settings.products.get("speed_classes") or []
    if edges:
        return np.asarray(edges, dtype=float)
    di = next(k for k, per in enumerate(settings.periods) if per is not None)
    ax = settings.axes[1 - di]
    return np.linspace(ax[0], ax[-1], 6)


def _cell_extras(est, settings: CellSettings, size, limits, key) -> dict:
    """Per-cell [products] from the fitted estimate (library calls only)."""
    from . import products as _products

    p = settings.products
    out = {}
    thresholds = p["thresholds"]
    if len(thresholds):
        out["exceedance_at_threshold"] = est.exceedance(thresholds)
    if p["standard_error"]:
        # R(K) / (n |H|^{1/2}): the variance of f_hat(x) divided by f(x)
        out["variance_factor"] = float(_products.standard_error(est, np.ones(1))[0] ** 2)
    if p.get("sectors"):
        out["sector_probability"] = est.sector_table(*_sector_names(settings), p["sectors"],
                                                     _speed_edges(settings)).values
    seed = [p["seed"], int(key[0]), int(key[1])]
    if p["samples"]:
        out["samples"] = est.sample(p["samples"], seed=seed + [1])
    if p["points"] is not None:
        out["density_at_point"] = est.pdf(p["points"])
    if p["bootstrap"]:
        def stat(b):
            g = b.grid(size, limits=limits).values.ravel()
            return np.concatenate([g, b.exceedance(thresholds)]) if len(thresholds) else g
        draws = _products.bootstrap(est, stat, p["bootstrap"], seed=seed + [2])
        a = (1 - p["band_level"]) / 2
        lo, hi = np.quantile(draws, [a, 1 - a], axis=0)
        m = int(np.prod(size))
        out["density_lower"], out["density_upper"] = lo[:m].reshape(size), hi[:m].reshape(size)
        if len(thresholds):
            out["exceedance_lower"], out["exceedance_upper"] = lo[m:], hi[m:]
    return out


def fit_and_evaluate(samples: list[np.ndarray], settings: CellSettings, keys=None) -> list:
    """Fit and evaluate every sample of a block: the one place the library is called.

    Returns one entry per sample: a :class:`CellResult`, or the message of the
    MvkdeError that refused the cell.  Cells without bounds, point masses or
    periods go through the batched library calls when the installed library
    has them (``bandwidth.select_many`` and ``engines.evaluate_grid_many``);
    otherwise each cell is ``mvkde.fit(...)`` followed by ``.grid(...)``.
    """
    from . import bandwidth as _bandwidth
    from . import engines as _engines

    plain = (settings.bounds is None and settings.point_masses is None and settings.periods is None
             and settings.sphere is None and isinstance(settings.bandwidth, str)
             and not settings.per_cell_products)
    if plain and samples and hasattr(_bandwidth, "select_many") and hasattr(_engines, "evaluate_grid_many"):
        try:
            return _batched(samples, settings, _bandwidth, _engines)
        except MvkdeError:
            pass  # one cell refused: fall back to one call per cell so only that cell is flagged
    keys = keys if keys is not None else [(k, 0) for k in range(len(samples))]
    return [_one_cell(x, settings, key) for x, key in zip(samples, keys)]


def _batched(samples, settings, _bandwidth, _engines) -> list:
    from .kernels import get_kernel, get_multivariate_kernel

    mk = get_multivariate_kernel(get_kernel(settings.kernel).name, settings.form, settings.d)
    results = _bandwidth.select_many(settings.bandwidth, samples, None, kernel=mk.name, form=mk.form,
                                     parametrization=settings.parametrization)
    values, choices = _engines.evaluate_grid_many(settings.axes, samples, None,
                                                  [r.matrix for r in results], mk, settings.engine)
    return [CellResult(values[k], r.H, bool(r.converged), bool(r.at_edge), c.engine)
            for k, (r, c) in enumerate(zip(results, choices))]


def _one_cell(x: np.ndarray, settings: CellSettings, key=(0, 0)):
    from . import fit

    limits = [(a[0], a[-1]) for a in settings.axes]
    size = [len(a) for a in settings.axes]
    try:
        est = fit(x, **settings.fit_kwargs())
        grid = est.grid(size, limits=limits)
        res = CellResult(np.asarray(grid.values, dtype=float), np.asarray(est.H, dtype=float),
                         bool(est.bandwidth.converged), bool(est.bandwidth.at_edge),
                         str(grid.attrs.get("engine", "")))
        j = settings.point_mass_index
        if j is not None:
            res.point_mass_probability = float(est.point_mass_probability)
            if settings.d > 1:
                keep = [k for k in range(settings.d) if k != j]
                pm = est.point_mass_grid([size[k] for k in keep], limits=[limits[k] for k in keep])
                res.density_at_point_mass = np.asarray(pm.values, dtype=float)
        if settings.per_cell_products:
            res.extras = _cell_extras(est, settings, size, limits, key)
        return res
    except (MvkdeError, np.linalg.LinAlgError) as exc:
        return f"{type(exc).__name__}: {exc}"


def process_block(values, codes, first_cell: int, tile_shape: tuple, settings: CellSettings) -> dict:
    """One dask task: every cell (and split) of a block, fitted and evaluated.

    ``values`` has shape (*tile_shape, *sample_shape, d); ``codes`` (split index
    per sample, -1 for no sample) broadcasts to ``values.shape[:-1]``.
    Missing values are dropped per cell and counted; a cell with fewer valid
    samples than ``settings.min_samples`` or refused by the library gets NaN
    and a flag.  ``first_cell`` and the cell's position seed its subsample, so
    results do not depend on how cells are grouped into blocks.
    """
    import warnings

    from .errors import MvkdeWarning

    values = np.asarray(values, dtype=float)
    d = settings.d
    ncell = int(np.prod(tile_shape)) if tile_shape else 1
    vals = values.reshape(ncell, -1, d)
    codes = np.broadcast_to(np.asarray(codes), values.shape[:-1]).reshape(ncell, -1)
    S = settings.n_splits
    grid_shape = tuple(len(a) for a in settings.axes)
    j = settings.point_mass_index
    other_shape = tuple(n for k, n in enumerate(grid_shape) if k != j)
    out = {
        "density": np.full((ncell, S) + grid_shape, np.nan),
        "n_samples": np.zeros((ncell, S), dtype=np.int32),
        "n_missing": np.zeros((ncell, S), dtype=np.int32),
        "bandwidth": np.full((ncell, S, d, d), np.nan),
        "grid_mass": np.full((ncell, S), np.nan),
        "bandwidth_converged": np.zeros((ncell, S), dtype=np.int8),
        "flags": np.zeros((ncell, S), dtype=np.uint8),
        "messages": [],
        "engines": set(),
    }
    if j is not None:
        out["point_mass_probability"] = np.full((ncell, S), np.nan)
        if d > 1:
            out["density_at_point_mass"] = np.full((ncell, S) + other_shape, np.nan)
    weights = _trapezoid_weights(settings.axes)
    if settings.sphere:
        # a location on the sphere: node areas (km2) instead of trapezoid weights in degrees
        from .directional import node_areas_km2

        ia, ib = settings.names.index(settings.sphere[0]), settings.names.index(settings.sphere[1])
        weights = np.ones(grid_shape)
        for k, a in enumerate(settings.axes):
            if k not in (ia, ib):
                shape = [1] * d
                shape[k] = -1
                weights = weights * _trapezoid_weights([a]).reshape(shape)
        shape = [1] * d
        shape[ia], shape[ib] = len(settings.axes[ia]), len(settings.axes[ib])
        area = node_areas_km2(settings.axes[ia], settings.axes[ib])
        weights = weights * (area if ia < ib else area.T).reshape(shape)
    other_weights = _trapezoid_weights([a for k, a in enumerate(settings.axes) if k != j]) if (
        j is not None and d > 1) else None

    todo, where = [], []
    for c in range(ncell):
        finite = np.isfinite(vals[c]).all(axis=1)
        for s in range(S):
            member = codes[c] == s
            x = vals[c][member & finite]
            out["n_missing"][c, s] = int((member & ~finite).sum())
            if settings.max_samples is not None and len(x) > settings.max_samples:
                rng = np.random.default_rng([settings.seed, first_cell + c, s])
                x = x[np.sort(rng.choice(len(x), settings.max_samples, replace=False))]
                out["flags"][c, s] |= FLAGS["subsampled"]
            out["n_samples"][c, s] = len(x)
            if len(x) < settings.min_samples:
                out["flags"][c, s] |= FLAGS["too_few_samples"]
                continue
            todo.append(x)
            where.append((c, s))

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", MvkdeWarning)  # reported through flags instead
        results = fit_and_evaluate(todo, settings, [(first_cell + c, s) for c, s in where])

    for (c, s), res in zip(where, results):
        if not isinstance(res, str):
            for name, value in res.extras.items():
                value = np.asarray(value, dtype=float)
                if name not in out:
                    out[name] = np.full((ncell, S) + value.shape, np.nan)
                out[name][c, s] = value
        if isinstance(res, str):
            out["flags"][c, s] |= FLAGS["fit_failed"]
            if len(out["messages"]) < 3:
                out["messages"].append((first_cell + c, s, res))
            continue
        out["density"][c, s] = res.density
        out["bandwidth"][c, s] = res.H
        out["bandwidth_converged"][c, s] = int(res.converged)
        out["engines"].add(res.engine)
        if not res.converged:
            out["flags"][c, s] |= FLAGS["bandwidth_not_converged"]
        if res.at_edge:
            out["flags"][c, s] |= FLAGS["bandwidth_at_edge"]
        mass = float(np.sum(res.density * weights))
        if j is not None:
            out["point_mass_probability"][c, s] = res.point_mass_probability
            if d > 1 and res.density_at_point_mass is not None:
                out["density_at_point_mass"][c, s] = res.density_at_point_mass
                mass += float(np.sum(res.density_at_point_mass * other_weights))
            else:
                mass += res.point_mass_probability
        out["grid_mass"][c, s] = mass
        if abs(mass - 1.0) > GRID_MASS_TOLERANCE:
            out["flags"][c, s] |= FLAGS["grid_mass_off_by_more_than_1_percent"]
    return out


# ---------------------------------------------------------------------------
# scheduling
# ---------------------------------------------------------------------------

class Progress:
    """A bar on a terminal; plain log lines (every 10 % or 30 s) otherwise."""

    def __init__(self, total: int, stream=None, label="blocks"):
        self.total, self.done, self.label = max(1, total), 0, label
        self.stream = stream if stream is not None else sys.stderr
        self.tty = bool(getattr(self.stream, "isatty", lambda: False)())
        self.t0 = self.last = time.perf_counter()
        self.last_tenth = -1

    def update(self, n: int = 1) -> None:
        self.done += n
        now = time.perf_counter()
        frac = self.done / self.total
        if self.tty:
            width = 30
            fill = int(round(width * frac))
            self.stream.write(f"\r[{'#' * fill}{'.' * (width - fill)}] {self.done}/{self.total} {self.label} "
                              f"{now - self.t0:6.1f} s")
            if self.done >= self.total:
                self.stream.write("\n")
            self.stream.flush()
            return
        tenth = int(frac * 10)
        if tenth > self.last_tenth or now - self.last > 30 or self.done >= self.total:
            self.last_tenth, self.last = tenth, now
            print(f"mvkde run: {self.done}/{self.total} {self.label} done ({100 * frac:.0f} %), "
                  f"{now - self.t0:.1f} s", file=self.stream, flush=True)


def _worker_environ() -> dict:
    """Environment of local-cluster worker processes (set before they start).

    dask.distributed's default sets MALLOC_TRIM_THRESHOLD_=65536, which also
    fixes glibc's mmap threshold at 128 kB: every array above that is then
    mapped and unmapped afresh, page faults included, and a block of cells
    allocates thousands of such temporaries (the workers ran 1.3-3 x slower
    than the same code in the main process).  Here arrays up to 32 MB come
    from the heap and up to 256 MB of freed heap is kept for reuse; BLAS and
    OpenMP stay at one thread per single-threaded worker, as in dask's default.
    Variables already set in the environment win (dask.distributed's rule).
    """
    import dask

    env = dict(dask.config.get("distributed.nanny.pre-spawn-environ", {}) or {})
    env.update({"MALLOC_TRIM_THRESHOLD_": 256 * 2**20, "MALLOC_MMAP_THRESHOLD_": 32 * 2**20,
                "OMP_NUM_THREADS": 1, "MKL_NUM_THREADS": 1, "OPENBLAS_NUM_THREADS": 1})
    return env


class Scheduler:
    """The dask scheduler named by ``compute.scheduler``; a context manager.

    "threads", "processes" and "synchronous" use dask's embedded local
    schedulers; "local-cluster" starts a dask.distributed LocalCluster with
    ``compute.workers`` single-threaded worker processes; an address
    ("tcp://HOST:PORT") connects to a running dask.distributed scheduler.
    """

    def __init__(self, compute: dict):
        self.name = compute["scheduler"]
        self.workers = compute["workers"]
        self.memory_limit = compute["memory_limit"]
        self.client = None
        self.cluster = None

    def __enter__(self):
        if self.name == "threads" and self.workers != 1:
            self._limit_blas_threads()
        if self.name in ("threads", "processes", "synchronous"):
            return self
        try:
            from distributed import Client, LocalCluster
        except ImportError:  # pragma: no cover - distributed is a runtime dependency
            raise ConfigError("compute.scheduler needs dask.distributed: pip install distributed") from None
        if self.name == "local-cluster":
            import os

            import dask

            n = self.workers or os.cpu_count() or 1
            with dask.config.set({"distributed.nanny.pre-spawn-environ": _worker_environ()}):
                self.cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True,
                                            memory_limit=self.memory_limit, dashboard_address=None,
                                            silence_logs=logging.ERROR)
            self.client = Client(self.cluster)
        else:
            try:
                self.client = Client(self.name, timeout="20s")
            except (OSError, TimeoutError, ValueError) as exc:
                raise ConfigError(f"compute.scheduler = {self.name!r}: cannot connect to a dask scheduler "
                                  f"there ({exc}); start one (dask scheduler) or use \"local-cluster\"") from None
        return self

    def _limit_blas_threads(self) -> None:
        """One BLAS/OpenMP thread per task while several dask threads run tasks.

        Each dask thread already keeps a core busy; a BLAS call that wakes its
        own pool on top would oversubscribe the cores.  Uses threadpoolctl when
        it is installed (it is not a dependency); without it the few BLAS calls
        of a block (most of the work is FFTs and element-wise numpy, single
        threaded) keep their default.  Restored on exit.
        """
        try:
            from threadpoolctl import threadpool_limits
        except ImportError:
            return
        self._blas_limits = threadpool_limits(limits=1)

    def __exit__(self, *exc):
        limits = getattr(self, "_blas_limits", None)
        if limits is not None:
            limits.restore_original_limits()
            self._blas_limits = None
        if self.client is not None:
            self.client.close()
        if self.cluster is not None:
            self.cluster.close()
        return False

    def describe(self) -> str:
        if self.client is not None:
            n = len(self.client.scheduler_info().get("workers", {}))
            return f"{self.name} ({n} workers)"
        return f"{self.name} ({self.workers or 'all'} workers)" if self.name != "synchronous" else self.name

    def compute(self, *collections):
        import dask

        if self.client is not None:
            return self.client.compute(list(collections), sync=True)
        kw = {"scheduler": self.name}
        if self.workers and self.name != "synchronous":
            kw["num_workers"] = self.workers
        return dask.compute(*collections, **kw)

    def run_blocks(self, tasks: list, on_result) -> None:
        """Compute delayed ``tasks``; call ``on_result(index, result)`` as each one finishes."""
        import dask
        from dask.callbacks import Callback

        if self.client is not None:
            from distributed import as_completed

            futures = self.client.compute(tasks)
            index = {f.key: i for i, f in enumerate(futures)}
            for fut in as_completed(futures):
                on_result(index[fut.key], fut.result())
                fut.release()
            return
        keys = {t.key: i for i, t in enumerate(tasks)}

        class _Done(Callback):
            def _posttask(self, key, result, dsk, state, worker_id):
                if key in keys:
                    on_result(keys[key], result)

        kw = {"scheduler": self.name}
        if self.workers and self.name != "synchronous":
            kw["num_workers"] = self.workers
        with _Done():
            dask.compute(*tasks, **kw)


# ---------------------------------------------------------------------------
# the whole run
# ---------------------------------------------------------------------------

def block_tasks(plan: Plan, settings: CellSettings, skip=()) -> list:
    """One delayed :func:`process_block` per block of cells (except the blocks in ``skip``)."""
    import uuid

    import dask

    # a run-unique token: two runs on one shared dask cluster must never share keys
    token = uuid.uuid4().hex[:12]
    tasks = []
    data = plan.values.data
    nd = len(plan.cell_dims)
    for b, tile in enumerate(plan.tiles()):
        if b in skip:
            continue
        block = data[tile] if tile else data
        codes = plan.codes
        if nd:
            # codes carry the cell dims only for tables (one row layout per group)
            codes = codes[tuple(t if codes.shape[k] > 1 else slice(None) for k, t in enumerate(tile))]
        tile_shape = tuple(t.stop - t.start for t in tile)
        first = _first_cell(tile, plan.cell_shape)
        tasks.append(dask.delayed(process_block, pure=True)(
            block, codes, first, tile_shape, settings, dask_key_name=f"mvkde-block-{b}-{token}"))
    return tasks


def _first_cell(tile, shape) -> int:
    if not tile:
        return 0
    return int(np.ravel_multi_index(tuple(t.start for t in tile), shape))


def execute(plan: Plan, settings: CellSettings, scheduler: Scheduler, progress: Progress | None = None,
            store: "BlockStore | None" = None) -> dict:
    """Run every block and gather the results into arrays over (*cells, split, ...).

    With a :class:`BlockStore`, blocks it already holds are read back instead of
    computed, and each computed block is saved to it as soon as it arrives.
    """
    ncell_shape = plan.cell_shape
    S = settings.n_splits
    assembled: dict = {}
    messages, engines = [], set()
    tiles = list(plan.tiles())

    def assemble(i, res):
        tile = tiles[i]
        tshape = tuple(t.stop - t.start for t in tile)
        for name, arr in res.items():
            if name == "messages":
                messages.extend(res[name])
                continue
            if name == "engines":
                engines.update(res[name])
                continue
            if name not in assembled:
                fill = np.nan if arr.dtype.kind == "f" else 0
                assembled[name] = np.full(ncell_shape + arr.shape[1:], fill, dtype=arr.dtype)
            assembled[name][tile] = arr.reshape(tshape + arr.shape[1:])
        if progress is not None:
            progress.update()

    done = store.done_blocks() if store is not None else set()
    for i in sorted(done):
        assemble(i, store.read(i, tiles[i]))
    todo = [i for i in range(len(tiles)) if i not in done]

    def on_result(k, res):
        i = todo[k]
        if store is not None:
            store.write(i, tiles[i], res)
        assemble(i, res)

    if todo:
        scheduler.run_blocks(block_tasks(plan, settings, skip=done), on_result)
    assembled["messages"] = messages
    assembled["engines"] = sorted(e for e in engines if e)
    assembled["resumed_blocks"] = len(done)
    assert all(assembled[k].shape[len(ncell_shape)] == S for k in assembled if isinstance(assembled[k], np.ndarray))
    return assembled


class BlockStore:
    """Finished blocks of a run kept in a Zarr store, for the opt-in resumable mode.

    Layout of the folder: ``results.zarr`` with one Zarr array per result
    (chunks = the blocks, so a block is written as whole chunks),
    ``run.json`` with the fingerprint of the run (resolved workflow without
    its compute and output settings, input files' sizes and modification
    times, grid axes, blocks), and one marker ``done/B.json`` per finished
    block written after its data: a block counts as done only when its
    marker exists, so a run killed while saving a block recomputes it.  A store made by a different run is
    replaced.  zarr is imported here only (the ``resume`` extra).
    """

    def __init__(self, path, plan: Plan, settings: CellSettings, note=None):
        try:
            import zarr
        except ImportError:
            raise ConfigError(f"{plan.workflow.source}: output.resume = true needs the zarr package: "
                              "pip install 'mvkde[resume]' (or set output.resume = false)") from None
        import json
        import shutil
        from pathlib import Path

        self.zarr = zarr
        self.path = Path(path)
        self.markers = self.path / "done"
        self.chunks_over_cells = tuple(plan.tile)
        self.cell_shape = plan.cell_shape
        self.fingerprint = _fingerprint(plan, settings)
        stamp = self.path / "run.json"
        if self.path.exists():
            try:
                same = json.loads(stamp.read_text()) == self.fingerprint
            except (OSError, ValueError):
                same = False
            if not same:
                if note is not None:
                    note(f"mvkde run: {self.path} was made by a different workflow or different inputs: "
                         "starting over")
                shutil.rmtree(self.path)
        if not self.path.exists():
            self.markers.mkdir(parents=True)
            _write_atomic(stamp, json.dumps(self.fingerprint))
        self.root = zarr.open_group(str(self.path / "results.zarr"), mode="a")

    def done_blocks(self) -> set:
        return {int(f.stem) for f in self.markers.glob("*.json") if f.stem.isdigit()}

    def read(self, i: int, tile) -> dict:
        import json

        meta = json.loads((self.markers / f"{i}.json").read_text())
        ncell = int(np.prod([t.stop - t.start for t in tile])) if tile else 1
        out = {}
        for name in self.root.array_keys():
            block = np.asarray(self.root[name][tile if tile else ...])
            out[name] = block.reshape((ncell,) + block.shape[len(tile):])
        out["messages"] = [tuple(m) for m in meta["messages"]]
        out["engines"] = set(meta["engines"])
        return out

    def write(self, i: int, tile, res: dict) -> None:
        import json

        tshape = tuple(t.stop - t.start for t in tile)
        for name, arr in res.items():
            if name in ("messages", "engines"):
                continue
            if name not in self.root:
                fill = np.nan if arr.dtype.kind == "f" else 0
                self.root.create_array(name, shape=self.cell_shape + arr.shape[1:], dtype=arr.dtype,
                                       chunks=tuple(max(1, c) for c in self.chunks_over_cells) + arr.shape[1:],
                                       fill_value=fill)
            self.root[name][tile if tile else ...] = arr.reshape(tshape + arr.shape[1:])
        meta = {"messages": [list(m) for m in res["messages"]], "engines": sorted(e for e in res["engines"] if e)}
        _write_atomic(self.markers / f"{i}.json", json.dumps(meta))

    def remove(self) -> None:
        import shutil

        shutil.rmtree(self.path, ignore_errors=True)


def _write_atomic(path, text: str) -> None:
    import os

    tmp = path.with_name(path.name + f".{os.getpid()}.tmp")
    tmp.write_text(text)
    os.replace(tmp, path)


def _fingerprint(plan: Plan, settings: CellSettings) -> dict:
    """What makes two runs' blocks interchangeable: not the scheduler, nor the output settings."""
    spec = plan.workflow.to_json()
    spec = {k: v for k, v in spec.items() if k not in ("compute", "output")}
    spec["block_size"] = plan.workflow["compute"]["block_size"]
    files = []
    for f in plan.files:
        st = f.stat()
        files.append([str(f.resolve()), st.st_size, st.st_mtime_ns])
    return {"workflow": spec, "inputs": files, "axes": [a.tolist() for a in settings.axes],
            "tile": list(plan.tile), "cell_shape": list(plan.cell_shape), "n_splits": settings.n_splits}


def resume_store_path(output) -> "Path":
    from pathlib import Path

    output = Path(output)
    return output.with_name(output.name + ".resume")


def build_dataset(plan: Plan, settings: CellSettings, results: dict) -> xr.Dataset:
    """The labelled output: density, n_samples, bandwidth and diagnostics with CF attributes."""
    from . import CAUTION
    from .units import density_units

    names, units = plan.names, plan.units
    cdims = list(plan.cell_dims)
    split = [plan.split_dim] if plan.split_dim else []
    lead = cdims + split

    def squeeze(a):  # drop the split axis when there is no split
        return a if split else a.reshape(a.shape[: len(cdims)] + a.shape[len(cdims) + 1:])

    coords = {}
    for dname in cdims:
        if dname in plan.cell_coords:
            c = plan.cell_coords[dname]
            coords[dname] = (dname, np.asarray(c.values), dict(getattr(c, "attrs", {})))
    if split:
        coords[plan.split_dim] = (plan.split_dim, np.asarray(plan.split_labels),
                                  {"long_name": "meteorological season (DJF, MAM, JJA, SON)"
                                   if plan.split_dim == "season" else "month of the year"})
    sphere = list(settings.sphere or [])
    for j, (v, ax, u) in enumerate(zip(names, settings.axes, units)):
        attrs = {"long_name": plan.variable_attrs.get(v, {}).get("long_name", v)}
        if u:
            attrs["units"] = u
        if "standard_name" in plan.variable_attrs.get(v, {}):
            attrs["standard_name"] = plan.variable_attrs[v]["standard_name"]
        if settings.periods is not None and settings.periods[j] is not None:
            attrs["period"] = float(settings.periods[j])
        if v in sphere:
            # no period attribute on the longitude: plot and inspect read a period as a circular
            # variable to draw on a polar axis, and a location belongs on a map
            attrs.setdefault("units", "degrees_north" if sphere.index(v) == 0 else "degrees_east")
        coords[v] = (v, ax, attrs)
    if sphere:
        from .directional import node_areas_km2

        ia, ib = names.index(sphere[0]), names.index(sphere[1])
        area = node_areas_km2(settings.axes[ia], settings.axes[ib])
        coords["cell_area"] = (tuple(sphere), area, {
            "units": "km2", "long_name": "area of the Earth's surface each grid node stands for (trapezoid "
                                         "rule on the sphere)"})
    coords["variable_row"] = ("variable_row", np.array(names))
    coords["variable_column"] = ("variable_column", np.array(names))

    j = settings.point_mass_index
    dens_units = density_units(units)
    if sphere:
        other = density_units([u for v, u in zip(names, units) if v not in sphere])
        dens_units = "km-2" if other == "1" else f"km-2 {other}"
    long = "joint probability density of " + ", ".join(names)
    if j is not None:
        long += f" (continuous part: {names[j]} > {settings.point_masses[j]})"
    data_vars = {
        "density": (lead + names, squeeze(results["density"]), {
            "long_name": long, "units": dens_units, "caution": CAUTION,
            "grid_note": "evaluated at the nodes of the shared grid (numpy.linspace(lo, hi, size) per variable)"}),
        "n_samples": (lead, squeeze(results["n_samples"]), {
            "long_name": "number of valid samples fitted in the cell", "units": "1"}),
        "n_missing": (lead, squeeze(results["n_missing"]), {
            "long_name": "number of samples dropped because a variable was missing", "units": "1"}),
        "bandwidth": (lead + ["variable_row", "variable_column"], squeeze(results["bandwidth"]), {
            "long_name": "bandwidth matrix H (covariance of the scaled kernel)",
            "units_note": "entry (i, j) has the units of variable i times those of variable j"}),
        "grid_mass": (lead, squeeze(results["grid_mass"]), {
            "long_name": "integral of the density over the grid (trapezoid rule), point mass included",
            "units": "1"}),
        "bandwidth_converged": (lead, squeeze(results["bandwidth_converged"]), {
            "long_name": "1 if the bandwidth selector reported convergence", "units": "1"}),
        "flags": (lead, squeeze(results["flags"]), {
            "long_name": "quality flags of the cell",
            "flag_masks": np.array(list(FLAGS.values()), dtype=np.uint8),
            "flag_meanings": " ".join(FLAGS)}),
    }
    if j is not None:
        data_vars["point_mass_probability"] = (lead, squeeze(results["point_mass_probability"]), {
            "long_name": f"probability that {names[j]} <= {settings.point_masses[j]} (the point mass)",
            "units": "1"})
        if "density_at_point_mass" in results:
            others = [v for k, v in enumerate(names) if k != j]
            data_vars["density_at_point_mass"] = (lead + others, squeeze(results["density_at_point_mass"]), {
                "long_name": "density of " + ", ".join(others) + f" on the point mass of {names[j]} "
                             f"(integrates to point_mass_probability)",
                "units": density_units([u for k, u in enumerate(units) if k != j])})
    ds = xr.Dataset(data_vars, coords=coords)
    from .derived import add_cell_products, add_grid_products

    add_cell_products(ds, results, settings, lead, squeeze)
    add_grid_products(ds, plan.workflow["products"], names, j,
                      settings.bounds[j][0] if j is not None else float("nan"))
    return ds


def encoding_for(ds: xr.Dataset, plan: Plan, output: dict) -> dict:
    """Compressed, chunked netCDF4 encoding: one chunk = one block of cells with its whole grid."""
    enc = {}
    for name, var in ds.data_vars.items():
        chunks = []
        for dname in var.dims:
            if dname in plan.cell_dims:
                chunks.append(plan.tile[plan.cell_dims.index(dname)])
            else:
                chunks.append(var.sizes[dname])
        e = {"zlib": output["complevel"] > 0, "complevel": output["complevel"] or 1} if output["complevel"] else {}
        if var.ndim:
            e["chunksizes"] = tuple(max(1, c) for c in chunks)
        if name in ("density", "density_at_point_mass") and output["dtype"] == "float32":
            e["dtype"] = "float32"
        if var.dtype.kind == "f":
            e["_FillValue"] = np.nan
        enc[name] = e
    return enc


def estimate_sizes(plan: Plan, settings: CellSettings | None = None) -> dict:
    """Bytes per task (input block + output block + engine work space) and of the output."""
    wf = plan.workflow
    d = len(plan.names)
    grid = int(np.prod(wf.grid_size()))
    per_block = int(np.prod(plan.tile)) if plan.tile else 1
    n = plan.sample_counts[2]
    S = plan.n_splits
    itemsize = 8
    from .engines import exact

    work = exact.CHUNK_ELEMENTS * itemsize
    task = per_block * n * d * itemsize * 2 + per_block * S * grid * itemsize * 2 + work
    out_item = 4 if wf["output"]["dtype"] == "float32" else 8
    output = plan.n_cells * S * (grid * out_item + d * d * 8 + 32)
    return {"task_bytes": task, "output_bytes": output, "engine_work_bytes": work}


def run(wf: Workflow, *, progress_stream=None, plan: Plan | None = None, store_path=None):
    """Execute a workflow: returns (dataset, plan, settings, summary dict).

    Nothing is written, except finished blocks to the Zarr store at
    ``store_path`` when given (the resumable mode).
    """
    plan = plan or prepare(wf)
    stream = progress_stream if progress_stream is not None else sys.stderr
    store = None
    with Scheduler(wf["compute"]) as sched:
        t0 = time.perf_counter()  # compute time: a cluster's start-up is not counted
        axes = resolve_axes(plan, sched.compute)
        settings = settings_for(plan, axes)
        if store_path is not None:
            store = BlockStore(store_path, plan, settings, note=lambda m: print(m, file=stream, flush=True))
        progress = Progress(plan.n_blocks, progress_stream)
        results = execute(plan, settings, sched, progress, store=store)
        seconds = time.perf_counter() - t0
        where = sched.describe()
    ds = build_dataset(plan, settings, results)
    flags = ds["flags"].values
    _refuse_if_nothing_fitted(plan, flags, results["messages"])
    summary = {
        "seconds": seconds,
        "scheduler": where,
        "cells": plan.n_cells * plan.n_splits,
        "blocks": plan.n_blocks,
        "flag_counts": {name: int(((flags & bit) > 0).sum()) for name, bit in FLAGS.items()},
        "messages": results["messages"],
        "engines": results["engines"],
        "resumed_blocks": results["resumed_blocks"],
        "store": store,
    }
    return ds, plan, settings, summary


def _refuse_if_nothing_fitted(plan: Plan, flags: np.ndarray, messages) -> None:
    """A run in which no cell got a density is an input or settings error, not an output."""
    usable = (flags & (FLAGS["too_few_samples"] | FLAGS["fit_failed"])) == 0
    if flags.size == 0 or usable.any():
        return
    wf = plan.workflow
    few = int(((flags & FLAGS["too_few_samples"]) > 0).sum())
    failed = int(((flags & FLAGS["fit_failed"]) > 0).sum())
    parts = []
    if few:
        parts.append(f"{few} with fewer than input.min_samples = {wf['input']['min_samples']} valid samples")
    if failed:
        example = f" (e.g. {messages[0][2]})" if messages else ""
        parts.append(f"{failed} refused by the estimator{example}")
    raise InputError(f"no cell of {_where_files(plan)} got a density: of {flags.size} cells, " + " and ".join(parts)
                     + ": check the input values, the selection and the [estimator] settings")


# ---------------------------------------------------------------------------
# from a workflow file to a written output
# ---------------------------------------------------------------------------

def _human(nbytes: float) -> str:
    for unit in ("B", "kB", "MB", "GB", "TB"):
        if nbytes < 1000 or unit == "TB":
            return f"{nbytes:.0f} {unit}" if unit == "B" else f"{nbytes:.1f} {unit}"
        nbytes /= 1000
    return f"{nbytes:.1f} TB"


def describe_plan(plan: Plan) -> str:
    """The text ``mvkde check`` prints."""
    wf = plan.workflow
    est, inp = wf["estimator"], wf["input"]
    sizes = estimate_sizes(plan)
    total_in = sum(f.stat().st_size for f in plan.files)
    lines = [f"workflow {wf.source}: valid"]
    lines.append(f"  input       {len(plan.files)} {plan.kind} file(s), {_human(total_in)}: "
                 + ", ".join(f.name for f in plan.files[:3]) + (" ..." if len(plan.files) > 3 else ""))
    lines.append("  variables   " + ", ".join(f"{v} [{u or 'no units'}]" for v, u in zip(plan.names, plan.units)))
    celltext = " x ".join(f"{d}={n}" for d, n in zip(plan.cell_dims, plan.cell_shape)) or "one cell"
    lines.append(f"  cells       {plan.n_cells} ({celltext})"
                 + (f" x {plan.n_splits} {plan.split_dim}s ({', '.join(map(str, plan.split_labels))})"
                    if plan.split_dim else ""))
    lo, med, hi = plan.sample_counts
    what = "rows per group" if plan.kind != "netcdf" else "samples per cell" + (
        f" and {plan.split_dim}" if plan.split_dim else "")
    lines.append(f"  samples     {what}: " + (f"{hi}" if lo == hi else f"min {lo}, median {med}, max {hi}")
                 + f" before dropping missing values; cells with fewer than {inp['min_samples']} valid "
                   "samples get NaN and a flag")
    grid = wf.grid_size()
    lim = wf["grid"]["limits"]
    lines.append("  grid        " + " x ".join(map(str, grid)) + " nodes: " + "; ".join(
        f"{v} " + (f"[{lim[v][0]:g}, {lim[v][1]:g}]" if v in lim else
                   f"[0, {wf.variable(v)['period']:g}]" if wf.variable(v)["period"] else "from the data range")
        for v in plan.names))
    lines.append(f"  estimator   kernel {est['kernel']} ({est['form']}), bandwidth {est['bandwidth']} "
                 f"({est['parametrization']}), engine {est['engine']}"
                 + (f", boundary {est['boundary']}" if any(wf.variable(v)["bounds"] for v in plan.names) else ""))
    for v in plan.names:
        t = wf.variable(v)
        extras = [f"bounds {t['bounds']}" if t["bounds"] else "", f"point mass <= {t['point_mass']:g}"
                  if t["point_mass"] is not None else "", f"period {t['period']:g}" if t["period"] else ""]
        extras = [e for e in extras if e]
        if extras:
            lines.append(f"              {v}: " + ", ".join(extras))
    per_block = int(np.prod(plan.tile)) if plan.tile else 1
    lines.append(f"  compute     scheduler {wf['compute']['scheduler']}, workers {wf['compute']['workers'] or 'all cores'}, "
                 f"{plan.n_blocks} block(s) of up to {per_block} cell(s)")
    lines.append(f"  memory      about {_human(sizes['task_bytes'])} per task (input block, output block and "
                 f"{_human(sizes['engine_work_bytes'])} of engine work space)")
    lines.append(f"  output      {wf['output']['path']}: about {_human(sizes['output_bytes'])} before compression")
    for note in plan.notes:
        lines.append(f"  note        {note}")
    return "\n".join(lines)


def run_and_write(path, overrides=(), *, overwrite=False, command_line=None, out=None, progress_stream=None):
    """Load, run and write a workflow; print the summary to ``out``.

    Returns the run summary (a dict; ``summary["path"]`` is the output written).
    """
    from . import CAUTION
    from . import provenance as _prov
    from .workflow import load

    out = out if out is not None else sys.stdout
    wf = path if isinstance(path, Workflow) else load(path, overrides)
    overwrite = overwrite or wf["output"]["overwrite"]
    target = _io.check_output_path(wf["output"]["path"], overwrite=overwrite)
    _io.clean_stale_partials(target)  # left by an earlier run that was killed while writing
    plan = prepare(wf)
    store_path = resume_store_path(target) if wf["output"]["resume"] else None
    if store_path is not None:
        try:
            import zarr  # noqa: F401
        except ImportError:
            raise ConfigError(f"{wf.source}: output.resume = true needs the zarr package: "
                              "pip install 'mvkde[resume]' (or set output.resume = false)") from None
    ds, plan, settings, summary = run(wf, progress_stream=progress_stream, plan=plan, store_path=store_path)
    rec = _prov.record(wf, plan.files, command_line=command_line, extra={
        "scheduler": summary["scheduler"], "engines": summary["engines"],
        "grid_limits": {v: [float(a[0]), float(a[-1])] for v, a in zip(plan.names, settings.axes)}})
    est = wf["estimator"]
    ds.attrs.update({
        "title": wf["output"]["title"] or ("joint probability density of " + ", ".join(plan.names)),
        "Conventions": "CF-1.8",
        "source": f"mvkde {rec['software']['mvkde']}: multivariate kernel density estimation",
        "history": _prov.history_line(rec),
        "provenance": _prov.to_json(rec),
        "caution": CAUTION,
        "kernel": est["kernel"], "kernel_form": est["form"], "bandwidth_method": est["bandwidth"],
        "bandwidth_parametrization": est["parametrization"],
        "boundary": settings.boundary or "none",
        "min_samples": int(wf["input"]["min_samples"]),
    })
    _io.write_netcdf_atomic(ds, target, overwrite=overwrite, encoding=encoding_for(ds, plan, wf["output"]))
    if summary["store"] is not None:
        summary["store"].remove()  # the output is complete: the finished blocks are no longer needed
    fc = summary["flag_counts"]
    resumed = (f", {summary['resumed_blocks']} of them resumed from {store_path.name}"
               if summary["resumed_blocks"] else "")
    print(f"mvkde run: wrote {target} ({summary['cells']} densities, {summary['blocks']} blocks{resumed}, "
          f"{summary['seconds']:.1f} s on {summary['scheduler']})", file=out)
    flagged = {k: v for k, v in fc.items() if v}
    if flagged:
        print("  flagged cells: " + ", ".join(f"{k} {v}" for k, v in flagged.items()), file=out)
    for cell, split, msg in summary["messages"][:3]:
        print(f"  e.g. cell {cell}" + (f", {plan.split_dim} {plan.split_labels[split]}" if plan.split_dim else "")
              + f": {msg}", file=out)
    print(f"  caution: {CAUTION}", file=out)
    summary["path"] = target
    return summary
