"""`mvkde run` and `mvkde check` as a user meets them: exit codes, one-line errors, the plan."""

import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import xarray as xr

from mvkde.cli import main

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO / "sample_grids"))
import generate  # noqa: E402


@pytest.fixture(scope="module")
def small_grid(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("cli")
    path = tmp / "small.nc"
    # the simulated Aldmere basin (sample_grids/generate.py): simulated, not observations
    generate.make_grid(1, seed=3, lat=np.array([60.0, 61.0]), lon=np.array([20.0, 21.0])).to_netcdf(path)
    return path


def workflow(tmp_path, data, extra="", out=None, name="w.toml"):
    out = out or tmp_path / "out.nc"
    text = f"""
[input]
path = "{data}"
variables = ["tasmax"]
{extra}
[estimator]
bandwidth = "normal"
[grid]
size = 32
[output]
path = "{out}"
"""
    p = tmp_path / name
    p.write_text(text)
    return str(p)


def one_line_error(capsys, code, *needles):
    err = capsys.readouterr().err
    assert code == 2, err
    assert err.count("\n") == 1 and "Traceback" not in err, err
    for n in needles:
        assert n in err, err
    return err


def test_bad_key_exit_2_names_file_and_key(tmp_path, small_grid, capsys):
    wf = workflow(tmp_path, small_grid, extra="[compute]\nschedular = \"threads\"\n")
    one_line_error(capsys, main(["run", wf]), wf, "compute.schedular", "scheduler")


def test_bad_value_exit_2(tmp_path, small_grid, capsys):
    wf = workflow(tmp_path, small_grid)
    one_line_error(capsys, main(["check", wf, "--set", "estimator.kernel=epanechnikof"]),
                   "estimator.kernel", "'epanechnikof'", "epanechnikov", "set on the command line")


def test_missing_input_exit_2(tmp_path, capsys):
    wf = workflow(tmp_path, tmp_path / "nowhere.nc")
    one_line_error(capsys, main(["run", wf]), "nowhere.nc", "not found")


def test_unknown_variable_exit_2(tmp_path, small_grid, capsys):
    wf = workflow(tmp_path, small_grid)
    Path(wf).write_text(Path(wf).read_text().replace('["tasmax"]', '["tasmax", "huss"]'))
    one_line_error(capsys, main(["check", wf]), "huss", "pr, tasmax")


def test_missing_workflow_exit_2(tmp_path, capsys):
    one_line_error(capsys, main(["run", str(tmp_path / "nope.toml")]), "nope.toml", "not found")


def test_run_refuses_to_overwrite_then_overwrites(tmp_path, small_grid, capsys):
    wf = workflow(tmp_path, small_grid)
    assert main(["run", wf]) == 0
    out = capsys.readouterr().out
    assert "wrote" in out and "caution" in out     # the run summary repeats the caution
    one_line_error(capsys, main(["run", wf]), "exists", "--overwrite")
    assert main(["run", wf, "--overwrite"]) == 0


def test_set_overrides_output_and_selection(tmp_path, small_grid):
    wf = workflow(tmp_path, small_grid)
    other = tmp_path / "summer.nc"
    assert main(["run", wf, "--set", f"output.path={str(other)!r}", "--set", "input.seasons=['JJA']",
                 "--set", "input.box.lon=[20.5, 21.5]"]) == 0
    ds = xr.open_dataset(other)
    assert list(ds["lon"].values) == [21.0]
    assert int(ds["n_samples"].max()) == 92  # June-August days of the one year


def test_check_prints_the_plan(tmp_path, small_grid, capsys):
    wf = workflow(tmp_path, small_grid, extra="split_by = \"month\"")
    assert main(["check", wf]) == 0
    out = capsys.readouterr().out
    for word in ("cells       4", "x 12 months", "samples", "grid        32 nodes", "memory", "per task",
                 "output", "block"):
        assert word in out, out
    assert not (tmp_path / "out.nc").exists()


def test_console_entry_point_runs_check(tmp_path, small_grid):
    wf = workflow(tmp_path, small_grid)
    proc = subprocess.run([sys.executable, "-m", "mvkde.cli", "check", wf], capture_output=True, text=True,
                          cwd=REPO)
    assert proc.returncode == 0, proc.stderr
    assert "valid" in proc.stdout


def test_progress_lines_when_not_a_terminal(tmp_path, small_grid, capsys):
    wf = workflow(tmp_path, small_grid, extra="", out=tmp_path / "p.nc")
    assert main(["run", wf, "--set", "compute.block_size=1"]) == 0
    err = capsys.readouterr().err
    assert "4/4 blocks done (100 %)" in err and "\r" not in err
