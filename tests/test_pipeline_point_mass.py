"""Point-mass outputs of the runner, through the library's own point-mass estimate.

``mvkde.fit(point_masses=...)`` gives ``point_mass_probability``, ``grid`` (the
continuous part, integrating to 1 - p) and ``point_mass_grid`` (the density of the
other variables on the point mass, integrating to p).  The runner's outputs are
checked against the share of dry days in the input and against the same library
call made directly on one cell.  The input is the simulated Aldmere basin of
``sample_grids/generate.py`` (simulated, not observations).
"""

import sys
from pathlib import Path

import numpy as np
import pytest
import xarray as xr

import mvkde
from mvkde.cli import main

from conftest import grid_integral

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO / "sample_grids"))
import generate  # noqa: E402


def test_point_mass_outputs(tmp_path):
    data = tmp_path / "g.nc"
    generate.make_grid(2, seed=5, lat=np.array([60.0, 61.0]), lon=np.array([21.0])).to_netcdf(data)
    wf = tmp_path / "pm.toml"
    wf.write_text(f"""
[input]
path = "{data}"
variables = ["pr", "tasmax"]
[variables.pr]
bounds = [0, inf]
point_mass = 1.0
[estimator]
bandwidth = "normal"
boundary = "none"
[grid]
size = [60, 50]
limits.pr = [1.0, 80.0]
limits.tasmax = [-30.0, 45.0]
[output]
path = "{tmp_path / 'pm.nc'}"
""")
    assert main(["run", str(wf)]) == 0
    ds = xr.open_dataset(tmp_path / "pm.nc")
    src = xr.open_dataset(data)
    assert ds["point_mass_probability"].dims == ("lat", "lon")
    assert ds["density_at_point_mass"].dims == ("lat", "lon", "tasmax")
    dry = (src["pr"] <= 1.0).mean("time")
    # the probability of the point mass is the share of days at or below the threshold
    np.testing.assert_allclose(ds["point_mass_probability"].values, dry.values, rtol=1e-6)
    for i in range(2):
        pm = ds["density_at_point_mass"][i, 0]
        assert grid_integral(pm) == pytest.approx(float(dry[i, 0]), rel=0.01)
        total = grid_integral(ds["density"][i, 0]) + grid_integral(pm)
        assert float(ds["grid_mass"][i, 0]) == pytest.approx(total, rel=1e-9)
    assert "continuous part" in ds["density"].attrs["long_name"]
    assert ds["density_at_point_mass"].attrs["units"] == "degC-1"
    # one cell against the library's point-mass estimate on the same rows (the real code, no stand-in)
    cell = src[["pr", "tasmax"]].isel(lat=1, lon=0).to_dataframe()[["pr", "tasmax"]].dropna()
    est = mvkde.fit(cell.to_numpy(dtype=float), names=["pr", "tasmax"], bandwidth="normal",
                    bounds=[(0.0, np.inf), None], boundary="none", point_masses=[1.0, None])
    limits = [(1.0, 80.0), (-30.0, 45.0)]
    assert float(ds["point_mass_probability"][1, 0]) == pytest.approx(est.point_mass_probability, rel=1e-12)
    np.testing.assert_allclose(ds["density"][1, 0].values, est.grid([60, 50], limits=limits).values,
                               rtol=1e-10, atol=1e-14)
    np.testing.assert_allclose(ds["density_at_point_mass"][1, 0].values,
                               est.point_mass_grid([50], limits=limits[1:]).values, rtol=1e-10, atol=1e-14)
