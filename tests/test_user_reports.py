"""What users hit with real inputs: each case failed before its fix.

All data here are simulated (invented stations and grids), not observations.
"""

import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr

import mvkde
from mvkde.cli import main
from mvkde.pipeline.blocks import FLAGS
from mvkde.pipeline.workflow import SCHEMA
from mvkde.products import speed_class_edges


def grid_file(path: Path, time_coord, time_attrs=None) -> Path:
    """Simulated pr and tasmax on a 2 x 2 grid, with the given time coordinate."""
    rng = np.random.default_rng(0)
    n = len(time_coord)
    ds = xr.Dataset({"pr": (("time", "lat", "lon"), rng.gamma(1.0, 3.0, (n, 2, 2)), {"units": "mm"}),
                     "tasmax": (("time", "lat", "lon"), rng.normal(15, 4, (n, 2, 2)), {"units": "degC"})},
                    coords={"time": ("time", time_coord, time_attrs or {}), "lat": [60.0, 61.0], "lon": [20.0, 21.0]})
    ds.to_netcdf(path)
    return path


def workflow(tmp_path: Path, data: Path, extra: str = "", variables='["pr", "tasmax"]', name="w.toml") -> Path:
    wf = tmp_path / name
    wf.write_text(f"""
[input]
path = "{data}"
variables = {variables}
{extra}
[grid]
size = [16, 16]
[compute]
scheduler = "synchronous"
[output]
path = "{tmp_path / 'out.nc'}"
""")
    return wf


@pytest.mark.parametrize("attrs", [{}, {"units": "fortnights since the flood", "calendar": "standard"}],
                         ids=["step-numbers", "undecodable-units"])
def test_time_coordinate_without_dates_runs(tmp_path, capsys, attrs):
    data = grid_file(tmp_path / "steps.nc", np.arange(300.0), attrs)
    wf = workflow(tmp_path, data, "[variables.pr]\nbounds = [0, inf]")
    assert main(["run", str(wf)]) == 0, capsys.readouterr().err
    capsys.readouterr()
    ds = xr.open_dataset(tmp_path / "out.nc")
    assert int(ds["n_samples"].min()) == 300
    # a selection by date on such a file: exit 2, one line naming the keys and the coordinate
    code = main(["run", str(wf), "--overwrite", "--set", 'input.seasons=["JJA"]'])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1 and "Traceback" not in err
    assert "input.seasons" in err and "'time'" in err and "steps.nc" in err


def stations(path: Path, dry_station=False, constant_station=False) -> Path:
    """Simulated daily pr and tasmax at three invented stations (ST01..ST03)."""
    rng = np.random.default_rng(1)
    rows = []
    for k in range(3):
        n = 400
        dry = rng.random(n) < 0.5
        pr = np.where(dry, 0.0, 1.0 + rng.gamma(0.9, 5.0, n))
        t = rng.normal(15 + k, 4, n)
        if dry_station and k == 1:
            pr = np.zeros(n)  # a station where it never rained
        if constant_station and k == 2:
            t = np.full(n, 12.5)  # a broken sensor: one value throughout
        rows.append(pd.DataFrame({"station": f"ST0{k + 1}", "date": pd.date_range("2001-01-01", periods=n),
                                  "pr": pr, "tasmax": t}))
    pd.concat(rows).to_csv(path, index=False)
    return path


def test_all_dry_station_gets_point_mass_one_and_no_failure(tmp_path, capsys):
    data = stations(tmp_path / "st.csv", dry_station=True)
    wf = workflow(tmp_path, data, 'group_by = "station"\n[variables.pr]\nbounds = [0, inf]\npoint_mass = 1.0\n'
                                  '[variables.tasmax]\nunits = "degC"')
    (tmp_path / "w.toml").write_text((tmp_path / "w.toml").read_text() + "\n[grid.limits]\npr = [1.0, 60.0]\n"
                                     "tasmax = [-5.0, 35.0]\n")
    assert main(["run", str(wf)]) == 0, capsys.readouterr().err
    ds = xr.open_dataset(tmp_path / "out.nc")
    dry = ds.sel(station="ST02")
    assert int(dry["flags"]) & FLAGS["fit_failed"] == 0
    assert float(dry["point_mass_probability"]) == 1.0
    assert float(np.nanmax(dry["density"])) == 0.0                       # no continuous part
    # tasmax on dry days integrates to 1 (the whole probability sits on the point mass)
    assert float(dry["density_at_point_mass"].integrate("tasmax")) == pytest.approx(1.0, abs=5e-3)
    assert float(dry["grid_mass"]) == pytest.approx(1.0, abs=5e-3)


def test_all_dry_sample_in_the_library():
    x = np.column_stack([np.zeros(200), np.random.default_rng(2).normal(size=200)])
    est = mvkde.fit(x, bounds=[(0, None), None], point_masses=[0.5, None])
    assert est.point_mass_probability == 1.0
    assert float(est.grid(8, limits=[(0.5, 10), (-3, 3)]).max()) == 0.0
    assert float(est.point_mass_grid(256, limits=[(-6, 6)]).integrate("x1")) == pytest.approx(1.0, abs=1e-3)
    # products of an all-dry estimate: everything lives on the point mass (x1's own sample summarised)
    np.testing.assert_allclose(est.exceedance([[-1.0, 0.0], [1.0, 0.0]]), [(x[:, 1] > 0).mean(), 0.0], atol=0.03)
    assert est.quantiles("x0", [0.5])[0] == 0.0
    assert est.quantiles("x1", [0.5])[0] == pytest.approx(np.median(x[:, 1]), abs=0.1)


def test_failed_cells_are_named_by_their_labels_and_the_reason_is_stored(tmp_path, capsys):
    data = stations(tmp_path / "st.csv", constant_station=True)
    wf = workflow(tmp_path, data, 'group_by = "station"\n[variables.pr]\nbounds = [0, inf]')
    assert main(["run", str(wf)]) == 0
    out = capsys.readouterr().out
    assert "e.g. station=ST03:" in out and "cell 2" not in out
    ds = xr.open_dataset(tmp_path / "out.nc")
    reasons = ds["failure_reason"]
    assert reasons.sel(station="ST03").item() != "" and reasons.sel(station="ST01").item() == ""
    assert main(["inspect", str(tmp_path / "out.nc")]) == 0
    report = capsys.readouterr().out
    assert "cells refused: " + reasons.sel(station="ST03").item() in report


def test_one_default_boundary_everywhere():
    x = np.random.default_rng(3).gamma(2.0, 1.0, (500, 1))
    est = mvkde.fit(x, bounds=[(0, None)])
    assert est.boundary == "linear" and "linear boundary kernel" in est.attrs["boundary_choice"]
    assert SCHEMA["estimator"]["boundary"].default == "linear"
    assert mvkde.fit.__kwdefaults__["bandwidth"] == "plugin" == SCHEMA["estimator"]["bandwidth"].default


def test_rain_with_dry_days_and_wind_direction():
    """The README's first pair: dry days (a point mass) together with a circular direction."""
    rng = np.random.default_rng(4)
    n = 1500
    dry = rng.random(n) < 0.4
    pr = np.where(dry, 0.0, 1.0 + rng.gamma(0.8, 5.0, n))
    direction = np.mod(rng.vonmises(np.deg2rad(225), 3.0, n) * 180 / np.pi, 360)
    est = mvkde.fit(np.column_stack([pr, direction]), names=["pr", "wind_dir"], bounds=[(0, None), None],
                    periods=[None, 360.0], point_masses=[1.0, None])
    assert est.point_mass_probability == pytest.approx(dry.mean(), abs=1e-12)
    cont = est.grid([80, 73], limits=[(1.0, 80.0), (0.0, 360.0)]).integrate(["pr", "wind_dir"])
    on_mass = est.point_mass_grid(73, limits=[(0.0, 360.0)]).integrate("wind_dir")
    assert float(cont) + float(on_mass) == pytest.approx(1.0, abs=5e-3)


def test_coarse_grid_is_told_apart_from_mass_outside(tmp_path, capsys):
    rng = np.random.default_rng(5)
    n = 1000
    pr = np.where(rng.random(n) < 0.5, 0.0, rng.gamma(0.6, 2.0, n))
    frame = pd.DataFrame({"pr": pr, "tasmax": rng.normal(15, 4, n)})
    frame.to_csv(tmp_path / "one.csv", index=False)
    wf = workflow(tmp_path, tmp_path / "one.csv", "[variables.pr]\nbounds = [0, inf]\npoint_mass = 0.0\n"
                                                  "[grid.limits]\npr = [0.0, 60.0]")
    text = (tmp_path / "w.toml").read_text().replace("size = [16, 16]", "size = [40, 40]")
    (tmp_path / "w.toml").write_text(text)
    assert main(["check", str(wf)]) == 0
    assert "node spacing" in capsys.readouterr().out
    assert main(["run", str(wf)]) == 0
    flags = int(xr.open_dataset(tmp_path / "out.nc")["flags"])
    assert flags & FLAGS["grid_too_coarse_for_the_bandwidth"]


def test_quantiles_and_marginal_of_a_point_mass_estimate():
    rng = np.random.default_rng(6)
    n = 3000
    dry = rng.random(n) < 0.4
    pr = np.where(dry, 0.0, 1.0 + rng.gamma(0.8, 5.0, n))
    t = rng.normal(15, 4, n)
    est = mvkde.fit(pd.DataFrame({"pr": pr, "tasmax": t}), bounds=[(0, None), None], point_masses=[1.0, None])
    m = est.marginal(["tasmax"])
    assert float(m.grid(512).integrate("tasmax")) == pytest.approx(1.0, abs=1e-4)
    # quantiles against the sample's own (common practice: an estimate summarises its sample)
    np.testing.assert_allclose(est.quantiles("tasmax", [0.1, 0.5, 0.9]), np.quantile(t, [0.1, 0.5, 0.9]), atol=0.3)
    q = est.quantiles("pr", [0.2, 0.9])
    assert q[0] == 0.0  # inside the point mass: the bound
    assert q[1] == pytest.approx(np.quantile(pr, 0.9), rel=0.05)


def test_wind_rose_speed_classes_follow_one_rule():
    rng = np.random.default_rng(7)
    df = pd.DataFrame({"speed": rng.gamma(3.0, 2.0, 400), "direction": rng.uniform(0, 360, 400)})
    est = mvkde.fit(df, bounds=[(0, None), None], periods=[None, 360.0], bandwidth="normal")
    table = est.sector_table("direction", "speed", 8)
    lo, hi = est.default_limits()[0]
    np.testing.assert_allclose(table["speed_lower"].values, speed_class_edges(lo, hi)[:-1])
    np.testing.assert_allclose(table["speed_upper"].values, speed_class_edges(lo, hi)[1:])


def test_plugin_on_two_peaks_is_not_oversmoothed():
    """The default selector on a two-peak direction sample follows the peaks (Oliveira et al. 2012)."""
    rng = np.random.default_rng(8)
    theta = np.where(rng.random(2000) < 0.5, rng.vonmises(0.0, 30.0, 2000), rng.vonmises(np.pi, 30.0, 2000))
    est = mvkde.fit(np.mod(theta, 2 * np.pi) * 180 / np.pi, periods=[360.0])
    assert est.concentrations["x0"] > 20  # a one-peak rule picks about 5 here


def test_version_is_quick_to_import():
    # the console script's --version loads no numerical stack (start-up of well under a second)
    code = "import sys, mvkde.cli; mvkde.cli.main(['--version']); print(sorted(m for m in ('numpy', 'xarray') if m in sys.modules))"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=False)
    assert out.stdout.strip().endswith("[]"), out.stdout + out.stderr


def test_boundary_fallback_is_recorded_for_the_provenance():
    """Where the linear boundary kernel cannot apply, the batch says which method was used and why."""
    rng = np.random.default_rng(9)
    cells = [np.column_stack([rng.gamma(2, 1, 300), rng.gamma(2, 1, 300)]) for _ in range(2)]
    cells = [np.column_stack([c[:, 0], c[:, 1] + 0.5 * c[:, 0]]) for c in cells]  # correlated: a full H couples them
    batch = mvkde.fit_cells(cells, axes=[np.linspace(0, 12, 16)] * 2, bounds=[(0, None), (0, None)],
                            bandwidth="normal")
    assert "boundary of 2 cell(s): linear boundary kernel not applicable" in batch.path and "'reflect'" in batch.path
