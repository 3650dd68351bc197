"""Runs killed with SIGKILL, the resumable mode, and a dask worker lost mid-run.

The runs are real ``python -m mvkde.cli run`` processes (through a small
launcher that can slow each block down and hold the process after the
temporary output is written, so the kill lands at a known moment); the
dask cluster is a real ``dask scheduler`` and two ``dask worker`` processes
on 127.0.0.1.
"""

import os
import queue
import re
import signal
import socket
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from mvkde.cli import main

REPO = Path(__file__).resolve().parent.parent
DASK = Path(sys.executable).parent / "dask"
TIMEOUT = 90  # seconds: upper bound on any wait in this module

# Runs the CLI; DELAY slows every block (so a kill lands mid-run), HOLD_AFTER_WRITE keeps the
# process alive after the temporary output is complete and before the rename.
LAUNCHER = r"""
import os, sys, time
import xarray as xr
import mvkde.pipeline.schedule as g
delay = float(os.environ.get("MVKDE_TEST_DELAY", "0"))
inner = g.process_block
def slow_block(*args, **kwargs):
    time.sleep(delay)
    return inner(*args, **kwargs)
g.process_block = slow_block
if os.environ.get("MVKDE_TEST_HOLD_AFTER_WRITE"):
    # the netCDF writer behind write_netcdf_atomic (xarray's to_netcdf, or its netCDF4 store directly)
    import mvkde.pipeline.output as o
    write = o._to_netcdf
    def held(*args, **kwargs):
        out = write(*args, **kwargs)
        print("TEMPORARY OUTPUT COMPLETE", file=sys.stderr, flush=True)
        time.sleep(600)
        return out
    o._to_netcdf = held
from mvkde.cli import main
sys.exit(main(sys.argv[1:]))
"""


def env(**extra):
    return dict(os.environ, PYTHONPATH=str(REPO), **{k: str(v) for k, v in extra.items()})


class Running:
    """A child process whose stderr lines are collected on a thread."""

    def __init__(self, args, cwd, **extra_env):
        self.proc = subprocess.Popen(args, cwd=cwd, env=env(**extra_env), stdout=subprocess.DEVNULL,
                                     stderr=subprocess.PIPE, text=True)
        self.lines: "queue.Queue[str]" = queue.Queue()
        self.seen: list[str] = []
        threading.Thread(target=self._read, daemon=True).start()

    def _read(self):
        for line in self.proc.stderr:
            self.lines.put(line)

    def wait_for(self, pattern: str, timeout=TIMEOUT) -> str:
        deadline = time.monotonic() + timeout
        rx = re.compile(pattern)
        while time.monotonic() < deadline:
            try:
                line = self.lines.get(timeout=0.2)
            except queue.Empty:
                if self.proc.poll() is not None and self.lines.empty():
                    break
                continue
            self.seen.append(line)
            if rx.search(line):
                return line
        raise AssertionError(f"no line matching {pattern!r} (exit {self.proc.poll()}); saw: {self.seen[-5:]}")

    def kill(self):
        if self.proc.poll() is None:
            os.kill(self.proc.pid, signal.SIGKILL)
        self.proc.wait(timeout=TIMEOUT)
        self.proc.stderr.close()


def cli(args, cwd, **extra_env) -> Running:
    return Running([sys.executable, "-c", LAUNCHER, *args], cwd, **extra_env)


@pytest.fixture(scope="module")
def archive(tmp_path_factory):
    """6 x 5 cells x 120 days of two correlated variables (simulated, not observations)."""
    tmp = tmp_path_factory.mktemp("interrupt")
    rng = np.random.default_rng(21)
    shape = (120, 6, 5)
    a = 10 + 3 * rng.standard_normal(shape)
    b = 0.5 * a + 2 * rng.standard_normal(shape)
    ds = xr.Dataset({"tasmax": (("time", "lat", "lon"), a.astype("f4"), {"units": "degC"}),
                     "tasmin": (("time", "lat", "lon"), b.astype("f4"), {"units": "degC"})},
                    coords={"time": pd.date_range("2001-01-01", periods=120), "lat": np.arange(6.0),
                            "lon": np.arange(5.0)})
    ds.to_netcdf(tmp / "archive.nc")
    return tmp / "archive.nc"


def write_workflow(folder: Path, data: Path, out: Path, extra_output="", scheduler="threads", workers=1,
                   extra_input="") -> Path:
    text = f"""
[input]
path = "{data}"
variables = ["tasmax", "tasmin"]
{extra_input}
[estimator]
bandwidth = "normal"
[grid]
size = 24
[compute]
scheduler = "{scheduler}"
workers = {workers}
block_size = 1
[output]
path = "{out}"
{extra_output}
"""
    p = folder / f"w_{out.stem}.toml"
    p.write_text(text)
    return p


def partials(out: Path) -> list[Path]:
    return sorted(out.parent.glob(f".{out.name}.*.partial"))


def same_data(a: xr.Dataset, b: xr.Dataset) -> None:
    assert set(a.data_vars) == set(b.data_vars)
    for name in a.data_vars:
        assert a[name].dtype == b[name].dtype, name
        np.testing.assert_array_equal(a[name].values, b[name].values, err_msg=name)
    for name in a.coords:
        np.testing.assert_array_equal(a[name].values, b[name].values, err_msg=name)


@pytest.fixture(scope="module")
def clean_run(archive, tmp_path_factory):
    folder = tmp_path_factory.mktemp("clean")
    out = folder / "clean.nc"
    assert main(["run", str(write_workflow(folder, archive, out))]) == 0
    return xr.open_dataset(out).load()


def test_sigkill_while_computing_and_after_writing_leaves_no_output(archive, clean_run, tmp_path):
    out = tmp_path / "density.nc"
    wf = write_workflow(tmp_path, archive, out)
    # 1. killed while the blocks are being computed
    run = cli(["run", str(wf)], tmp_path, MVKDE_TEST_DELAY=0.1)
    run.wait_for(r"blocks done")
    run.kill()
    assert not out.exists() and not partials(out)
    # 2. killed when the temporary file is complete but not yet renamed: the worst moment
    run = cli(["run", str(wf)], tmp_path, MVKDE_TEST_HOLD_AFTER_WRITE=1)
    run.wait_for("TEMPORARY OUTPUT COMPLETE")
    left = partials(out)
    assert [p.name for p in left] == [f".{out.name}.{run.proc.pid}.partial"]
    run.kill()
    assert not out.exists()
    # a partial whose process is alive (a concurrent run) is never touched
    alive = out.with_name(f".{out.name}.1.partial")  # PID 1 always runs
    alive.write_text("in progress")
    # 3. the rerun removes the dead run's temporary file and completes
    assert main(["run", str(wf)]) == 0
    assert out.exists() and partials(out) == [alive]
    alive.unlink()
    same_data(xr.open_dataset(out).load(), clean_run)


def test_resume_skips_finished_blocks_and_matches_a_clean_run(archive, clean_run, tmp_path, capsys):
    out = tmp_path / "resumed.nc"
    wf = write_workflow(tmp_path, archive, out, extra_output="resume = true")
    store = out.with_name(out.name + ".resume")
    run = cli(["run", str(wf)], tmp_path, MVKDE_TEST_DELAY=0.15)
    run.wait_for(r"blocks done \((3|4|5|6)\d %\)")
    run.kill()
    assert not out.exists()
    done = len(list((store / "done").glob("*.json")))
    assert 0 < done < 30, done
    assert main(["run", str(wf)]) == 0
    said = capsys.readouterr().out
    m = re.search(r"30 blocks, (\d+) of them resumed", said)
    assert m and int(m.group(1)) >= done, said
    same_data(xr.open_dataset(out).load(), clean_run)
    assert not store.exists()  # removed once the output is complete


def test_resume_store_of_another_run_is_replaced(archive, clean_run, tmp_path, capsys, monkeypatch):
    """A store whose fingerprint differs (another grid) is not reused: blocks are recomputed."""
    import mvkde.pipeline.schedule as gridded

    out = tmp_path / "r.nc"
    wf = write_workflow(tmp_path, archive, out, extra_output="resume = true")
    calls = []
    inner = gridded.process_block

    def failing(*args, **kwargs):
        calls.append(1)
        if len(calls) == 8:
            raise KeyboardInterrupt  # an interruption after 7 blocks
        return inner(*args, **kwargs)

    monkeypatch.setattr(gridded, "process_block", failing)
    assert main(["run", str(wf), "--set", "compute.scheduler=synchronous", "--set", "grid.size=20"]) == 130
    store = out.with_name(out.name + ".resume")
    assert len(list((store / "done").glob("*.json"))) == 7
    monkeypatch.setattr(gridded, "process_block", inner)
    capsys.readouterr()
    assert main(["run", str(wf)]) == 0  # grid.size 24: a different run
    captured = capsys.readouterr()
    assert "starting over" in captured.err and "resumed" not in captured.out
    same_data(xr.open_dataset(out).load(), clean_run)


# ---------------------------------------------------------------------------
# worker loss on a real dask.distributed cluster
# ---------------------------------------------------------------------------

def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.fixture
def cluster(tmp_path):
    """`dask scheduler` + two `dask worker` processes (no nanny: killing one really loses it)."""
    port = free_port()
    address = f"tcp://127.0.0.1:{port}"
    procs, logs = {}, []

    def start(name, args):
        logs.append(open(tmp_path / f"{name}.log", "w"))
        procs[name] = subprocess.Popen([str(DASK), *args], cwd=tmp_path, env=env(), stdout=logs[-1],
                                       stderr=subprocess.STDOUT)

    try:
        start("scheduler", ["scheduler", "--host", "127.0.0.1", "--port", str(port), "--no-dashboard"])
        deadline = time.monotonic() + TIMEOUT
        while True:
            try:
                socket.create_connection(("127.0.0.1", port), timeout=1).close()
                break
            except OSError:
                if time.monotonic() > deadline or procs["scheduler"].poll() is not None:
                    raise AssertionError((tmp_path / "scheduler.log").read_text())
                time.sleep(0.2)
        for name in ("worker-a", "worker-b"):
            start(name, ["worker", address, "--nthreads", "1", "--no-nanny", "--no-dashboard",
                         "--name", name, "--host", "127.0.0.1"])
        from distributed import Client

        with Client(address, timeout="30s") as client:
            client.wait_for_workers(2, timeout=TIMEOUT)
        yield address, procs
    finally:
        for name in ("worker-a", "worker-b", "scheduler"):
            p = procs.get(name)
            if p is not None and p.poll() is None:
                p.kill()
            if p is not None:
                p.wait(timeout=TIMEOUT)
        for log in logs:
            log.close()


def test_worker_killed_mid_run_does_not_fail_the_run(archive, clean_run, cluster, tmp_path):
    address, procs = cluster
    out = tmp_path / "cluster.nc"
    wf = write_workflow(tmp_path, archive, out, scheduler=address)
    run = cli(["run", str(wf)], tmp_path, MVKDE_TEST_DELAY=0.15)
    run.wait_for(r"blocks done")
    procs["worker-a"].kill()  # SIGKILL: its running and finished-but-unfetched tasks are lost
    procs["worker-a"].wait(timeout=TIMEOUT)
    run.proc.wait(timeout=TIMEOUT)
    time.sleep(0.5)  # let the reader thread take the last lines
    err = "".join(run.seen) + "".join(iter_queue(run.lines))
    run.proc.stderr.close()
    assert run.proc.returncode == 0, err
    assert "30/30 blocks done" in err
    log = (tmp_path / "scheduler.log").read_text()
    assert re.search(r"Remove worker .*name: worker-a", log), log[-2000:]  # it was lost during the run
    # dask re-ran the lost worker's tasks on the survivor: the output equals a clean run's
    same_data(xr.open_dataset(out).load(), clean_run)


def iter_queue(q):
    while True:
        try:
            yield q.get_nowait()
        except queue.Empty:
            return
