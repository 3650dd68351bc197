"""mvkde.densities: the per-cell job from Python, lazy on dask; Zarr output of mvkde run.

The reference for every number here is ``mvkde run`` on the same settings
(the workflow path and the Python path must give the same Dataset).
"""

from __future__ import annotations

import io
import json
import os
import signal
import subprocess
import sys
import textwrap
import time
import warnings
from pathlib import Path

import dask
import numpy as np
import pandas as pd
import pytest
import xarray as xr
from dask.callbacks import Callback

import mvkde
from mvkde.pipeline.run import run_and_write

ROOT = Path(__file__).resolve().parent.parent
BASIN = ROOT / "sample_grids" / "basin_daily.nc"
STATIONS = ROOT / "sample_grids" / "stations_daily.csv"
SEASONAL = ROOT / "workflows" / "basin_seasonal.toml"

# workflows/basin_seasonal.toml as keyword arguments; the tests cut the basin to its
# two southern rows of cells (input.box in the workflow, .sel here) to stay quick
BASIN_SOUTH = {"lat": slice(60.0, 60.5)}
BASIN_SETTINGS = dict(
    variables=["pr", "tasmax"], sample_dims=("time",), split_by="season", min_samples=40,
    bounds={"pr": (0, None)}, point_masses={"pr": 1.0}, kernel="gaussian", form="product",
    bandwidth="plugin", parametrization="full", boundary="reflect",
    grid={"size": [64, 64], "limits": {"pr": (1.0, 60.0), "tasmax": (-20.0, 40.0)}},
    products={"thresholds": [[5.0, 20.0]], "hdr_masses": [0.5, 0.9, 0.99], "quantiles": [0.5, 0.9, 0.99]},
)


class TaskCount(Callback):
    """Counts the dask tasks executed while it is active (dask's local schedulers)."""

    def __init__(self):
        super().__init__()
        self.n = 0

    def _pretask(self, key, dsk, state):
        self.n += 1


def run_basin(path: Path) -> Path:
    run_and_write(SEASONAL, [f"input.path={str(BASIN)!r}", "input.box.lat=[60.0, 60.5]",
                             f"output.path={str(path)!r}"],
                  overwrite=True, out=io.StringIO(), progress_stream=io.StringIO())
    return path


@pytest.fixture(scope="module")
def basin_run(tmp_path_factory):
    """The mvkde run output (netCDF) of the southern basin."""
    return run_basin(tmp_path_factory.mktemp("run") / "basin.nc")


@pytest.fixture(scope="module")
def basin_lazy():
    """(input, task count before compute, computed output) of densities on the dask-backed basin."""
    with warnings.catch_warnings():  # blocks of cells that cut across the file's chunks: intended
        warnings.filterwarnings("ignore", message=".*separate the stored chunks.*")
        ds = xr.open_dataset(BASIN, chunks={"lat": 2, "lon": 3}).sel(BASIN_SOUTH)
    with TaskCount() as counter:
        out = mvkde.densities(ds, **BASIN_SETTINGS)
        before = counter.n
        lazy_density = out["density"].data
        computed = out.compute()
    return ds, before, counter.n, lazy_density, computed


def assert_same_output(ours: xr.Dataset, theirs: xr.Dataset, rtol=1e-12):
    """Same variables, dims, coordinates, attributes, and values to ``rtol`` of each variable's scale."""
    assert set(ours.variables) == set(theirs.variables)
    assert set(ours.attrs) == set(theirs.attrs)
    for k in ours.attrs:
        if k not in ("history", "provenance"):
            np.testing.assert_array_equal(np.asarray(ours.attrs[k]), np.asarray(theirs.attrs[k]), err_msg=k)
    for name in theirs.variables:
        a, b = ours[name], theirs[name]
        assert a.dims == b.dims, name
        assert set(a.attrs) == set(b.attrs), name
        for k in a.attrs:
            np.testing.assert_array_equal(np.asarray(a.attrs[k]), np.asarray(b.attrs[k]), err_msg=f"{name}.{k}")
        x, y = np.asarray(a.values), np.asarray(b.values)
        if x.dtype.kind == "f":
            assert np.array_equal(np.isnan(x), np.isnan(y)), name
            scale = np.nanmax(np.abs(y)) if np.isfinite(y).any() else 1.0
            assert np.nanmax(np.abs(x - y)) <= rtol * (scale or 1.0), name
        else:
            np.testing.assert_array_equal(x, y, err_msg=name)


# ---------------------------------------------------------------------------
# lazy, and the numbers of mvkde run
# ---------------------------------------------------------------------------

def test_dask_backed_input_stays_lazy_until_compute(basin_lazy):
    ds, before, after, lazy_density, out = basin_lazy
    assert before == 0  # building the Dataset ran no task
    assert isinstance(lazy_density, dask.array.Array)
    assert after > 0  # .compute() ran them
    # the caller's chunks along the cell dims are the blocks: 2 x 3 cells each
    assert lazy_density.chunks[:2] == ((2,), (3, 3, 1))


def test_densities_equal_the_run_output(basin_lazy, basin_run):
    ds, _, _, _, out = basin_lazy
    with xr.open_dataset(basin_run) as ref:
        assert_same_output(out, ref.load())
    prov = json.loads(out.attrs["provenance"])
    assert prov["inputs"] == [{"type": "xarray.core.dataset.Dataset", "dask_token": dask.base.tokenize(ds)}]
    assert prov["workflow"]["estimator"]["bandwidth"] == "plugin"
    assert prov["workflow"]["variables"]["pr"]["point_mass"] == 1.0


def test_in_memory_dataset_is_computed_at_once(basin_lazy):
    ds, _, _, _, lazy_out = basin_lazy
    small = ds.isel(lon=slice(0, 2)).load()
    out = mvkde.densities(small, **BASIN_SETTINGS)
    assert isinstance(out["density"].data, np.ndarray)
    np.testing.assert_allclose(out["density"].values, lazy_out["density"].isel(lon=slice(0, 2)).values,
                               rtol=0, atol=1e-12 * float(lazy_out["density"].max()))


def test_runs_on_the_active_distributed_client(basin_lazy):
    from distributed import Client, LocalCluster, get_task_stream

    ds, _, _, _, reference = basin_lazy
    part = ds.isel(lon=slice(0, 3))
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=False, dashboard_address=":0") as cluster, \
            Client(cluster) as client:
        out = mvkde.densities(part, **BASIN_SETTINGS)
        with get_task_stream(client) as stream:
            computed = out.compute()
        keys = [str(t["key"]) for t in stream.data]
        workers = {t["worker"] for t in stream.data}
        known = set(client.scheduler_info()["workers"])
    assert any("mvkde-block" in k for k in keys)  # the fits ran on the client's workers
    assert workers and workers <= known
    assert_same_output(computed, reference.isel(lon=slice(0, 3)))


def test_dataframe_by_group_equals_the_run(tmp_path):
    table = pd.read_csv(STATIONS)
    table = table[table["station"].isin(["aldmere_lock", "dunmoss"])]
    csv = tmp_path / "two_stations.csv"
    table.to_csv(csv, index=False)
    wf = tmp_path / "wf.toml"
    wf.write_text(textwrap.dedent(f"""
        [input]
        path = {str(csv)!r}
        variables = ["tasmax", "wind_speed"]
        group_by = "station"
        time = "date"
        split_by = "season"
        [variables.wind_speed]
        bounds = [0, inf]
        [estimator]
        kernel = "biweight"
        form = "spherical"
        [grid]
        size = [32, 32]
        limits.tasmax = [-20.0, 40.0]
        limits.wind_speed = [0.0, 30.0]
        [output]
        path = {str(tmp_path / "run.nc")!r}
    """))
    run_and_write(wf, out=io.StringIO(), progress_stream=io.StringIO())
    out = mvkde.densities(table, variables=["tasmax", "wind_speed"], group_by="station", time="date",
                          split_by="season", bounds={"wind_speed": (0, np.inf)}, kernel="biweight",
                          form="spherical", grid={"size": 32, "limits": {"tasmax": (-20, 40), "wind_speed": (0, 30)}})
    assert isinstance(out["density"].data, np.ndarray)
    assert list(out["station"].values) == ["aldmere_lock", "dunmoss"]
    with xr.open_dataset(tmp_path / "run.nc") as ref:
        assert_same_output(out, ref.load())


def test_values_outside_bounds_raise_when_computed():
    rng = np.random.default_rng(3)
    x = rng.normal(size=(200, 2, 2))
    ds = xr.Dataset({"a": (("time", "y", "x"), x), "b": (("time", "y", "x"), x ** 2)}).chunk({"y": 1})
    out = mvkde.densities(ds, bounds={"a": (0, None)}, min_samples=20,
                          grid={"size": 16, "limits": {"a": (0, 3), "b": (0, 9)}})
    with pytest.raises(mvkde.InputError, match=r"variable a has values down to .* outside bounds\['a'\]"):
        out.compute(scheduler="synchronous")


# ---------------------------------------------------------------------------
# arguments
# ---------------------------------------------------------------------------

@pytest.fixture(scope="module")
def small():
    return xr.open_dataset(BASIN, chunks={}).isel(lat=slice(0, 1), lon=slice(0, 1))


@pytest.mark.parametrize("kwargs, error, pattern", [
    (dict(variables=["pr", "tasmin"]), mvkde.InputError, r"variables names 'tasmin'.*\(did you mean 'tasmax'\?\)"),
    (dict(variables=["pr"], sample_dims=("days",)), mvkde.InputError,
     r"sample_dims names 'days', which is not a dimension of pr"),
    (dict(variables=["pr"], bounds={"tasmax": (0, None)}), mvkde.InputError,
     r"bounds names 'tasmax', which is not one of variables = \['pr'\]"),
    (dict(variables=["pr"], periods={"wind": 360.0}), mvkde.InputError, r"periods names 'wind'"),
    (dict(variables=["pr"], grid={"limits": {"tas": (0, 1)}}), mvkde.InputError, r"grid\['limits'\] names 'tas'"),
    (dict(variables=["pr"], kernel="gausian"), mvkde.ConfigError,
     r"kernel = 'gausian' is not valid: expected one of .*did you mean 'gaussian'"),
    (dict(variables=["pr"], bounds={"pr": (5, 1)}), mvkde.ConfigError, r"bounds\['pr'\] = \[5.0, 1.0\] is not valid"),
    (dict(variables=["pr"], windows={"past": ["2001-13-01", "2002-12-31"]}), mvkde.ConfigError,
     r"windows"),
])
def test_bad_arguments_name_the_argument(small, kwargs, error, pattern):
    with pytest.raises(error, match=pattern) as info:
        mvkde.densities(small, **kwargs)
    assert isinstance(info.value, mvkde.MvkdeError)
    assert "\n" not in str(info.value)


def test_import_mvkde_leaves_the_pipeline_unloaded():
    code = "import sys, mvkde; print('mvkde.pipeline.densities' in sys.modules); print(callable(mvkde.densities))"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True,
                         env={**os.environ, "PYTHONPATH": str(ROOT)}).stdout.split()
    assert out == ["False", "True"]


# ---------------------------------------------------------------------------
# Zarr output
# ---------------------------------------------------------------------------

def test_zarr_output_reopens_like_the_netcdf_output(basin_run, tmp_path):
    store = run_basin(tmp_path / "basin.zarr")
    assert store.is_dir() and not list(tmp_path.glob(".*partial"))
    with xr.open_dataset(store, engine="zarr") as z, xr.open_dataset(basin_run) as nc:
        assert_same_output(z.load(), nc.load(), rtol=0)
        pz, pn = json.loads(z.attrs["provenance"]), json.loads(nc.attrs["provenance"])
        for rec in (pz, pn):
            for k in ("created_utc", "command_line", "overrides"):
                rec.pop(k)
            rec["workflow"]["output"].pop("path")
        assert pz == pn
    # inspect (and plot, which opens outputs the same way) read the store
    from mvkde.inspect import open_output, summarise

    summary = summarise(open_output(store), store)
    assert summary["size_bytes"] > 0 and "density" in summary["data_variables"]


def test_a_failed_zarr_write_leaves_no_store(tmp_path, monkeypatch):
    from mvkde.pipeline import output

    ds = xr.Dataset({"density": (("x",), np.arange(4.0))})
    real = xr.Dataset.to_zarr

    def half_then_fail(self, store, **kw):
        real(self.isel(x=slice(0, 2)), store, **kw)
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(xr.Dataset, "to_zarr", half_then_fail)
    with pytest.raises(mvkde.InputError, match="cannot write output .*No space left"):
        output.write_output_atomic(ds, tmp_path / "out.zarr")
    assert not (tmp_path / "out.zarr").exists()
    assert list(tmp_path.iterdir()) == []


def test_a_killed_zarr_write_leaves_no_store(tmp_path):
    target = tmp_path / "out.zarr"
    ready = tmp_path / "ready"
    script = textwrap.dedent(f"""
        import time, numpy as np, xarray as xr
        from mvkde.pipeline import output
        real = xr.Dataset.to_zarr
        def slow(self, store, **kw):
            real(self, store, **kw)          # the store is complete under its temporary name ...
            open({str(ready)!r}, "w").close()
            time.sleep(60)                    # ... and the process dies before the rename
        xr.Dataset.to_zarr = slow
        output.write_output_atomic(xr.Dataset({{"density": (("x",), np.arange(4.0))}}), {str(target)!r})
    """)
    proc = subprocess.Popen([sys.executable, "-c", script], env={**os.environ, "PYTHONPATH": str(ROOT)})
    try:
        for _ in range(600):
            if ready.exists() or proc.poll() is not None:
                break
            time.sleep(0.1)
        assert ready.exists(), "the writer did not reach the write"
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait()
    finally:
        if proc.poll() is None:
            proc.kill()
    assert not target.exists()
    partial = list(tmp_path.glob(".out.zarr.*.partial"))
    assert len(partial) == 1 and partial[0].is_dir()
    from mvkde.pipeline.output import clean_stale_partials

    assert clean_stale_partials(target) == partial  # the next run removes what the killed one left
    assert not partial[0].exists()


def test_windows_and_compare_equal_the_run(tmp_path):
    """Named windows and [compare] from Python give the labelled comparison mvkde run writes."""
    change = ROOT / "workflows" / "basin_change.toml"
    out = tmp_path / "change.nc"
    # the run selects summer days itself; here the caller does, so both take the same observations per year
    box = ["input.box.lat=[60.9, 61.1]", "input.box.lon=[20.9, 21.6]", "products.bootstrap=0",
           "products.observations_per_year=92",
           "grid.size=[24, 24]", f"output.path={str(out)!r}"]
    run_and_write(change, box, overwrite=True, out=io.StringIO(), progress_stream=io.StringIO())
    ran = xr.open_dataset(out).load()
    ds = xr.open_mfdataset([ROOT / "sample_grids" / "basin_daily.nc", ROOT / "sample_grids" / "basin_daily_warm.nc"],
                           combine="by_coords").sel(lat=[61.0], lon=[21.0, 21.5]).load()
    py = mvkde.densities(ds.sel(time=ds["time"].dt.season == "JJA"), variables=["pr", "tasmax"], min_samples=40,
                         windows={"baseline": ("2001-01-01", "2004-12-31"), "warm": ("2041-01-01", "2043-12-31")},
                         compare={"reference": "baseline", "alpha": 0.05},
                         bounds={"pr": (0, None)}, point_masses={"pr": 1.0}, boundary="reflect",
                         grid={"size": [24, 24], "limits": {"pr": (1.0, 60.0), "tasmax": (0.0, 40.0)}},
                         products={"thresholds": [[5.0, 20.0]], "return_periods": True,
                                   "observations_per_year": 92})
    for name in ("density", "density_difference", "density_change_significant", "probability_ratio",
                 "point_mass_probability_change", "return_period_and", "return_period_or"):
        np.testing.assert_allclose(py[name].values, ran[name].values, rtol=1e-10, err_msg=name)
    assert list(py["window"].values) == ["baseline", "warm"]
