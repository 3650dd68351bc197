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
from mvkde.inspect import layout

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
    (["--cell", "lat=60,lon=20,season=JJA,station=x"], ["the file has no dimension station",
                                                         "cell dimensions are lat, lon, season"]),
    (["--cell", "stn=3"], ["the file has no dimension stn", "lat, lon, season"]),
    (["--cell", "lat=60,lon=20,season=JJA,pr=3"], ["pr is not a cell dimension"]),
    (["--field", "n_sample"], ["not in the file", "n_samples"]),
    (["--field", "bandwidth[pr,wind]"], ["bandwidth[A,B]"]),
    (["--field", "exceedance[tasmax>99]", "--cell", "season=JJA"], ["outside the grid of tasmax"]),
    (["--field", "n_samples"], ["varies over lat, lon, season"]),
    (["--field", "density", "--cell", "season=JJA"], ["grid per cell"]),
    (["--cell", "lat=60,lon=20,season=JJA", "--size", "10x10"], ["--size 10x10", "200..8000", "10x10in"]),
    (["--cell", "lat=60,lon=20,season=JJA", "--size", "big"], ["--size 'big'", "12x9in"]),
    (["--field", "exceedance", "--cell", "season=JJA"], ["grid per cell", "choose one cell", "lat=VALUE"]),
    (["--cell", "lat=60,lon=20,season=JJA", "-o", "picture.jpg"], [".png"]),
])
def test_bad_arguments_exit_2_with_one_line(outputs, capsys, argv, needles):
    code = main(["plot", str(outputs["products"]), *argv])
    err = capsys.readouterr().err
    assert code == 2, err
    assert err.count("\n") == 1 and "Traceback" not in err, err
    for n in needles:
        assert n in err, err
    assert "--width" not in err or "--width" in argv, err      # never name an option the user did not give


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
    r = run_python("import sys, mvkde, mvkde.cli, mvkde.plot, mvkde.inspect, mvkde.pipeline.run; "
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


# ---------------------------------------------------------------------------
# fields users asked for: the bracket syntax and grid products of one cell
# ---------------------------------------------------------------------------

def test_bracket_exceedance_is_computed_even_beside_an_exceedance_product(outputs, capsys):
    ds = xr.open_dataset(outputs["products"])
    assert "exceedance" in ds.data_vars
    a, b = float(ds.pr.values[5]), float(ds.tasmax.values[15])
    da, label = field_values(ds, layout(ds), f"exceedance[pr>{a!r},tasmax>{b!r}]")
    # at a grid node the computed field equals the file's own exceedance product there
    np.testing.assert_allclose(da.values, ds["exceedance"].sel(pr=a, tasmax=b).values, atol=1e-12)
    assert np.nanmax(da.values) > 0.01
    out = outputs["tmp"] / "bracket.png"
    code = main(["plot", str(outputs["products"]), "--field", "exceedance[pr>10,tasmax>25]",
                 "--cell", "season=JJA", "-o", str(out)])
    assert code == 0, capsys.readouterr().err
    assert_picture(out, *mpimg.imread(out).shape[1::-1])


@pytest.mark.parametrize("name, dims", [("exceedance", 2), ("cdf", 2), ("marginal_pr", 1), ("density", 2)])
def test_grid_product_of_one_cell_is_drawn(outputs, name, dims):
    ds = xr.open_dataset(outputs["products"])
    cell = {"lat": "60", "lon": "21", "season": "JJA"}
    fig, res = build_figure(ds, cell=cell, field=name, size=(640, 480))
    assert res.kind == "grid" and "lat 60" in res.title
    values = ds[name].sel(lat=60.0, lon=21.0, season="JJA").values
    if dims == 2:
        fill = res.artists["fill"]
        # the filled levels are round numbers that cover the cell's values
        assert fill.levels[0] <= np.nanmin(values) and fill.levels[-1] >= np.nanmax(values)
        assert all(float(f"{lv:.3g}") == pytest.approx(lv, abs=1e-15) for lv in fill.levels)
    res = plot_output(outputs["products"], cell=cell, field=name, size=(640, 480),
                      out=outputs["tmp"] / f"grid_{name}.png")
    assert_picture(res.path, 640, 480)


def test_numeric_cell_takes_the_nearest_value_and_says_which(outputs, capsys):
    out = outputs["tmp"] / "nearest.png"
    code = main(["plot", str(outputs["grid"]), "--cell", "lat=75,lon=20.2", "--season", "JJA", "-o", str(out)])
    text = capsys.readouterr()
    assert code == 0, text.err
    assert "used the nearest lat, 61" in text.out and "used the nearest lon, 20" in text.out
    fig, res = build_figure(xr.open_dataset(outputs["grid"]), cell={"lat": "75", "lon": "20", "season": "JJA"})
    assert "lat 61" in res.title and res.notes == ["--cell lat=75: used the nearest lat, 61, outside the "
                                                   "file's lat 60..61"]


def test_size_in_pixels_or_inches():
    assert parse_size() is None                             # the picture chooses its own size
    assert parse_size("8x6in") == (800, 600)                # 100 pixels per inch
    assert parse_size("1200X900px") == (1200, 900)
    with pytest.raises(MvkdeError, match=r"--size 10x10 .*for inches write --size 10x10in") as err:
        parse_size("10x10")
    assert "--width" not in str(err.value)
    with pytest.raises(MvkdeError, match="--size 100x1in"):
        parse_size("100x1in")


# ---------------------------------------------------------------------------
# pictures fit for a report
# ---------------------------------------------------------------------------

def is_round(x):
    return float(f"{x:.2g}") == pytest.approx(x, rel=1e-9, abs=1e-15)


def test_joint_picture_has_round_colour_bar_ticks_and_units_on_the_marginals(outputs):
    ds = xr.open_dataset(outputs["grid"])
    fig, res = build_figure(ds, cell={"lat": "60", "lon": "22", "season": "SON"}, size=(800, 600))
    ticks = res.artists["colour_bar"].get_ticks()
    assert len(ticks) >= 3 and all(is_round(t) for t in ticks), ticks
    assert "[1/(mm d-1)]" in res.artists["top"].get_ylabel()
    assert "[degC-1]" in res.artists["side"].get_xlabel()


def test_axis_ranges_hold_the_density_not_the_wide_grid():
    cov = np.array([[1.0, 0.6], [0.6, 2.0]])
    ds = tiny_outputs.synthetic_normal(cov)           # the grid reaches far into empty tails
    fig, res = build_figure(ds, cell={}, size=(500, 500))
    ax = res.artists["axes"]
    (x0, x1), (y0, y1) = ax.get_xlim(), ax.get_ylim()
    hs, tp = ds["hs"].values, ds["tp"].values
    assert x1 - x0 < 0.75 * (hs[-1] - hs[0]) and y1 - y0 < 0.75 * (tp[-1] - tp[0])
    # the box drawn holds at least 99.9 % of the normal's mass: P(|X| < x1) P(|Y| < y1) as a lower
    # bound of the box probability (Bonferroni; scipy.stats.norm)
    from scipy.stats import norm

    outside = (norm.cdf(x0, scale=1.0) + norm.sf(x1, scale=1.0)
               + norm.cdf(y0, scale=np.sqrt(2.0)) + norm.sf(y1, scale=np.sqrt(2.0)))
    assert outside <= 1e-3


def test_map_fills_its_canvas(outputs):
    ds = xr.open_dataset(outputs["grid"])
    fig, res = build_figure(ds, field="grid_mass", cell={"season": "JJA"})
    fig.canvas.draw()
    box = res.artists["axes"].get_window_extent()
    width, height = fig.bbox.width, fig.bbox.height
    # the map takes most of the canvas both ways: no blank third beside it
    assert box.width / width > 0.6 and box.height / height > 0.6, (box, width, height)


def test_flags_are_a_categorical_legend_not_a_colour_bar(outputs):
    ds = xr.open_dataset(outputs["grid"])
    fig, res = build_figure(ds, field="flags", cell={"season": "JJA"})
    assert "colour_bar" not in res.artists and len(fig.axes) == 1
    names = [t.get_text() for t in res.artists["legend"].get_texts()]
    meanings = ds["flags"].attrs["flag_meanings"].split()
    masks = [int(m) for m in ds["flags"].attrs["flag_masks"]]
    present = {int(v) for v in ds["flags"].sel(season="JJA").values.ravel()}
    expected = {" + ".join(m for m, b in zip(meanings, masks) if v & b) or "no flag" for v in present}
    assert set(names) == expected and "too_few_samples" in " ".join(names)


def test_constant_field_is_stated_not_given_a_degenerate_colour_bar(outputs, tmp_path):
    ds = xr.open_dataset(outputs["grid"]).load()
    ds["n_samples"][:] = 365
    path = tmp_path / "constant.nc"
    ds.to_netcdf(path)
    res = plot_output(path, field="n_samples", cell={"season": "DJF"}, out=tmp_path / "constant.png")
    assert "constant = 365" in res.title
    assert "colour_bar" not in res.artists and "365" in res.artists["constant"].get_text()
    img = mpimg.imread(res.path)
    assert img.shape[0] > 200 and img.shape[1] > 200


def test_hdr_regions_are_labelled_in_the_picture_on_one_line_style(outputs):
    ds = xr.open_dataset(outputs["grid"])
    fig, res = build_figure(ds, cell={"lat": "60", "lon": "22", "season": "SON"}, size=(800, 600))
    ax, cs = res.artists["axes"], res.artists["contours"]
    styles = {str(s) for s in cs.get_linestyles()}
    assert len(styles) == 1, styles                                  # one line style for every level
    labels = sorted(t.get_text() for t in cs.labelTexts)
    assert set(labels) == {"50 %", "90 %", "99 %"}, labels
    assert ax.get_legend() is None and all(a.get_legend() is None for a in fig.axes)
    # one variable: each level line carries its label too
    fig, res = build_figure(xr.open_dataset(outputs["single"]), cell={"lat": "61", "lon": "20"})
    assert [t.get_text() for t in res.artists["level_texts"]] == ["50 %", "90 %", "99 %"]
