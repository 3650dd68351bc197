"""Workflow labels (input.windows / input.sources), [compare] and joint return periods, end to end."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from scipy import stats

import mvkde
from mvkde.pipeline.run import run_and_write

ROOT = Path(__file__).resolve().parent.parent


def _write(tmp_path, x, start="2001-01-01", name="d.nc"):
    """(time, lat, lon, 2) values as a daily netCDF file with variables a and b."""
    t = pd.date_range(start, periods=x.shape[0], freq="D")
    ds = xr.Dataset({"a": (("time", "lat", "lon"), x[..., 0], {"units": "K"}),
                     "b": (("time", "lat", "lon"), x[..., 1], {"units": "m"})},
                    coords={"time": t, "lat": np.arange(x.shape[1], dtype=float),
                            "lon": np.arange(x.shape[2], dtype=float)})
    ds.to_netcdf(tmp_path / name)
    return tmp_path / name


def _workflow(tmp_path, body, name="w.toml"):
    path = tmp_path / name
    path.write_text(body)
    return path


def _run(path, tmp_path):
    summary = run_and_write(path, overwrite=True, out=open("/dev/null", "w"), progress_stream=open("/dev/null", "w"))
    return xr.open_dataset(summary["path"])


BASE = """
[input]
path = "{data}"
variables = ["a", "b"]
min_samples = 30
{extra}
[grid]
size = 24
limits.a = [-5.0, 6.0]
limits.b = [-5.0, 5.0]
[products]
thresholds = [[0.5, 0.5]]
{products}
[compute]
scheduler = "synchronous"
[output]
path = "{out}"
"""


def test_windows_of_different_lengths_overlap_and_a_window_with_too_few_samples(tmp_path):
    rng = np.random.default_rng(1)
    data = _write(tmp_path, rng.normal(size=(400, 1, 2, 2)))
    extra = """windows.long = ["2001-01-01", "2001-09-30"]
windows.short = ["2001-06-01", "2001-08-15"]
windows.tiny = ["2001-12-01", "2001-12-10"]
[compare]
reference = "long"
"""
    wf = _workflow(tmp_path, BASE.format(data=data, out=tmp_path / "o.nc", extra=extra, products=""))
    ds = _run(wf, tmp_path)
    n = ds["n_samples"].values[0, 0]
    # inclusive windows: Jan 1 - Sep 30 2001 is 273 days, Jun 1 - Aug 15 is 76 (overlapping: counted in both)
    assert list(ds["window"].values) == ["long", "short", "tiny"]
    assert n.tolist() == [273, 76, 10]
    flags = ds["flags"].values[0, 0]
    assert flags[2] & 1 and not flags[0] & 1  # too_few_samples flagged, not fatal
    assert np.isnan(ds["density"].values[0, 0, 2]).all()
    # the reference is dropped from the comparison outputs
    assert list(ds["window_compared"].values) == ["short", "tiny"]
    assert np.isfinite(ds["density_difference"].sel(window_compared="short").values).all()
    assert np.isnan(ds["density_difference"].sel(window_compared="tiny").values).all()
    assert str(ds["window_end"].values[1]) == "2001-08-15"


def test_reference_label_that_does_not_exist_is_one_line_exit_2(tmp_path):
    rng = np.random.default_rng(2)
    data = _write(tmp_path, rng.normal(size=(100, 1, 1, 2)))
    extra = """windows.baseline = ["2001-01-01", "2001-02-28"]
windows.recent = ["2001-03-01", "2001-04-10"]
[compare]
reference = "basline"
"""
    wf = _workflow(tmp_path, BASE.format(data=data, out=tmp_path / "o.nc", extra=extra, products=""))
    proc = subprocess.run([sys.executable, "-m", "mvkde", "run", str(wf)], capture_output=True, text=True,
                          cwd=tmp_path, env={"PYTHONPATH": str(ROOT), "PATH": "/usr/bin:/bin"})
    assert proc.returncode == 2
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1
    assert "compare.reference" in lines[0] and "baseline, recent" in lines[0]


@pytest.mark.parametrize("pair, fragment", [
    ('["2001-13-01", "2001-12-31"]', "ISO dates"),
    ('["2002-01-01", "2001-12-31"]', "is before the start"),
])
def test_bad_window_dates_are_refused(tmp_path, pair, fragment):
    from mvkde.errors import ConfigError
    from mvkde.pipeline.workflow import loads

    text = f'[input]\npath = "x.nc"\nvariables = ["a"]\nwindows.w = {pair}\n[output]\npath = "o.nc"\n'
    with pytest.raises(ConfigError, match=fragment):
        loads(text)


def test_a_source_whose_variables_differ_is_refused(tmp_path):
    from mvkde.errors import MvkdeError
    from mvkde.pipeline.workflow import load

    rng = np.random.default_rng(3)
    one = _write(tmp_path, rng.normal(size=(60, 1, 1, 2)), name="one.nc")
    two = tmp_path / "two.nc"
    xr.open_dataset(one).rename({"b": "c"}).to_netcdf(two)
    wf = _workflow(tmp_path, f'[input]\nvariables = ["a", "b"]\nsources.obs = "{one}"\nsources.model = "{two}"\n'
                             f'[output]\npath = "{tmp_path / "o.nc"}"\n')
    with pytest.raises(MvkdeError, match=r"input.sources.model .* has no variable b"):
        mvkde.pipeline.run.plan_run(load(wf))


def test_sources_give_a_source_dimension(tmp_path):
    rng = np.random.default_rng(4)
    one = _write(tmp_path, rng.normal(size=(200, 1, 2, 2)), name="one.nc")
    two = _write(tmp_path, rng.normal(size=(150, 1, 2, 2)) + 0.5, name="two.nc")
    text = BASE.format(data="", out=tmp_path / "o.nc", extra=f'sources.obs = "{one}"\nsources.model = "{two}"\n'
                                                               '[compare]\nreference = "obs"\n', products="")
    text = text.replace('path = ""\n', "", 1)
    ds = _run(_workflow(tmp_path, text), tmp_path)
    assert list(ds["source"].values) == ["obs", "model"]
    assert ds["n_samples"].values[0, 0].tolist() == [200, 150]
    assert list(ds["source_compared"].values) == ["model"]
    assert (ds["probability_ratio"].values > 1).mean() > 0.5  # the model is shifted up by 0.5 in both
    # inspect lists the labels with their inputs and the comparison settings
    from mvkde.inspect import format_summary, summarise

    s = summarise(ds, tmp_path / "o.nc")
    assert [item["name"] for item in s["labels"]["source"]] == ["obs", "model"]
    assert s["labels"]["source"][1]["path"].endswith("two.nc")
    assert s["comparison"]["reference"] == "obs" and s["comparison"]["compared"] == ["model"]
    text = format_summary(s)
    assert "sources" in text and "model against obs (dim source)" in text


def test_return_periods_are_the_files_own_numbers_and_match_the_normal_closed_form(tmp_path):
    rng = np.random.default_rng(5)
    n = 30000  # large: the smoothing bias of the tail probabilities shrinks with n (at n = 6000 it was 6 %)
    data = _write(tmp_path, rng.normal(size=(n, 1, 1, 2)))
    text = BASE.format(data=data, out=tmp_path / "o.nc", extra="",
                       products="return_periods = true").replace("size = 24", "size = 64")
    text = text.replace("thresholds = [[0.5, 0.5]]", "thresholds = [[0.5, 0.5], [1.0, 0.0]]")
    ds = _run(_workflow(tmp_path, text), tmp_path)
    lam = float(ds["observations_per_year"])
    assert lam == pytest.approx(365.2425, rel=1e-9)  # daily samples, whole span: n / (n days / 365.2425)
    ex, cdf = ds["exceedance_at_threshold"].values, ds["cdf_at_threshold"].values
    # exactly the file's own numbers
    assert np.array_equal(ds["return_period_and"].values, 1.0 / (lam * ex))
    assert np.array_equal(ds["return_period_or"].values, 1.0 / (lam * (1.0 - cdf)))
    # closed form for independent standard normals (scipy.stats.norm): P(A > a, B > b) = sf(a) sf(b),
    # F(a, b) = cdf(a) cdf(b)
    t = np.array([[0.5, 0.5], [1.0, 0.0]])
    p_and = stats.norm.sf(t[:, 0]) * stats.norm.sf(t[:, 1])
    p_or = 1.0 - stats.norm.cdf(t[:, 0]) * stats.norm.cdf(t[:, 1])
    np.testing.assert_allclose(ds["return_period_and"].values.ravel(), 1.0 / (lam * p_and), rtol=0.05)
    np.testing.assert_allclose(ds["return_period_or"].values.ravel(), 1.0 / (lam * p_or), rtol=0.05)
    assert "Salvadori" in ds["return_period_and"].attrs["reference"]


def test_return_periods_need_observations_per_year_without_dates(tmp_path):
    rng = np.random.default_rng(6)
    x = rng.normal(size=(80, 1, 1, 2))
    ds = xr.Dataset({"a": (("time", "lat", "lon"), x[..., 0]), "b": (("time", "lat", "lon"), x[..., 1])},
                    coords={"time": np.arange(80.0), "lat": [0.0], "lon": [0.0]})
    ds.to_netcdf(tmp_path / "plain.nc")
    wf = _workflow(tmp_path, BASE.format(data=tmp_path / "plain.nc", out=tmp_path / "o.nc", extra="",
                                         products="return_periods = true"))
    proc = subprocess.run([sys.executable, "-m", "mvkde", "run", str(wf)], capture_output=True, text=True,
                          cwd=tmp_path, env={"PYTHONPATH": str(ROOT), "PATH": "/usr/bin:/bin"})
    assert proc.returncode == 2 and len(proc.stderr.strip().splitlines()) == 1
    assert "products.observations_per_year" in proc.stderr


def test_null_case_share_of_flagged_cells_is_at_most_alpha_plus_monte_carlo_error(tmp_path):
    rng = np.random.default_rng(7)
    cells = 40
    # the same law in both windows (unequal lengths: 500 and 300 days)
    data = _write(tmp_path, rng.normal(size=(800, 1, cells, 2)))
    extra = """windows.first = ["2001-01-01", "2002-05-15"]
windows.second = ["2002-05-16", "2003-03-11"]
[compare]
reference = "first"
alpha = 0.05
"""
    ds = _run(_workflow(tmp_path, BASE.format(data=data, out=tmp_path / "o.nc", extra=extra, products="")),
              tmp_path)
    assert ds["n_samples"].values[0, 0].tolist() == [500, 300]
    flagged = (ds["density_change_significant"].sum(["a", "b"]) > 0).values.mean()
    # under a complete null the false discovery rate bounds P(any flag) by alpha (Benjamini & Hochberg
    # 1995); Monte Carlo error of a share of 40 cells: 2 sqrt(alpha (1 - alpha) / 40) = 0.069
    assert flagged <= 0.05 + 2 * np.sqrt(0.05 * 0.95 / cells)


def test_density_difference_of_a_cell_equals_mvkde_compare(tmp_path):
    rng = np.random.default_rng(8)
    x = rng.normal(size=(300, 1, 1, 2))
    x[150:] += 0.6
    data = _write(tmp_path, x)
    extra = """windows.before = ["2001-01-01", "2001-05-30"]
windows.after = ["2001-05-31", "2001-10-27"]
[compare]
reference = "before"
"""
    ds = _run(_workflow(tmp_path, BASE.format(data=data, out=tmp_path / "o.nc", extra=extra, products="")),
              tmp_path)
    ref = mvkde.fit(x[:150, 0, 0], names=["a", "b"])
    other = mvkde.fit(x[150:, 0, 0], names=["a", "b"])
    lib = mvkde.compare(ref, other, size=24, limits=[(-5.0, 6.0), (-5.0, 5.0)], thresholds=[[0.5, 0.5]])
    np.testing.assert_allclose(ds["common_bandwidth"].values[0, 0, 0], lib["bandwidth"].values, rtol=1e-10)
    np.testing.assert_allclose(ds["density_difference"].values[0, 0, 0], lib["density_difference"].values,
                               rtol=1e-9, atol=1e-12)
    np.testing.assert_array_equal(ds["density_change_significant"].values[0, 0, 0].astype(bool),
                                  lib["density_change_significant"].values)
    np.testing.assert_allclose(ds["probability_ratio"].values[0, 0, 0], lib["probability_ratio"].values,
                               rtol=1e-9)
