"""Workflows with a circular variable (wind direction) and a spherical location (lat/lon)."""

import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from mvkde import directional as D
from mvkde.cli import main
from mvkde.errors import ConfigError
from mvkde.pipeline.workflow import load

REPO = Path(__file__).resolve().parent.parent


def test_wind_example_runs_end_to_end(tmp_path, capsys):
    out = tmp_path / "wind.nc"
    # the shipped example with a cheaper selector and grid for the test budget
    code = main(["run", str(REPO / "workflows" / "stations_wind.toml"), "--set", f'output.path="{out}"',
                 "--set", 'estimator.bandwidth="normal"', "--set", "grid.size=[40, 37]",
                 "--set", "compute.scheduler=\"synchronous\"", "--set", "products.sectors=8",
                 "--set", "products.speed_classes=[0, 4, 8, 30]"])
    assert code == 0, capsys.readouterr().err
    ds = xr.open_dataset(out)
    assert ds["wind_dir"].attrs["period"] == 360.0
    np.testing.assert_allclose(ds["wind_dir"].values, np.linspace(0, 360, 37))
    assert ds.sizes["station"] == 5
    # each station's joint density integrates to one (speed >= 0 reflected, direction one full turn)
    mass = ds["density"].integrate(["wind_speed", "wind_dir"]).values
    np.testing.assert_allclose(mass, 1.0, atol=5e-3)
    # continuous across north: the 0 and 360 columns are the same direction
    np.testing.assert_allclose(ds["density"].isel(wind_dir=0), ds["density"].isel(wind_dir=-1), rtol=1e-10)
    # H holds the equivalent variance of the direction and no coupling with speed
    H = ds["bandwidth"].values
    assert np.all(H[:, 0, 1] == 0) and np.all(H[:, 1, 1] > 0)
    assert ds["density"].attrs["units"] == "1/(m s-1 degree)"
    # wind-rose numbers: 8 sectors x 3 speed classes per station, summing to the mass inside them
    sp = ds["sector_probability"]
    assert sp.dims == ("station", "sector", "speed_class")
    np.testing.assert_allclose(ds["sector"].values, np.arange(8) * 45.0)
    inside = ds["density"].sel(wind_speed=slice(0, 30)).integrate(["wind_speed", "wind_dir"]).values
    np.testing.assert_allclose(sp.sum(["sector", "speed_class"]).values, inside, atol=5e-3)
    # the invented stations blow mostly from the south-west (generator: 70 % around 225 degrees)
    by_sector = sp.sum("speed_class").mean("station")
    assert float(by_sector.sel(sector=225.0)) == float(by_sector.max())


def lightning_table(path):
    """Simulated lightning strikes (not observations): von Mises-Fisher clouds about two centres."""
    rng = np.random.default_rng(5)
    rows = []
    for region, (lat, lon, k) in {"pacific": (-15.0, 179.0, 60.0), "arctic": (86.0, 0.0, 150.0)}.items():
        u = D.sample_vmf(np.tile(D.lonlat_to_unit(lat, lon), (200, 1)), k, rng)
        la, lo = D.unit_to_latlon(u)
        rows.append(pd.DataFrame({"region": region, "date": pd.date_range("2001-01-01", periods=200),
                                  "lat": la, "lon": lo, "current": rng.gamma(3.0, 10.0, 200)}))
    pd.concat(rows).to_csv(path, index=False)


def sphere_workflow(tmp_path, extra="", variables='["lat", "lon"]'):
    data = tmp_path / "strikes.csv"
    lightning_table(data)
    text = f"""
[input]
path = "{data}"
variables = {variables}
group_by = "region"
time = "date"
[estimator]
sphere = ["lat", "lon"]
bandwidth = "normal"
{extra}
[grid]
size = [181, 361]                # 1 degree: finer than the kernels
[compute]
scheduler = "synchronous"
[output]
path = "{tmp_path / 'strikes.nc'}"
"""
    p = tmp_path / "strikes.toml"
    p.write_text(text)
    return p


def test_sphere_workflow_density_per_km2(tmp_path, capsys):
    wf = sphere_workflow(tmp_path)
    assert main(["run", str(wf)]) == 0, capsys.readouterr().err
    ds = xr.open_dataset(tmp_path / "strikes.nc")
    assert ds["density"].attrs["units"] == "km-2"
    assert float(ds["lat"][0]) == -90.0 and float(ds["lon"][-1]) == 180.0
    mass = (ds["density"] * ds["cell_area"]).sum(["lat", "lon"]).values
    np.testing.assert_allclose(mass, 1.0, atol=2e-3)
    np.testing.assert_allclose(ds["grid_mass"].values, 1.0, atol=2e-3)
    pacific = ds["density"].sel(region="pacific")
    np.testing.assert_allclose(pacific.isel(lon=0), pacific.isel(lon=-1), rtol=1e-10)  # date line


def test_sphere_key_errors(tmp_path):
    wf = sphere_workflow(tmp_path)
    text = wf.read_text()
    wf.write_text(text.replace('sphere = ["lat", "lon"]', 'sphere = ["lat", "longitude"]'))
    with pytest.raises(ConfigError, match=r"estimator.sphere names \['longitude'\]"):
        load(wf)
    wf.write_text(text.replace('sphere = ["lat", "lon"]', 'sphere = ["lat"]'))
    with pytest.raises(ConfigError, match="must name two variables"):
        load(wf)
    wf.write_text(text + '\n[variables.lon]\nperiod = 360.0\n')
    with pytest.raises(ConfigError, match="variables.lon.period is set but lon is part of the spherical"):
        load(wf)
