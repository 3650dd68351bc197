"""Small density outputs for the plot and inspect tests.

Every number here is simulated or written from a closed form, not observations.

``run_grid`` and ``run_stations`` write a tiny input simulated by
``sample_grids/generate.py`` (the invented Aldmere basin) and run a real workflow
through :func:`mvkde.pipeline.run.run_and_write`:

* ``run_grid``: pr and tasmax on a 2 x 3 lat/lon grid, one year, split by
  season, with one under-sampled cell (lat 61, lon 22: 20 valid days, flagged
  too_few_samples); with ``variables=("tasmax",)`` and no split, a 1-variable grid;
* ``run_stations``: tasmax and wind_speed at three simulated stations.

``synthetic_*`` build an output-shaped Dataset by hand from a density with a
closed form, for checks against outside values without estimation error: a
bivariate normal (``synthetic_normal``), a von Mises direction times a gamma speed
or the direction alone (``synthetic_directional``), and a point mass with an
exponential-times-normal continuous part (``synthetic_point_mass``).
"""

import io
import json
import sys
from pathlib import Path

import numpy as np
import xarray as xr

from mvkde.pipeline.blocks import FLAGS
from mvkde.pipeline.run import run_and_write

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO / "sample_grids"))
import generate  # noqa: E402  (the sample-data generator)


GRID_WORKFLOW = """
[input]
path = "{data}"
variables = {variables}
split_by = {split}
min_samples = 40

[estimator]
kernel = "gaussian"
bandwidth = "normal"

[grid]
size = {size}
{limits}

[compute]
scheduler = "threads"
workers = 1

[output]
path = "{out}"
"""


LIMITS = {"pr": [0.0, 60.0], "tasmax": [-25.0, 40.0]}


PRODUCTS = """
[products]
marginals = true
cdf = true
exceedance = true
"""


def run_grid(folder: Path, variables=("pr", "tasmax"), split=True, size=(40, 36), name="grid",
             products=False) -> Path:
    """A 2 x 3 cell grid of simulated data (not observations), one year; cell (lat 61, lon 22)
    keeps 20 valid days of tasmax (too few: flagged).

    ``products=True`` also writes the grid products (marginals, cdf, exceedance) per cell.
    """
    folder.mkdir(parents=True, exist_ok=True)
    data = folder / f"{name}_input.nc"
    if not data.exists():
        ds = generate.make_grid(1, seed=5, lat=np.array([60.0, 61.0]), lon=np.array([20.0, 21.0, 22.0]))
        ds["tasmax"][20:, 1, 2] = np.nan
        ds.to_netcdf(data)
    out = folder / f"{name}.nc"
    wf = folder / f"{name}.toml"
    size = list(size)[: len(variables)]
    wf.write_text(GRID_WORKFLOW.format(data=data, variables=json.dumps(list(variables)),
                                       split='"season"' if split else '""', size=size, out=out,
                                       limits="\n".join(f"limits.{v} = {LIMITS[v]}" for v in variables))
                  .replace('split_by = ""\n', "") + (PRODUCTS if products else ""))
    run_and_write(str(wf), overwrite=True, out=io.StringIO(), progress_stream=io.StringIO())
    return out


STATION_WORKFLOW = """
[input]
path = "{data}"
variables = ["tasmax", "wind_speed"]
group_by = "station"
min_samples = 30

[variables.tasmax]
units = "degC"
[variables.wind_speed]
units = "m s-1"

[estimator]
bandwidth = "normal"

[grid]
size = 32
limits.tasmax = [-30.0, 45.0]
limits.wind_speed = [-10.0, 40.0]

[compute]
workers = 1

[output]
path = "{out}"
"""


def run_stations(folder: Path) -> Path:
    """Three of the simulated stations (not observations), one year, tasmax x wind_speed per station."""
    folder.mkdir(parents=True, exist_ok=True)
    table = generate.make_stations(years=1)
    table = table[table.station.isin(["aldmere_lock", "brackenfold", "dunmoss"])]
    data = folder / "stations.csv"
    table.to_csv(data, index=False)
    out = folder / "stations.nc"
    wf = folder / "stations.toml"
    wf.write_text(STATION_WORKFLOW.format(data=data, out=out))
    run_and_write(str(wf), overwrite=True, out=io.StringIO(), progress_stream=io.StringIO())
    return out


_OUTPUTS: dict = {}


def all_outputs(tmp_path_factory) -> dict:
    """The run outputs, made once per test session (shared by the plot and inspect tests)."""
    if not _OUTPUTS:
        tmp = tmp_path_factory.mktemp("outputs")
        _OUTPUTS.update({
            "grid": run_grid(tmp),                                        # lat, lon, season; pr, tasmax
            "single": run_grid(tmp, variables=("tasmax",), split=False, size=(64,), name="single"),
            "stations": run_stations(tmp),                                # station; tasmax, wind_speed
            "products": run_grid(tmp, name="products", products=True),    # grid + marginals, cdf, exceedance
            "tmp": tmp,
        })
    return dict(_OUTPUTS)


def _per_cell(ds, lead, n):
    shape = tuple(ds.sizes[d] for d in lead)
    ds["n_samples"] = (lead, np.full(shape, n, dtype=np.int32), {"units": "1"})
    ds["grid_mass"] = (lead, np.ones(shape), {"units": "1"})
    ds["flags"] = (lead, np.zeros(shape, dtype=np.uint8),
                   {"flag_masks": np.array(list(FLAGS.values()), dtype=np.uint8),
                    "flag_meanings": " ".join(FLAGS)})
    return ds


def synthetic_normal(cov, n_nodes=241, reach=6.0) -> xr.Dataset:
    """One station whose density is exactly the centred bivariate normal with covariance ``cov``
    (a closed form written on a grid, not an estimate from observations)."""
    cov = np.asarray(cov, dtype=float)
    sd = np.sqrt(np.diag(cov))
    x = np.linspace(-reach * sd[0], reach * sd[0], n_nodes)
    y = np.linspace(-reach * sd[1], reach * sd[1], n_nodes + 10)
    X, Y = np.meshgrid(x, y, indexing="ij")
    P = np.linalg.inv(cov)
    q = P[0, 0] * X**2 + 2 * P[0, 1] * X * Y + P[1, 1] * Y**2
    f = np.exp(-q / 2) / (2 * np.pi * np.sqrt(np.linalg.det(cov)))
    ds = xr.Dataset(
        {"density": (("station", "hs", "tp"), f[None], {"units": "1/(m s)"})},
        coords={"station": ["buoy_a"], "hs": ("hs", x, {"units": "m", "long_name": "wave height"}),
                "tp": ("tp", y, {"units": "s", "long_name": "wave period"}),
                "variable_row": ["hs", "tp"], "variable_column": ["hs", "tp"]})
    ds["bandwidth"] = (("station", "variable_row", "variable_column"), 0.01 * cov[None])
    return _per_cell(ds, ["station"], 500)


def von_mises(theta_deg, mean_deg, kappa):
    from scipy.special import i0

    t = np.deg2rad(theta_deg - mean_deg)
    return np.exp(kappa * np.cos(t)) / (2 * np.pi * i0(kappa)) * (np.pi / 180.0)  # per degree


def synthetic_directional(period_on="coordinate", with_speed=True) -> xr.Dataset:
    """Two stations: wind direction (period 360) x wind speed, or direction alone.

    Closed forms, not observations: von Mises directions (mean 225 deg, kappa 2 and
    mean 90 deg, kappa 4) times a Gamma(3, scale 2.5) speed.

    The period is written on the direction coordinate (``period_on='coordinate'``)
    or only in the provenance record (``'provenance'``).
    """
    direction = np.linspace(0.0, 360.0, 73)      # both 0 and 360: the repeated node
    speed = np.linspace(0.0, 25.0, 40)
    dims = ["station", "wind_dir"] + (["wind_speed"] if with_speed else [])
    values = []
    for mean, kappa in ((225.0, 2.0), (90.0, 4.0)):
        fd = von_mises(direction, mean, kappa)
        if with_speed:
            from scipy.stats import gamma

            fs = gamma(a=3.0, scale=2.5).pdf(speed)
            values.append(fd[:, None] * fs[None, :])
        else:
            values.append(fd)
    coords = {"station": ["north_pier", "south_mast"],
              "wind_dir": ("wind_dir", direction, {"units": "degree", "long_name": "wind direction"})}
    names = ["wind_dir"]
    if with_speed:
        coords["wind_speed"] = ("wind_speed", speed, {"units": "m s-1", "long_name": "wind speed"})
        names.append("wind_speed")
    if period_on == "coordinate":
        coords["wind_dir"][2]["period"] = 360.0
    coords["variable_row"] = names
    coords["variable_column"] = names
    ds = xr.Dataset({"density": (dims, np.array(values), {"units": "1/(degree m s-1)"})}, coords=coords)
    ds["bandwidth"] = (("station", "variable_row", "variable_column"),
                       np.broadcast_to(np.eye(len(names)), (2, len(names), len(names))).copy())
    ds = _per_cell(ds, ["station"], 700)
    prov = {"workflow": {"input": {"variables": names},
                         "variables": {"wind_dir": {"period": 360.0 if period_on == "provenance" else None},
                                       **({"wind_speed": {"period": None}} if with_speed else {})}}}
    ds.attrs["provenance"] = json.dumps(prov)
    return ds


def synthetic_point_mass(p_dry=0.4, scale=5.0, threshold=1.0) -> xr.Dataset:
    """One cell: pr with a point mass (pr <= threshold, probability p_dry) and tasmax ~ N(10, 5^2), independent.

    Continuous part: pr - threshold exponential with ``scale``, times the normal, times 1 - p_dry;
    on the point mass: p_dry times the normal density of tasmax (the layout of mvkde run outputs).
    A closed form written on a grid, not observations.
    """
    from scipy.stats import expon, norm

    pr = np.linspace(threshold, threshold + 16 * scale, 321)
    tx = np.linspace(-25.0, 45.0, 281)
    f_t = norm(10.0, 5.0).pdf(tx)
    cont = (1 - p_dry) * expon(loc=threshold, scale=scale).pdf(pr)[:, None] * f_t[None, :]
    ds = xr.Dataset(
        {"density": (("cell", "pr", "tasmax"), cont[None], {"units": "1/(mm d-1 degC)"}),
         "density_at_point_mass": (("cell", "tasmax"), (p_dry * f_t)[None], {"units": "degC-1"}),
         "point_mass_probability": (("cell",), np.array([p_dry]), {"units": "1"})},
        coords={"cell": [0], "pr": ("pr", pr, {"units": "mm d-1"}), "tasmax": ("tasmax", tx, {"units": "degC"}),
                "variable_row": ["pr", "tasmax"], "variable_column": ["pr", "tasmax"]})
    ds["bandwidth"] = (("cell", "variable_row", "variable_column"), np.eye(2)[None])
    ds = _per_cell(ds, ["cell"], 365)
    ds.attrs["provenance"] = json.dumps({"workflow": {"input": {"variables": ["pr", "tasmax"]}, "variables": {
        "pr": {"point_mass": threshold, "period": None}, "tasmax": {"point_mass": None, "period": None}}}})
    return ds
