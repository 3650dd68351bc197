"""Two samples per cell compared, for blocks of cells (the cell axis first).

The batch layer of :mod:`mvkde.comparison`: the pipeline calls these on the
samples of a block of cells; :func:`mvkde.compare` calls them on one
pair of estimates, so both doors give the same numbers.  The formulas, the
common bandwidth matrix and the bootstrap design are described in the
module docstring of :mod:`mvkde.comparison`.
"""

from __future__ import annotations

import warnings

import numpy as np
from scipy import interpolate, stats

from . import engines as _engines
from .bandwidth import SELECTORS
from .cells import fit_cells
from .errors import InputError, MvkdeError, MvkdeWarning
from .estimator import fit
from .kernels import get_kernel, get_multivariate_kernel
from .products import grid as _grid

__all__ = ["common_bandwidth_cells", "densities_with_bandwidth_cells", "difference_test_cells",
           "exceedance_from_grids", "bootstrap_exceedance_cells", "probability_ratio_cells", "DEFAULT_FLOOR",
           "kernel_roughness", "compare_pairs_cells"]

#: nodes whose mean density is below this share of its largest value are not tested
DEFAULT_FLOOR = 0.05

# samples per fit_cells call in the bootstrap: bounds the memory of the replicate grids
_CHUNK = 512


def _is_plain(bounds, point_masses, periods, sphere) -> bool:
    return not ((bounds is not None and any(b is not None and tuple(b) != (-np.inf, np.inf) for b in bounds))
                or (point_masses is not None and any(t is not None for t in point_masses))
                or (periods is not None and any(p is not None for p in periods)) or sphere is not None)


def common_bandwidth_cells(reference_samples, other_samples, *, axes, selector="plugin", parametrization="full",
                           **settings) -> np.ndarray:
    """One bandwidth matrix per cell, chosen by ``selector`` on the two samples pooled.

    Parameters
    ----------
    reference_samples, other_samples : list of (n_c, d) arrays
        The two samples of each cell.
    axes : list of ndarray
        The shared grid (the batch door evaluates the pooled density on it).
    selector, parametrization : str
        As in :func:`mvkde.fit`.
    **settings
        kernel, form, bounds, boundary, point_masses, periods, sphere, engine,
        names, units: as in :func:`mvkde.cells.fit_cells`.

    Returns
    -------
    ndarray, shape (C, d, d)
        NaN for a cell the selector refused.

    Notes
    -----
    Under the null both samples come from one law and the pooled sample is
    a sample of size n_1 + n_2 from it, so the pooled selector estimates the
    matrix suited to that law; a common H makes the smoothing bias of the
    two estimates equal, so it cancels in their difference.  Where the laws
    differ the pooled sample is their mixture, somewhat wider than either,
    and H errs towards smoothing more: the test loses some power but keeps
    its level.
    """
    if not isinstance(selector, str):
        raise InputError("common_bandwidth_cells: selector must be a selector name, "
                         f"one of {sorted(SELECTORS)}")
    pooled = [np.vstack([np.asarray(a, dtype=float), np.asarray(b, dtype=float)])
              for a, b in zip(reference_samples, other_samples)]
    batch = fit_cells(pooled, axes=axes, bandwidth=selector, parametrization=parametrization, **settings)
    return batch.H


def densities_with_bandwidth_cells(samples, H, *, axes, kernel="gaussian", form="product", bounds=None,
                                   boundary=None, point_masses=None, periods=None, sphere=None, engine="auto",
                                   names=None, units=None, groups=None) -> dict:
    """Densities of many samples on one grid, sample k smoothed with the matrix ``H[k]``.

    Parameters
    ----------
    samples : list of (n_k, d) arrays
    H : array, shape (len(samples), d, d)
        The bandwidth matrix of each sample (for example its cell's common H).
    axes : list of ndarray
        The shared grid.
    groups : list of int, optional
        Samples sharing a group number share their H (a cell's bootstrap
        replicates): on the per-cell path they go through one
        :func:`mvkde.cells.fit_cells` call per group.  Default: one group per
        sample.
    kernel, form, bounds, boundary, point_masses, periods, sphere, engine, names, units
        As in :func:`mvkde.fit`.

    Returns
    -------
    dict
        ``density`` (K, *grid) (the continuous part with a point mass),
        ``point_mass_probability`` (K,) or None, ``density_at_point_mass``
        (K, *other grid) or None, ``errors`` (list, None for a fitted sample).

    Notes
    -----
    :func:`mvkde.cells.fit_cells` applies a given matrix cell by cell.
    Without bounds, point masses or directions the densities are instead
    computed as one array problem (one binned FFT for all samples, each with
    its own kernel spectrum, :func:`mvkde.engines.evaluate_grid_many`), the
    numbers ``fit(sample, bandwidth=H[k]).grid(...)`` gives.
    """
    axes = [np.asarray(a, dtype=float) for a in axes]
    d = len(axes)
    H = np.asarray(H, dtype=float).reshape(len(samples), d, d)
    K = len(samples)
    shape = tuple(len(a) for a in axes)
    out = {"density": np.full((K,) + shape, np.nan), "point_mass_probability": None,
           "density_at_point_mass": None, "errors": [None] * K}
    if K == 0:
        return out
    finite = np.all(np.isfinite(H.reshape(K, -1)), axis=1)
    for k in np.flatnonzero(~finite):
        out["errors"][k] = "no bandwidth matrix (the selector refused this cell)"
    if _is_plain(bounds, point_masses, periods, sphere):
        mk = get_multivariate_kernel(get_kernel(kernel).name, form, d)
        ok = np.flatnonzero(finite)
        for a in range(0, ok.size, _CHUNK):
            part = ok[a:a + _CHUNK]
            try:
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore", MvkdeWarning)
                    values, _ = _engines.evaluate_grid_many(axes, [samples[k] for k in part], None,
                                                            [H[k] for k in part], mk, engine)
                out["density"][part] = values
            except (MvkdeError, np.linalg.LinAlgError) as exc:
                for k in part:
                    out["errors"][k] = f"{type(exc).__name__}: {exc}"
        return out
    groups = list(range(K)) if groups is None else list(groups)
    settings = dict(kernel=kernel, form=form, bounds=bounds, boundary=boundary, point_masses=point_masses,
                    periods=periods, sphere=sphere, engine=engine, names=names, units=units)
    order = {}
    for k, g in enumerate(groups):
        if finite[k]:
            order.setdefault(g, []).append(k)
    for members in order.values():
        for a in range(0, len(members), _CHUNK):
            part = members[a:a + _CHUNK]
            batch = fit_cells([samples[k] for k in part], axes=axes, bandwidth=H[part[0]], **settings)
            out["density"][part] = batch.density
            if batch.point_mass_probability is not None:
                if out["point_mass_probability"] is None:
                    out["point_mass_probability"] = np.full(K, np.nan)
                out["point_mass_probability"][part] = batch.point_mass_probability
            if batch.density_at_point_mass is not None:
                if out["density_at_point_mass"] is None:
                    out["density_at_point_mass"] = np.full((K,) + batch.density_at_point_mass.shape[1:], np.nan)
                out["density_at_point_mass"][part] = batch.density_at_point_mass
            for k, err in zip(part, batch.errors):
                out["errors"][k] = err
    return out


def difference_test_cells(reference_density, other_density, n_reference, n_other, *, sqrt_det_H, roughness,
                          alpha=0.05, floor=DEFAULT_FLOOR) -> dict:
    """Density differences, z statistics and false-discovery-rate flags for a block of cells.

    Parameters
    ----------
    reference_density, other_density : array, shape (C, *grid)
        The two densities of each cell on one grid, **both smoothed with the
        cell's common bandwidth matrix H** (see :func:`common_bandwidth_cells`).
    n_reference, n_other : array, shape (C,)
        Sample sizes (every row, point-mass rows included).
    sqrt_det_H : array, shape (C,)
        |H|^{1/2} of each cell's common matrix.
    roughness : float
        R(K) of the unit-covariance d-variate kernel (``est.kernel.roughness``;
        (4 pi)^{-d/2} for the Gaussian).
    alpha : float
        False discovery rate over the tested nodes of each cell.
    floor : float
        Nodes are tested where the mean of the two densities is at least
        ``floor`` times its largest value in the cell.

    Returns
    -------
    dict of arrays, each (C, *grid)
        ``difference`` (other minus reference), ``z`` (NaN at untested
        nodes), ``p_value`` (NaN at untested nodes), ``tested`` and
        ``significant`` (bool; False at untested nodes and in a cell with NaN).

    Notes
    -----
    z = (f_o - f_r) / sqrt(R(K) |H|^{-1/2} f (1/n_r + 1/n_o)), f the pooled
    density (n_r f_r + n_o f_o) / (n_r + n_o): the pointwise variance of two
    independent estimates (Wand & Jones 1995, Sec. 4.3) under the null; the local test of Duong, Koch & Wand (2009) [memory]; the
    Benjamini & Hochberg (1995) procedure over each cell's tested nodes,
    through ``statsmodels.stats.multitest.multipletests(method="fdr_bh")``.
    """
    from statsmodels.stats.multitest import multipletests

    if not 0 < alpha < 1:
        raise InputError(f"alpha must lie strictly between 0 and 1, got {alpha}")
    if not 0 < floor < 1:
        raise InputError(f"floor must lie strictly between 0 and 1 (a share of the peak density), got {floor}")
    f_r = np.asarray(reference_density, dtype=float)
    f_o = np.asarray(other_density, dtype=float)
    if f_r.shape != f_o.shape:
        raise InputError(f"the two density stacks have shapes {f_r.shape} and {f_o.shape}; give the same grid")
    C = f_r.shape[0]
    lead = (C,) + (1,) * (f_r.ndim - 1)
    n_r = np.asarray(n_reference, dtype=float).reshape(lead)
    n_o = np.asarray(n_other, dtype=float).reshape(lead)
    root = np.asarray(sqrt_det_H, dtype=float).reshape(lead)
    diff = f_o - f_r
    mean = 0.5 * (np.maximum(f_r, 0.0) + np.maximum(f_o, 0.0))
    with np.errstate(invalid="ignore", divide="ignore"):
        peak = np.nanmax(mean.reshape(C, -1), axis=1).reshape(lead) if mean.size else np.zeros(lead)
        # the variance under the null, with the pooled density (n_r f_r + n_o f_o) / (n_r + n_o) for the
        # common f: a score-type statistic whose denominator does not move with a chance low f_o or f_r
        pooled = (n_r * np.maximum(f_r, 0.0) + n_o * np.maximum(f_o, 0.0)) / (n_r + n_o)
        var = float(roughness) / root * pooled * (1.0 / n_r + 1.0 / n_o)
        tested = (mean >= floor * peak) & (peak > 0) & (var > 0) & np.isfinite(diff) & np.isfinite(var)
        z = np.where(tested, diff / np.sqrt(np.where(tested, var, 1.0)), np.nan)
    p = np.where(tested, 2.0 * stats.norm.sf(np.abs(np.nan_to_num(z))), np.nan)
    significant = np.zeros(f_r.shape, dtype=bool)
    for c in range(C):
        t = tested[c]
        if t.any():
            reject = multipletests(p[c][t], alpha=alpha, method="fdr_bh")[0]
            flags = np.zeros(t.shape, dtype=bool)
            flags[t] = reject
            significant[c] = flags
    return {"difference": diff, "z": z, "p_value": p, "tested": tested, "significant": significant}


def exceedance_from_grids(density, axes, thresholds, *, point_mass_probability=None, density_at_point_mass=None,
                          point_mass_index=None, point_mass_bound=None) -> np.ndarray:
    """Joint exceedance P(X > t componentwise) at ``thresholds`` from a stack of gridded densities.

    Parameters
    ----------
    density : array, shape (K, *grid)
        Densities (the continuous part, integrating to 1 - p, with a point mass).
    axes : list of ndarray
    thresholds : array, shape (m, d)
    point_mass_probability : array (K,), optional
    density_at_point_mass : array (K, *other grid), optional
        The other variables' density on the point mass (integrating to p).
    point_mass_index, point_mass_bound
        Which variable has the point mass, and its bound.

    Returns
    -------
    ndarray, shape (K, m)

    Notes
    -----
    Cumulative trapezoid sums from the last node of each axis
    (:func:`mvkde.products.grid.cumulative`), interpolated multilinearly at
    the thresholds; mass outside the grid is not counted.  The point mass
    adds p x P(others > t_others) where its bound exceeds the threshold.
    """
    axes = [np.asarray(a, dtype=float) for a in axes]
    d = len(axes)
    t = np.atleast_2d(np.asarray(thresholds, dtype=float))
    if t.shape[1] != d:
        raise InputError(f"thresholds have {t.shape[1]} columns for {d} variables")
    density = np.asarray(density, dtype=float)
    out = _upper_at(density, axes, t)
    if point_mass_probability is not None and point_mass_index is not None:
        j = int(point_mass_index)
        active = t[:, j] < float(point_mass_bound)
        p = np.asarray(point_mass_probability, dtype=float)
        if d == 1:
            part = np.repeat(p[:, None], t.shape[0], axis=1)
        else:
            others = [k for k in range(d) if k != j]
            part = _upper_at(np.asarray(density_at_point_mass, dtype=float), [axes[k] for k in others],
                             t[:, others])
        out = out + np.where(active[None, :], part, 0.0)
    return out


def _upper_at(values, axes, t) -> np.ndarray:
    """(K, m): the stack's cumulative exceedance interpolated at the points t."""
    K = values.shape[0]
    cum = _grid.cumulative(values, axes, upper=True, nlead=1)
    moved = np.moveaxis(cum, 0, -1)
    clipped = np.column_stack([np.clip(t[:, j], a[0], a[-1]) for j, a in enumerate(axes)])
    res = interpolate.RegularGridInterpolator(axes, moved, method="linear")(clipped)  # (m, K)
    beyond = np.zeros(t.shape[0], dtype=bool)
    for j, a in enumerate(axes):
        beyond |= t[:, j] > a[-1]
    res[beyond] = 0.0
    return res.T.reshape(K, t.shape[0])


def bootstrap_exceedance_cells(samples, H, thresholds, *, axes, replicates=200, seed=None, keys=None,
                               kernel="gaussian", form="product", bounds=None, boundary=None, point_masses=None,
                               periods=None, sphere=None, engine="auto", names=None, units=None) -> np.ndarray:
    """Bootstrap replicates of the joint exceedance at ``thresholds`` for a block of cells.

    Each cell's sample is resampled with replacement ``replicates`` times;
    each replicate is smoothed with its cell's matrix ``H[c]`` held fixed and
    its exceedance integrated from its grid exactly as
    :func:`exceedance_from_grids` integrates the point estimate.

    Parameters
    ----------
    samples : list of (n_c, d) arrays
    H : array (C, d, d)
    thresholds : array (m, d)
    axes : list of ndarray
        The grid the exceedance is integrated on (the one the point
        estimate uses, so replicates and estimate agree in construction).
    replicates : int
    seed : int, optional
    keys : list of tuple of int, optional
        A key per cell mixed into the seed, so a cell's replicates do not
        depend on which block it falls in (default: its position).
    kernel, form, bounds, boundary, point_masses, periods, sphere, engine, names, units
        As in :func:`mvkde.fit`.

    Returns
    -------
    ndarray, shape (C, replicates, m); NaN for a cell that could not be fitted.

    Notes
    -----
    Two paths give the same numbers:

    * Without bounds, point masses or directions the grid exceedance is a
      linear functional of the density, and the density with H fixed is a
      weighted sum of one kernel per sample point, so a replicate's
      exceedance is sum_i (N_bi / n) q_i(t), with N_bi the multinomial
      resampling counts and q_i(t) = sum_nodes W_t(node) K_H(node - X_i) the
      grid-integrated exceedance of the kernel on point i (W_t: the
      non-negative node weights of the cumulative trapezoid sums and the
      interpolation at t).  q is one weighted kernel sum per cell and
      threshold (through :func:`mvkde.fit` with the nodes as data and W_t as
      weights); the replicates are then one (replicates x n) @ (n x m)
      product.  No replicate grid is built.
    * Otherwise the replicates of all cells form one list of samples sent
      through the batch door (:func:`mvkde.cells.fit_cells`, via
      :func:`densities_with_bandwidth_cells`) in chunks, and each replicate
      grid is integrated.
    """
    replicates = int(replicates)
    if replicates < 2:
        raise InputError(f"replicates must be at least 2, got {replicates}")
    C = len(samples)
    t = np.atleast_2d(np.asarray(thresholds, dtype=float))
    axes = [np.asarray(a, dtype=float) for a in axes]
    H = np.asarray(H, dtype=float)
    keys = list(keys) if keys is not None else [(c,) for c in range(C)]
    base = [] if seed is None else [int(seed)]
    out = np.full((C, replicates, t.shape[0]), np.nan)

    def draws(c, n):
        rng = np.random.default_rng(base + [int(v) for v in np.atleast_1d(keys[c])] + [7])
        return rng.integers(0, n, size=(replicates, n))

    if _is_plain(bounds, point_masses, periods, sphere):
        _bootstrap_plain(out, samples, H, t, axes, draws, kernel, form)
        return out

    j = None if point_masses is None else next((k for k, v in enumerate(point_masses) if v is not None), None)
    bound = None if j is None else float(bounds[j][0])
    settings = dict(kernel=kernel, form=form, bounds=bounds, boundary=boundary, point_masses=point_masses,
                    periods=periods, sphere=sphere, engine=engine, names=names, units=units)
    per_chunk = max(1, _CHUNK // replicates)
    for a in range(0, C, per_chunk):
        cells = list(range(a, min(C, a + per_chunk)))
        reps, hs, groups = [], [], []
        for c in cells:
            x = np.asarray(samples[c], dtype=float)
            reps.extend(x[i] for i in draws(c, x.shape[0]))
            hs.extend([H[c]] * replicates)
            groups.extend([c] * replicates)
        res = densities_with_bandwidth_cells(reps, np.array(hs), axes=axes, groups=groups, **settings)
        ex = exceedance_from_grids(res["density"], axes, t, point_mass_probability=res["point_mass_probability"],
                                   density_at_point_mass=res["density_at_point_mass"], point_mass_index=j,
                                   point_mass_bound=bound)
        out[cells] = ex.reshape(len(cells), replicates, t.shape[0])
    return out



def _bootstrap_plain(out, samples, H, t, axes, draws, kernel, form) -> None:
    """Replicates as resampling counts times each point's grid-integrated kernel mass (fills ``out``)."""
    replicates = out.shape[1]
    weights = [_node_weights_at(axes, row) for row in t]
    for c in range(len(samples)):
        x = np.asarray(samples[c], dtype=float)
        if not np.all(np.isfinite(H[c])):
            continue
        try:
            q = np.column_stack([_kernel_mass(x, H[c], axes, w, kernel, form) for w in weights])
        except (MvkdeError, np.linalg.LinAlgError):
            continue
        n = x.shape[0]
        idx = draws(c, n)
        counts = np.bincount((idx + n * np.arange(replicates)[:, None]).ravel(),
                             minlength=replicates * n).reshape(replicates, n)
        out[c] = counts @ q / n

def _node_weights_at(axes, t_row) -> np.ndarray:
    """W_t on the grid: exceedance_from_grids(f) at t equals sum(W_t * f).

    The cumulative trapezoid sums and the multilinear interpolation act on
    each axis separately, so W_t is the outer product of one weight vector
    per axis (each the 1-D exceedance functional applied to unit vectors).
    """
    out = np.ones(())
    for a, tj in zip(axes, t_row):
        w = _upper_at(np.eye(a.size), [a], np.array([[tj]]))[:, 0]
        out = np.multiply.outer(out, w)
    return out


def _kernel_mass(x, H, axes, W, kernel, form) -> np.ndarray:
    """q_i = sum_nodes W(node) K_H(node - x_i) for every row x_i (K symmetric: a weighted kernel sum
    with the grid nodes as data, evaluated at the sample)."""
    keep = W > 0
    total = float(W.sum())
    if keep.sum() < len(axes) + 1 or total <= 0:
        return np.zeros(x.shape[0])
    mesh = np.meshgrid(*axes, indexing="ij")
    nodes = np.column_stack([m[keep] for m in mesh])
    est = fit(nodes, kernel=kernel, form=form, bandwidth=H, weights=W[keep] / total, engine="exact")
    return est.pdf(x) * total


def probability_ratio_cells(reference_exceedance, other_exceedance, reference_replicates=None,
                            other_replicates=None, *, band_level=0.9) -> dict:
    """Probability ratios other / reference and their bootstrap percentile limits.

    Parameters
    ----------
    reference_exceedance, other_exceedance : array (C, m)
    reference_replicates, other_replicates : array (C, B, m), optional
        Bootstrap replicates of the two exceedances (independent resamples).
    band_level : float
        Coverage of the percentile interval.

    Returns
    -------
    dict
        ``ratio`` (C, m), and ``lower``, ``upper`` (C, m) when replicates are
        given.  0/0 is NaN; p/0 is +inf.
    """
    if not 0 < band_level < 1:
        raise InputError(f"band_level must lie strictly between 0 and 1, got {band_level}")
    out = {"ratio": _ratio(other_exceedance, reference_exceedance)}
    if reference_replicates is not None and other_replicates is not None:
        r = _ratio(other_replicates, reference_replicates)
        a = (1.0 - band_level) / 2.0
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            out["lower"] = np.nanquantile(r, a, axis=1)
            out["upper"] = np.nanquantile(r, 1.0 - a, axis=1)
    return out


def _ratio(num, den) -> np.ndarray:
    num = np.maximum(np.asarray(num, dtype=float), 0.0)
    den = np.maximum(np.asarray(den, dtype=float), 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where((num == 0) & (den == 0), np.nan, num / den)


def kernel_roughness(kernel="gaussian", form="product", d=1) -> float:
    """R(K) of the unit-covariance d-variate kernel (the constant of the pointwise variance).

    Parameters
    ----------
    kernel : str, optional
    form : {'product', 'spherical'}, optional
    d : int, optional

    Returns
    -------
    float
    """
    return float(get_multivariate_kernel(get_kernel(kernel).name, form, d).roughness)


def compare_pairs_cells(reference_samples, other_samples, *, axes, selector="plugin", parametrization="full",
                        H=None, thresholds=None, alpha=0.05, floor=DEFAULT_FLOOR, bootstrap=0, band_level=0.9,
                        seed=None, keys=None, kernel="gaussian", form="product", bounds=None, boundary=None,
                        point_masses=None, periods=None, sphere=None, engine="auto", names=None,
                        units=None) -> dict:
    """Every comparison output for a block of pairs (reference, other), the pair axis first.

    The sequence :func:`mvkde.compare` runs on one pair, for many pairs at
    once: a common H per pair (``selector`` on the pooled sample, or the
    given ``H``), both samples refitted with it in one batch call, the local
    test, and at ``thresholds`` the two exceedances, their bootstrap
    replicates (``bootstrap`` > 0, H held fixed) and the probability ratio.

    Parameters
    ----------
    reference_samples, other_samples : list of ndarray, shape (n_p, d)
        The two samples of each pair P.
    axes : list of ndarray
        The shared grid.
    selector, parametrization, H : str, str, array_like of shape (P, d, d), optional
        Common-bandwidth selection on the pooled sample, or the given matrices.
    thresholds : array_like of shape (m, d), optional
    alpha, floor, bootstrap, band_level, seed
        Local test and bootstrap settings, as for :func:`mvkde.compare`.
    keys : list of tuple, optional
        Per-pair keys of the bootstrap random streams (default ``(p,)``).
    kernel, form, bounds, boundary, point_masses, periods, sphere, engine, names, units
        Estimator settings, as for :func:`mvkde.fit`.

    Returns
    -------
    dict
        ``difference``, ``significant`` (P, *grid), ``H`` (P, d, d),
        ``errors`` (list: None or why the pair has no comparison), and with
        thresholds ``ratio`` (P, m) (``lower``/``upper`` with bootstrap);
        with a point mass ``point_mass_change`` (P,).
    """
    P = len(reference_samples)
    d = len(axes)
    settings = dict(kernel=kernel, form=form, bounds=bounds, boundary=boundary, point_masses=point_masses,
                    periods=periods, sphere=sphere, engine=engine, names=names, units=units)
    shape = tuple(len(a) for a in axes)
    out = {"difference": np.full((P,) + shape, np.nan), "significant": np.zeros((P,) + shape, dtype=bool),
           "H": np.full((P, d, d), np.nan), "errors": [None] * P}
    if P == 0:
        return out
    if H is None:
        H = common_bandwidth_cells(reference_samples, other_samples, axes=axes, selector=selector,
                                   parametrization=parametrization, **settings)
    H = np.asarray(H, dtype=float).reshape(P, d, d)
    out["H"] = H
    res = densities_with_bandwidth_cells(list(reference_samples) + list(other_samples), np.concatenate([H, H]),
                                         axes=axes, groups=list(range(P)) * 2, **settings)
    f = res["density"]
    ok = np.array([res["errors"][p] is None and res["errors"][P + p] is None for p in range(P)])
    for p in np.flatnonzero(~ok):
        out["errors"][p] = res["errors"][p] or res["errors"][P + p]
    n_r = np.array([len(x) for x in reference_samples], dtype=float)
    n_o = np.array([len(x) for x in other_samples], dtype=float)
    with np.errstate(invalid="ignore"):
        root = np.sqrt(np.linalg.det(H))
    test = difference_test_cells(f[:P], f[P:], n_r, n_o, sqrt_det_H=root,
                                 roughness=kernel_roughness(kernel, form, d), alpha=alpha, floor=floor)
    out["difference"] = np.where(ok.reshape((P,) + (1,) * d), test["difference"], np.nan)
    out["significant"] = test["significant"] & ok.reshape((P,) + (1,) * d)
    pmp = res["point_mass_probability"]
    j = None if point_masses is None else next((k for k, v in enumerate(point_masses) if v is not None), None)
    if pmp is not None:
        out["point_mass_change"] = np.where(ok, pmp[P:] - pmp[:P], np.nan)
    if thresholds is not None and len(thresholds):
        t = np.atleast_2d(np.asarray(thresholds, dtype=float))
        bound = None if j is None else float(bounds[j][0])
        ex = exceedance_from_grids(f, axes, t, point_mass_probability=pmp,
                                   density_at_point_mass=res["density_at_point_mass"], point_mass_index=j,
                                   point_mass_bound=bound)
        reps = [None, None]
        if bootstrap:
            keys = list(keys) if keys is not None else [(p,) for p in range(P)]
            boot = bootstrap_exceedance_cells(list(reference_samples) + list(other_samples), np.concatenate([H, H]),
                                              t, axes=axes, replicates=bootstrap, seed=seed,
                                              keys=[tuple(k) + (0,) for k in keys] + [tuple(k) + (1,) for k in keys],
                                              **settings)
            reps = [boot[:P], boot[P:]]
        pr = probability_ratio_cells(ex[:P], ex[P:], *reps, band_level=band_level)
        for name in ("ratio", "lower", "upper"):
            if name in pr:
                out[name] = np.where(ok[:, None], pr[name], np.nan)
        out["exceedance_reference"], out["exceedance_other"] = ex[:P], ex[P:]
    return out
