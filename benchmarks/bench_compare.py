"""Comparison of two labels per cell (mvkde.compare_cells batch functions) with bootstrap ratio intervals."""

from __future__ import annotations

import time

import numpy as np

from harness import Row, case, note
from mvkde import comparison as cmp
from mvkde.cells import fit_cells

GAUSSIAN_ROUGHNESS_2D = 1.0 / (4.0 * np.pi)


@case("comparison")
def compare_block(smoke: bool):
    """The issue's size: 100 cells x 3,650 samples per label, 200 replicates, two labels, 64 x 64 grid.

    Reference: the same replicates refitted one by one through the batch door
    (fit_cells with the cell's H, which applies a given matrix cell by cell) and
    integrated on their grids, on a few cells, extrapolated to the block.
    """
    cells, n, replicates, size, sub = (4, 300, 10, 24, 1) if smoke else (100, 3650, 200, 64, 2)
    rng = np.random.default_rng(4)
    cov = np.array([[1.0, 0.5], [0.5, 1.0]])
    ref = [rng.multivariate_normal([0.0, 0.0], cov, size=n) for _ in range(cells)]
    oth = [rng.multivariate_normal([0.3, 0.2], cov, size=n) for _ in range(cells)]
    axes = [np.linspace(-5.0, 5.3, size), np.linspace(-5.0, 5.2, size)]
    t = np.array([[0.9, 1.1], [1.2, 0.85]])
    timings = {}

    t0 = time.perf_counter()
    H = cmp.common_bandwidth_cells(ref, oth, axes=axes)
    timings["common H"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    dens = cmp.densities_with_bandwidth_cells(ref + oth, np.concatenate([H, H]), axes=axes)["density"]
    timings["densities"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    cmp.difference_test_cells(dens[:cells], dens[cells:], np.full(cells, n), np.full(cells, n),
                              sqrt_det_H=np.sqrt(np.linalg.det(H)), roughness=GAUSSIAN_ROUGHNESS_2D)
    ex = cmp.exceedance_from_grids(dens, axes, t)
    timings["test + exceedance"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    keys_r = [(c, 0) for c in range(cells)]
    boot_r = cmp.bootstrap_exceedance_cells(ref, H, t, axes=axes, replicates=replicates, seed=1, keys=keys_r)
    boot_o = cmp.bootstrap_exceedance_cells(oth, H, t, axes=axes, replicates=replicates, seed=1,
                                            keys=[(c, 1) for c in range(cells)])
    cmp.probability_ratio_cells(ex[:cells], ex[cells:], boot_r, boot_o)
    timings["bootstrap"] = time.perf_counter() - t0
    total = sum(timings.values())

    # reference: refit every replicate of `sub` cells through fit_cells, integrate each grid
    t0 = time.perf_counter()
    worst = 0.0
    for c in range(sub):
        draws = np.random.default_rng([1, c, 0, 7]).integers(0, n, size=(replicates, n))
        batch = fit_cells([ref[c][i] for i in draws], axes=axes, bandwidth=H[c])
        direct = cmp.exceedance_from_grids(batch.density, axes, t)
        worst = max(worst, float(np.max(np.abs(direct - boot_r[c]))))
    per_cell = (time.perf_counter() - t0) / sub
    reference = per_cell * cells * 2   # two labels
    note("comparison: mvkde time = common H (pooled selector, batch door) + common-H densities of both labels + "
         "local test + exceedance + 200 bootstrap replicates of both labels with H held fixed (resampling counts "
         "times each point's grid-integrated kernel mass); reference = refitting every replicate through "
         f"fit_cells with the cell's H and integrating its grid, measured on {sub} cells and scaled to the "
         "block's cells x 2 labels. Max error = largest |difference| of a replicate's exceedance probability.")
    parts = ", ".join(f"{k} {v:.1f} s" for k, v in timings.items())
    return [Row(f"{cells} cells x {n} samples x 2 labels, {replicates} replicates, {size}x{size} grid", total,
                "replicates refitted via fit_cells (extrapolated)", reference, worst,
                target="minutes on 2 cores", met=total <= 600, notes=parts)]
