"""Reading inputs and writing outputs (pipeline layer).

Outputs are always written to a temporary name in the destination folder and
renamed into place only when complete, so a reader never sees a half-written
file.
"""

from __future__ import annotations

import os
from pathlib import Path

import xarray as xr

from .errors import InputError


def temporary_path(path: Path) -> Path:
    return path.with_name(f".{path.name}.{os.getpid()}.partial")


def write_netcdf_atomic(ds: xr.Dataset, path, *, overwrite: bool = False, encoding=None) -> Path:
    """Write ``ds`` to ``path`` through a temporary file and an atomic rename."""
    path = Path(path)
    if path.exists() and not overwrite:
        raise InputError(f"output {path} exists: pass --overwrite (or choose another output.path)")
    folder = path.parent if str(path.parent) else Path(".")
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"cannot create output folder {folder}: {exc.strerror}") from None
    if not os.access(folder, os.W_OK):
        raise InputError(f"output folder {folder} is not writable: choose another output.path")
    tmp = temporary_path(path)
    try:
        ds.to_netcdf(tmp, engine="netcdf4", encoding=encoding or {})
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()
    return path
