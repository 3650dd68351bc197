"""Two samples compared: density differences with local significance, probability ratios.

Two layers, one set of formulas:

* :func:`compare` takes two fitted estimates (say a baseline period and a
  recent one, or observations and a model run) and returns a labelled
  :class:`xarray.Dataset`.
* The batch functions take arrays with a leading cell axis, for the
  pipeline's blocks: :func:`common_bandwidth_cells` (one H per cell from the
  pooled sample), :func:`densities_with_bandwidth_cells` (each sample's
  density with its cell's H), :func:`difference_test_cells` (differences, z
  statistics and false-discovery-rate flags), :func:`exceedance_from_grids`,
  :func:`bootstrap_exceedance_cells` (replicates through the batch door) and
  :func:`probability_ratio_cells`.  :func:`compare` is built from them, so
  both doors give the same numbers.

The local test
--------------
At each grid node x the null hypothesis is f_1(x) = f_2(x).  Both samples are
smoothed with one bandwidth matrix H (:func:`common_bandwidth_cells`: the
selector applied to the pooled sample), so under the null
E f_1_hat(x) = E f_2_hat(x) = (f * K_H)(x) exactly and the smoothing bias
cancels; with two different matrices it would not, and the test would
reject where the two estimates are merely smoothed differently.  The
statistic is

    z(x) = (f_2_hat(x) - f_1_hat(x)) / sqrt(R(K) |H|^{-1/2} f_hat(x) (1/n_1 + 1/n_2)),
    f_hat = (n_1 f_1_hat + n_2 f_2_hat) / (n_1 + n_2),

asymptotically standard normal under the null.  The denominator is the
variance of the difference of two independent estimates,
R(K) |H|^{-1/2} [f_1(x)/n_1 + f_2(x)/n_2] (from Var f_hat(x) ~ R(K) f(x) /
(n |H|^{1/2}), Wand & Jones 1995, Sec. 4.3), evaluated under the null with
the pooled estimate for the common f: a score-type denominator that does not
shrink when one sample's estimate is low by chance (with the two estimates
in place of the pooled one, the share of null cells with a flag was 0.060
against 0.050 on one block of 200 cells with samples of 1,000 and 400).  Two-sided p-values are computed only at nodes
where the mean of the two densities is at least ``floor`` times its largest
value on the grid (in the far tails the normal approximation fails and the
variance estimate is near zero), and the Benjamini-Hochberg step-up
procedure (Benjamini & Hochberg 1995, via
``statsmodels.stats.multitest.multipletests(method="fdr_bh")``) controls the
false discovery rate over the tested nodes of each cell.  Nodes below the
floor are never flagged.  This is the local kernel two-sample test of Duong,
Koch & Wand (2009) and Duong (2013) [memory: citation details and the
multiple-comparison procedure used in those papers not checked here], with
Benjamini-Hochberg for the multiple comparison.

The asymptotic variance overstates the exact one (it drops the
-(E f_hat)^2 / n term), so the test is somewhat conservative at small n.
With a point mass the test is on the continuous part (the density above the
point-mass threshold, scaled by 1 - p); the point mass itself is compared by
``point_mass_probability_change``.

Probability ratios and their intervals
--------------------------------------
``probability_ratio`` = P_other(X > t) / P_reference(X > t) componentwise at
each threshold t, both probabilities integrated from the two common-H
densities on the comparison grid (cumulative trapezoid sums,
:func:`mvkde.products.grid.cumulative`, plus the point-mass part).  The
interval is a bootstrap percentile interval: each sample is resampled with
replacement independently of the other, the density of each replicate is
refitted with H **held fixed** at the common matrix (as
:func:`mvkde.products.bootstrap` does: the interval describes the sampling
variability of the smoothed law, not of the selector; Hall 1992), and the
ratio is recomputed exactly as for the point estimate.  A replicate whose
reference probability is 0 gives an infinite ratio; the limits are then
percentiles of the extended values, and a ratio 0/0 is NaN.

References
----------
Benjamini, Y. & Hochberg, Y. (1995). Controlling the false discovery rate: a
practical and powerful approach to multiple testing. JRSS B 57, 289-300.
Duong, T., Koch, I. & Wand, M. P. (2009). Highest density difference region
estimation with application to flow cytometric data. Biometrical Journal 51,
504-521 [memory for the volume and pages].
Duong, T. (2013). Local significant differences from nonparametric
two-sample tests. Journal of Nonparametric Statistics 25, 635-645 [memory].
Hall, P. (1992). Effect of bias estimation on coverage accuracy of bootstrap
confidence intervals for a probability density. Ann. Statist. 20, 675-694.
Wand, M. P. & Jones, M. C. (1995). Kernel Smoothing. Chapman & Hall.
"""


from __future__ import annotations

import numpy as np
import xarray as xr

from .bandwidth import SELECTORS
from .compare_cells import (DEFAULT_FLOOR, bootstrap_exceedance_cells, common_bandwidth_cells,
                            densities_with_bandwidth_cells, difference_test_cells, exceedance_from_grids,
                            probability_ratio_cells)
from .errors import InputError
from .estimator import CAUTION
from .kernels import get_kernel, get_multivariate_kernel
from .units import density_units

__all__ = ["compare", "common_bandwidth_cells", "densities_with_bandwidth_cells", "difference_test_cells",
           "exceedance_from_grids", "bootstrap_exceedance_cells", "probability_ratio_cells",
           "full_sample", "DEFAULT_FLOOR", "COMPARE_CAUTION"]

COMPARE_CAUTION = (
    "Differences and ratios compare two samples as they were recorded: a change can come from the "
    "climate, from the instrument, the station's site or a model's configuration, and a short window "
    "compares sampling noise as much as climate. Flags are a local test with the false discovery rate "
    "controlled over the grid of each cell, not over cells; the ratio interval is a bootstrap "
    "percentile interval of the smoothed laws and widens quickly towards the tails. " + CAUTION
)


# ---------------------------------------------------------------------------
# samples and fit settings of an estimate
# ---------------------------------------------------------------------------

def full_sample(est) -> np.ndarray:
    """Every row of an estimate's sample, the point-mass rows included (at the bound).

    ``est.data`` holds only the continuous part when a variable has a point
    mass; the rows on the point mass are rebuilt from the density on the
    point mass (its sample) with the point-mass variable at its bound.

    Parameters
    ----------
    est : DensityEstimate
        An unweighted estimate.

    Returns
    -------
    ndarray, shape (n, d)
        The continuous rows, then the point-mass rows.
    """
    if est.weights is not None:
        raise InputError("compare: weighted estimates are not supported (resampling and pooling need "
                         "equally weighted rows); fit without weights")
    pm = est._point
    if pm is None or pm.count == 0:
        return np.asarray(est.data, dtype=float)
    rows = np.empty((pm.count, est.d))
    rows[:, pm.index] = pm.bound
    if est.d > 1:
        if pm.estimate is None:
            raise InputError(f"compare: the sample on the point mass of {pm.name} is not available: {pm.problem}")
        others = [k for k in range(est.d) if k != pm.index]
        rows[:, others] = pm.estimate.data
    return np.vstack([np.asarray(est.data, dtype=float), rows])


def _settings(est) -> dict:
    """Keyword arguments of :func:`fit` / :func:`fit_cells` that rebuild an estimate's kind."""
    opts = est._fit_options(list(range(est.d)))
    # est.bounds is the box of the continuous part (above a point-mass threshold): the support's are wanted
    bounds = [tuple(b) for b in est.support.bounds]
    out = dict(kernel=est.kernel.name, form=est.kernel.form, bounds=bounds, boundary=opts["boundary"],
               periods=opts.get("periods"), sphere=opts.get("sphere"), names=list(est.names),
               units=list(est.units), engine=est.engine)
    pm = est.support.point_mass
    out["point_masses"] = None if pm is None else [pm.threshold if j == pm.index else None for j in range(est.d)]
    return out



# ---------------------------------------------------------------------------
# the estimate-level door
# ---------------------------------------------------------------------------

def _common_matrix(reference, other, bandwidth, axes, settings) -> tuple[np.ndarray, str]:
    d = reference.d
    if isinstance(bandwidth, str):
        if bandwidth == "common":
            method = reference.bandwidth.method
            selector = method if method in SELECTORS else "plugin"
        elif bandwidth in SELECTORS:
            selector = bandwidth
        else:
            raise InputError(f"bandwidth must be 'common', a selector name ({', '.join(sorted(SELECTORS))}) "
                             f"or a {d} x {d} matrix, got {bandwidth!r}")
        H = common_bandwidth_cells([full_sample(reference)], [full_sample(other)], axes=axes, selector=selector,
                                   parametrization=reference.bandwidth.parametrization, **settings)[0]
        if not np.all(np.isfinite(H)):
            raise InputError("compare: the bandwidth selector refused the pooled sample; give a matrix")
        return H, f"{selector} selector on the pooled sample"
    H = np.asarray(bandwidth, dtype=float)
    if H.shape != (d, d):
        raise InputError(f"bandwidth matrix must be {d} x {d}, got shape {H.shape}")
    return H, "given"


def _axes(reference, other, size, limits):
    d = reference.d
    size = 64 if size is None else size
    size = [int(size)] * d if np.isscalar(size) else [int(s) for s in size]
    if limits is None or isinstance(limits, dict) or any(l is None for l in limits):
        a, b = reference.default_limits(), other.default_limits()
        default = [(min(x[0], y[0]), max(x[1], y[1])) for x, y in zip(a, b)]
        if limits is None:
            limits = default
        elif isinstance(limits, dict):
            limits = [tuple(limits.get(n, default[j])) for j, n in enumerate(reference.names)]
        else:
            limits = [tuple(l) if l is not None else default[j] for j, l in enumerate(limits)]
    if len(size) != d or len(limits) != d:
        raise InputError(f"size and limits need one entry per variable ({d})")
    return [np.linspace(float(lo), float(hi), s) for (lo, hi), s in zip(limits, size)]


def compare(reference_estimate, other_estimate, *, size=None, limits=None, thresholds=None, alpha=0.05,
            floor=DEFAULT_FLOOR, bootstrap=0, band_level=0.9, seed=None, bandwidth="common") -> xr.Dataset:
    """Compare two fitted estimates: where the density changed, and how much likelier joint events became.

    Parameters
    ----------
    reference_estimate, other_estimate : DensityEstimate
        Fitted with :func:`mvkde.fit` on the same variables with the same
        settings (kernel, bounds, point masses, directions); unweighted.
    size : int or sequence of int
        Grid nodes per variable (default 64).
    limits : sequence of (lo, hi) or dict, optional
        Grid range; default the union of the two estimates' default limits.
    thresholds : array (m, d), optional
        Points t at which P(X > t componentwise) is compared.
    alpha : float
        False discovery rate of the local test over the tested grid nodes.
    floor : float
        Share of the largest mean density below which nodes are not tested.
    bootstrap : int
        Replicates for the probability-ratio interval (0: no interval).
    band_level : float
        Coverage of the percentile interval.
    seed : int, optional
        Seed of the bootstrap.
    bandwidth : "common", selector name or (d, d) array
        The common matrix H both samples are refitted with: ``"common"`` runs
        the reference estimate's selector (``"plugin"`` if its H was given)
        on the pooled sample; a selector name runs that selector on the
        pooled sample; a matrix is used as given.

    Returns
    -------
    xarray.Dataset
        ``density_difference`` and ``density_change_significant`` (and
        ``density_difference_z``) on the grid, one dimension per variable;
        with thresholds, ``probability_ratio`` and, with ``bootstrap``,
        ``probability_ratio_lower`` / ``_upper`` over the ``threshold``
        dimension (coordinates ``threshold_VAR``); with a point mass,
        ``point_mass_probability_change`` (other minus reference);
        ``bandwidth`` (the common H).

    Notes
    -----
    The test, the common matrix and the bootstrap are described in the
    module docstring of :mod:`mvkde.comparison`.

    Examples
    --------
    >>> import numpy as np, mvkde
    >>> from mvkde import compare
    >>> rng = np.random.default_rng(0)
    >>> base = mvkde.fit(rng.normal(size=(800, 2)), names=["tas", "pr"])
    >>> recent = mvkde.fit(rng.normal(size=(800, 2)) + [0.5, 0.0], names=["tas", "pr"])
    >>> out = compare(base, recent, size=32, thresholds=[[1.0, 1.0]], bootstrap=50, seed=1)
    >>> float(out["probability_ratio"][0]) > 1
    True
    """
    ref, oth = reference_estimate, other_estimate
    if list(ref.names) != list(oth.names):
        raise InputError(f"compare: the estimates have different variables {ref.names} and {oth.names}")
    settings = _settings(ref)
    if _settings(oth)["bounds"] != settings["bounds"] or ref.support.point_mass != oth.support.point_mass \
            or ref.periods != oth.periods or ref.kernel.name != oth.kernel.name:
        raise InputError("compare: fit both estimates with the same kernel, bounds, point masses and periods")
    d = ref.d
    axes = _axes(ref, oth, size, limits)
    H, how = _common_matrix(ref, oth, bandwidth, axes, settings)
    x_r, x_o = full_sample(ref), full_sample(oth)
    res = densities_with_bandwidth_cells([x_r, x_o], np.stack([H, H]), axes=axes, **settings)
    for label, err in zip(("reference", "other"), res["errors"]):
        if err is not None:
            raise InputError(f"compare: the {label} sample could not be refitted with the common H: {err}")
    f = res["density"]
    kernel = get_multivariate_kernel(get_kernel(settings["kernel"]).name, settings["form"], d)
    sqrt_det = float(np.sqrt(np.linalg.det(H)))
    test = difference_test_cells(f[:1], f[1:], [x_r.shape[0]], [x_o.shape[0]], sqrt_det_H=[sqrt_det],
                                 roughness=kernel.roughness, alpha=alpha, floor=floor)
    ds = _grid_variables(ref, axes, test, H, how, alpha, floor)
    names = list(ref.names)
    pm = ref.support.point_mass
    j = None if pm is None else pm.index
    if j is not None:
        ds["point_mass_probability_change"] = ((), float(oth.point_mass_probability - ref.point_mass_probability),
                                               {"long_name": f"point-mass probability of {names[j]} (other minus "
                                                             "reference)", "units": "1"})
    if thresholds is not None:
        ds = _threshold_variables(ds, thresholds, f, res, (x_r, x_o), H, axes, settings, j, bootstrap, band_level,
                                  seed)
    ds.attrs.update({"caution": COMPARE_CAUTION, "n_reference": int(x_r.shape[0]), "n_other": int(x_o.shape[0]),
                     "bandwidth_choice": how, "kernel": settings["kernel"]})
    return ds



def _grid_variables(ref, axes, test, H, how, alpha, floor) -> xr.Dataset:
    """The difference, its z statistic and the flags on the grid, and the common H."""
    names = list(ref.names)
    coords = {n: (n, a, {"units": u} if u else {}) for n, a, u in zip(names, axes, ref.units)}
    units = density_units(list(ref.units))
    ds = xr.Dataset(coords=coords)
    ds["density_difference"] = (names, test["difference"][0], {
        "long_name": "density of the other sample minus density of the reference sample, both smoothed "
                     "with the common bandwidth matrix", "units": units})
    ds["density_difference_z"] = (names, test["z"][0], {
        "long_name": "z statistic of the local two-sample test (NaN where the density is below the floor)",
        "units": "1"})
    ds["density_change_significant"] = (names, test["significant"][0], {
        "long_name": "density difference significant by the local test, false discovery rate controlled "
                     "over the grid (Benjamini-Hochberg)", "alpha": float(alpha), "floor": float(floor),
        "floor_note": "nodes where the mean of the two densities is below floor x its largest value are "
                      "not tested (never flagged)",
        "tested_nodes": int(test["tested"][0].sum()),
        "test": "local kernel two-sample z test with a common bandwidth matrix (Duong, Koch & Wand 2009, "
                "Biometrical Journal 51, 504-521); Benjamini & Hochberg (1995) over the tested nodes"})
    ds["bandwidth"] = (("variable_row", "variable_column"), H, {
        "long_name": "common bandwidth matrix H of both samples", "choice": how})
    ds = ds.assign_coords(variable_row=names, variable_column=names)
    return ds

def _threshold_variables(ds, thresholds, f, res, samples, H, axes, settings, j, bootstrap, band_level, seed):
    """Probability ratios (and their interval) at the thresholds, on a ``threshold`` dimension."""
    x_r, x_o = samples
    names = list(settings["names"])
    d = len(names)
    t = np.atleast_2d(np.asarray(thresholds, dtype=float))
    if t.shape[1] != d:
        raise InputError(f"thresholds must be (m, {d}), got shape {t.shape}")
    bound = None if j is None else float(settings["bounds"][j][0])
    ex = exceedance_from_grids(f, axes, t, point_mass_probability=res["point_mass_probability"],
                               density_at_point_mass=res["density_at_point_mass"], point_mass_index=j,
                               point_mass_bound=bound)
    reps = [None, None]
    if bootstrap:
        boot = bootstrap_exceedance_cells([x_r, x_o], np.stack([H, H]), t, axes=axes, replicates=bootstrap,
                                          seed=seed, keys=[(0,), (1,)], **settings)
        reps = [boot[:1], boot[1:]]
    pr = probability_ratio_cells(ex[:1], ex[1:], *reps, band_level=band_level)
    tc = {f"threshold_{n}": ("threshold", t[:, k]) for k, n in enumerate(names)}
    ds = ds.assign_coords(threshold=np.arange(t.shape[0]), **tc)
    attrs = {"long_name": "P_other(X > threshold) / P_reference(X > threshold), componentwise joint "
                          "exceedance", "units": "1"}
    ds["probability_ratio"] = ("threshold", pr["ratio"][0], attrs)
    ds["exceedance_reference"] = ("threshold", ex[0], {"long_name": "joint exceedance of the reference "
                                                       "sample (common H)", "units": "1"})
    ds["exceedance_other"] = ("threshold", ex[1], {"long_name": "joint exceedance of the other sample "
                                                   "(common H)", "units": "1"})
    if bootstrap:
        for side in ("lower", "upper"):
            ds[f"probability_ratio_{side}"] = ("threshold", pr[side][0], {
                "long_name": f"{side} limit of the bootstrap percentile interval of the probability ratio",
                "units": "1", "band_level": float(band_level), "replicates": int(bootstrap),
                "bootstrap": "each sample resampled independently; H held fixed at the common matrix"})
    return ds
