"""A whole run, from a workflow file to a written output: the functions the command line calls.

Reading a run from ``mvkde run`` down::

    run_and_write                       this module
      workflow.load                     TOML -> validated spec, defaults filled
      plan_run                          inputs.prepare (open, select, tile) + checks before work
      run
        schedule.Scheduler              dask: embedded threads/processes, local cluster, tcp://
        axes.resolve_axes               the grid shared by every cell
        blocks.settings_for             what every block task needs
        schedule.execute                one blocks.process_block per block -> mvkde.cells.fit_cells
        output.build_dataset            labelled Dataset (+ products.add_*_products)
      provenance.record                 versions, inputs' SHA-256, resolved workflow
      output.write_output_atomic        temporary file (netCDF) or store (.zarr) -> rename

``mvkde check`` is :func:`plan_run` and :func:`describe_plan`.
"""

from __future__ import annotations

import sys
import time

import numpy as np

from ..errors import ConfigError, InputError
from ..estimator import CAUTION
from . import provenance as _prov
from ..errors import MvkdeError
from ..estimator import fit
from .blocks import COARSE_SPACING, FLAGS, check_settings, settings_for
from .axes import resolve_axes
from .inputs import Plan, check_memory, estimate_sizes, human_bytes, prepare, where_files
from .output import (build_dataset, check_output_path, clean_stale_partials, encoding_for, global_attributes,
                     is_zarr_path, write_output_atomic)
from .resume import BlockStore, resume_store_path
from .schedule import Progress, Scheduler, execute
from .workflow import Workflow, load

__all__ = ["plan_run", "run", "run_and_write", "describe_plan"]


def plan_run(wf: Workflow) -> Plan:
    """Open and select the inputs, then refuse, before any work, settings and sizes that cannot run.

    Parameters
    ----------
    wf : Workflow
        The validated workflow.

    Returns
    -------
    Plan
    """
    plan = prepare(wf)
    check_settings(wf, plan)
    check_memory(plan)
    return plan


def run(wf: Workflow, *, progress_stream=None, plan: Plan | None = None, store_path=None):
    """Execute a workflow: returns (dataset, plan, settings, summary dict).

    Nothing is written, except finished blocks to the Zarr store at
    ``store_path`` when given (the resumable mode).

    Parameters
    ----------
    wf : Workflow
        The validated workflow.
    progress_stream : file-like, optional
        Where progress and store notes are written; ``sys.stderr`` when None.
    plan : Plan, optional
        A plan already made by :func:`plan_run`.
    store_path : path-like, optional
        Zarr store of the finished blocks (the resumable mode).

    Returns
    -------
    tuple
        (xarray.Dataset, Plan, CellSettings, dict): the summary holds ``seconds``, ``scheduler``, ``cells``,
        ``blocks``, ``flag_counts``, ``failures``, ``engines``, ``paths``, ``resumed_blocks`` and ``store``.
    """
    plan = plan or plan_run(wf)
    stream = progress_stream if progress_stream is not None else sys.stderr
    store = None
    with Scheduler(wf["compute"]) as sched:
        t0 = time.perf_counter()  # compute time: a cluster's start-up is not counted
        axes = resolve_axes(plan, sched.compute)
        settings = settings_for(plan, axes)
        if store_path is not None:
            store = BlockStore(store_path, plan, settings, note=lambda m: print(m, file=stream, flush=True))
        progress = Progress(plan.n_blocks, progress_stream)
        results = execute(plan, settings, sched, progress, store=store)
        seconds = time.perf_counter() - t0
        where = sched.describe()
    ds = build_dataset(plan, settings, results)
    flags = ds["flags"].values
    failures = [(plan.cell_label(cell, split), msg) for cell, split, msg in results["failures"]]
    refuse_if_nothing_fitted(plan, flags, failures)
    summary = {
        "seconds": seconds,
        "scheduler": where,
        "cells": plan.n_cells * plan.n_splits,
        "blocks": plan.n_blocks,
        "flag_counts": {name: int(((flags & bit) > 0).sum()) for name, bit in FLAGS.items()},
        "failures": failures,
        "engines": results["engines"],
        "paths": results["paths"],
        "resumed_blocks": results["resumed_blocks"],
        "store": store,
    }
    return ds, plan, settings, summary


def refuse_if_nothing_fitted(plan: Plan, flags: np.ndarray, messages) -> None:
    """A run in which no cell got a density is an input or settings error, not an output."""
    usable = (flags & (FLAGS["too_few_samples"] | FLAGS["fit_failed"])) == 0
    if flags.size == 0 or usable.any():
        return
    wf = plan.workflow
    few = int(((flags & FLAGS["too_few_samples"]) > 0).sum())
    failed = int(((flags & FLAGS["fit_failed"]) > 0).sum())
    parts = []
    if few:
        parts.append(f"{few} with fewer than input.min_samples = {wf['input']['min_samples']} valid samples")
    if failed:
        example = f" (e.g. {messages[0][0]}: {messages[0][1]})" if messages else ""
        parts.append(f"{failed} refused by the estimator{example}")
    raise InputError(f"no cell of {where_files(plan)} got a density: of {flags.size} cells, " + " and ".join(parts)
                     + ": check the input values, the selection and the [estimator] settings")


def describe_plan(plan: Plan) -> str:
    """The text ``mvkde check`` prints.

    Parameters
    ----------
    plan : Plan
        The planned run.

    Returns
    -------
    str
    """
    wf = plan.workflow
    est, inp = wf["estimator"], wf["input"]
    sizes = estimate_sizes(plan)
    total_in = sum(f.stat().st_size for f in plan.files)
    lines = [f"workflow {wf.source}: valid"]
    lines.append(f"  input       {len(plan.files)} {plan.kind} file(s), {human_bytes(total_in)}: "
                 + ", ".join(f.name for f in plan.files[:3]) + (" ..." if len(plan.files) > 3 else ""))
    lines.append("  variables   " + ", ".join(f"{v} [{u or 'no units'}]" for v, u in zip(plan.names, plan.units)))
    celltext = " x ".join(f"{d}={n}" for d, n in zip(plan.cell_dims, plan.cell_shape)) or "one cell"
    lines.append(f"  cells       {plan.n_cells} ({celltext})"
                 + (f" x {plan.n_splits} {plan.split_dim}s ({', '.join(map(str, plan.split_labels))})"
                    if plan.split_dim else ""))
    lo, med, hi = plan.sample_counts
    what = "rows per group" if plan.kind != "netcdf" else "samples per cell" + (
        f" and {plan.split_dim}" if plan.split_dim else "")
    lines.append(f"  samples     {what}: " + (f"{hi}" if lo == hi else f"min {lo}, median {med}, max {hi}")
                 + f" before dropping missing values; cells with fewer than {inp['min_samples']} valid "
                   "samples get NaN and a flag")
    grid = wf.grid_size()
    lim = wf["grid"]["limits"]
    lines.append("  grid        " + " x ".join(map(str, grid)) + " nodes: " + "; ".join(
        f"{v} " + (f"[{lim[v][0]:g}, {lim[v][1]:g}]" if v in lim else
                   f"[0, {wf.variable(v)['period']:g}]" if wf.variable(v)["period"] else "from the data range")
        for v in plan.names))
    lines.append(f"  estimator   kernel {est['kernel']} ({est['form']}), bandwidth {est['bandwidth']} "
                 f"({est['parametrization']}), engine {est['engine']}"
                 + (f", boundary {est['boundary']}" if any(wf.variable(v)["bounds"] for v in plan.names) else ""))
    for v in plan.names:
        t = wf.variable(v)
        extras = [f"bounds {t['bounds']}" if t["bounds"] else "", f"point mass <= {t['point_mass']:g}"
                  if t["point_mass"] is not None else "", f"period {t['period']:g}" if t["period"] else ""]
        extras = [e for e in extras if e]
        if extras:
            lines.append(f"              {v}: " + ", ".join(extras))
    per_block = int(np.prod(plan.tile)) if plan.tile else 1
    lines.append(f"  compute     scheduler {wf['compute']['scheduler']}, workers {wf['compute']['workers'] or 'all cores'}, "
                 f"{plan.n_blocks} block(s) of up to {per_block} cell(s)")
    lines.append(f"  memory      about {human_bytes(sizes['task_bytes'])} per task (input block, output block and "
                 f"{human_bytes(sizes['engine_work_bytes'])} of engine work space)")
    lines.append(f"  output      {wf['output']['path']}: about {human_bytes(sizes['output_bytes'])} before compression")
    for note in plan.notes:
        lines.append(f"  note        {note}")
    for warning in coarse_grid_warnings(plan):
        lines.append(f"  warning     {warning}")
    return "\n".join(lines)


def coarse_grid_warnings(plan: Plan) -> list[str]:
    """Variables whose grid spacing exceeds the kernel's standard deviation in a sample cell.

    The first cell with enough valid samples is fitted with the run's own
    settings (all its samples pooled, so its bandwidths are if anything
    smaller than a split's); a spacing above ``COARSE_SPACING`` kernel
    standard deviations makes the trapezoid rule miss the density near a
    bound or a peak, and the products integrated on the grid are biased.

    Parameters
    ----------
    plan : Plan
        The planned run.

    Returns
    -------
    list of str
        One warning per variable; empty when the first cell cannot be fitted.
    """
    wf = plan.workflow
    first = plan.values.isel({d: 0 for d in plan.cell_dims}) if plan.cell_dims else plan.values
    x = np.asarray(first.values, dtype=float).reshape(-1, len(plan.names))
    x = x[np.isfinite(x).all(axis=1)]
    if len(x) < max(wf["input"]["min_samples"], len(plan.names) + 1):
        return []
    settings = settings_for(plan, None)
    try:
        H = fit(x, **settings.fit_kwargs()).H
    except MvkdeError:
        return []
    out = []
    limits = wf["grid"]["limits"]
    for j, (v, size) in enumerate(zip(plan.names, wf.grid_size())):
        table = wf.variable(v)
        if table["period"] is not None or v in (wf["estimator"].get("sphere") or ()) or not np.isfinite(H[j, j]):
            continue
        if v in limits:
            lo, hi = limits[v]
        else:
            lo, hi = float(x[:, j].min()), float(x[:, j].max())
            lo, hi = lo - 0.2 * (hi - lo), hi + 0.2 * (hi - lo)
        spacing, sd = (hi - lo) / (size - 1), float(np.sqrt(H[j, j]))
        if spacing > COARSE_SPACING * sd:
            need = int(np.ceil((hi - lo) / (COARSE_SPACING * sd))) + 1
            out.append(f"grid.size gives {v} a node spacing of {spacing:.3g}, above {COARSE_SPACING:g} x the "
                       f"kernel's standard deviation {sd:.3g} in the first cell: products integrated on the grid will be biased; "
                       f"use about {need} nodes for {v}")
    return out


def run_and_write(path, overrides=(), *, overwrite=False, command_line=None, out=None, progress_stream=None):
    """Load, run and write a workflow; print the summary to ``out``.

    Returns the run summary (a dict; ``summary["path"]`` is the output written).

    Parameters
    ----------
    path : str, path-like or Workflow
        The workflow file, or a workflow already loaded.
    overrides : sequence of str, optional
        ``--set`` overrides (``key=value``) applied when loading the file.
    overwrite : bool, optional
        Replace an existing output (also set by ``output.overwrite``).
    command_line : list of str, optional
        The command recorded in the provenance.
    out : file-like, optional
        Where the summary is printed; ``sys.stdout`` when None.
    progress_stream : file-like, optional
        Where progress is reported.

    Returns
    -------
    dict
    """
    out = out if out is not None else sys.stdout
    wf = path if isinstance(path, Workflow) else load(path, overrides)
    overwrite = overwrite or wf["output"]["overwrite"]
    target = check_output_path(wf["output"]["path"], overwrite=overwrite)
    clean_stale_partials(target)  # left by an earlier run that was killed while writing
    if is_zarr_path(target):
        try:
            import zarr  # noqa: F401
        except ImportError:
            raise ConfigError(f"{wf.source}: output.path = {str(target)!r} names a Zarr store, which needs the "
                              "zarr package: pip install 'mvkde[zarr]' (or name a .nc file)") from None
    plan = plan_run(wf)
    store_path = resume_store_path(target) if wf["output"]["resume"] else None
    if store_path is not None:
        try:
            import zarr  # noqa: F401
        except ImportError:
            raise ConfigError(f"{wf.source}: output.resume = true needs the zarr package: "
                              "pip install 'mvkde[zarr]' (or set output.resume = false)") from None
    hashing = _prov.InputsInBackground(plan.files)  # the inputs' SHA-256, while the cells are computed
    ds, plan, settings, summary = run(wf, progress_stream=progress_stream, plan=plan, store_path=store_path)
    rec = _prov.record(wf, plan.files, command_line=command_line, inputs=hashing.result(), extra={
        "scheduler": summary["scheduler"], "engines": summary["engines"], "batch": summary["paths"],
        "grid_limits": {v: [float(a[0]), float(a[-1])] for v, a in zip(plan.names, settings.axes)}})
    ds.attrs.update(global_attributes(wf, settings, plan.names, rec))
    write_output_atomic(ds, target, overwrite=overwrite, encoding=encoding_for(ds, plan, wf["output"]))
    if summary["store"] is not None:
        summary["store"].remove()  # the output is complete: the finished blocks are no longer needed
    fc = summary["flag_counts"]
    resumed = (f", {summary['resumed_blocks']} of them resumed from {store_path.name}"
               if summary["resumed_blocks"] else "")
    print(f"mvkde run: wrote {target} ({summary['cells']} densities, {summary['blocks']} blocks{resumed}, "
          f"{summary['seconds']:.1f} s on {summary['scheduler']})", file=out)
    flagged = {k: v for k, v in fc.items() if v}
    if flagged:
        print("  flagged cells: " + ", ".join(f"{k} {v}" for k, v in flagged.items()), file=out)
    for label, msg in summary["failures"][:3]:
        print(f"  e.g. {label}: {msg}", file=out)
    print(f"  caution: {CAUTION}", file=out)
    summary["path"] = target
    return summary

