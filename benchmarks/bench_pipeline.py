"""The workflow runner at archive scale, side by side with a per-cell scipy loop.

Case: 50 x 50 cells x 3,650 days x 2 variables (daily maximum and minimum
temperature from the Aldmere law, sample_grids/generate.py), a 64 x 64 grid,
a bandwidth matrix chosen per cell by the plug-in selector; the archive is one
compressed netCDF4 file chunked as whole time series over 10 x 10 tiles of
cells (read lazily by the runner, one hyperslab per block).  Reference: a
per-cell loop of scipy.stats.gaussian_kde evaluated on the same 64 x 64 grid,
timed on a few cells and scaled to all of them (its cost does not depend on
which bandwidth it uses).  Then the speed-up from one to two local-cluster
workers on the same cells.

    python benchmarks/run.py --only pipeline
    MVKDE_BENCH_PIPELINE_SIDE=8 python benchmarks/run.py --only pipeline   # 8 x 8 cells only

The selector is a parameter (``SELECTOR``); where this installation lacks
"plugin" the case falls back to "normal" and says so in the notes.
"""

from __future__ import annotations

import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from harness import Row, case

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent / "sample_grids"))

SELECTOR = "plugin"
SIDE = 50
DAYS = 3650
GRID = 64
REFERENCE_CELLS = 6


def _selector(wanted: str) -> tuple[str, str]:
    from mvkde.bandwidth import SELECTORS

    if wanted in SELECTORS:
        return wanted, ""
    return "normal", f"selector {wanted!r} not in this installation: used 'normal'; "


def _write_archive(folder: Path, side: int, days: int) -> Path:
    import pandas as pd
    import xarray as xr

    import generate

    rng = np.random.default_rng(2024)
    lat = 60.0 + 0.05 * np.arange(side)
    lon = 20.0 + 0.05 * np.arange(side)
    dates = pd.date_range("2001-01-01", periods=days, freq="D")
    _, tasmax = generate.simulate(dates, generate.elevation(lat, lon), rng)
    tasmin = tasmax - 8.0 + 4.0 * rng.standard_normal(tasmax.shape)
    ds = xr.Dataset({"tasmax": (("time", "lat", "lon"), tasmax.astype("float32"), {"units": "degC"}),
                     "tasmin": (("time", "lat", "lon"), tasmin.astype("float32"), {"units": "degC"})},
                    coords={"time": dates, "lat": lat, "lon": lon})
    path = folder / "archive.nc"
    # stored as archives meant for per-cell work are: compressed, chunked as whole
    # time series over small tiles of cells
    enc = {v: {"zlib": True, "complevel": 1, "chunksizes": (days, min(side, 10), min(side, 10))}
           for v in ("tasmax", "tasmin")}
    ds.to_netcdf(path, encoding=enc)
    return path


def _workflow(folder: Path, data: Path, selector: str, scheduler: str, workers: int) -> Path:
    text = f"""
[input]
path = "{data}"
variables = ["tasmax", "tasmin"]
[estimator]
bandwidth = "{selector}"
[grid]
size = {GRID}
limits.tasmax = [-40.0, 50.0]
limits.tasmin = [-50.0, 45.0]
[compute]
scheduler = "{scheduler}"
workers = {workers}
[output]
path = "{folder / f'out_{scheduler}_{workers}.nc'}"
overwrite = true
"""
    p = folder / f"w_{scheduler}_{workers}.toml"
    p.write_text(text)
    return p


def _run(wf: Path) -> float:
    import io

    from mvkde.pipeline.run import run_and_write

    sink = io.StringIO()
    # compute time of the run (reading, fitting, evaluating); cluster start-up excluded
    return run_and_write(str(wf), out=sink, progress_stream=sink)["seconds"]


def _scipy_loop(data: Path, cells: int) -> float:
    import xarray as xr
    from scipy import stats

    ds = xr.open_dataset(data)
    gx, gy = np.meshgrid(np.linspace(-40, 50, GRID), np.linspace(-50, 45, GRID), indexing="ij")
    pts = np.vstack([gx.ravel(), gy.ravel()])
    t0 = time.perf_counter()
    for k in range(cells):
        i, j = divmod(k, ds.sizes["lon"])
        x = np.vstack([ds.tasmax[:, i, j].values, ds.tasmin[:, i, j].values]).astype(float)
        stats.gaussian_kde(x)(pts)
    return time.perf_counter() - t0


@case("pipeline")
def pipeline_throughput(smoke: bool):
    side = 4 if smoke else int(os.environ.get("MVKDE_BENCH_PIPELINE_SIDE", SIDE))
    days = 365 if smoke else DAYS
    selector, note = _selector(SELECTOR)
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        data = _write_archive(folder, side, days)
        cells = side * side
        t_run = _run(_workflow(folder, data, selector, "threads", 2))
        k = min(cells, 2 if smoke else REFERENCE_CELLS)
        t_ref = _scipy_loop(data, k) * cells / k
        scale = (SIDE * SIDE) / cells
        rows.append(Row(
            f"{side}x{side} cells x {days} days x 2 vars, {GRID}x{GRID} grid, {selector} H, threads x2",
            t_run, f"scipy.stats.gaussian_kde per cell (timed on {k} cells, scaled)", t_ref,
            target=">= 200x", notes=note + f"{cells / t_run:.1f} cells/s"
            + (f"; a full 50x50 run would take about {t_run * scale:.0f} s at this rate" if scale != 1 else "")))
        t1 = _run(_workflow(folder, data, selector, "local-cluster", 1))
        t2 = _run(_workflow(folder, data, selector, "local-cluster", 2))
        rows.append(Row(f"same cells, local-cluster 2 workers vs 1", t2, "same pipeline, 1 worker", t1,
                        target="speed-up >= 1.7x", notes=note + f"{cells / t1:.1f} -> {cells / t2:.1f} cells/s"))
    return rows
