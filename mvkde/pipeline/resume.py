"""The resumable mode: finished blocks of a run kept in a Zarr store until the output is written."""

from __future__ import annotations

import json
import os
import shutil
from pathlib import Path

import numpy as np

from ..errors import ConfigError
from .blocks import BlockResult, CellSettings
from .inputs import Plan


class BlockStore:
    """Finished blocks of a run kept in a Zarr store, for the opt-in resumable mode.

    Layout of the folder: ``results.zarr`` with one Zarr array per result
    (chunks = the blocks, so a block is written as whole chunks),
    ``run.json`` with the fingerprint of the run (resolved workflow without
    its compute and output settings, input files' sizes and modification
    times, grid axes, blocks), and one marker ``done/B.json`` per finished
    block written after its data: a block counts as done only when its
    marker exists, so a run killed while saving a block recomputes it.  A store made by a different run is
    replaced.  zarr is imported here only (the ``resume`` extra).
    """

    def __init__(self, path, plan: Plan, settings: CellSettings, note=None):
        try:
            import zarr
        except ImportError:
            raise ConfigError(f"{plan.workflow.source}: output.resume = true needs the zarr package: "
                              "pip install 'mvkde[zarr]' (or set output.resume = false)") from None
        self.zarr = zarr
        self.path = Path(path)
        self.markers = self.path / "done"
        self.chunks_over_cells = tuple(plan.tile)
        self.cell_shape = plan.cell_shape
        self.fingerprint = _fingerprint(plan, settings)
        stamp = self.path / "run.json"
        if self.path.exists():
            try:
                same = json.loads(stamp.read_text()) == self.fingerprint
            except (OSError, ValueError):
                same = False
            if not same:
                if note is not None:
                    note(f"mvkde run: {self.path} was made by a different workflow or different inputs: "
                         "starting over")
                shutil.rmtree(self.path)
        if not self.path.exists():
            self.markers.mkdir(parents=True)
            _write_atomic(stamp, json.dumps(self.fingerprint))
        self.root = zarr.open_group(str(self.path / "results.zarr"), mode="a")

    def done_blocks(self) -> set:
        return {int(f.stem) for f in self.markers.glob("*.json") if f.stem.isdigit()}

    def read(self, i: int, tile) -> BlockResult:
        meta = json.loads((self.markers / f"{i}.json").read_text())
        ncell = int(np.prod([t.stop - t.start for t in tile])) if tile else 1
        out = {}
        for name in self.root.array_keys():
            block = np.asarray(self.root[name][tile if tile else ...])
            out[name] = block.reshape((ncell,) + block.shape[len(tile):])
        failures = [tuple(m) for m in meta["failures"]]
        # text arrays live in the marker (Zarr arrays hold numbers): the reasons come back from the failures
        out["failure_reason"] = np.full(out["flags"].shape, "", dtype=object)
        first = int(meta["first_cell"])
        for cell, split, message in failures:
            out["failure_reason"][cell - first, split] = message
        return BlockResult(out, failures, set(meta["engines"]), set(meta["paths"]))

    def write(self, i: int, tile, res: BlockResult) -> None:
        tshape = tuple(t.stop - t.start for t in tile)
        for name, arr in res.arrays.items():
            if arr.dtype.kind == "O":
                continue  # text: kept in the marker (failures)
            if name not in self.root:
                fill = np.nan if arr.dtype.kind == "f" else 0
                self.root.create_array(name, shape=self.cell_shape + arr.shape[1:], dtype=arr.dtype,
                                       chunks=tuple(max(1, c) for c in self.chunks_over_cells) + arr.shape[1:],
                                       fill_value=fill)
            self.root[name][tile if tile else ...] = arr.reshape(tshape + arr.shape[1:])
        meta = {"failures": [list(m) for m in res.failures], "engines": sorted(e for e in res.engines if e),
                "paths": sorted(res.paths), "first_cell": self._first_cell(tile)}
        _write_atomic(self.markers / f"{i}.json", json.dumps(meta))

    def _first_cell(self, tile) -> int:
        return int(np.ravel_multi_index(tuple(t.start for t in tile), self.cell_shape)) if tile else 0

    def remove(self) -> None:
        shutil.rmtree(self.path, ignore_errors=True)


def _write_atomic(path, text: str) -> None:
    tmp = path.with_name(path.name + f".{os.getpid()}.tmp")
    tmp.write_text(text)
    os.replace(tmp, path)


def _fingerprint(plan: Plan, settings: CellSettings) -> dict:
    """What makes two runs' blocks interchangeable: not the scheduler, nor the output settings."""
    spec = plan.workflow.to_json()
    spec = {k: v for k, v in spec.items() if k not in ("compute", "output")}
    spec["block_size"] = plan.workflow["compute"]["block_size"]
    files = []
    for f in plan.files:
        st = f.stat()
        files.append([str(f.resolve()), st.st_size, st.st_mtime_ns])
    return {"workflow": spec, "inputs": files, "axes": [a.tolist() for a in settings.axes],
            "tile": list(plan.tile), "cell_shape": list(plan.cell_shape), "n_splits": settings.n_splits}


def resume_store_path(output) -> Path:
    output = Path(output)
    return output.with_name(output.name + ".resume")


