"""`mvkde plot`: every picture kind from a generated output, HDR levels checked numerically."""

import subprocess
import sys
from pathlib import Path

import matplotlib.image as mpimg  # a test dependency (pyproject.toml): imported plainly, never skipped
import numpy as np
import pytest
import xarray as xr

from mvkde.cli import main
from mvkde.errors import MvkdeError
from mvkde.plot import (HDR_MASSES, build_figure, field_values, hdr_levels, parse_selection, parse_size,
                        plot_output)
from mvkde.summary import layout

import tiny_outputs

REPO = Path(__file__).resolve().parent.parent


@pytest.fixture(scope="module")
def outputs(tmp_path_factory):
    return tiny_outputs.all_outputs(tmp_path_factory)


def assert_picture(path, width, height):
    """A PNG of exactly width x height pixels that is not blank (many distinct colours)."""
    img = mpimg.imread(path)
    assert img.shape[:2] == (height, width)
    colours = np.unique(np.round(img[..., :3].reshape(-1, 3) * 255).astype(np.uint8), axis=0)
    assert len(colours) > 20, f"only {len(colours)} distinct colours in {path}"


def mass_fraction_above(values, level):
    """Share of the grid's node mass where the density is at least ``level`` (uniform cells)."""
    v = np.where(np.isfinite(values), values, 0.0)
    return v[v >= level].sum() / v.sum()


# ---------------------------------------------------------------------------
# each kind writes a PNG of the requested size that is not blank
# ---------------------------------------------------------------------------

def test_joint_cell_picture_size_and_content(outputs, capsys):
    out = outputs["tmp"] / "joint.png"
    code = main(["plot", str(outputs["grid"]), "--cell", "lat=60.2,lon=21", "--season", "JJA",
                 "--size", "640x480", "-o", str(out)])
    assert code == 0, capsys.readouterr().err
    assert str(out) in capsys.readouterr().out
    assert_picture(out, 640, 480)


def test_map_of_fields_picture_size_and_content(outputs, capsys):
    for k, field in enumerate(["n_samples", "bandwidth[pr,tasmax]", "exceedance[tasmax>20]"]):
        out = outputs["tmp"] / f"map{k}.png"
        code = main(["plot", str(outputs["grid"]), "--field", field, "--cell", "season=DJF",
                     "--width", "701", "--height", "533", "-o", str(out)])
        assert code == 0, capsys.readouterr().err
        assert_picture(out, 701, 533)


def test_line_picture_for_one_variable(outputs):
    res = plot_output(outputs["single"], cell={"lat": "61", "lon": "20"}, size=(500, 400),
                      out=outputs["tmp"] / "line.png")
    assert res.kind == "line"
    assert_picture(res.path, 500, 400)


def test_points_picture_for_stations(outputs):
    res = plot_output(outputs["stations"], field="n_samples", size=(600, 450), out=outputs["tmp"] / "st.png")
    assert res.kind == "map"
    assert_picture(res.path, 600, 450)
    res = plot_output(outputs["stations"], cell={"station": "dunmoss"}, size=(600, 450),
                      out=outputs["tmp"] / "st_joint.png")
    assert res.kind == "joint"
    assert_picture(res.path, 600, 450)


@pytest.mark.parametrize("period_on", ["coordinate", "provenance"])
def test_polar_picture_for_a_direction(tmp_path, period_on):
    path = tmp_path / "wind.nc"
    tiny_outputs.synthetic_directional(period_on).to_netcdf(path)
    lay = layout(xr.open_dataset(path))
    assert lay.periods == {"wind_dir": 360.0}
    res = plot_output(path, cell={"station": "south_mast"}, size=(700, 700), out=tmp_path / "wind.png")
    assert res.kind == "polar"
    assert_picture(res.path, 700, 700)
    assert res.artists["axes"].name == "polar"


def test_polar_line_for_direction_alone(tmp_path):
    path = tmp_path / "dir.nc"
    tiny_outputs.synthetic_directional(with_speed=False).to_netcdf(path)
    res = plot_output(path, cell={"station": "north_pier"}, size=(520, 520), out=tmp_path / "dir.png")
    assert res.kind == "polar"
    assert_picture(res.path, 520, 520)


def test_default_picture_name_is_beside_the_output(outputs):
    res = plot_output(outputs["grid"], cell={"lat": "61", "lon": "20", "season": "MAM"}, size=(400, 300))
    assert res.path.parent == outputs["grid"].parent and res.path.suffix == ".png"
    assert "lat61" in res.path.name and "MAM" in res.path.name
    assert_picture(res.path, 400, 300)


# ---------------------------------------------------------------------------
# the HDR contours enclose the stated masses (levels, not pixels)
# ---------------------------------------------------------------------------

def test_hdr_levels_of_a_bivariate_normal_match_the_closed_form(tmp_path):
    # For a bivariate normal the Mahalanobis distance squared is chi-square with 2 degrees of
    # freedom, P(r^2 <= q) = 1 - exp(-q/2), so the level enclosing mass a is
    # f_a = (1 - a) / (2 pi |S|^(1/2))  [common practice; Hyndman 1996, Sec. 3].
    cov = np.array([[1.0, 0.6], [0.6, 2.0]])
    ds = tiny_outputs.synthetic_normal(cov)
    density = ds["density"].isel(station=0)
    levels = hdr_levels(density, HDR_MASSES)
    expected = (1 - np.array(HDR_MASSES)) / (2 * np.pi * np.sqrt(np.linalg.det(cov)))
    np.testing.assert_allclose(levels, expected, rtol=0.01)
    # and the picture draws exactly those levels
    fig, res = build_figure(ds, cell={}, size=(500, 500))
    np.testing.assert_allclose([res.hdr_levels[m] for m in HDR_MASSES], levels, rtol=1e-12)
    np.testing.assert_allclose(np.sort(res.artists["contours"].levels), np.sort(levels), rtol=1e-12)


def test_drawn_hdr_contours_enclose_the_stated_mass_of_a_run_cell(outputs):
    ds = xr.open_dataset(outputs["grid"])
    fig, res = build_figure(ds, cell={"lat": "60", "lon": "22", "season": "SON"}, size=(600, 500))
    cell = ds["density"].sel(lat=60.0, lon=22.0, season="SON").values
    drawn = np.sort(res.artists["contours"].levels)
    assert len(drawn) == 3
    # levels are fractions of the mass on the grid (node sums on the uniform grid): the share above
    # a level can exceed the stated mass by at most one node's share
    node_mass = np.nanmax(cell) / np.nansum(cell)
    for m in HDR_MASSES:
        level = res.hdr_levels[m]
        assert level in drawn
        share = mass_fraction_above(cell, level)
        assert m <= share <= m + node_mass + 1e-12


def test_hdr_levels_on_a_circle_count_the_repeated_node_once():
    ds = tiny_outputs.synthetic_directional(with_speed=False)
    full = ds["density"].isel(station=1)                  # nodes 0, 5, ..., 360
    open_ = full.isel(wind_dir=slice(0, -1))              # nodes 0, 5, ..., 355
    np.testing.assert_allclose(hdr_levels(full, periods={"wind_dir": 360.0}), hdr_levels(open_), rtol=1e-12)


# ---------------------------------------------------------------------------
# fields
# ---------------------------------------------------------------------------

def test_exceedance_field_matches_scipy_for_a_bivariate_normal():
    from scipy.stats import multivariate_normal

    cov = np.array([[1.0, 0.6], [0.6, 2.0]])
    ds = tiny_outputs.synthetic_normal(cov)
    lay = layout(ds)
    da, label = field_values(ds, lay, "exceedance[hs>0.5,tp>-0.7]")
    # P(X > a, Y > b) = P(-X < -a, -Y < -b), and -X has the same centred normal law (scipy.stats)
    ref = multivariate_normal(mean=[0, 0], cov=cov).cdf([-0.5, 0.7])
    assert float(da.isel(station=0)) == pytest.approx(ref, abs=2e-4)
    assert "hs > 0.5 m" in label and "tp > -0.7 s" in label


def test_point_mass_output_exceedance_and_marginal_match_the_closed_form(tmp_path):
    from scipy.stats import norm

    from mvkde.plot import cell_density

    ds = tiny_outputs.synthetic_point_mass(p_dry=0.4, scale=5.0, threshold=1.0)
    lay = layout(ds)
    assert lay.point_mass == {"pr": 1.0}
    # P(tasmax > 15) counts dry days too: the normal tail beyond one sd (scipy.stats.norm.sf)
    da, _ = field_values(ds, lay, "exceedance[tasmax>15]")
    assert float(da.isel(cell=0)) == pytest.approx(norm.sf(1.0), abs=1e-4)
    # P(pr > 5, tasmax > 15) = (1 - p) exp(-(5 - 1) / 5) * norm.sf(1): the point mass lies below 5
    da, _ = field_values(ds, lay, "exceedance[pr>5,tasmax>15]")
    assert float(da.isel(cell=0)) == pytest.approx(0.6 * np.exp(-0.8) * norm.sf(1.0), abs=1e-4)
    # the marginal of tasmax drawn for the cell includes the point-mass part: it integrates to 1
    cd = cell_density(ds, lay, {"cell": 0}, ["tasmax"])
    assert np.trapezoid(cd.values, cd.axes["tasmax"]) == pytest.approx(1.0, abs=1e-3)  # trapezoid error ~1e-4
    path = tmp_path / "pm.nc"
    ds.to_netcdf(path)
    res = plot_output(path, size=(600, 480), out=tmp_path / "pm.png")
    assert res.kind == "joint" and "P(pr <= 1) = 0.400" in res.title
    assert_picture(res.path, 600, 480)


def test_bandwidth_field_is_the_entry_of_H(outputs):
    ds = xr.open_dataset(outputs["grid"])
    da, label = field_values(ds, layout(ds), "bandwidth[tasmax,pr]")
    np.testing.assert_array_equal(da.values, ds["bandwidth"].values[..., 1, 0])
    assert "tasmax,pr" in label


# ---------------------------------------------------------------------------
# arguments and errors
# ---------------------------------------------------------------------------

def test_parse_size_and_selection():
    assert parse_size("1200x900") == (1200, 900)
    assert parse_size(width="640") == (640, 700)
    assert parse_selection(["lat=60.5, lon=21", "season=JJA"]) == {"lat": "60.5", "lon": "21", "season": "JJA"}
    for bad in [dict(size="12x"), dict(size="100x100"), dict(size="800x600", width=700), dict(width="wide")]:
        with pytest.raises(MvkdeError):
            parse_size(**bad)
    with pytest.raises(MvkdeError, match="NAME=VALUE"):
        parse_selection(["lat"])


@pytest.mark.parametrize("argv, needles", [
    (["--cell", "lat=60"], ["choose one cell", "lon=VALUE", "season=VALUE", "DJF"]),
    (["--cell", "lat=60,lon=20,season=JAS"], ["season", "'JJA'"]),
    (["--cell", "lat=75,lon=20,season=JJA"], ["outside the values of lat"]),
    (["--cell", "lat=60,lon=20,season=JJA,station=x"], ["station is not a cell dimension"]),
    (["--field", "n_sample"], ["not in the file", "n_samples"]),
    (["--field", "bandwidth[pr,wind]"], ["bandwidth[A,B]"]),
    (["--field", "exceedance[tasmax>99]", "--cell", "season=JJA"], ["outside the grid of tasmax"]),
    (["--field", "n_samples"], ["varies over lat, lon, season"]),
    (["--field", "density", "--cell", "season=JJA"], ["grid per cell"]),
    (["--cell", "lat=60,lon=20,season=JJA", "--size", "10x10"], ["--width 10"]),
    (["--cell", "lat=60,lon=20,season=JJA", "-o", "picture.jpg"], [".png"]),
])
def test_bad_arguments_exit_2_with_one_line(outputs, capsys, argv, needles):
    code = main(["plot", str(outputs["grid"]), *argv])
    err = capsys.readouterr().err
    assert code == 2, err
    assert err.count("\n") == 1 and "Traceback" not in err, err
    for n in needles:
        assert n in err, err


def test_missing_file_and_non_density_file(tmp_path, capsys):
    assert main(["plot", str(tmp_path / "nothing.nc")]) == 2
    assert "not found" in capsys.readouterr().err
    other = tmp_path / "other.nc"
    xr.Dataset({"t": ("x", np.arange(3.0))}).to_netcdf(other)
    assert main(["plot", str(other)]) == 2
    assert "no 'density' variable" in capsys.readouterr().err


def test_cell_without_density_says_why(outputs, capsys):
    assert main(["plot", str(outputs["grid"]), "--cell", "lat=61,lon=22,season=JJA"]) == 2
    assert "too_few_samples" in capsys.readouterr().err


# ---------------------------------------------------------------------------
# matplotlib is optional and imported late
# ---------------------------------------------------------------------------

def run_python(code):
    return subprocess.run([sys.executable, "-c", code], cwd=REPO, capture_output=True, text=True, timeout=120)


def test_import_mvkde_does_not_import_matplotlib():
    # the pattern of xarray's test_lazy_import: importing the package loads no optional plotting module
    r = run_python("import sys, mvkde, mvkde.cli, mvkde.plot, mvkde.summary, mvkde.gridded; "
                   "print(sorted(m for m in sys.modules if m.split('.')[0] == 'matplotlib'))")
    assert r.returncode == 0, r.stderr
    assert r.stdout.strip() == "[]"


def test_missing_matplotlib_gives_the_install_hint(tmp_path):
    # through ``python -m mvkde`` (mvkde/__main__.py) with matplotlib made unimportable
    r = run_python("import runpy, sys; sys.modules['matplotlib'] = None\n"
                   f"sys.argv = ['mvkde', 'plot', {str(tmp_path / 'x.nc')!r}]\n"
                   "runpy.run_module('mvkde', run_name='__main__')")
    assert r.returncode == 2
    assert r.stderr.count("\n") == 1 and "pip install 'mvkde[plot]'" in r.stderr, r.stderr
