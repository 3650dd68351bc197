"""The demo: the main example workflow on the invented Aldmere basin sample data.

``mvkde demo`` runs ``workflows/basin_seasonal.toml`` end to end (joint
density of precipitation and maximum temperature per cell and season) with
the embedded local scheduler and writes ``out/basin_seasonal_density.nc``.
Where this installation of the library lacks an option the workflow asks
for, the demo says so and uses the closest available one.
"""

from __future__ import annotations

import inspect
import sys
from pathlib import Path

from .errors import InputError

MAIN_WORKFLOW = "basin_seasonal.toml"


def repo_dir() -> Path:
    """The source tree (the demo runs from a checkout)."""
    here = Path(__file__).resolve().parent.parent
    if (here / "sample_grids" / "generate.py").exists():
        return here
    return Path.cwd()


def sample_grids_dir() -> Path:
    return repo_dir() / "sample_grids"


def _fallbacks(wf) -> list[str]:
    """Replace options this installation lacks; return a note per replacement."""
    from . import fit
    from .workflow import _library_choices

    lib = _library_choices()
    notes = []
    est = wf.spec["estimator"]
    if est["bandwidth"] not in lib["bandwidth"]:
        notes.append(f"bandwidth selector {est['bandwidth']!r} is not in this installation: using 'normal'")
        est["bandwidth"] = "normal"
    if est["boundary"] not in lib["boundary"]:
        notes.append(f"boundary method {est['boundary']!r} is not in this installation: using 'none' "
                     "(mass leaks across the bound; see the grid_mass variable)")
        est["boundary"] = "none"
    if "point_masses" not in inspect.signature(fit).parameters:
        for name, table in wf.spec["variables"].items():
            if table["point_mass"] is not None:
                notes.append(f"point masses are not in this installation: {name} <= {table['point_mass']:g} "
                             "is treated as part of the continuous density")
                table["point_mass"] = None
                lim = wf.spec["grid"]["limits"].get(name)
                if lim is not None and table["bounds"]:
                    lim[0] = table["bounds"][0]
    return notes


def run(out_dir="out", out=None) -> int:
    from .gridded import run_and_write
    from .workflow import load

    out = out if out is not None else sys.stdout
    repo = repo_dir()
    path = repo / "workflows" / MAIN_WORKFLOW
    data = sample_grids_dir() / "basin_daily.nc"
    if not path.exists():
        raise InputError(f"example workflow {path} not found: run the demo from a checkout of mvkde")
    if not data.exists():
        raise InputError(f"sample data {data} not found: run 'python sample_grids/generate.py'")
    target = Path(out_dir) / "basin_seasonal_density.nc"
    wf = load(path, [f"input.path={str(data)!r}", f"output.path={str(target)!r}"])
    for note in _fallbacks(wf):
        print(f"mvkde demo: note: {note}", file=out)
    print(f"mvkde demo: running {path.relative_to(repo)} on the invented Aldmere basin data "
          f"({wf['input']['split_by']} densities of {', '.join(wf.variables)} per cell)", file=out)
    written = run_and_write(wf, overwrite=True, command_line=["mvkde", "demo", "--out", str(out_dir)], out=out)["path"]
    print(f"mvkde demo: open it with xarray.open_dataset({str(written)!r}); "
          f"'mvkde check {path.relative_to(repo)}' prints the plan", file=out)
    return 0
