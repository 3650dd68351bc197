"""File formats the pipeline reads (netCDF files and globs, CSV and Parquet tables).

Inputs are opened lazily: netCDF files (one file, a glob or a list) through
xarray and dask, so a cell block reads only its own hyperslab; CSV and
Parquet tables through pandas.  Writing lives in :mod:`mvkde.pipeline.output`.
"""

from __future__ import annotations

import glob
import hashlib
import os
import warnings
from pathlib import Path

import xarray as xr

from ..errors import InputError

NETCDF_SUFFIXES = (".nc", ".nc4", ".netcdf", ".cdf", ".h5")
TABLE_SUFFIXES = {".csv": "csv", ".txt": "csv", ".parquet": "parquet", ".pq": "parquet"}


def expand_paths(paths) -> list[Path]:
    """Files named by ``paths`` (paths or globs), sorted within each glob.

    Parameters
    ----------
    paths : iterable of str or path-like
        Paths or glob patterns; ``~`` is expanded.

    Returns
    -------
    list of pathlib.Path
    """
    files: list[Path] = []
    for p in paths:
        p = os.path.expanduser(str(p))
        if any(ch in p for ch in "*?["):
            found = sorted(glob.glob(p))
            if not found:
                raise InputError(f"input.path: the glob {p!r} matches no file")
            files += [Path(f) for f in found]
        else:
            if not Path(p).exists():
                raise InputError(f"input.path: file {p} not found (relative paths are looked up from the "
                                 "current folder, then from the workflow file's folder)")
            files.append(Path(p))
    if not files:
        raise InputError("input.path names no file")
    return files


def input_format(files, fmt: str = "auto") -> str:
    """'netcdf', 'csv' or 'parquet', from ``fmt`` or the files' suffixes.

    Parameters
    ----------
    files : list of path-like
        The input files.
    fmt : str, optional
        ``input.format``; anything but "auto" is returned as given.

    Returns
    -------
    str
    """
    if fmt != "auto":
        return fmt
    kinds = set()
    for f in files:
        suffix = Path(f).suffix.lower()
        if suffix in TABLE_SUFFIXES:
            kinds.add(TABLE_SUFFIXES[suffix])
        elif suffix in NETCDF_SUFFIXES:
            kinds.add("netcdf")
        else:
            raise InputError(f"input.path: cannot tell the format of {f} from its suffix "
                             f"{suffix or '(none)'}: set input.format to netcdf, csv or parquet")
    if len(kinds) > 1:
        raise InputError(f"input.path mixes formats {sorted(kinds)}: give files of one format")
    return kinds.pop()


def open_gridded(files, chunks=None) -> xr.Dataset:
    """Open one or several netCDF files lazily.

    ``chunks`` is passed to xarray: ``None`` opens one file without dask
    (lazily indexed: nothing is read until values are asked for, and a later
    ``.chunk()`` reads each chunk as one hyperslab), ``{}`` uses the files'
    own chunks.  Several files are combined by their coordinates and always
    get dask chunks (``{}`` when ``chunks`` is None).

    Parameters
    ----------
    files : list of path-like
        The netCDF files.
    chunks : dict or None, optional
        Dask chunks, as above.

    Returns
    -------
    xarray.Dataset
    """
    try:
        try:
            return _open(files, chunks, decode_times=True)
        except ValueError as exc:
            if "decode time" not in str(exc):
                raise
            # a time coordinate in units xarray cannot decode: keep its numbers (a run that needs
            # dates then says so, naming the coordinate)
            return _open(files, chunks, decode_times=False)
    except (OSError, ValueError) as exc:
        raise InputError(f"input.path: cannot open {', '.join(map(str, files[:3]))}"
                         f"{' ...' if len(files) > 3 else ''} as netCDF: {exc}") from None


def _open(files, chunks, decode_times: bool) -> xr.Dataset:
    if len(files) == 1:
        return xr.open_dataset(files[0], chunks=chunks, engine="netcdf4", decode_times=decode_times)
    with warnings.catch_warnings():
        # blocks of whole cell columns that cut across the files' own chunks: intended (one read per block)
        warnings.filterwarnings("ignore", message=".*separate the stored chunks.*")
        return xr.open_mfdataset([str(f) for f in files], chunks={} if chunks is None else chunks, engine="netcdf4",
                                 combine="by_coords", data_vars="minimal", coords="minimal", compat="override",
                                 parallel=False, decode_times=decode_times)


def check_units_agree(files, names) -> None:
    """Refuse several files whose ``units`` attributes of one variable differ.

    Combining files keeps the first file's attributes, so a file in kelvin
    among files in degC would otherwise be pooled silently.

    Parameters
    ----------
    files : list of path-like
        The netCDF files.
    names : list of str
        The variables to compare.
    """
    import netCDF4

    seen: dict = {}
    for f in files:
        try:
            with netCDF4.Dataset(f) as nc:
                for v in names:
                    if v in nc.variables:
                        u = str(getattr(nc.variables[v], "units", "")).strip()
                        seen.setdefault(v, []).append((u, f))
        except OSError as exc:
            raise InputError(f"input.path: cannot open {f} as netCDF: {exc}") from None
    for v, pairs in seen.items():
        first_u, first_f = pairs[0]
        for u, f in pairs[1:]:
            if u != first_u:
                raise InputError(f"input.path: variable {v} has units {u or '(none)'!r} in {Path(f).name} but "
                                 f"{first_u or '(none)'!r} in {Path(first_f).name}: convert the files to one "
                                 "unit before pooling them")


def read_table(files, fmt: str, columns=None):
    """Read CSV or Parquet files into one pandas DataFrame (only ``columns`` if given).

    Parameters
    ----------
    files : list of path-like
        The table files.
    fmt : {'csv', 'parquet'}
        Their format.
    columns : list of str, optional
        The columns to read; all when None.

    Returns
    -------
    pandas.DataFrame
    """
    import pandas as pd

    frames = []
    for f in files:
        try:
            if fmt == "csv":
                frames.append(pd.read_csv(f, usecols=columns))
            else:
                try:
                    frames.append(pd.read_parquet(f, columns=columns))
                except ImportError:
                    raise InputError("reading Parquet needs pyarrow: pip install 'mvkde[parquet]'") from None
        except ValueError as exc:  # usecols naming a missing column, or a malformed file
            raise InputError(f"input.path: cannot read {f}: {exc}") from None
        except OSError as exc:
            raise InputError(f"input.path: cannot read {f}: {exc}") from None
    return frames[0] if len(frames) == 1 else pd.concat(frames, ignore_index=True)


def table_columns(files, fmt: str) -> list[str]:
    """Column names of the first table (cheap: reads the header or the schema).

    Parameters
    ----------
    files : list of path-like
        The table files.
    fmt : {'csv', 'parquet'}
        Their format.

    Returns
    -------
    list of str
    """
    import pandas as pd

    f = files[0]
    if fmt == "csv":
        return list(pd.read_csv(f, nrows=0).columns)
    try:
        import pyarrow.parquet as pq
    except ImportError:
        raise InputError("reading Parquet needs pyarrow: pip install 'mvkde[parquet]'") from None
    return list(pq.read_schema(f).names)


def sha256(path, block: int = 1 << 20) -> str:
    """SHA-256 of a file's bytes, read in 1 MiB blocks.

    Parameters
    ----------
    path : path-like
        The file.
    block : int, optional
        Bytes read at a time.

    Returns
    -------
    str
        The hexadecimal digest.
    """
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        while chunk := fh.read(block):
            h.update(chunk)
    return h.hexdigest()


def read_points(path, names, source=None) -> "np.ndarray":
    """Points (m, d) from a CSV table with one column per variable (products.points).

    Parameters
    ----------
    path : path-like
        The CSV file.
    names : list of str
        The variables, one column each.
    source : str, optional
        How messages name the workflow.

    Returns
    -------
    numpy.ndarray
        (m, d) float, finite, at least one row.
    """
    import numpy as np
    import pandas as pd

    where = f"{source}: " if source else ""
    p = Path(path)
    if not p.exists():
        raise InputError(f"{where}products.points: file {p} not found")
    try:
        table = pd.read_csv(p)
    except (OSError, ValueError) as exc:
        raise InputError(f"{where}products.points: cannot read {p} as CSV: {exc}") from None
    missing = [n for n in names if n not in table.columns]
    if missing:
        raise InputError(f"{where}products.points: {p} lacks column(s) {', '.join(missing)} "
                         f"(it has {', '.join(map(str, table.columns))})")
    try:
        pts = table[list(names)].to_numpy(dtype=float)
    except ValueError:
        raise InputError(f"{where}products.points: columns {', '.join(names)} of {p} must be numbers") from None
    if not np.all(np.isfinite(pts)) or len(pts) == 0:
        raise InputError(f"{where}products.points: {p} needs at least one row and finite numbers only")
    return pts


def rechunk_by_tasks():
    """A context in which dask rechunks by its "tasks" method, without importing dask.distributed.

    Left to choose, dask imports dask.distributed (about 0.3 s) to ask whether
    a client is running, and picks "p2p" only when one is; with distributed
    not imported no client can be running, so the choice is "tasks" and is
    set here directly.  With distributed imported, or a method configured,
    dask chooses as usual.
    """
    import contextlib
    import sys

    import dask

    if "distributed" in sys.modules or dask.config.get("array.rechunk.method", None):
        return contextlib.nullcontext()
    return dask.config.set({"array.rechunk.method": "tasks"})
