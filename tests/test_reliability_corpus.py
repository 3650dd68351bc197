"""The bad-input corpus (tests/bad_inputs/): exit status 2 and one precise line, never a traceback.

Also: an unexpected internal error gives exit status 1, a short message and
the path of a log holding the traceback.

    PYTHONPATH=. python tests/test_reliability_corpus.py   # the message of every case (README table)
"""

import os
import re
import subprocess
import sys
import tomllib
from pathlib import Path

import pytest

from mvkde.cli import main

REPO = Path(__file__).resolve().parent.parent
CORPUS = Path(__file__).resolve().parent / "bad_inputs"
CASES = tomllib.loads((CORPUS / "cases.toml").read_text())["case"]


PROGRESS = re.compile(r"^mvkde run: \d+/\d+ blocks done .*$")


def error_lines(err: str) -> list[str]:
    """stderr without the progress lines of blocks finished before the error."""
    return [line for line in err.splitlines() if not PROGRESS.match(line)]


def run_case(case, folder: Path, capsys=None):
    """Run one case from ``folder`` (its setup made there); return (code, stderr)."""
    setup = case.get("setup", {})
    for name in setup.get("files", []):
        (folder / name).write_text("placeholder\n")
    for name in setup.get("folders", []):
        (folder / name).mkdir()
    workflow = CORPUS / case.get("workflow", case["name"] + ".toml")
    old = os.getcwd()
    os.chdir(folder)
    try:
        code = main(["run", str(workflow), *case.get("args", [])])
    finally:
        os.chdir(old)
    err = capsys.readouterr().err if capsys is not None else ""
    return code, err


def test_corpus_is_large_enough_and_every_workflow_has_a_case():
    named = {c.get("workflow", c["name"] + ".toml") for c in CASES}
    on_disk = {p.name for p in CORPUS.glob("*.toml") if p.name != "cases.toml"}
    # every workflow file has a case, and every case but the missing-file one has its file
    assert named - on_disk == {"no_such_workflow.toml"}, named - on_disk
    assert on_disk <= named, f"workflow files without a case: {on_disk - named}"
    assert len(CASES) == len(on_disk) + 1
    assert len({c["name"] for c in CASES}) == len(CASES)
    # the README's message table lists exactly the cases (it is printed by this file's __main__)
    rows = [line for line in (CORPUS / "README.md").read_text().splitlines()
            if line.startswith("| ") and not line.startswith("| case")]
    assert sorted(line.split("|")[1].strip() for line in rows) == sorted(c["name"] for c in CASES)


@pytest.mark.parametrize("case", CASES, ids=[c["name"] for c in CASES])
def test_bad_input_exits_2_with_one_precise_line(case, tmp_path, capsys):
    setup = case.get("setup", {})
    code, err = run_case(case, tmp_path, capsys)
    assert code == case["code"], err
    lines = error_lines(err)
    assert len(lines) == 1 and err.endswith("\n"), f"not exactly one error line: {err!r}"
    assert "Traceback" not in err and "internal error" not in err, err
    assert lines[0].startswith("mvkde run: error: "), err
    for fragment in case["fragments"]:
        assert fragment in lines[0], f"{fragment!r} missing from: {err}"
    # nothing was written: no output, no temporary file, no store
    assert {p.name for p in tmp_path.iterdir()} == set(setup.get("files", []) + setup.get("folders", []))


@pytest.mark.parametrize("name", ["variable_not_in_file", "malformed_toml"])
def test_bad_input_through_the_real_command(name, tmp_path):
    """The console path (python -m mvkde.cli) gives the same status and a single line."""
    case = next(c for c in CASES if c["name"] == name)
    env = dict(os.environ, PYTHONPATH=str(REPO))
    proc = subprocess.run([sys.executable, "-m", "mvkde.cli", "run", str(CORPUS / f"{name}.toml")],
                          cwd=tmp_path, env=env, capture_output=True, text=True, timeout=120)
    assert proc.returncode == 2, proc.stderr
    assert proc.stderr.count("\n") == 1 and "Traceback" not in proc.stderr
    assert all(f in proc.stderr for f in case["fragments"]), proc.stderr


def test_internal_error_exit_1_short_message_and_log(tmp_path, capsys, monkeypatch):
    """A bug (here: the dataset builder raising) is exit 1 with the traceback in a log, not on screen."""
    import mvkde.pipeline.run as run_module

    def broken(*args, **kwargs):
        raise ZeroDivisionError("simulated bug in the runner")

    monkeypatch.setattr(run_module, "build_dataset", broken)
    monkeypatch.chdir(tmp_path)
    code = main(["run", str(CORPUS / "output_exists.toml")])  # valid but for a missing setup: runs
    err = capsys.readouterr().err
    assert code == 1, err
    assert len(error_lines(err)) == 1 and "Traceback" not in err
    assert "internal error" in err and "ZeroDivisionError" in err
    log = Path(err.rsplit("traceback in ", 1)[1].strip())
    assert log.is_file()
    text = log.read_text()
    assert "Traceback" in text and "simulated bug in the runner" in text and "build_dataset" not in err
    assert not (tmp_path / "out.nc").exists()
    log.unlink()


def test_resume_without_zarr_is_a_clear_error(tmp_path, capsys, monkeypatch):
    """The resumable mode's optional dependency, missing: exit 2 naming the key and the extra."""
    monkeypatch.setitem(sys.modules, "zarr", None)  # import zarr -> ImportError
    monkeypatch.chdir(tmp_path)
    code = main(["run", str(CORPUS / "output_exists.toml"), "--set", "output.resume=true"])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1, err
    assert "output.resume" in err and "mvkde[zarr]" in err


def test_one_all_nan_cell_is_flagged_not_fatal(tmp_path):
    """One bad cell must not stop a nightly run: the cell gets NaN and a flag, the others a density."""
    import numpy as np
    import xarray as xr

    from mvkde.pipeline.blocks import FLAGS

    ds = xr.open_dataset(CORPUS / "data" / "grid.nc").load()
    ds["tasmax"][:, 1, 0] = np.nan
    ds.to_netcdf(tmp_path / "one_bad.nc")
    text = (CORPUS / "output_exists.toml").read_text().replace("data/grid.nc", str(tmp_path / "one_bad.nc"))
    (tmp_path / "w.toml").write_text(text.replace('"out.nc"', f'"{tmp_path / "out.nc"}"'))
    assert main(["run", str(tmp_path / "w.toml")]) == 0
    out = xr.open_dataset(tmp_path / "out.nc")
    flags = out["flags"].values
    assert flags[1, 0] & FLAGS["too_few_samples"] and np.isnan(out["density"][1, 0]).all()
    assert (flags[[0, 0, 1], [0, 1, 1]] == 0).all()
    assert np.isfinite(out["density"][0, 0]).all()


if __name__ == "__main__":  # the table of messages for tests/bad_inputs/README.md
    import contextlib
    import io
    import tempfile

    print("| case | exit | message (stderr) |\n|---|---|---|")
    for case in CASES:
        with tempfile.TemporaryDirectory() as tmp:
            buf = io.StringIO()
            with contextlib.redirect_stderr(buf), contextlib.redirect_stdout(io.StringIO()):
                code, _ = run_case(case, Path(tmp))
        msg = " / ".join(error_lines(buf.getvalue())).replace(str(CORPUS) + "/", "").replace("|", "\\|")
        print(f"| {case['name']} | {code} | {msg} |")
