"""One quadrature for every grid product: the file, the estimate and the picture agree.

For one cell, the workflow's ``hdr_level``, ``quantile_*``, ``exceedance``
and ``marginal_*`` must equal the estimate's own methods on the same grid
(``mvkde.fit`` on the cell's sample, with the run's settings), in a bounded,
a circular, a point-mass and a spherical case.  Data are simulated, not
observations.
"""

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr

import mvkde
from mvkde import directional as D
from mvkde.pipeline.run import run_and_write
from mvkde.plot import hdr_levels as plot_hdr_levels
from mvkde.products import grid as G

MASSES = [0.5, 0.9]
PROBS = [0.1, 0.5, 0.9]


def run_table(tmp_path: Path, frame: pd.DataFrame, variables: str, size, limits: str, extra="",
              estimator="") -> xr.Dataset:
    frame.to_csv(tmp_path / "cell.csv", index=False)
    out = tmp_path / "out.nc"
    (tmp_path / "w.toml").write_text(f"""
[input]
path = "{tmp_path / 'cell.csv'}"
variables = {variables}
{extra}
[estimator]
bandwidth = "normal"
{estimator}
[grid]
size = {list(size)}
{limits}
[products]
marginals = true
exceedance = true
hdr_masses = {MASSES}
quantiles = {PROBS}
[compute]
scheduler = "synchronous"
[output]
path = "{out}"
""")
    run_and_write(tmp_path / "w.toml", out=open("/dev/null", "w"))
    return xr.open_dataset(out).load()


def same_grid(ds, names):
    size = [ds.sizes[v] for v in names]
    limits = [(float(ds[v][0]), float(ds[v][-1])) for v in names]
    return size, limits


def check_products(ds, est, names, *, exceedance=True, quantile_names=None):
    size, limits = same_grid(ds, names)
    g = est.grid(size, limits=limits)
    np.testing.assert_allclose(ds["density"].values, g.values, rtol=1e-10, atol=1e-12 * float(g.max()))
    # HDR levels: the file, the estimate and the picture (one quadrature)
    file_levels = ds["hdr_level"].values
    np.testing.assert_allclose(file_levels, est.hdr_levels(MASSES, size=size, limits=limits), rtol=1e-10)
    np.testing.assert_allclose(file_levels, plot_hdr_levels(ds["density"], MASSES), rtol=1e-10)
    for v in quantile_names or names:
        np.testing.assert_allclose(ds[f"quantile_{v}"].values, est.quantiles(v, PROBS, size=size, limits=limits),
                                   rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(ds[f"marginal_{v}"].values,
                                   est.marginal_grid([v], size, limits).values, rtol=1e-10, atol=1e-14)
    if exceedance:
        np.testing.assert_allclose(ds["exceedance"].values,
                                   est.probability_grid("exceedance", size, limits).values, rtol=1e-10, atol=1e-14)


def test_bounded_cell(tmp_path):
    rng = np.random.default_rng(1)
    pr = rng.gamma(1.2, 4.0, 600)
    t = 20 + 0.3 * pr + rng.normal(0, 3, 600)
    frame = pd.DataFrame({"pr": pr, "tasmax": t})
    ds = run_table(tmp_path, frame, '["pr", "tasmax"]', (48, 40), 'limits.pr = [0.0, 40.0]\nlimits.tasmax = [5.0, 40.0]',
                   "[variables.pr]\nbounds = [0, inf]")
    est = mvkde.fit(frame, bounds=[(0, None), None], bandwidth="normal", boundary="linear")
    check_products(ds, est, ["pr", "tasmax"])


def test_circular_cell(tmp_path):
    rng = np.random.default_rng(2)
    direction = np.mod(np.where(rng.random(500) < 0.7, rng.vonmises(np.deg2rad(225), 4, 500),
                                rng.vonmises(np.deg2rad(45), 2, 500)) * 180 / np.pi, 360)
    speed = rng.gamma(3.0, 2.0, 500)
    frame = pd.DataFrame({"wind_speed": speed, "wind_dir": direction})
    ds = run_table(tmp_path, frame, '["wind_speed", "wind_dir"]', (40, 37), "limits.wind_speed = [0.0, 30.0]",
                   "[variables.wind_speed]\nbounds = [0, inf]\n[variables.wind_dir]\nperiod = 360.0")
    est = mvkde.fit(frame, bounds=[(0, None), None], periods=[None, 360.0], bandwidth="normal")
    # the CDF along a circular axis is not a product a risk model reads; exceedance is checked for the others
    check_products(ds, est, ["wind_speed", "wind_dir"], quantile_names=["wind_speed"])


def test_point_mass_cell(tmp_path):
    rng = np.random.default_rng(3)
    n = 900
    dry = rng.random(n) < 0.45
    pr = np.where(dry, 0.0, 1.0 + rng.gamma(0.8, 6.0, n))
    t = rng.normal(18, 4, n) - 2 * dry
    frame = pd.DataFrame({"pr": pr, "tasmax": t})
    ds = run_table(tmp_path, frame, '["pr", "tasmax"]', (48, 40), 'limits.pr = [1.0, 60.0]\nlimits.tasmax = [0.0, 36.0]',
                   "[variables.pr]\nbounds = [0, inf]\npoint_mass = 1.0")
    est = mvkde.fit(frame, bounds=[(0, None), None], point_masses=[1.0, None], bandwidth="normal", boundary="linear")
    assert float(ds["point_mass_probability"]) == pytest.approx(est.point_mass_probability, abs=1e-15)
    check_products(ds, est, ["pr", "tasmax"])
    # the marginal of tasmax counts the dry days: it integrates to 1 (trapezoid on the grid)
    assert float(ds["marginal_tasmax"].integrate("tasmax")) == pytest.approx(1.0, abs=5e-3)


def test_sphere_products_integrate_to_one_with_cell_area(tmp_path):
    rng = np.random.default_rng(4)
    u = D.sample_vmf(np.tile(D.lonlat_to_unit(50.0, 10.0), (400, 1)), 80.0, rng)
    lat, lon = D.unit_to_latlon(u)
    frame = pd.DataFrame({"lat": lat, "lon": lon, "current": rng.gamma(3.0, 10.0, 400)})
    ds = run_table(tmp_path, frame, '["lat", "lon", "current"]', (61, 121, 40), "limits.current = [-60.0, 200.0]",
                   estimator='sphere = ["lat", "lon"]')
    assert ds["density"].attrs["units"] == "km-2"  # per km2 of the Earth's surface (current has no units here)
    # the joint mass over the sphere (node areas) and the current axis (trapezoid) is 1
    w = G.GridWeights([ds["lat"].values, ds["lon"].values, ds["current"].values], sphere=(0, 1))
    assert float((ds["density"].values * w.full()).sum()) == pytest.approx(1.0, abs=5e-3)
    # the marginal of the linear variable integrates the location with the node areas: it is a density in current
    assert float(ds["marginal_current"].integrate("current")) == pytest.approx(1.0, abs=5e-3)
    assert "marginal_lat" not in ds  # half of a location has no marginal of its own


def test_grid_weights_integrate_known_laws():
    """The quadrature itself, against closed forms (scipy-free): trapezoid and node areas."""
    x = np.linspace(-8, 8, 401)
    f = np.exp(-x ** 2 / 2) / np.sqrt(2 * np.pi)  # N(0, 1): integrates to 1
    assert float((f * G.trapezoid_weights(x)).sum()) == pytest.approx(1.0, abs=1e-12)
    lat, lon = np.linspace(-90, 90, 91), np.linspace(-180, 180, 181)
    area = G.GridWeights([lat, lon], sphere=(0, 1)).full()
    assert float(area.sum()) == pytest.approx(4 * np.pi * D.EARTH_RADIUS_KM ** 2, rel=1e-12)  # the sphere's area
    # exceedance of N(0,1) at 0 by the cumulative rule: 1/2 (symmetry)
    e = G.cumulative(f, [x], upper=True)
    assert float(e[200]) == pytest.approx(0.5, abs=1e-6)
    # the HDR level of N(0,1) holding 0.5: phi(0.6745) (Hyndman 1996; quantile from the closed form)
    lv = G.hdr_levels(f, G.trapezoid_weights(x), [0.5])[0]
    assert lv == pytest.approx(np.exp(-0.67449 ** 2 / 2) / np.sqrt(2 * np.pi), rel=2e-2)
