"""`mvkde inspect`: a readable summary of an output file, and JSON that keeps the provenance exactly."""

import hashlib
import json
from pathlib import Path

import numpy as np
import pytest
import xarray as xr

from mvkde.cli import main
from mvkde.pipeline.blocks import FLAGS

import tiny_outputs


@pytest.fixture(scope="module")
def outputs(tmp_path_factory):
    return tiny_outputs.all_outputs(tmp_path_factory)


def inspect_json(path, capsys):
    assert main(["inspect", str(path), "--json"]) == 0
    return json.loads(capsys.readouterr().out)


@pytest.mark.parametrize("which", ["grid", "stations"])
def test_json_round_trips_the_provenance_exactly(outputs, capsys, which):
    path = outputs[which]
    with xr.open_dataset(path) as ds:
        stored = json.loads(ds.attrs["provenance"])
    summary = inspect_json(path, capsys)
    assert summary["provenance"] == stored
    # and re-serialising gives back the stored text's content key for key, in the same order
    assert list(summary["provenance"]) == list(stored)
    assert json.dumps(summary["provenance"]) == json.dumps(stored)


def test_json_reports_what_the_file_holds(outputs, capsys):
    path = outputs["grid"]
    s = inspect_json(path, capsys)
    ds = xr.open_dataset(path)
    assert s["cell_dims"] == ["lat", "lon", "season"] and s["n_cells"] == 2 * 3 * 4
    assert s["cells"]["season"]["values"] == ["DJF", "MAM", "JJA", "SON"]
    assert [v["name"] for v in s["variables"]] == ["pr", "tasmax"]
    assert [v["units"] for v in s["variables"]] == ["mm d-1", "degC"]
    assert s["variables"][1]["limits"] == [-25.0, 40.0] and s["variables"][1]["grid_size"] == 36
    assert s["estimator"]["kernel"] == "gaussian" and s["estimator"]["bandwidth"] == "normal"
    assert s["estimator"]["boundary"] == ds.attrs["boundary"]
    # bandwidth ranges over cells, straight from the bandwidth variable
    H = ds["bandwidth"].values
    sd = np.sqrt(H[..., 1, 1])
    r = s["bandwidth"]["kernel_sd"]["tasmax"]
    assert r["min"] == pytest.approx(np.nanmin(sd)) and r["max"] == pytest.approx(np.nanmax(sd))
    assert r["cells"] == int(np.isfinite(sd).sum()) == 24 - 4   # the too-few cell has no H in any season
    e = s["bandwidth"]["entries"]["pr,tasmax"]
    assert e["median"] == pytest.approx(np.nanmedian(H[..., 0, 1]))
    # flagged cells decoded from the CF flag_masks / flag_meanings
    flags = ds["flags"].values.astype(int)
    too_few = int(((flags & FLAGS["too_few_samples"]) != 0).sum())
    assert too_few == 4
    assert s["flags"]["counts"]["too_few_samples"] == too_few
    assert s["flags"]["flagged_cells"] == int((flags != 0).sum())
    assert any(ex["cell"]["lat"] == 61.0 and ex["cell"]["lon"] == 22.0 and "too_few_samples" in ex["flags"]
               for ex in s["flags"]["examples"])
    assert any("4 of 24 cells have no density" in w for w in s["warnings"])
    assert any(w.startswith("4 cells flagged too_few_samples") for w in s["warnings"])


def test_text_report_is_readable_and_complete(outputs, capsys):
    path = outputs["grid"]
    assert main(["inspect", str(path)]) == 0
    text = capsys.readouterr().out
    ds = xr.open_dataset(path)
    prov = json.loads(ds.attrs["provenance"])
    data = Path(prov["inputs"][0]["path"])
    for needle in [
        "cells        24: lat 2 (60, 61) x lon 3 (20, 21, 22) x season 4 (DJF, MAM, JJA, SON)",
        "pr [mm d-1]", "tasmax [degC]", "kernel gaussian (product)", "bandwidth selector normal",
        f"boundary {ds.attrs['boundary']}", "sqrt(H[tasmax,tasmax]) min", "too_few_samples 4",
        "e.g. lat=61, lon=22, season=DJF: too_few_samples",
        hashlib.sha256(data.read_bytes()).hexdigest(),                      # the input's checksum
        f"numpy {np.__version__}", prov["created_utc"], "caution",
    ]:
        assert needle in text, needle
    assert "Traceback" not in text and "{" not in text.split("provenance")[1].split("caution")[0]


def test_circular_variable_and_missing_provenance(tmp_path, capsys):
    ds = tiny_outputs.synthetic_directional(period_on="coordinate")
    del ds.attrs["provenance"]
    path = tmp_path / "wind.nc"
    ds.to_netcdf(path)
    s = inspect_json(path, capsys)
    assert s["provenance"] is None
    assert s["variables"][0]["period"] == 360.0
    assert "the file has no provenance attribute" in s["warnings"]
    assert main(["inspect", str(path)]) == 0
    text = capsys.readouterr().out
    assert "circular with period 360" in text and "(none recorded)" in text


def test_bad_files_exit_2_with_one_line(tmp_path, capsys):
    for path, needle in [(tmp_path / "absent.nc", "not found"), (tmp_path, "is a folder")]:
        assert main(["inspect", str(path)]) == 2
        err = capsys.readouterr().err
        assert err.count("\n") == 1 and needle in err, err
    other = tmp_path / "other.nc"
    xr.Dataset({"t": ("x", np.arange(3.0))}).to_netcdf(other)
    assert main(["inspect", str(other)]) == 2
    assert "no 'density' variable" in capsys.readouterr().err
    junk = tmp_path / "junk.nc"
    junk.write_text("not netCDF")
    assert main(["inspect", str(junk)]) == 2
    assert "cannot open" in capsys.readouterr().err


def test_estimate_summary_says_n_counts_the_part_above_the_point_mass():
    # simulated daily rain: 850 of 1461 rows at or below 1 mm (dry), 611 above
    import mvkde

    rng = np.random.default_rng(3)
    pr = np.concatenate([rng.uniform(0.0, 1.0, 850), 1.0 + rng.exponential(5.0, 611)])
    tas = rng.normal(10.0, 5.0, pr.size)
    est = mvkde.fit(np.column_stack([pr, tas]), bounds=[(0, None), None], point_masses=[1.0, None],
                    bandwidth="normal")
    text = repr(est)
    assert "n=611 above the point mass x0 <= 1 (1,461 rows, 850 at the point mass)" in text, text
    plain = mvkde.fit(tas[:, None], bandwidth="normal")
    assert "n=1461," in repr(plain)


def test_text_report_columns_stay_apart_for_long_variable_names(outputs, capsys, tmp_path):
    ds = xr.open_dataset(outputs["grid"]).load()
    ds["point_mass_probability_of_a_long_name"] = ds["n_samples"] * 0.0
    path = tmp_path / "long.nc"
    ds.to_netcdf(path)
    assert main(["inspect", str(path)]) == 0
    out = capsys.readouterr().out
    rows = out.split("  data variables\n", 1)[1].splitlines()
    starts = {row.index("(") for row in rows}
    assert len(starts) == 1, rows                       # the dims column starts at one place
    for row in rows:
        name = row.split()[0]
        assert row.startswith(f"    {name}  "), row     # and at least two spaces after every name
