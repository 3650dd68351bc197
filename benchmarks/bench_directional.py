"""Directional estimates: mvkde's factorised direct sums against sums of scipy.stats densities."""

from __future__ import annotations

import math
import time

import numpy as np
from scipy import stats

import mvkde
from mvkde import directional as D
from harness import Row, best_of, case


@case("directional")
def wind_grid(smoke: bool):
    """Speed x direction grid (reflection at speed 0) vs scipy.stats.vonmises x norm summed over the data."""
    n, size = (500, (32, 37)) if smoke else (4_000, (64, 73))
    rng = np.random.default_rng(3)
    direction = np.mod(np.rad2deg(rng.vonmises(2.0, 1.5, n)), 360.0)
    speed = rng.gamma(2.0, 3.0, n)
    est = mvkde.fit(np.column_stack([speed, direction]), periods=[None, 360.0], bounds=[(0, None), None],
                    boundary="reflect")
    t_m, g = best_of(lambda: est.grid(size, limits={"x0": (0.0, 40.0)}))
    h = math.sqrt(est.H[0, 0])
    kappa = est.concentrations["x1"]
    S, A = np.meshgrid(g["x0"].values, np.deg2rad(g["x1"].values), indexing="ij")

    def reference():
        out = np.zeros(S.size)
        theta = np.deg2rad(direction)
        for a in range(0, n, 200):                 # chunks of data: (m, 200) matrices
            sl = slice(a, a + 200)
            vm = stats.vonmises.pdf(A.ravel()[:, None] - theta[None, sl], kappa) * 2 * math.pi / 360
            lin = stats.norm.pdf(S.ravel()[:, None], speed[None, sl], h) + \
                stats.norm.pdf(S.ravel()[:, None], -speed[None, sl], h)
            out += (vm * lin).sum(axis=1)
        return out / n

    t_r, r = best_of(reference, repeat=1)
    err = np.abs(g.values.ravel() - r).max() / r.max()
    return [Row(f"speed x direction, n={n}, {size[0]}x{size[1]} grid, reflect", t_m,
                "scipy.stats vonmises x norm, chunked sums", t_r, err, target="ratio >= 1",
                met=t_r / t_m >= 1)]


@case("directional")
def circular_block(smoke: bool):
    """A block of circular cells through the batch door: binned FFT convolution with a periodic direction
    axis (one engine call for the block) against the same block with engine='exact' (per-cell direct sums of
    the von Mises x reflected Gaussian kernel, the path every circular cell took before).  Both times are the
    whole fit_cells call (the per-cell concentration and speed-bandwidth selections included); "max error" is
    the largest binned-vs-direct difference over the block's cells, relative to each cell's peak."""
    from mvkde.cells import fit_cells

    cells, n = (16, 500) if smoke else (256, 3650)
    rng = np.random.default_rng(8)
    samples = []
    for _ in range(cells):
        direction = np.mod(np.rad2deg(rng.vonmises(rng.uniform(0, 2 * math.pi), rng.uniform(0.5, 4.0), n)), 360.0)
        samples.append(np.column_stack([direction, rng.gamma(2.0, rng.uniform(2.0, 4.0), n)]))
    axes = [np.linspace(0.0, 360.0, 64), np.linspace(0.0, 40.0, 64)]
    options = dict(axes=axes, periods=[360.0, None], bounds=[None, (0.0, math.inf)], boundary="reflect")
    t_b, binned = best_of(lambda: fit_cells(samples, **options), repeat=1)
    t_e, exact = best_of(lambda: fit_cells(samples, engine="exact", **options), repeat=1)
    peak = exact.density.reshape(cells, -1).max(axis=1)
    err = float((np.abs(binned.density - exact.density).reshape(cells, -1).max(axis=1) / peak).max())
    return [Row(f"{cells} circular cells (direction x speed, n={n}, 64x64, reflect): fit_cells, "
                f"{cells / t_b:.1f} cells/s", t_b,
                f"same block, engine='exact' (per-cell direct sums): {cells / t_e:.1f} cells/s", t_e, err,
                target="binned error <= 1e-3 x peak", met=err <= 1e-3,
                notes=f"path: {binned.path}; engines: {sorted(set(binned.engine))}")]


@case("directional")
def sphere_grid(smoke: bool):
    """Lat/lon grid of a vMF estimate vs scipy.stats.vonmises_fisher summed over the data."""
    n, size = (200, (61, 121)) if smoke else (1_000, (181, 361))
    rng = np.random.default_rng(4)
    u = D.sample_vmf(np.tile(D.lonlat_to_unit(-15.0, 179.0), (n, 1)), 30.0, rng)
    lat, lon = D.unit_to_latlon(u)
    est = mvkde.fit(np.column_stack([lat, lon]), sphere=("lat", "lon"), names=["lat", "lon"])
    t_m, g = best_of(lambda: est.grid(size))
    kappa = est.concentrations["lat"]
    LA, LO = np.meshgrid(g["lat"].values, g["lon"].values, indexing="ij")
    x = D.lonlat_to_unit(LA.ravel(), LO.ravel())

    def reference():
        out = np.zeros(x.shape[0])
        for i in range(n):
            out += stats.vonmises_fisher(u[i], kappa).pdf(x)
        return out / n / D.EARTH_RADIUS_KM ** 2

    t_r, r = best_of(reference, repeat=1)
    err = np.abs(g.values.ravel() - r).max() / r.max()
    return [Row(f"location on the sphere, n={n}, {size[0]}x{size[1]} grid", t_m,
                "scipy.stats.vonmises_fisher per datum", t_r, err, target="ratio >= 1",
                met=t_r / t_m >= 1)]


@case("directional")
def joint_cv(smoke: bool):
    """Joint likelihood / least-squares CV of kappa and the speed bandwidth (no reference library)."""
    rows = []
    for n in ((300,) if smoke else (500, 2000)):
        rng = np.random.default_rng(5)
        x = np.column_stack([rng.gamma(2.0, 3.0, n), np.mod(np.rad2deg(rng.vonmises(2.0, 1.5, n)), 360.0)])
        for method in ("mlcv", "lscv"):
            t0 = time.perf_counter()
            mvkde.fit(x, periods=[None, 360.0], bandwidth=method)
            rows.append(Row(f"{method} joint (kappa, h), n={n}", time.perf_counter() - t0,
                            notes="exact O(n^2) sums, Nelder-Mead"))
    return rows


@case("directional")
def circular_selectors(smoke: bool):
    """One circular variable: binned FFT LSCV/MLCV against the exact O(n^2) pair sums
    (``directional.cross_validate``); the von Mises mixture plug-in and the KD-tree
    likelihood CV on the sphere against the dense one.  "max error" is the relative
    difference of the chosen concentrations."""
    from mvkde.directional import fast_cv as sel
    from mvkde.directional.selectors import mixture_plugin_concentration

    rows = []
    n = 500 if smoke else 2000
    rng = np.random.default_rng(6)
    comp = rng.random(n) < 0.5
    theta = np.mod(np.where(comp, rng.vonmises(0.0, 8.0, n), rng.vonmises(2.5, 8.0, n)), 2 * math.pi)
    for method in ("lscv", "mlcv"):
        t_m, fast = best_of(lambda: sel.circular_cv(method, theta), repeat=3)
        t_r, exact = best_of(lambda: D.cross_validate(method, theta=theta[:, None]), repeat=1)
        rows.append(Row(f"{method} one circular variable, n={n}, two peaks", t_m,
                        "exact pair sums (directional.cross_validate)", t_r,
                        abs(fast.kappa / float(exact.kappas[0]) - 1)))
    m = 3650
    big = np.mod(np.concatenate([rng.vonmises(0.0, 8.0, m // 2), rng.vonmises(2.5, 8.0, m - m // 2)]), 2 * math.pi)
    t_p, _ = best_of(lambda: mixture_plugin_concentration(big), repeat=3)
    t_t, _ = best_of(lambda: D.taylor_rule(big), repeat=3)
    rows.append(Row(f"plugin (von Mises mixture, EM, BIC), n={m}", t_p, "Taylor (2008) rule, same data", t_t,
                    target="a few ms"))
    k = 600 if smoke else 2000
    u = np.vstack([D.sample_vmf(np.tile(D.lonlat_to_unit(20.0, 100.0), (k // 2, 1)), 400.0, rng),
                   D.sample_vmf(np.tile(D.lonlat_to_unit(-30.0, -60.0), (k - k // 2, 1)), 100.0, rng)])
    t_m, fast = best_of(lambda: sel.sphere_likelihood_cv(u), repeat=1)
    t_r, exact = best_of(lambda: D.cross_validate("mlcv", units=u), repeat=1)
    rows.append(Row(f"sphere likelihood CV, KD-tree, n={k}", t_m, "dense pair sums", t_r,
                    abs(fast.kappa / exact.kappa_sphere - 1)))
    return rows
