"""The output of a run: the labelled Dataset, its encoding, and writing it atomically.

:func:`build_dataset` labels the gathered block arrays (CF attributes, the
shared grid as coordinates, diagnostics, point mass and the products of
:mod:`mvkde.pipeline.products`); :func:`write_netcdf_atomic` writes a
temporary ``.NAME.PID.partial`` in the destination folder and renames it into
place only when complete, so a reader never sees a half-written file.
"""

from __future__ import annotations

import glob
import os
import shutil
from pathlib import Path

import numpy as np
import xarray as xr

from ..directional import node_areas_km2
from ..estimator import CAUTION
from ..errors import InputError
from ..units import density_units
from . import provenance as _prov
from .blocks import FLAGS, CellSettings
from .inputs import Plan
from .products import add_cell_products, add_comparison, add_grid_products, add_return_periods


def build_dataset(plan: Plan, settings: CellSettings, results: dict) -> xr.Dataset:
    """The labelled output: density, n_samples, bandwidth and diagnostics with CF attributes.

    ``results`` is what :func:`~mvkde.pipeline.schedule.execute` returns.
    """
    results = results["arrays"]
    names, units = plan.names, plan.units
    cdims = list(plan.cell_dims)
    split = plan.split_dims
    lead = cdims + split
    split_shape = plan.split_shape

    def squeeze(a):  # the flat split axis as the label dims and the season split (none without them)
        a = np.asarray(a)
        return a.reshape(a.shape[: len(cdims)] + split_shape + a.shape[len(cdims) + 1:])

    coords = {}
    for dname in cdims:
        if dname in plan.cell_coords:
            c = plan.cell_coords[dname]
            coords[dname] = (dname, np.asarray(c.values), dict(getattr(c, "attrs", {})))
    coords.update(label_coords(plan))
    if plan.split_dim:
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
        ia, ib = names.index(sphere[0]), names.index(sphere[1])
        area = node_areas_km2(settings.axes[ia], settings.axes[ib])
        coords["cell_area"] = (tuple(sphere), area, {
            "units": "km2", "long_name": "area of the Earth's surface each grid node stands for (trapezoid "
                                         "rule on the sphere)"})
    coords["variable_row"] = ("variable_row", np.array(names))
    coords["variable_column"] = ("variable_column", np.array(names))

    j = settings.point_mass_index
    dens_units = density_units([u for v, u in zip(names, units) if v not in sphere], per_km2=bool(sphere))
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
    data_vars["failure_reason"] = (lead, squeeze(np.asarray(results["failure_reason"], dtype=object)), {
        "long_name": "why the estimator refused the cell (empty where it got a density)"})
    ds = xr.Dataset(data_vars, coords=coords)
    add_cell_products(ds, results, settings, lead, squeeze)
    add_grid_products(ds, plan.workflow["products"], names, j,
                      settings.bounds[j][0] if j is not None else float("nan"),
                      sphere=(names.index(sphere[0]), names.index(sphere[1])) if sphere else None)
    if plan.workflow["products"]["return_periods"] and len(settings.products.thresholds):
        add_return_periods(ds, settings, np.asarray(plan.rates, dtype=float).reshape(split_shape),
                           cdims, split, pm_bound=settings.bounds[j][0] if j is not None else None)
    if settings.compare is not None:
        add_comparison(ds, plan, settings, results, squeeze, lead)
    return ds


def label_coords(plan: Plan) -> dict:
    """Coordinates of the window and source dims: names, and the dates or paths of each label.

    Parameters
    ----------
    plan : Plan
        The planned run.

    Returns
    -------
    dict
        Coordinate name -> (dim, values, attributes); empty without labels.
    """
    coords = {}
    if "window" in plan.label_dims:
        spans = list(plan.workflow["input"]["windows"].values())
        coords["window"] = ("window", np.asarray(plan.label_names["window"]), {
            "long_name": "named time window of the samples (input.windows; both end days included)",
            "note": "windows may overlap and differ in length; a sample in two windows counts in both"})
        coords["window_start"] = ("window", np.array([a for a, _ in spans]), {"long_name": "first day of the window"})
        coords["window_end"] = ("window", np.array([b for _, b in spans]), {"long_name": "last day of the window"})
    if "source" in plan.label_dims:
        coords["source"] = ("source", np.asarray(plan.label_names["source"]), {
            "long_name": "named input the samples come from (input.sources)"})
        coords["source_path"] = ("source", np.asarray(plan.label_info["source"]),
                                 {"long_name": "path or glob of the source"})
    return coords


def global_attributes(wf, settings: CellSettings, names: list, rec: dict) -> dict:
    """The global attributes of an output (the same from ``mvkde run`` and :func:`mvkde.densities`).

    Parameters
    ----------
    wf : Workflow
        The validated workflow.
    settings : CellSettings
        The cell settings of the run.
    names : list of str
        The variables.
    rec : dict
        The provenance record (:func:`mvkde.pipeline.provenance.record`).

    Returns
    -------
    dict
    """
    est = wf["estimator"]
    return {
        "title": wf["output"]["title"] or ("joint probability density of " + ", ".join(names)),
        "Conventions": "CF-1.8",
        "source": f"mvkde {rec['software']['mvkde']}: multivariate kernel density estimation",
        "history": _prov.history_line(rec),
        "provenance": _prov.to_json(rec),
        "caution": CAUTION,
        "kernel": est["kernel"], "kernel_form": est["form"], "bandwidth_method": est["bandwidth"],
        "bandwidth_parametrization": est["parametrization"],
        "boundary": settings.boundary or "none",
        "min_samples": int(wf["input"]["min_samples"]),
    }


def is_zarr_path(path) -> bool:
    """An output path naming a Zarr store (``output.path`` ending in ``.zarr``).

    Parameters
    ----------
    path : str or path-like

    Returns
    -------
    bool
    """
    return str(path).rstrip("/").lower().endswith(".zarr")


def encoding_for(ds: xr.Dataset, plan: Plan, output: dict) -> dict:
    """Compressed, chunked netCDF4 encoding: one chunk = one block of cells with its whole grid.

    Parameters
    ----------
    ds : xarray.Dataset
        The output.
    plan : Plan
        The planned run (its cell dims and tile).
    output : dict
        The ``[output]`` table (``complevel``, ``dtype``).

    Returns
    -------
    dict
        Variable name -> netCDF4 encoding.
    """
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


# ---------------------------------------------------------------------------
# writing
# ---------------------------------------------------------------------------

def temporary_path(path: Path) -> Path:
    """Where ``path`` is written before the rename: ``.NAME.PID.partial`` in the same folder.

    Parameters
    ----------
    path : pathlib.Path

    Returns
    -------
    pathlib.Path
    """
    return path.with_name(f".{path.name}.{os.getpid()}.partial")


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # someone else's live process
        return True
    return True


def clean_stale_partials(path) -> list[Path]:
    """Remove temporary files of ``path`` left by runs that died (their PID is gone).

    A run killed while writing (SIGKILL, a node lost) leaves
    ``.NAME.PID.partial``; a file whose PID still runs belongs to a run in
    progress and is kept.  Returns the files removed.

    Parameters
    ----------
    path : str or path-like
        The output path.

    Returns
    -------
    list of pathlib.Path
    """
    path = Path(path)
    removed = []
    prefix = f".{path.name}."
    folder = path.parent if str(path.parent) else Path(".")
    if not folder.is_dir():
        return removed
    for f in folder.glob(glob.escape(prefix) + "*.partial"):
        pid_text = f.name[len(prefix): -len(".partial")]
        if not pid_text.isdigit() or int(pid_text) == os.getpid() or _pid_alive(int(pid_text)):
            continue
        try:
            if f.is_dir() and not f.is_symlink():  # a Zarr store
                shutil.rmtree(f)
            else:
                f.unlink()
            removed.append(f)
        except OSError:
            pass
    return removed


def check_output_path(path, *, overwrite: bool = False) -> Path:
    """Refuse an existing output (unless ``overwrite``) or an unwritable folder, before any work.

    The output folder is created if missing.

    Parameters
    ----------
    path : str or path-like
        The output path.
    overwrite : bool, optional
        Accept an existing output.

    Returns
    -------
    pathlib.Path
    """
    path = Path(path)
    if path.exists() and not overwrite:
        raise InputError(f"output {path} exists: pass --overwrite (or choose another output.path)")
    if path.exists() and path.is_dir() and not (is_zarr_path(path) and _looks_like_zarr(path)):
        raise InputError(f"output.path {path} is a folder: name a file, e.g. {path / 'density.nc'}")
    if path.exists() and not path.is_dir() and is_zarr_path(path):
        raise InputError(f"output.path {path} is a file, not a Zarr store: remove it or choose another "
                         "output.path")
    folder = path.parent if str(path.parent) else Path(".")
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"cannot create output folder {folder}: {exc.strerror}: choose another output.path") from None
    if not os.access(folder, os.W_OK):
        raise InputError(f"output folder {folder} is not writable: choose another output.path")
    return path


def write_netcdf_atomic(ds: xr.Dataset, path, *, overwrite: bool = False, encoding=None) -> Path:
    """Write ``ds`` to ``path`` through a temporary file and an atomic rename.

    Parameters
    ----------
    ds : xarray.Dataset
        The output.
    path : str or path-like
        The netCDF file.
    overwrite : bool, optional
        Replace an existing output.
    encoding : dict, optional
        netCDF4 encoding per variable (:func:`encoding_for`).

    Returns
    -------
    pathlib.Path
    """
    path = check_output_path(path, overwrite=overwrite)
    clean_stale_partials(path)
    tmp = temporary_path(path)
    try:
        _to_netcdf(ds, tmp, encoding or {})
        os.replace(tmp, path)
    except OSError as exc:  # disk full, quota, a folder removed under the run
        raise InputError(f"cannot write output {path}: {exc.strerror or exc}: free space or choose another "
                         "output.path") from None
    finally:
        if tmp.exists():
            tmp.unlink()
    return path


def _to_netcdf(ds: xr.Dataset, path: Path, encoding: dict) -> None:
    """``ds.to_netcdf(path, engine="netcdf4", encoding=encoding)``, without importing dask.distributed.

    ``to_netcdf`` asks dask which scheduler is active (to choose file locks
    and whether to close the file between dask writes), and dask imports
    dask.distributed to answer: about 0.3 s in a run that never uses it.  A
    Dataset of in-memory arrays is written by the same netCDF4 store and
    encoding steps with the netCDF library's own lock given; with
    distributed already imported, a lazy variable, or an xarray without
    these parts, ``to_netcdf`` itself writes.
    """
    import sys

    lazy = any(v.chunks is not None for v in ds.variables.values())
    if "distributed" not in sys.modules and not lazy:
        try:
            from xarray.backends.netCDF4_ import NETCDF4_PYTHON_LOCK, NetCDF4DataStore
        except ImportError:  # pragma: no cover - another xarray layout
            pass
        else:
            store = NetCDF4DataStore.open(os.fspath(path), mode="w", format="NETCDF4", lock=NETCDF4_PYTHON_LOCK)
            try:
                ds.dump_to_store(store, encoding=encoding)
            finally:
                store.close()
            return
    ds.to_netcdf(path, engine="netcdf4", encoding=encoding)


def _looks_like_zarr(path: Path) -> bool:
    return any((path / name).exists() for name in ("zarr.json", ".zgroup", ".zattrs"))


def zarr_encoding(ds: xr.Dataset, netcdf_encoding: dict) -> dict:
    """The netCDF encoding translated for Zarr: same chunks (one block of cells) and storage types.

    Parameters
    ----------
    ds : xarray.Dataset
        The output.
    netcdf_encoding : dict or None
        netCDF4 encoding per variable.

    Returns
    -------
    dict
    """
    enc = {}
    for name, e in (netcdf_encoding or {}).items():
        z = {}
        if "chunksizes" in e:
            z["chunks"] = e["chunksizes"]
        if "dtype" in e:
            z["dtype"] = e["dtype"]
        if "_FillValue" in e:
            z["_FillValue"] = e["_FillValue"]
        enc[name] = z
    return enc


def write_zarr_atomic(ds: xr.Dataset, path, *, overwrite: bool = False, encoding=None) -> Path:
    """Write ``ds`` as a Zarr store at ``path``: a temporary store in the same folder, renamed when complete.

    The store is a folder, so an existing output is first moved aside and
    removed only once the new store is in place; a write that fails or is
    killed leaves no store at ``path`` (the temporary one is removed here, or
    by the next run's :func:`clean_stale_partials`).

    Parameters
    ----------
    ds : xarray.Dataset
        The output.
    path : str or path-like
        The store, ending in ``.zarr``.
    overwrite : bool, optional
        Replace an existing output.
    encoding : dict, optional
        netCDF4 encoding per variable, translated by :func:`zarr_encoding`.

    Returns
    -------
    pathlib.Path
    """
    try:
        import zarr  # noqa: F401
    except ImportError:
        raise InputError(f"output.path {path} asks for a Zarr store, which needs the zarr package: "
                         "pip install 'mvkde[zarr]' (or name a .nc file)") from None
    path = check_output_path(path, overwrite=overwrite)
    clean_stale_partials(path)
    tmp = temporary_path(path)
    old = path.with_name(f".{path.name}.{os.getpid()}.old.partial")
    try:
        if tmp.exists():
            shutil.rmtree(tmp)
        # Zarr format 2: read by every zarr and xarray release, and its string and
        # consolidated-metadata encodings are stable (zarr warns that format 3 ones are not yet)
        # text variables (failure_reason) as fixed-width unicode: Zarr format 2 stores no Python objects
        text = {name: ds[name].astype(str) for name, var in ds.data_vars.items() if var.dtype.kind == "O"}
        ds = ds.assign(text) if text else ds
        ds.to_zarr(tmp, mode="w", encoding=zarr_encoding(ds, encoding), consolidated=True, zarr_format=2)
        if path.exists():
            os.replace(path, old)
        os.replace(tmp, path)
    except OSError as exc:  # disk full, quota, a folder removed under the run
        raise InputError(f"cannot write output {path}: {exc.strerror or exc}: free space or choose another "
                         "output.path") from None
    finally:
        for leftover in (tmp, old):
            if leftover.exists():
                shutil.rmtree(leftover, ignore_errors=True)
    return path


def write_output_atomic(ds: xr.Dataset, path, *, overwrite: bool = False, encoding=None) -> Path:
    """netCDF, or a Zarr store when ``path`` ends in ``.zarr``; either way complete or absent.

    Parameters
    ----------
    ds : xarray.Dataset
        The output.
    path : str or path-like
        The output path.
    overwrite : bool, optional
        Replace an existing output.
    encoding : dict, optional
        netCDF4 encoding per variable.

    Returns
    -------
    pathlib.Path
    """
    if is_zarr_path(path):
        return write_zarr_atomic(ds, path, overwrite=overwrite, encoding=encoding)
    return write_netcdf_atomic(ds, path, overwrite=overwrite, encoding=encoding)
