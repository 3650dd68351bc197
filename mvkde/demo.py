"""The demo: the main example workflow on the invented Aldmere basin sample data.

``mvkde demo`` runs ``workflows/basin_seasonal.toml`` end to end (joint
density of precipitation and maximum temperature per cell and season) with
the embedded local scheduler and writes ``out/basin_seasonal_density.nc``.
It ends by
writing two pictures beside the output (with the plot extra) and printing
their paths.
"""

from __future__ import annotations

import sys
from pathlib import Path

from .errors import InputError

MAIN_WORKFLOW = "basin_seasonal.toml"
CHANGE_WORKFLOW = "basin_change.toml"


def repo_dir() -> Path:
    """The source tree (the demo runs from a checkout).

    Returns
    -------
    pathlib.Path
        The checkout holding ``sample_grids/generate.py``, else the current directory.
    """
    here = Path(__file__).resolve().parent.parent
    if (here / "sample_grids" / "generate.py").exists():
        return here
    return Path.cwd()


def sample_grids_dir() -> Path:
    """The ``sample_grids`` directory of the source tree.

    Returns
    -------
    pathlib.Path
    """
    return repo_dir() / "sample_grids"


def run(out_dir="out", out=None) -> int:
    """Run the example workflow on the invented basin data and draw its pictures.

    Parameters
    ----------
    out_dir : str or path-like
        Directory of the output file.
    out : file, optional
        Where to write progress lines (default ``sys.stdout``).

    Returns
    -------
    int
        0 (problems raise :class:`~mvkde.errors.InputError`).
    """
    from .pipeline.run import run_and_write
    from .pipeline.workflow import load

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
    print(f"mvkde demo: running {path.relative_to(repo)} on the invented Aldmere basin data "
          f"({wf['input']['split_by']} densities of {', '.join(wf.variables)} per cell)", file=out)
    written = run_and_write(wf, overwrite=True, command_line=["mvkde", "demo", "--out", str(out_dir)], out=out)["path"]
    print(f"mvkde demo: open it with xarray.open_dataset({str(written)!r}); "
          f"'mvkde check {path.relative_to(repo)}' prints the plan", file=out)
    for line in pictures(written):
        print(f"mvkde demo: {line}", file=out)
    for line in change(repo, out_dir, out):
        print(f"mvkde demo: {line}", file=out)
    return 0


def change(repo: Path, out_dir, out) -> list[str]:
    """The comparison example: the warm period against the baseline, on a 3 x 3 block of cells in the
    middle of the basin (kept small so the demo stays short), and a difference picture of one cell."""
    from .errors import MvkdeError
    from .pipeline.run import run_and_write
    from .pipeline.workflow import load

    path = repo / "workflows" / CHANGE_WORKFLOW
    grids = sample_grids_dir()
    files = [str(grids / "basin_daily.nc"), str(grids / "basin_daily_warm.nc")]
    if not path.exists() or not all(Path(f).exists() for f in files):
        return [f"no comparison: {path.name} or the warm-period data is missing"]
    target = Path(out_dir) / "basin_change.nc"
    wf = load(path, [f"input.path={files!r}".replace("'", '"'), f"output.path={str(target)!r}",
                     "input.box.lat=[60.5, 61.5]", "input.box.lon=[21.0, 22.0]"])
    print(f"mvkde demo: running {path.relative_to(repo)} (warm period against the baseline, summer days, "
          "3 x 3 cells)", file=out)
    written = run_and_write(wf, overwrite=True, command_line=["mvkde", "demo"], out=out)["path"]
    try:
        from .plot import plot_output, require_matplotlib

        require_matplotlib()
        result = plot_output(written, cell={"lat": "61", "lon": "21.5"}, field="density_difference",
                             out=Path(written).with_name("basin_change_difference.png"))
        ratio = plot_output(written, field="probability_ratio",
                            out=Path(written).with_name("basin_change_probability_ratio.png"))
    except MvkdeError as exc:
        return [f"no comparison picture: {exc}"]
    return [f"picture: {result.path} (density difference warm - baseline of one cell, significant nodes outlined)",
            f"picture: {ratio.path} (probability ratio warm / baseline of P(pr > 5 mm, tasmax > 20 degC) per cell)"]


def pictures(output) -> list[str]:
    """Write the demo's pictures beside ``output``; one line per picture (or why there is none).

    A summer cell in the middle of the basin (joint density with its
    highest-density regions) and a summer map of P(tasmax > 25 degC).

    Parameters
    ----------
    output : str or path-like
        The density file written by the demo.

    Returns
    -------
    list of str
    """
    import xarray as xr

    from .errors import MvkdeError
    from .plot import plot_output, require_matplotlib

    try:
        require_matplotlib()
    except MvkdeError as exc:
        return [f"no pictures: {exc}"]
    output = Path(output)
    with xr.open_dataset(output) as ds:
        centre = {d: ds[d].values[ds.sizes[d] // 2] for d in ("lat", "lon") if d in ds.dims}
        season = "JJA" if "season" in ds.dims and "JJA" in ds["season"].values else None
        hot = 25.0 if "tasmax" in ds.dims and float(ds["tasmax"][0]) < 25.0 < float(ds["tasmax"][-1]) else None
    cell = {k: f"{float(v):g}" for k, v in centre.items()}
    if season:
        cell["season"] = season
    lines = []
    requests = [("joint density of one cell", dict(cell=cell, out=output.with_name(output.stem + "_cell.png")))]
    if hot is not None:
        requests.append(("map of P(tasmax > 25 degC)" + (" in summer" if season else ""),
                         dict(cell={"season": season} if season else {}, field=f"exceedance[tasmax>{hot:g}]",
                              out=output.with_name(output.stem + "_tasmax_above_25.png"))))
    for what, kw in requests:
        try:
            result = plot_output(output, **kw)
            lines.append(f"picture: {result.path} ({what})")
        except MvkdeError as exc:
            lines.append(f"no picture of the {what}: {exc}")
    return lines
