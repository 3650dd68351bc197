"""Uncertainty of an estimate: the asymptotic pointwise standard error and bootstrap bands.

References
----------
Wand, M. P. & Jones, M. C. (1995). Kernel Smoothing, Sec. 4.3 (variance).
Hall, P. (1992). Effect of bias estimation on coverage accuracy of bootstrap
confidence intervals for a probability density. Ann. Statist. 20, 675-694.
"""

from __future__ import annotations

import numpy as np

from ..errors import InputError
from ..progress import Progress
from .estimate import DEFAULT_GRID, exceedance


def standard_error(est, density_values) -> np.ndarray:
    """Asymptotic pointwise standard error sqrt(f R(K) / (n |H|^{1/2})).

    Wand & Jones (1995, Sec. 4.3): Var f_hat(x) ~ n^{-1} |H|^{-1/2} R(K) f(x),
    with R(K) of the unit-covariance d-variate kernel and n the effective
    sample size (every row, the point mass's included, for the continuous
    part of an estimate with a point mass).  Asymptotic: it overstates the variance at small n.

    Parameters
    ----------
    est : DensityEstimate
    density_values : array_like of float
        Density f at the points of interest (negative values count as 0).

    Returns
    -------
    ndarray
        Shape of ``density_values``.
    """
    f = np.maximum(np.asarray(density_values, dtype=float), 0.0)
    # with a point mass, f is the continuous part (1 - p) f_c = n^{-1} sum over ALL n rows of
    # 1{above} K_H(x - X_i): its variance has the whole sample size, n_above / (1 - p)
    n = est.n_effective / (1.0 - est.point_mass_probability) if est.point_mass_probability < 1 else np.inf
    var = f * est.kernel.roughness / (n * est.bandwidth.matrix.sqrt_det)
    return np.sqrt(var)


def bootstrap(est, statistic, replicates=200, seed=None):
    """Values of ``statistic(estimate)`` over bootstrap resamples of the data.

    The bandwidth matrix is held fixed (the bands describe the sampling
    variability of the estimate, not its smoothing bias: they cover
    E f_hat = f * K_H, Hall 1992).

    Parameters
    ----------
    est : DensityEstimate
    statistic : callable
        Called with each refitted estimate; returns an array of fixed shape.
    replicates : int
        At least 2.
    seed : int or numpy.random.Generator, optional

    Returns
    -------
    ndarray, shape (replicates, ...)
    """
    replicates = int(replicates)
    if replicates < 2:
        raise InputError(f"replicates must be at least 2, got {replicates}")
    rng = np.random.default_rng(seed)
    out = []
    every = list(range(est.d))
    progress = Progress(replicates, label="bootstrap replicates", prefix="mvkde", log_lines=False)
    for _ in range(replicates):
        idx = rng.choice(est.n, size=est.n, replace=True, p=est.weights)
        out.append(np.asarray(statistic(est._refit(est.data[idx], every))))
        progress.update()
    return np.stack(out)


def bootstrap_bands(est, points=None, *, kind="density", level=0.9, replicates=200, seed=None,
                    size=None):
    """Percentile bootstrap band (lower, upper) for the density or the exceedance probability.

    ``points`` (m, d) or None for the grid of ``size``; ``kind`` is 'density'
    or 'exceedance'.

    Parameters
    ----------
    est : DensityEstimate
    points : array_like, shape (m, d), or pandas.DataFrame, optional
    kind : {'density', 'exceedance'}
    level : float
        Coverage, strictly between 0 and 1.
    replicates : int
    seed : int or numpy.random.Generator, optional
    size : int or sequence of int, optional

    Returns
    -------
    lower, upper : ndarray, shape (m,)
        The (1 - level)/2 and (1 + level)/2 quantiles of the replicates (:func:`bootstrap`).
    """
    if kind not in ("density", "exceedance"):
        raise InputError(f"kind must be 'density' or 'exceedance', got {kind!r}")
    if not 0 < level < 1:
        raise InputError(f"level must lie strictly between 0 and 1, got {level}")
    if points is None:
        g = est.grid(size or DEFAULT_GRID.get(est.d, 24))
        mesh = np.meshgrid(*[g[n].values for n in est.names], indexing="ij")
        points = np.column_stack([m.ravel() for m in mesh])
    pts = est._points(points)
    stat = (lambda b: b.pdf(pts)) if kind == "density" else (lambda b: exceedance(b, pts))
    draws = bootstrap(est, stat, replicates, seed)
    a = (1 - level) / 2
    lo, hi = np.quantile(draws, [a, 1 - a], axis=0)
    return lo, hi
