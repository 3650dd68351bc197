"""Fast engines side by side with scipy, scikit-learn and statsmodels.

Every case fits the same data with the same bandwidth matrix H in mvkde and
in the reference library, times both in the same run and reports the max
difference relative to the peak density.
"""

from __future__ import annotations

import gc
import time
import tracemalloc

import numpy as np
from scipy import stats

import mvkde
from harness import Row, best_of, case, note


def _mesh(grid):
    axes = [grid[d].values for d in grid.dims]
    mesh = np.meshgrid(*axes, indexing="ij")
    return np.column_stack([g.ravel() for g in mesh])


def _scipy_scaled(ref, pts, values, rng, subset):
    """Time scipy on ``subset`` grid nodes (plus the peak node) and scale to all nodes."""
    take = rng.choice(pts.shape[0], size=min(subset, pts.shape[0]), replace=False)
    take = np.unique(np.append(take, np.argmax(values)))
    t0 = time.perf_counter()
    r = ref(pts[take].T)
    t = time.perf_counter() - t0
    err = np.abs(values[take] - r).max() / values.max()
    return t * pts.shape[0] / take.size, err, take.size


def _gaussian_vs_scipy(smoke, d, size, n, subset, target):
    rng = np.random.default_rng(10 + d)
    cov = np.full((d, d), 0.6) + np.diag(np.linspace(0.4, 1.4, d))
    x = rng.multivariate_normal(np.zeros(d), cov, size=n)
    ref = stats.gaussian_kde(x.T, bw_method="silverman")
    est = mvkde.fit(x, bandwidth=ref.covariance)          # same full H as scipy
    limits = est.default_limits()
    t_m, g = best_of(lambda: est.grid(size, limits=limits))
    pts = _mesh(g)
    t_r, err, used = _scipy_scaled(ref, pts, g.values.ravel(), rng, subset)
    name = f"gaussian full H, n={n:,}, d={d}, {'x'.join([str(size)] * d)} grid"
    return Row(name, t_m, "scipy gaussian_kde", t_r, err, target=target,
               notes=f"engine {g.attrs['engine']} ({g.attrs.get('engine_refinement', '-')}); "
                     f"scipy timed on {used} of {pts.shape[0]} nodes, scaled linearly")


@case("binned grids vs scipy.stats.gaussian_kde")
def gaussian_2d(smoke: bool):
    if smoke:
        return [_gaussian_vs_scipy(True, 2, 24, 2_000, 50, "runs")]
    return [_gaussian_vs_scipy(False, 2, 128, 100_000, 400, "ratio >= 1000, error <= 1e-3")]


@case("binned grids vs scipy.stats.gaussian_kde")
def gaussian_3d(smoke: bool):
    if smoke:
        return [_gaussian_vs_scipy(True, 3, 10, 2_000, 50, "runs")]
    return [_gaussian_vs_scipy(False, 3, 64, 100_000, 300, "ratio >= 300, error <= 1e-3")]


note("Scaled scipy times: scipy.stats.gaussian_kde costs n x (grid nodes) kernel terms, linear in "
     "the number of nodes, so it is timed on a random subset of the grid (plus the peak node) and "
     "scaled to the full grid; the max error is measured on that subset. The mvkde time is "
     "`grid(size, limits=...)` with the limits computed beforehand (the default-limits scan of the "
     "data, a few ms at n = 10^5, is not timed); 'engine binned (r)' gives the refinement chosen.")


@case("large samples (time and memory)")
def large_samples(smoke: bool):
    rows = []
    sizes = [20_000] if smoke else [1_000_000, 10_000_000]
    size = 32 if smoke else 256
    for n in sizes:
        rng = np.random.default_rng(n)
        x = rng.multivariate_normal([0, 0], [[1, 0.5], [0.5, 2]], size=n)
        est = mvkde.fit(x, bandwidth="normal")
        gc.collect()
        tracemalloc.start()
        t0 = time.perf_counter()
        g = est.grid(size)
        t = time.perf_counter() - t0
        _, peak = tracemalloc.get_traced_memory()
        tracemalloc.stop()
        # accuracy check against direct sums on a few nodes
        pts = _mesh(g)
        take = np.unique(np.append(rng.choice(pts.shape[0], 20, replace=False), np.argmax(g.values)))
        exact = mvkde.fit(x, bandwidth=est.H, engine="exact").pdf(pts[take])
        err = np.abs(g.values.ravel()[take] - exact).max() / g.values.max()
        rows.append(Row(f"gaussian full H, n={n:,}, d=2, {size}x{size} grid", t, "", float("nan"), err,
                        target="time, memory",
                        notes=f"peak memory {peak / 2 ** 20:.0f} MB beyond the data ({x.nbytes / 2 ** 20:.0f} MB); "
                              f"engine {g.attrs['engine']} ({g.attrs.get('engine_refinement', '-')}); "
                              f"error vs exact sums at {take.size} nodes"))
    return rows


note("Large samples: scipy.stats.gaussian_kde is left out: n = 10^7 data x 65,536 nodes is 6.6e11 "
     "kernel terms (hours at its rate measured above); the error column is against mvkde's exact "
     "direct sums on 21 nodes. Peak memory is the tracemalloc peak of the grid evaluation (the data "
     "array itself excluded).")


@case("scattered points vs scikit-learn KernelDensity")
def epanechnikov_points(smoke: bool):
    from sklearn.neighbors import KernelDensity

    n, m, d = (5_000, 500, 3) if smoke else (100_000, 10_000, 3)
    rng = np.random.default_rng(7)
    x = rng.standard_normal((n, d))
    pts = rng.standard_normal((m, d)) * 1.2
    b = 0.5
    # scikit-learn's "epanechnikov" is the spherical kernel 1 - |u|^2/b^2 on |u| < b, whose
    # covariance is b^2/(d+4) per coordinate [calc: radial moment of the ball kernel]
    H = np.eye(d) * b ** 2 / (d + 4)
    est = mvkde.fit(x, kernel="epanechnikov", form="spherical", bandwidth=H)
    skl = KernelDensity(kernel="epanechnikov", bandwidth=b, rtol=0.0, atol=0.0).fit(x)
    t_m, v = best_of(lambda: est.pdf(pts), repeat=3)
    t_r, r = best_of(lambda: np.exp(skl.score_samples(pts)), repeat=2)
    err = np.abs(v - r).max() / r.max()
    return [Row(f"epanechnikov spherical, n={n:,}, d=3, {m:,} scattered points", t_m,
                "sklearn KernelDensity (rtol=0)", t_r, err, target="ratio >= 2, equal results",
                notes=f"engine {est.attrs.get('engine')}")]


@case("small sample vs statsmodels KDEMultivariate")
def statsmodels_small(smoke: bool):
    from statsmodels.nonparametric.kernel_density import KDEMultivariate

    n, size = (300, 16) if smoke else (2_000, 64)
    rng = np.random.default_rng(3)
    x = rng.multivariate_normal([0, 5], [[1, 0.3], [0.3, 4]], size=n)
    sd = np.array([0.3, 0.7])
    # statsmodels' continuous Gaussian product kernel with bandwidths sd = diagonal H = diag(sd^2)
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", FutureWarning)  # statsmodels' own random-state notice
        ref = KDEMultivariate(x, var_type="cc", bw=sd)
    est = mvkde.fit(x, bandwidth=np.diag(sd ** 2))
    t_m, g = best_of(lambda: est.grid(size))
    pts = _mesh(g)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", FutureWarning)
        t_r, r = best_of(lambda: ref.pdf(pts), repeat=1)
    err = np.abs(g.values.ravel() - r).max() / r.max()
    return [Row(f"gaussian diagonal H, n={n:,}, d=2, {size}x{size} grid", t_m,
                "statsmodels KDEMultivariate", t_r, err, target="equal results",
                notes=f"engine {g.attrs['engine']}")]
