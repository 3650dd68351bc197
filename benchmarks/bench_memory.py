"""An input larger than memory: peak resident memory of a run over a large netCDF file.

The archive is generated here: 10-minute near-surface air temperature and
dew point (two float32 variables, degC) on LAT x LON cells for as many
steps as make the file about ``MVKDE_BENCH_MEMORY_GB`` gigabytes (default
6), written uncompressed and chunked the way archives usually are: one
chunk per year of steps over all cells, so that every block of cells has
to read across every chunk.  The run is the command line (``python -m mvkde.cli run``) in
a child process, with the embedded threads scheduler on 2 workers, limits
from the data (a first pass over the whole file), max_samples = 2000 per
cell, the normal-scale bandwidth and a 32 x 32 grid.  Its peak resident set
size is read from the kernel (``os.wait4`` rusage ``ru_maxrss`` of that
child) and must stay under 3 GB (the target of the reliability issue).

    python benchmarks/bench_memory.py --out /tmp/memory.md  # 6 GB, alone (make bench puts the figure in results.md)
    MVKDE_BENCH_MEMORY_GB=0.5 python benchmarks/bench_memory.py --keep /tmp/archive
    python benchmarks/run.py --only memory --smoke         # a 5 MB file, checks the case runs

Generating 6 GB takes a few minutes and needs twice that in free disk space
(the archive plus page cache headroom); the folder is a temporary one
unless ``--keep`` names one (the archive is then reused if it is there).
"""

from __future__ import annotations

import argparse
import datetime as _dt
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from harness import Row, case, machine

HERE = Path(__file__).resolve().parent
REPO = HERE.parent
LAT, LON = 20, 25
STEPS_PER_DAY = 144                  # 10-minute data
STEPS_PER_YEAR = 365 * STEPS_PER_DAY
RSS_TARGET = 3 * 10**9          # bytes (the target: under 3 GB)
SMOKE_GB = 0.002                 # with 4 x 5 cells: 12,500 steps per cell


def steps_for(gigabytes: float, lat: int = LAT, lon: int = LON) -> int:
    """Time steps of two float32 variables on lat x lon cells that make ``gigabytes`` of data."""
    return max(96, int(gigabytes * 1e9 / (lat * lon * 2 * 4)))


def write_archive(path: Path, steps: int, lat: int = LAT, lon: int = LON, seed: int = 11) -> Path:
    """Write the archive slab by slab (one year of steps at a time): memory stays small."""
    import netCDF4

    rng = np.random.default_rng(seed)
    lats = 55.0 + 0.1 * np.arange(lat)
    lons = 5.0 + 0.1 * np.arange(lon)
    base = 8.0 - 0.3 * (lats[:, None] - 55.0) + 0.05 * (lons[None, :] - 5.0)   # degC, smooth in space
    chunk_t = min(steps, STEPS_PER_YEAR)
    tmp = path.with_name(path.name + ".writing")
    with netCDF4.Dataset(tmp, "w", format="NETCDF4") as nc:
        nc.createDimension("time", steps)
        nc.createDimension("lat", lat)
        nc.createDimension("lon", lon)
        t = nc.createVariable("time", "f8", ("time",))
        t.units = "minutes since 1990-01-01 00:00:00"
        t.calendar = "standard"
        t[:] = 10.0 * np.arange(steps, dtype=float)
        nc.createVariable("lat", "f8", ("lat",))[:] = lats
        nc["lat"].units = "degrees_north"
        nc.createVariable("lon", "f8", ("lon",))[:] = lons
        nc["lon"].units = "degrees_east"
        tas = nc.createVariable("tas", "f4", ("time", "lat", "lon"), chunksizes=(chunk_t, lat, lon))
        tas.units = "degC"
        tas.long_name = "near-surface air temperature"
        tdps = nc.createVariable("tdps", "f4", ("time", "lat", "lon"), chunksizes=(chunk_t, lat, lon))
        tdps.units = "degC"
        tdps.long_name = "near-surface dew point temperature"
        for start in range(0, steps, chunk_t):
            stop = min(steps, start + chunk_t)
            k = np.arange(start, stop, dtype=float)[:, None, None]
            season = 9.0 * np.sin(2 * np.pi * (k / STEPS_PER_YEAR - 0.3))
            daily = 3.0 * np.sin(2 * np.pi * (k % STEPS_PER_DAY / STEPS_PER_DAY - 0.375))
            x = (base + season + daily + 2.5 * rng.standard_normal((stop - start, lat, lon))).astype("f4")
            tas[start:stop] = x
            tdps[start:stop] = (0.6 * x - 1.0 + 2.5 * rng.standard_normal(x.shape)).astype("f4")
    os.replace(tmp, path)
    return path


def write_workflow(folder: Path, data: Path, out: Path) -> Path:
    text = f"""
[input]
path = "{data}"
variables = ["tas", "tdps"]
max_samples = 2000

[estimator]
bandwidth = "normal"

[grid]
size = 32

[compute]
scheduler = "threads"
workers = 2

[output]
path = "{out}"
overwrite = true
"""
    p = folder / "memory.toml"
    p.write_text(text)
    return p


def run_measured(workflow: Path) -> dict:
    """Run the CLI in a child process; its wall time and peak RSS (bytes) from os.wait4."""
    env = dict(os.environ, PYTHONPATH=str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    t0 = time.perf_counter()
    proc = subprocess.Popen([sys.executable, "-m", "mvkde.cli", "run", str(workflow)], cwd=REPO, env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    # read the pipes on threads so the child never blocks on a full pipe before wait4
    import threading

    captured = {"out": "", "err": ""}

    def drain(name, stream):
        captured[name] = stream.read()

    readers = [threading.Thread(target=drain, args=("out", proc.stdout)),
               threading.Thread(target=drain, args=("err", proc.stderr))]
    for r in readers:
        r.start()
    _, status, usage = os.wait4(proc.pid, 0)
    proc.returncode = os.waitstatus_to_exitcode(status)
    for r in readers:
        r.join()
    seconds = time.perf_counter() - t0
    if proc.returncode != 0:
        raise RuntimeError(f"mvkde run failed ({proc.returncode}): {captured['err'][-2000:]}")
    return {"seconds": seconds, "peak_rss": usage.ru_maxrss * 1024, "stdout": captured["out"]}


def study(gigabytes: float, folder: Path, lat: int = LAT, lon: int = LON) -> dict:
    import xarray as xr

    data = folder / f"archive_{gigabytes:g}GB.nc"
    steps = steps_for(gigabytes, lat, lon)
    t0 = time.perf_counter()
    if not data.exists():
        write_archive(data, steps, lat, lon)
    t_gen = time.perf_counter() - t0
    out = folder / "density.nc"
    res = run_measured(write_workflow(folder, data, out))
    with xr.open_dataset(out) as ds:
        mass = ds["grid_mass"].values
        n = ds["n_samples"].values
        res.update(cells=int(ds.sizes["lat"] * ds.sizes["lon"]), blocks_note=res["stdout"].splitlines()[0],
                   mass_min=float(np.nanmin(mass)), mass_max=float(np.nanmax(mass)), n_samples=int(n.max()))
    res.update(file_bytes=data.stat().st_size, steps=steps, shape=f"{lat} x {lon}", generate_seconds=t_gen)
    return res


def record(res: dict, path: Path) -> None:
    lines = [
        "# Memory: an input larger than the memory a run may use",
        "",
        f"Machine: {machine()}. Run: {_dt.datetime.now(_dt.timezone.utc):%Y-%m-%d %H:%M} UTC.",
        "Command: `python benchmarks/bench_memory.py` (size: `MVKDE_BENCH_MEMORY_GB`, default 6).",
        "",
        f"- input: {res['file_bytes'] / 1e9:.2f} GB netCDF (uncompressed float32), {res['shape']} = "
        f"{res['cells']} cells x {res['steps']:,} 10-minute samples x 2 variables, chunked one year of "
        "steps over all cells",
        "- run: `python -m mvkde.cli run` (threads scheduler, 2 workers, limits from the data, "
        "max_samples = 2000, normal-scale H, 32 x 32 grid)",
        f"- peak resident set size of the run: **{res['peak_rss'] / 1e9:.2f} GB** "
        f"(target < {RSS_TARGET / 1e9:.0f} GB; `os.wait4` ru_maxrss of the child process)",
        f"- wall time of the run: {res['seconds']:.0f} s (generation of the file: {res['generate_seconds']:.0f} s)",
        f"- output check: grid mass per cell in [{res['mass_min']:.4f}, {res['mass_max']:.4f}], "
        f"n_samples = {res['n_samples']} (the subsample)",
        f"- summary line: `{res['blocks_note']}`",
        "",
        "Why it stays small: a single input file is opened without dask, so the selection is lazy indexing",
        "and each block's chunk is one hyperslab read of its own cells over all steps (no rechunking of",
        "year-chunks in memory); \"auto\" blocks hold at most 128 MiB of samples (float64); the output",
        "grids are the only thing held for the whole run.",
        "",
    ]
    path.write_text("\n".join(lines))


@case("memory")
def memory_case(smoke: bool):
    gb = SMOKE_GB if smoke else float(os.environ.get("MVKDE_BENCH_MEMORY_GB", 6))
    with tempfile.TemporaryDirectory(dir=os.environ.get("MVKDE_BENCH_MEMORY_DIR")) as tmp:
        res = study(gb, Path(tmp), *((4, 5) if smoke else (LAT, LON)))
    # the figure's one home is results.md (this row); memory.md explains it without repeating it
    return [Row(f"{res['file_bytes'] / 1e9:.3g} GB netCDF, {res['cells']} cells x {res['steps']:,} steps, CLI run",
                res["seconds"], target="peak RSS < 3 GB", met=res["peak_rss"] < 3e9,
                notes=f"peak RSS {res['peak_rss'] / 1e9:.2f} GB; input size / peak RSS = "
                      f"{res['file_bytes'] / res['peak_rss']:.2f}")]


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--gb", type=float, default=float(os.environ.get("MVKDE_BENCH_MEMORY_GB", 6)))
    ap.add_argument("--keep", default=None, help="folder to keep (and reuse) the archive in")
    ap.add_argument("--out", default="/tmp/mvkde-memory.md")
    args = ap.parse_args(argv)
    if args.keep:
        folder = Path(args.keep)
        folder.mkdir(parents=True, exist_ok=True)
        res = study(args.gb, folder)
    else:
        with tempfile.TemporaryDirectory() as tmp:
            res = study(args.gb, Path(tmp))
    record(res, Path(args.out))
    print(Path(args.out).read_text())
    return 0 if res["peak_rss"] < RSS_TARGET else 1


if __name__ == "__main__":
    sys.exit(main())
