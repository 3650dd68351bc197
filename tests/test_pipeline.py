"""End to end: workflow -> dask blocks -> labelled netCDF, on generated inputs with a known law."""

import hashlib
import json
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr

import mvkde
from mvkde.cli import main
from mvkde.pipeline.blocks import FLAGS

from conftest import grid_integral

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO / "sample_grids"))
import generate  # noqa: E402  (the sample-data generator and its known law)


def write_grid(path, years=1, lat=(60.0, 61.0), lon=(20.0, 21.0, 22.0), seed=7):
    """A small grid of the simulated Aldmere basin (simulated, not observations) with tasmin added
    (correlated with tasmax) and some missing values."""
    ds = generate.make_grid(years, seed=seed, lat=np.array(lat), lon=np.array(lon))
    rng = np.random.default_rng(seed)
    tasmin = ds.tasmax - 8.0 + 5.0 * rng.standard_normal(ds.tasmax.shape)
    ds["tasmin"] = tasmin.astype("float32").assign_attrs(units="degC", long_name="daily minimum temperature")
    ds["tasmax"][:20, 0, 1] = np.nan          # 20 missing days in cell (0, 1)
    ds["tasmin"][5:10, 0, 1] = np.nan         # 5 of them already missing in tasmax
    ds["tasmax"][20:, 1, 2] = np.nan          # cell (1, 2): only 20 valid days -> too few
    ds.to_netcdf(path)
    return path


def write_workflow(path, body):
    Path(path).write_text(body)
    return str(path)


GRID_BODY = """
[input]
path = "{data}"
variables = ["tasmax", "tasmin"]
min_samples = 50

[variables.tasmax]
bounds = [-40, inf]

[estimator]
kernel = "gaussian"
bandwidth = "normal"
boundary = "none"

[grid]
size = [48, 44]
limits.tasmax = [-50.0, 45.0]
limits.tasmin = [-60.0, 40.0]

[compute]
scheduler = "{scheduler}"
workers = 2
block_size = {block}

[output]
path = "{out}"
"""


@pytest.fixture(scope="module")
def grid_run(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("grid")
    data = write_grid(tmp / "grid.nc")
    wf = write_workflow(tmp / "w.toml", GRID_BODY.format(data=data, scheduler="threads", block=2,
                                                          out=tmp / "out" / "density.nc"))
    code = main(["run", wf])
    return code, data, wf, tmp / "out" / "density.nc"


def test_grid_run_exit_and_layout(grid_run):
    code, data, wf, out = grid_run
    assert code == 0
    ds = xr.open_dataset(out)
    # pinned layout (shared/DESIGN.md): cell dims, then one dim per variable named after it
    assert ds["density"].dims == ("lat", "lon", "tasmax", "tasmin")
    np.testing.assert_array_equal(ds["tasmax"].values, np.linspace(-50.0, 45.0, 48))
    np.testing.assert_array_equal(ds["tasmin"].values, np.linspace(-60.0, 40.0, 44))
    np.testing.assert_array_equal(ds["lat"].values, [60.0, 61.0])
    assert ds["n_samples"].dims == ("lat", "lon")
    assert ds["bandwidth"].dims == ("lat", "lon", "variable_row", "variable_column")
    assert ds["density"].attrs["units"] == "1/(degC degC)"
    assert ds["tasmax"].attrs["units"] == "degC"
    assert ds.attrs["Conventions"].startswith("CF-")
    assert ds.attrs["caution"] == mvkde.CAUTION
    assert ds["density"].encoding["zlib"] and ds["density"].encoding["chunksizes"][-2:] == (48, 44)
    assert not list(out.parent.glob(".*partial"))  # the temporary file was renamed away


def test_grid_run_missing_values_counted_and_flagged(grid_run):
    _, data, _, out = grid_run
    ds = xr.open_dataset(out)
    n_days = xr.open_dataset(data).sizes["time"]
    assert int(ds["n_missing"][0, 1]) == 20 and int(ds["n_samples"][0, 1]) == n_days - 20
    assert int(ds["n_samples"][0, 0]) == n_days
    assert int(ds["n_samples"][1, 2]) == 20
    assert int(ds["flags"][1, 2]) & FLAGS["too_few_samples"]
    assert np.isnan(ds["density"][1, 2]).all() and np.isnan(ds["bandwidth"][1, 2]).all()
    good = ds["flags"].values & FLAGS["too_few_samples"] == 0
    assert good.sum() == 5


def test_grid_run_integrates_to_one_and_respects_the_bound(grid_run):
    _, _, _, out = grid_run
    ds = xr.open_dataset(out)
    for i in range(2):
        for j in range(3):
            if i == 1 and j == 2:
                continue
            cell = ds["density"][i, j]
            assert grid_integral(cell) == pytest.approx(1.0, abs=0.01)
            assert float(ds["grid_mass"][i, j]) == pytest.approx(grid_integral(cell), rel=1e-9)
            # declared lower bound tasmax >= -40: no density at nodes below it
            assert float(np.abs(cell.sel(tasmax=slice(None, -40.0 - 1e-9))).max()) == 0.0


def test_grid_run_cell_equals_library_call(grid_run):
    _, data, _, out = grid_run
    ds = xr.open_dataset(out)
    src = xr.open_dataset(data)
    cell = src[["tasmax", "tasmin"]].isel(lat=0, lon=1).to_dataframe()[["tasmax", "tasmin"]].dropna()
    est = mvkde.fit(cell.to_numpy(dtype=float), names=["tasmax", "tasmin"], bandwidth="normal",
                    bounds=[(-40, None), None], boundary="none")
    ref = est.grid([48, 44], limits=[(-50.0, 45.0), (-60.0, 40.0)])
    np.testing.assert_allclose(ds["density"][0, 1].values, ref.values, rtol=1e-12, atol=0)
    np.testing.assert_allclose(ds["bandwidth"][0, 1].values, est.H, rtol=1e-12)


def test_grid_run_provenance(grid_run):
    _, data, wf, out = grid_run
    ds = xr.open_dataset(out)
    prov = json.loads(ds.attrs["provenance"])
    digest = hashlib.sha256(Path(data).read_bytes()).hexdigest()
    assert prov["inputs"] == [{"path": str(Path(data).resolve()), "size_bytes": Path(data).stat().st_size,
                               "sha256": digest}]
    assert prov["workflow"]["estimator"]["engine"] == "auto"            # defaults filled in
    assert prov["workflow"]["compute"]["block_size"] == 2
    assert prov["workflow"]["variables"]["tasmax"]["bounds"] == [-40.0, "inf"]
    assert prov["software"]["mvkde"] == mvkde.__version__ and prov["software"]["numpy"] == np.__version__
    assert prov["seed"] == 0 and prov["created_utc"].endswith("Z") and prov["host"]
    assert prov["command_line"][:2] == ["mvkde", "run"]
    assert prov["workflow_file"]["sha256"] == hashlib.sha256(Path(wf).read_bytes()).hexdigest()
    assert prov["created_utc"] in ds.attrs["history"]


CSV_BODY = """
[input]
path = "{data}"
variables = ["tasmax", "wind_speed"]
group_by = "station"
time = "date"
split_by = "season"
min_samples = 30

[variables.tasmax]
units = "degC"
[variables.wind_speed]
units = "m s-1"

[estimator]
bandwidth = "normal"
kernel = "biweight"
form = "spherical"

[grid]
size = 48
limits.tasmax = [-30.0, 50.0]
limits.wind_speed = [-20.0, 45.0]

[compute]
block_size = 2

[output]
path = "{out}"
"""


def test_table_run_per_station_and_season(tmp_path):
    table = generate.make_stations(years=1)
    table = table[table.station.isin(["aldmere_lock", "brackenfold", "dunmoss"])]
    data = tmp_path / "stations.csv"
    table.to_csv(data, index=False)
    wf = write_workflow(tmp_path / "s.toml", CSV_BODY.format(data=data, out=tmp_path / "st.nc"))
    assert main(["run", wf]) == 0
    ds = xr.open_dataset(tmp_path / "st.nc")
    assert ds["density"].dims == ("station", "season", "tasmax", "wind_speed")
    assert list(ds["station"].values) == ["aldmere_lock", "brackenfold", "dunmoss"]
    assert list(ds["season"].values) == ["DJF", "MAM", "JJA", "SON"]
    assert ds["density"].attrs["units"] == "1/(degC m s-1)"
    for s in range(3):
        for k in range(4):
            assert grid_integral(ds["density"][s, k]) == pytest.approx(1.0, abs=0.01)
    # one station and season against the library on the same rows
    rows = table[(table.station == "brackenfold") & pd.to_datetime(table.date).dt.month.isin([6, 7, 8])]
    est = mvkde.fit(rows[["tasmax", "wind_speed"]].to_numpy(), bandwidth="normal", kernel="biweight",
                    form="spherical")
    ref = est.grid(48, limits=[(-30.0, 50.0), (-20.0, 45.0)])
    np.testing.assert_allclose(ds["density"].sel(station="brackenfold", season="JJA").values, ref.values,
                               rtol=1e-12)
    assert int(ds["n_samples"].sel(station="brackenfold", season="JJA")) == len(rows)


def test_embedded_and_local_cluster_identical(tmp_path):
    data = write_grid(tmp_path / "g.nc", years=1, seed=11)
    outs = []
    for sched in ("threads", "local-cluster"):
        out = tmp_path / f"{sched}.nc"
        wf = write_workflow(tmp_path / f"{sched}.toml",
                            GRID_BODY.format(data=data, scheduler=sched, block=2, out=out))
        assert main(["run", wf]) == 0
        outs.append(xr.open_dataset(out))
    a, b = outs
    assert "2 workers" in json.loads(b.attrs["provenance"])["scheduler"]
    np.testing.assert_array_equal(a["density"].values, b["density"].values)  # identical, NaN cells too
    np.testing.assert_array_equal(a["bandwidth"].values, b["bandwidth"].values)


def test_mean_ise_falls_with_years_per_cell(tmp_path):
    # Truth: the generator's known law (sample_grids/generate.py, true_tasmax_density).
    lat, lon = (60.0, 61.0), (20.0, 21.5)
    elev = generate.elevation(np.array(lat), np.array(lon))
    axis = np.linspace(-35.0, 45.0, 201)
    mean_ise = []
    for years in (1, 4, 12):
        data = tmp_path / f"y{years}.nc"
        generate.make_grid(years, seed=100 + years, lat=np.array(lat), lon=np.array(lon)).to_netcdf(data)
        body = f"""
[input]
path = "{data}"
variables = ["tasmax"]
[estimator]
bandwidth = "normal"
[grid]
size = {len(axis)}
limits.tasmax = [{axis[0]}, {axis[-1]}]
[output]
path = "{tmp_path / f'ise{years}.nc'}"
"""
        assert main(["run", write_workflow(tmp_path / f"y{years}.toml", body)]) == 0
        dens = xr.open_dataset(tmp_path / f"ise{years}.nc")["density"]
        ise = [np.trapezoid((dens[i, j].values - generate.true_tasmax_density(axis, elev[i, j])) ** 2, axis)
               for i in range(2) for j in range(2)]
        mean_ise.append(np.mean(ise))
    print("mean ISE per cell for 1, 4, 12 years:", mean_ise)
    assert mean_ise[0] > mean_ise[1] > mean_ise[2], mean_ise
    assert mean_ise[2] < 0.5 * mean_ise[0]


def test_glob_of_files_with_processes_equals_one_file(tmp_path):
    ds = generate.make_grid(2, seed=21, lat=np.array([60.0, 61.0]), lon=np.array([20.0]))
    one = tmp_path / "one.nc"
    ds.to_netcdf(one)
    for year, part in ds.groupby("time.year"):
        part.to_netcdf(tmp_path / f"part_{year}.nc")
    outs = []
    for name, path, sched in (("one", one, "threads"), ("glob", tmp_path / "part_*.nc", "processes")):
        body = f"""
[input]
path = "{path}"
variables = ["tasmax"]
split_by = "season"
[estimator]
bandwidth = "normal"
[grid]
size = 40
[compute]
scheduler = "{sched}"
workers = 2
block_size = 1
[output]
path = "{tmp_path / (name + '.out.nc')}"
"""
        assert main(["run", write_workflow(tmp_path / f"{name}.toml", body)]) == 0
        outs.append(xr.open_dataset(tmp_path / f"{name}.out.nc"))
    np.testing.assert_array_equal(outs[0]["density"].values, outs[1]["density"].values)
    assert len(json.loads(outs[1].attrs["provenance"])["inputs"]) == 2
