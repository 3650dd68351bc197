"""Inputs of a run: open, select, label and tile the cells into blocks.

:func:`prepare` turns a validated :class:`~mvkde.pipeline.workflow.Workflow`
into a :class:`Plan`: the inputs opened lazily, the selection applied (time
range, months or seasons, coordinate box), tables pivoted to one row of
samples per group, the cell dimensions, the optional split (season or month)
and the tiling of the cells into blocks.  The evaluation grid shared by every
cell is :mod:`mvkde.pipeline.axes`.  Nothing here fits a density.
"""

from __future__ import annotations

import math
import os
import warnings
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import xarray as xr

from ..cells import engine_work_bytes
from ..errors import ConfigError, InputError
from . import labels as _labels
from . import readers as _io
from .workflow import SEASONS, Workflow

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
    origin: str = ""                           # how messages name the input when there are no files
    label_dims: list = field(default_factory=list)    # "window" and/or "source", in this order
    label_names: dict = field(default_factory=dict)   # dim -> label names
    label_info: dict = field(default_factory=dict)    # dim -> what each label is (date range, path)
    members: np.ndarray | None = None          # (label combinations, *codes shape) bool, or None
    rates: np.ndarray | None = None            # observations per year of every split (return periods)

    @property
    def cell_shape(self) -> tuple:
        return tuple(self.values.sizes[d] for d in self.cell_dims)

    @property
    def n_cells(self) -> int:
        return int(np.prod(self.cell_shape)) if self.cell_dims else 1

    @property
    def n_season(self) -> int:
        """Splits by season or month within one label combination."""
        return max(1, len(self.split_labels)) if self.split_dim else 1

    @property
    def n_labels(self) -> int:
        """Label combinations (windows x sources); 1 without labels."""
        return int(np.prod([len(self.label_names[d]) for d in self.label_dims])) if self.label_dims else 1

    @property
    def n_splits(self) -> int:
        """Every sample set of a cell: label combinations x seasons (flattened in that order)."""
        return self.n_labels * self.n_season

    @property
    def split_shape(self) -> tuple:
        """The flattened split axis as output dims: one per label dim, then the season/month split."""
        return tuple(len(self.label_names[d]) for d in self.label_dims) + ((self.n_season,) if self.split_dim else ())

    @property
    def split_dims(self) -> list:
        return list(self.label_dims) + ([self.split_dim] if self.split_dim else [])

    def tiles(self):
        """Slices over the cell dims, one tuple per block."""
        if not self.cell_dims:
            yield ()
            return
        starts = [range(0, n, t) for n, t in zip(self.cell_shape, self.tile)]
        for corner in np.ndindex(*[len(s) for s in starts]):
            yield tuple(slice(starts[k][i], min(starts[k][i] + self.tile[k], self.cell_shape[k]))
                        for k, i in enumerate(corner))

    def cell_label(self, cell: int, split: int = 0) -> str:
        """A cell named by its labels, e.g. ``station=ST03, season=JJA`` (``one cell`` without cell dims)."""
        parts = []
        if self.cell_dims:
            for dim, i in zip(self.cell_dims, np.unravel_index(int(cell), self.cell_shape)):
                coord = self.cell_coords.get(dim)
                value = np.asarray(coord.values)[i] if coord is not None else i
                if isinstance(value, (float, np.floating)):
                    value = f"{float(value):g}"
                elif isinstance(value, np.datetime64):
                    value = str(value)[:10]
                parts.append(f"{dim}={value}")
        index = np.unravel_index(int(split), self.split_shape) if self.split_shape else ()
        for dim, i in zip(self.label_dims, index):
            parts.append(f"{dim}={self.label_names[dim][i]}")
        if self.split_dim:
            parts.append(f"{self.split_dim}={self.split_labels[int(split) % self.n_season]}")
        return ", ".join(parts) if parts else "the only cell"

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

    Parameters
    ----------
    wf : Workflow
    n_cells : int
        Cells of the run.
    cell_bytes : int
        Bytes of one cell's samples.

    Returns
    -------
    int
    """
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
    """Open the inputs lazily, apply the selection and tile the cells.

    Parameters
    ----------
    wf : Workflow
        The validated workflow.

    Returns
    -------
    Plan
    """
    inp = wf["input"]
    if inp["sources"]:
        return _labels.prepare_sources(wf, plan_from_dataset, plan_from_table, _read_table_of, _file_chunks)
    files = _io.expand_paths(wf.input_paths())
    kind = _io.input_format(files, inp["format"])
    if kind == "netcdf":
        plan = _prepare_gridded(wf, files)
    else:
        plan = _prepare_table(wf, files, kind)
    return plan


def available_memory() -> int:
    """Bytes of memory available to this process (MemAvailable, else physical memory).

    Returns
    -------
    int
        Bytes (0 when the system does not say).
    """
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


def check_memory(plan: Plan) -> None:
    """Refuse, before any work, a run whose grids cannot fit in this machine's memory.

    The run holds the output of every cell for writing (float64), and each
    task holds its block's samples and grids.

    Parameters
    ----------
    plan : Plan

    Raises
    ------
    ConfigError
        Naming grid.size, the memory needed and the memory available.
    """
    avail = available_memory()
    if avail <= 0:
        return
    wf = plan.workflow
    sizes = estimate_sizes(plan)
    held = sizes["output_bytes"] * (8 // (4 if wf["output"]["dtype"] == "float32" else 8))
    workers = 1 if str(wf["compute"]["scheduler"]).startswith(("tcp", "tls", "ucx", "inproc")) else (
        wf["compute"]["workers"] or os.cpu_count() or 1)
    need = held + sizes["task_bytes"] * workers
    if need > avail:
        nodes = int(np.prod(wf.grid_size()))
        raise ConfigError(
            f"{wf.source}: grid.size = {wf['grid']['size']} gives {nodes:,} nodes per density: the run needs "
            f"about {human_bytes(need)} ({plan.n_cells * plan.n_splits:,} output grids plus {human_bytes(sizes['task_bytes'])} "
            f"per task) but {human_bytes(avail)} of memory is available: use fewer grid nodes, fewer cells "
            "(input.box) or a smaller compute.block_size")


def _refuse_without_dates(src, inp, tname, coord, file_name) -> None:
    """A selection by dates on a time coordinate that holds no dates: one clear line."""
    keys = [k for k in ("time_range", "months", "seasons", "split_by") if inp[k]]
    units = coord.attrs.get("units")
    why = (f"its units {units!r} could not be read as dates" if units else "it has no units of the form "
           "'days since YYYY-MM-DD'")
    raise ConfigError(f"{src}: {', '.join('input.' + k for k in keys)} select(s) by date, but the time "
                      f"coordinate {tname!r} of {file_name} holds plain {coord.dtype} numbers ({why}): remove "
                      f"{' and '.join('input.' + k for k in keys)}, or give the file a CF time coordinate")


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
    if wf["input"]["group_by"] is not None:
        raise ConfigError(f"{wf.source}: input.group_by applies to tables (.csv, .parquet); for gridded inputs "
                          "every dimension not in input.sample_dims is a cell dimension")
    # one file: opened without dask, so the selection below stays lazy indexing and each
    # block's dask chunk becomes one hyperslab read (a file chunked along time is never
    # rechunked in memory); several files: dask chunks of whole cell columns per file
    ds = _io.open_gridded(files, chunks=None if len(files) == 1 else _file_chunks(wf, files))
    origin = files[0].name + (" and the other files" if len(files) > 1 else "")
    if len(files) > 1:
        missing = [v for v in wf.variables if v not in ds.data_vars]
        if not missing:
            _io.check_units_agree(files, wf.variables)
    return plan_from_dataset(wf, ds, files=files, origin=origin)


def plan_from_dataset(wf: Workflow, ds: xr.Dataset, *, files=(), origin: str = "the Dataset",
                      tile: tuple | None = None) -> Plan:
    """The plan of a gridded input already opened as a Dataset (lazy or in memory).

    ``mvkde run`` reaches it through :func:`prepare` (files opened lazily) and
    :func:`mvkde.densities` with the caller's Dataset; ``tile`` (block shape
    over the cell dims) overrides ``compute.block_size``: the caller's dask
    chunks along the cell dims become the blocks.

    Parameters
    ----------
    wf : Workflow
    ds : xarray.Dataset
        The input variables over the cell and sample dims.
    files : sequence of pathlib.Path
        The files it was read from (for messages and the provenance).
    origin : str
        How messages name the input when there are no files.
    tile : tuple of int, optional
        Block shape over the cell dims.

    Returns
    -------
    Plan
    """
    inp, src = wf["input"], wf.source
    names = wf.variables
    files = list(files)
    tname = inp["time"]
    source_of = None
    if isinstance(ds, dict):  # input.sources: name -> (Dataset, how messages name it)
        ds, source_of, dims, sample_dims, cell_dims = _labels.combine_sources(wf, ds, _check_dataset, _select)
    else:
        dims, sample_dims, cell_dims = _check_dataset(wf, ds, origin)
        ds = _select(ds[names], wf, dims, sample_dims, origin)

    cell_shape = tuple(ds.sizes[d] for d in cell_dims)
    n_per_cell = int(np.prod([ds.sizes[d] for d in sample_dims]))
    if tile is None:
        tile = _tile_shape(cell_shape, block_cells(wf, int(np.prod(cell_shape)), n_per_cell * len(names) * 8))
    tile = tuple(max(1, min(int(t), n)) for t, n in zip(tile, cell_shape))
    # chunk so that one block reads exactly its own hyperslab, all samples at once
    chunks = {d: t for d, t in zip(cell_dims, tile)}
    chunks.update({d: -1 for d in sample_dims})
    with warnings.catch_warnings(), _io.rechunk_by_tasks():
        # blocks of whole cell columns cut across a file chunked along time: intended
        warnings.filterwarnings("ignore", message=".*separate the stored chunks.*")
        ds = ds.chunk(chunks)
        arr = ds.to_dataarray("variable").transpose(*cell_dims, *sample_dims, "variable")
        arr = arr.chunk({"variable": -1})

    if tname in sample_dims and inp["split_by"]:
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
    split_codes_1d = codes.ravel()
    times = ds[tname].values if tname in ds.coords else np.arange(ds.sizes.get(tname, 0))
    label_dims, label_names, label_info, members = [], {}, {}, None
    if inp["windows"] or source_of is not None:
        if tname not in sample_dims:
            raise ConfigError(f"{src}: input.windows selects along the time dimension {tname!r}: list it in "
                              "input.sample_dims")
        label_dims, label_names, label_info, members = _labels.label_members(
            wf, times, source_of, list(inp["sources"]), origin)
    n_season = max(1, len(labels)) if inp["split_by"] else 1
    n_labels = 1 if members is None else members.shape[0]
    rates = _labels.rates(wf, times, members, split_codes_1d if inp["split_by"] else None, n_season, n_labels, origin) \
        if tname in sample_dims else _labels.rates(wf, [], None, None, n_season, n_labels, origin)
    if members is not None:
        per = [int(np.sum(members[m] & (split_codes_1d == s) if inp["split_by"] else members[m]))
               * (n // max(1, members.shape[1])) for m in range(n_labels) for s in range(n_season)]
        counts = (int(min(per)), int(np.median(per)), int(max(per)))
        shape = [1] * (len(cell_dims) + len(sample_dims))
        shape[len(cell_dims) + sample_dims.index(tname)] = members.shape[1]
        members = members.reshape((members.shape[0],) + tuple(shape))
    plan = Plan(wf, "netcdf", files, arr, codes, cell_dims, {d: ds[d] for d in cell_dims if d in ds.coords},
                inp["split_by"], labels, tile, list(names), units, attrs, counts, origin=origin,
                label_dims=label_dims, label_names=label_names, label_info=label_info, members=members,
                rates=rates)
    _labels.note_empty_labels(plan)
    return plan


def _check_dataset(wf: Workflow, ds: xr.Dataset, origin: str):
    """(dims, sample_dims, cell_dims) of a gridded input, after refusing what cannot be a sample."""
    inp, src = wf["input"], wf.source
    names = wf.variables
    missing = [v for v in names if v not in ds.data_vars]
    if missing:
        raise InputError(f"input.variables: {', '.join(missing)} not in {origin}; data variables there: "
                         f"{', '.join(map(str, ds.data_vars))}")
    for v in names:
        if ds[v].dtype.kind not in "fiu":
            raise InputError(f"input.variables: {v} in {origin} holds {ds[v].dtype} values, not "
                             "numbers: choose a numeric variable")
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
    return dims, sample_dims, cell_dims


def _select(ds: xr.Dataset, wf: Workflow, dims, sample_dims, origin: str) -> xr.Dataset:
    """The workflow's selection: time range, months or seasons, coordinate box (refused without dates)."""
    inp, src = wf["input"], wf.source
    tname = inp["time"]
    needs_time = inp["time_range"] or inp["months"] or inp["seasons"] or inp["split_by"]
    if needs_time and tname not in ds.coords:
        raise ConfigError(f"{src}: input.time = {tname!r} is not a coordinate of the input "
                          f"(coordinates: {', '.join(map(str, ds.coords))}); time selection and "
                          "input.split_by need it")
    if inp["split_by"] and tname not in sample_dims:
        raise ConfigError(f"{src}: input.split_by needs the time dimension {tname!r} in input.sample_dims")
    if needs_time and not np.issubdtype(ds[tname].dtype, np.datetime64) and ds[tname].dtype != object:
        _refuse_without_dates(src, inp, tname, ds[tname], origin)
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
    return ds


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
    table = _read_table_of(wf, files, kind)
    return plan_from_table(wf, table, files=files, kind=kind, origin=files[0].name)


def _table_needs_time(inp, prod) -> bool:
    return bool(inp["time_range"] or inp["months"] or inp["seasons"] or inp["split_by"] or inp["windows"]
                or (prod["return_periods"] and prod["observations_per_year"] is None))


def _read_table_of(wf: Workflow, files, kind) -> pd.DataFrame:
    """The columns a workflow needs from a table input, after checking they are there."""
    inp, src = wf["input"], wf.source
    names = wf.variables
    header = _io.table_columns(files, kind)
    group = inp["group_by"]
    tname = inp["time"]
    needs_time = _table_needs_time(inp, wf["products"])
    wanted = list(names) + ([group] if group else []) + ([tname] if needs_time else []) + list(inp["box"])
    wanted = list(dict.fromkeys(wanted))
    for col in wanted:
        if col not in header:
            what = ("input.variables" if col in names else "input.group_by" if col == group
                    else "input.time" if col == tname else f"input.box.{col}")
            raise ConfigError(f"{src}: {what} names column {col!r}, which is not in {files[0].name} "
                              f"(columns: {', '.join(header)})")
    return _io.read_table(files, kind, wanted)


def _select_rows(table: pd.DataFrame, inp: dict, tname: str, needs_time: bool) -> pd.DataFrame:
    """The rows of a table inside input.time_range / months / seasons / box (dates read from ``tname``)."""
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
    for col, (lo, hi) in inp["box"].items():
        table = table[(table[col] >= lo) & (table[col] <= hi)]
    if len(table) == 0:
        raise InputError("the selection (input.time_range / months / seasons / box) leaves no rows: widen it")
    return table


def plan_from_table(wf: Workflow, table: pd.DataFrame, *, files=(), kind: str = "table",
                    origin: str = "the DataFrame", source_of=None) -> Plan:
    """The plan of a table already read (one density per ``input.group_by`` value).

    Parameters
    ----------
    wf : Workflow
    table : pandas.DataFrame
        The rows, with the variables, ``input.group_by`` and the time column as columns.
    files : sequence of pathlib.Path
        The files it was read from.
    kind : str
        "csv", "parquet" or "table" (a caller's DataFrame).
    origin : str
        How messages name the input when there are no files.
    source_of : ndarray of int, optional
        The source index of every row (the rows of joined ``input.sources``).

    Returns
    -------
    Plan
    """
    inp = wf["input"]
    names = wf.variables
    files = list(files)
    group = inp["group_by"]
    tname = inp["time"]
    needs_time = _table_needs_time(inp, wf["products"])
    if source_of is not None:
        table = table.assign(_mvkde_source=np.asarray(source_of))
    for v in names:
        if not pd.api.types.is_numeric_dtype(table[v]):
            raise InputError(f"input.variables: column {v!r} of {origin} is not numeric: list numeric "
                             "columns only, or clean the column")
    table = _select_rows(table, inp, tname, needs_time)

    if needs_time and inp["split_by"]:
        codes_flat, labels = _split_codes(pd.to_datetime(table[tname]).dt.month.to_numpy(),
                                          inp["split_by"], inp["seasons"])
    else:
        codes_flat, labels = np.zeros(len(table), dtype=np.int16), []
    label_dims, label_names, label_info, members_flat = [], {}, {}, None
    row_times = pd.to_datetime(table[tname]).to_numpy() if needs_time else np.arange(len(table))
    if inp["windows"] or source_of is not None:
        label_dims, label_names, label_info, members_flat = _labels.label_members(
            wf, row_times, table["_mvkde_source"].to_numpy() if source_of is not None else None,
            list(inp["sources"]), origin)
    n_season = max(1, len(labels)) if inp["split_by"] else 1
    n_labels = 1 if members_flat is None else members_flat.shape[0]
    rates = _labels.rates(wf, np.unique(row_times) if members_flat is None else row_times, members_flat,
                   codes_flat if inp["split_by"] else None, n_season, n_labels, origin) \
        if members_flat is not None else _labels.rates(wf, np.unique(row_times), None, None, n_season, 1, origin) \
        if not inp["split_by"] else _labels.rates_by_unique(wf, row_times, codes_flat, n_season, origin)
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
    members = None
    if members_flat is not None:
        members = np.zeros((members_flat.shape[0], n_groups, width), dtype=bool)
        members[:, keys[order], pos] = members_flat[:, order]

    cell_dims = [group] if group else []
    if not group:
        values, codes = values[0], codes[0]
        members = None if members is None else members[:, 0]
    tile = _tile_shape((n_groups,) if group else (), block_cells(wf, n_groups))
    import dask.array as da

    dims = cell_dims + [SAMPLE_DIM, "variable"]
    data = da.from_array(values, chunks=(tile + (-1, -1)) if group else (-1, -1))
    arr = xr.DataArray(data, dims=dims, coords={"variable": names})
    cell_coords = {group: xr.DataArray(np.asarray(uniques), dims=group)} if group else {}
    units = [wf.variable(v)["units"] or "" for v in names]
    counts = (int(sizes.min()), int(np.median(sizes)), int(sizes.max()))
    plan = Plan(wf, kind, files, arr, codes, cell_dims, cell_coords, inp["split_by"], labels, tile,
                list(names), units, {v: {} for v in names}, counts, origin=origin, label_dims=label_dims,
                label_names=label_names, label_info=label_info, members=members, rates=rates)
    _labels.note_empty_labels(plan)
    if inp["sample_dims"] != ["time"]:
        plan.notes.append("input.sample_dims is ignored for tables: every row of a group is a sample")
    if not any(units):
        plan.notes.append("tables carry no units: set variables.NAME.units to label the output")
    return plan



def where_files(plan: Plan) -> str:
    """How messages name the input: its first file and how many more, else ``plan.origin`` or "the input"."""
    if not plan.files:
        return plan.origin or "the input"
    return plan.files[0].name + (f" and {len(plan.files) - 1} more file(s)" if len(plan.files) > 1 else "")


def estimate_sizes(plan: Plan) -> dict:
    """Bytes per task (input block + output block + engine work space) and of the output.

    Parameters
    ----------
    plan : Plan

    Returns
    -------
    dict
        ``task_bytes``, ``output_bytes`` and ``engine_work_bytes``.
    """
    wf = plan.workflow
    d = len(plan.names)
    grid = int(np.prod(wf.grid_size()))
    per_block = int(np.prod(plan.tile)) if plan.tile else 1
    n = plan.sample_counts[2]
    S = plan.n_splits
    itemsize = 8
    work = engine_work_bytes()
    task = per_block * n * d * itemsize * 2 + per_block * S * grid * itemsize * 2 + work
    out_item = 4 if wf["output"]["dtype"] == "float32" else 8
    output = plan.n_cells * S * (grid * out_item + d * d * 8 + 32)
    return {"task_bytes": task, "output_bytes": output, "engine_work_bytes": work}


def human_bytes(nbytes: float) -> str:
    """``nbytes`` as text in decimal units (B, kB, MB, GB, TB).

    Parameters
    ----------
    nbytes : float

    Returns
    -------
    str
    """
    for unit in ("B", "kB", "MB", "GB", "TB"):
        if nbytes < 1000 or unit == "TB":
            return f"{nbytes:.0f} {unit}" if unit == "B" else f"{nbytes:.1f} {unit}"
        nbytes /= 1000
    return f"{nbytes:.1f} TB"
