"""Scheduling: the dask scheduler a workflow names, progress lines, and running the blocks.

:class:`Scheduler` opens dask's embedded threads or processes scheduler, a
local dask.distributed cluster or a connection to a running scheduler;
:func:`execute` makes one delayed :func:`~mvkde.pipeline.blocks.process_block`
per block, runs them, saves each finished block to the resume store when
there is one, and gathers the block results into arrays over the cells.
"""

from __future__ import annotations

import logging

import numpy as np

from ..errors import ConfigError, MvkdeError
from ..progress import Progress
from .blocks import BlockResult, CellSettings, process_block
from .inputs import Plan


#: times a block whose task failed on a dask.distributed cluster (not with an MvkdeError) is submitted again
RETRIES = 2


def _worker_environ() -> dict:
    """Environment of local-cluster worker processes (set before they start).

    dask.distributed's default sets MALLOC_TRIM_THRESHOLD_=65536, which also
    fixes glibc's mmap threshold at 128 kB: every array above that is then
    mapped and unmapped afresh, page faults included, and a block of cells
    allocates thousands of such temporaries (the workers ran 1.3-3 x slower
    than the same code in the main process).  Here arrays up to 32 MB come
    from the heap and up to 256 MB of freed heap is kept for reuse; BLAS and
    OpenMP stay at one thread per single-threaded worker, as in dask's default.
    Variables already set in the environment win (dask.distributed's rule).
    """
    import dask

    env = dict(dask.config.get("distributed.nanny.pre-spawn-environ", {}) or {})
    env.update({"MALLOC_TRIM_THRESHOLD_": 256 * 2**20, "MALLOC_MMAP_THRESHOLD_": 32 * 2**20,
                "OMP_NUM_THREADS": 1, "MKL_NUM_THREADS": 1, "OPENBLAS_NUM_THREADS": 1})
    return env


class Scheduler:
    """The dask scheduler named by ``compute.scheduler``; a context manager.

    "threads", "processes" and "synchronous" use dask's embedded local
    schedulers; "local-cluster" starts a dask.distributed LocalCluster with
    ``compute.workers`` single-threaded worker processes; an address
    ("tcp://HOST:PORT") connects to a running dask.distributed scheduler.
    """

    def __init__(self, compute: dict):
        self.name = compute["scheduler"]
        self.workers = compute["workers"]
        self.memory_limit = compute["memory_limit"]
        self.client = None
        self.cluster = None

    def __enter__(self):
        if self.name == "processes" and self.workers == 1:
            # one worker process would only add pickling: the blocks run in this process
            self.name = "synchronous"
            self.single_process = True
        if self.name in ("threads", "processes", "synchronous"):
            self._limit_blas_threads()
        if self.name == "processes":
            self._start_processes()
        if self.name in ("threads", "processes", "synchronous"):
            return self
        try:
            from distributed import Client, LocalCluster
        except ImportError:  # pragma: no cover - distributed is a runtime dependency
            raise ConfigError("compute.scheduler needs dask.distributed: pip install distributed") from None
        if self.name == "local-cluster":
            import os

            import dask

            n = self.workers or os.cpu_count() or 1
            with dask.config.set({"distributed.nanny.pre-spawn-environ": _worker_environ()}):
                self.cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True,
                                            memory_limit=self.memory_limit, dashboard_address=None,
                                            silence_logs=logging.ERROR)
            self.client = Client(self.cluster)
            # each worker loads the compiled binning loops now, as part of starting the cluster
            # (about 0.8 s a process), not inside the first block it computes
            from ..cells import warm_up

            self.client.run(warm_up)
        else:
            try:
                self.client = Client(self.name, timeout="20s")
            except (OSError, TimeoutError, ValueError) as exc:
                raise ConfigError(f"compute.scheduler = {self.name!r}: cannot connect to a dask scheduler "
                                  f"there ({exc}); start one (dask scheduler) or use \"local-cluster\"") from None
        return self

    def _start_processes(self) -> None:
        """Worker processes forked from this one (on Linux; spawned elsewhere).

        A forked worker starts with everything this process has imported and
        compiled (the binning loops are loaded here first, :func:`mvkde.cells.warm_up`),
        so it costs milliseconds; a spawned one imports mvkde, xarray and dask
        afresh (about 1 s each, measured: 400 cells took 4.9 s on 2 spawned
        processes against 2.2 s on 2 threads).  Threads do not scale here: about
        two thirds of a block's time is numpy and Python work that holds the GIL
        (measured: 2 threads ran no faster than 1).  Restored on exit.
        """
        import sys

        import dask

        from ..cells import warm_up

        # fork only on Linux: macOS's system libraries are not safe to use after a fork
        # (Python itself defaults to spawn there)
        method = "fork" if sys.platform.startswith("linux") else "spawn"
        if method == "fork":
            warm_up()
        self._context = dask.config.set({"multiprocessing.context": method})

    def _limit_blas_threads(self) -> None:
        """One BLAS/OpenMP thread per task on the embedded schedulers (restored on exit).

        Each worker (thread or forked process) already keeps a core busy; the
        BLAS calls of a block are small matrix products that a BLAS thread pool
        only slows down.  Measured on 2 cores, 4 blocks of 100 bounded cells in
        2 forked processes: 1.50 x the one-process speed with BLAS's default
        threads (the products ran 7 x slower, four BLAS threads spinning on two
        cores), 1.87 x with one BLAS thread each.  The one-worker run is limited
        too, so that "one worker" means one core.  numpy's and scipy's BLAS are
        loaded first so that the limit reaches both; forked workers inherit it.
        """
        import numpy.linalg  # noqa: F401
        import scipy.linalg  # noqa: F401
        from threadpoolctl import threadpool_limits

        self._blas_limits = threadpool_limits(limits=1)

    def __exit__(self, *exc):
        context = getattr(self, "_context", None)
        if context is not None:
            context.__exit__(None, None, None)
            self._context = None
        limits = getattr(self, "_blas_limits", None)
        if limits is not None:
            limits.restore_original_limits()
            self._blas_limits = None
        if self.client is not None:
            self.client.close()
        if self.cluster is not None:
            self.cluster.close()
        return False

    def describe(self) -> str:
        """The scheduler's name and worker count, for the log.

        Returns
        -------
        str
        """
        if self.client is not None:
            n = len(self.client.scheduler_info().get("workers", {}))
            return f"{self.name} ({n} workers)"
        if getattr(self, "single_process", False):
            return "processes (1 worker: in this process)"
        return f"{self.name} ({self.workers or 'all'} workers)" if self.name != "synchronous" else self.name

    def compute(self, *collections):
        """Compute dask collections on this scheduler (the run's reductions over the input).

        On the processes scheduler and on a local cluster they run on threads in
        this process instead (the files are on this machine): a pass over the
        input is decompression and numpy reductions, which release the GIL, and
        in worker processes every chunk would travel back through a pipe
        (measured on the 2,500-cell benchmark archive: 1.3 s in 2 processes and
        1.5-1.9 s on a local cluster, against 0.37 s in one thread).  A remote
        cluster computes them where the data are.

        Parameters
        ----------
        *collections : dask collections

        Returns
        -------
        list or tuple
            The computed results, in order (a list from a distributed client).
        """
        import dask

        if self.client is not None and self.name != "local-cluster":
            return self.client.compute(list(collections), sync=True)
        if self.name in ("processes", "local-cluster"):
            from dask.base import named_schedulers

            kw = {"scheduler": named_schedulers["threads"]}
            if self.workers:
                kw["num_workers"] = self.workers
            return dask.compute(*collections, **kw)
        return dask.compute(*collections, **self._local_kwargs())

    def _local_kwargs(self) -> dict:
        """``dask.compute`` keywords of an embedded scheduler: its get function, and the worker count.

        The get function itself, not its name: given a name, dask imports
        dask.distributed (about 0.3 s) to look for a running client, and then
        uses the same embedded scheduler anyway.
        """
        from dask.base import named_schedulers

        kw = {"scheduler": named_schedulers.get(self.name, self.name)}
        if self.workers and self.name != "synchronous":
            kw["num_workers"] = self.workers
        return kw

    def run_blocks(self, tasks: list, on_result) -> None:
        """Compute delayed ``tasks``; call ``on_result(index, result)`` as each one finishes.

        Parameters
        ----------
        tasks : list of dask.delayed.Delayed
        on_result : callable
            Called with the task's index in ``tasks`` and its result.
        """
        import dask
        from dask.callbacks import Callback

        if self.client is not None:
            from distributed import as_completed

            futures = self.client.compute(tasks)
            index = {f.key: i for i, f in enumerate(futures)}
            retries = dict.fromkeys(index, 0)
            pending = as_completed(futures)
            for fut in pending:
                try:
                    result = fut.result()
                except MvkdeError:
                    raise
                except Exception:
                    # a block whose inputs were lost with a worker (distributed can then report a missing
                    # key): block results are deterministic, so the block is submitted again, twice at most
                    if retries[fut.key] >= RETRIES:
                        raise
                    retries[fut.key] += 1
                    pending.add(self.client.compute(tasks[index[fut.key]]))
                    continue
                on_result(index[fut.key], result)
                fut.release()
            return
        keys = {t.key: i for i, t in enumerate(tasks)}

        class _Done(Callback):
            def _posttask(self, key, result, dsk, state, worker_id):
                if key in keys:
                    on_result(keys[key], result)

        with _Done():
            dask.compute(*tasks, **self._local_kwargs())


# ---------------------------------------------------------------------------
# the blocks of a run
# ---------------------------------------------------------------------------

def block_tasks(plan: Plan, settings: CellSettings, skip=(), token: str | None = None, *,
                local: bool = False) -> list:
    """One delayed :func:`process_block` per block of cells (except the blocks in ``skip``).

    ``mvkde run`` gathers them with :func:`execute`; :func:`mvkde.densities`
    assembles them into the dask arrays of a lazy Dataset.  Keys end in
    ``token`` (default: unique to the call).

    Parameters
    ----------
    plan : Plan
    settings : CellSettings
    skip : collection of int, optional
        Block indices left out.
    token : str, optional
    local : bool, optional
        The tasks run on an embedded (threads, processes, synchronous) scheduler: a block
        that is exactly one chunk of the input is handed to its task as that chunk's delayed
        value (see :func:`_chunks_as_delayed`).

    Returns
    -------
    list of dask.delayed.Delayed
    """
    import uuid

    import dask

    # a run-unique token: two runs on one shared dask cluster must never share keys
    token = token or uuid.uuid4().hex[:12]
    tasks = []
    data = plan.values.data
    nd = len(plan.cell_dims)
    tiles = list(plan.tiles())
    chunks = _chunks_as_delayed(data, tiles, nd) if local else None
    for b, tile in enumerate(tiles):
        if b in skip:
            continue
        block = chunks[b] if chunks is not None else data[tile] if tile else data
        codes, members = plan.codes, plan.members
        if nd:
            # codes (and label members) carry the cell dims only for tables (one row layout per group)
            codes = codes[tuple(t if codes.shape[k] > 1 else slice(None) for k, t in enumerate(tile))]
            if members is not None:
                members = members[(slice(None),) + tuple(t if members.shape[k + 1] > 1 else slice(None)
                                                         for k, t in enumerate(tile))]
        tile_shape = tuple(t.stop - t.start for t in tile)
        first = _first_cell(tile, plan.cell_shape)
        tasks.append(dask.delayed(process_block, pure=True)(
            block, codes, first, tile_shape, settings, members, dask_key_name=f"mvkde-block-{b}-{token}"))
    return tasks


def _chunks_as_delayed(data, tiles, nd: int):
    """One delayed chunk of ``data`` per tile, when every tile is exactly one chunk; else None.

    A dask array handed to ``dask.delayed`` is wrapped so that its keys are not
    reused across computations, and building that wrapper imports
    dask.distributed (about 0.3 s) even on an embedded scheduler; the chunks'
    own delayed values (``Array.to_delayed``) carry the same data without it.
    """
    import dask.array as da

    if not isinstance(data, da.Array) or any(len(c) != 1 for c in data.chunks[nd:]):
        return None
    edges = [np.cumsum((0,) + tuple(c)) for c in data.chunks[:nd]]
    index = []
    for tile in tiles:
        where = []
        for k, t in enumerate(tile):
            i = int(np.searchsorted(edges[k], t.start))
            if i + 1 >= len(edges[k]) or edges[k][i] != t.start or edges[k][i + 1] != t.stop:
                return None
            where.append(i)
        index.append(tuple(where) + (0,) * (data.ndim - nd))
    delayed = data.to_delayed()
    return [delayed[i] for i in index]


def _first_cell(tile, shape) -> int:
    if not tile:
        return 0
    return int(np.ravel_multi_index(tuple(t.start for t in tile), shape))


def execute(plan: Plan, settings: CellSettings, scheduler: Scheduler, progress: Progress | None = None,
            store=None) -> dict:
    """Run every block and gather the results into arrays over (*cells, split, ...).

    With a resume store (:class:`~mvkde.pipeline.resume.BlockStore`), blocks it
    already holds are read back instead of computed, and each computed block is
    saved to it as soon as it arrives.

    Parameters
    ----------
    plan : Plan
    settings : CellSettings
    scheduler : Scheduler
    progress : Progress, optional
        Updated once per block.
    store : BlockStore, optional

    Returns
    -------
    dict
        ``{"arrays": ..., "failures": ..., "engines": ..., "paths": ..., "resumed_blocks": ...}``.
    """
    ncell_shape = plan.cell_shape
    arrays: dict = {}
    failures, engines, paths = [], set(), set()
    tiles = list(plan.tiles())

    def assemble(i, res: BlockResult):
        tile = tiles[i]
        tshape = tuple(t.stop - t.start for t in tile)
        for name, arr in res.arrays.items():
            if name not in arrays:
                fill = np.nan if arr.dtype.kind == "f" else "" if arr.dtype.kind == "O" else 0
                arrays[name] = np.full(ncell_shape + arr.shape[1:], fill, dtype=arr.dtype)
            arrays[name][tile] = arr.reshape(tshape + arr.shape[1:])
        failures.extend(res.failures)
        engines.update(e for e in res.engines if e)
        paths.update(res.paths)
        if progress is not None:
            progress.update()

    done = store.done_blocks() if store is not None else set()
    for i in sorted(done):
        assemble(i, store.read(i, tiles[i]))
    todo = [i for i in range(len(tiles)) if i not in done]

    def on_result(k, res):
        i = todo[k]
        if store is not None:
            store.write(i, tiles[i], res)
        assemble(i, res)

    if todo:
        scheduler.run_blocks(block_tasks(plan, settings, skip=done, local=scheduler.client is None), on_result)
    return {"arrays": arrays, "failures": sorted(failures), "engines": sorted(engines), "paths": sorted(paths),
            "resumed_blocks": len(done)}
