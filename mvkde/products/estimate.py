"""Products derived from a fitted estimate for downstream risk models.

Marginals, conditionals, joint CDF and exceedance probabilities, marginal
quantiles, highest-density-region (HDR) levels, and pointwise uncertainty.

Where a closed form exists it is used:

* The marginal of a Gaussian-kernel estimate over any subset is the
  Gaussian-kernel estimate of the sub-sample with the sub-block of H.  For a
  product kernel whitened by the lower Cholesky factor L, integrating out
  the *trailing* variables is exact too, because the leading block of L is
  the Cholesky factor of the leading block of H and the trailing whitened
  coordinates integrate to one one at a time.
* For product kernels with a diagonal H (and the Gaussian kernel in one
  dimension) the CDF is a sum of products of integrated kernels.

Everything else is computed from the density on a fine grid (cumulative
trapezoid sums and multilinear interpolation); the grid's size is an
argument, and its limits extend past the data by the kernel's reach, so the
mass outside is negligible.

Uncertainty (standard error, bootstrap) is in :mod:`mvkde.products.uncertainty`,
wind-rose tables in :mod:`mvkde.products.wind_rose`.

References
----------
Hyndman, R. J. (1996). Computing and graphing highest density regions.
The American Statistician 50, 120-126.
"""

from __future__ import annotations

import numpy as np
import xarray as xr
from scipy import interpolate

from ..errors import InputError
from ..progress import Progress
from ..units import density_units
from . import grid as _grid

DEFAULT_GRID = {1: 2048, 2: 256, 3: 64, 4: 24}
DEFAULT_HDR_MASSES = (0.5, 0.9, 0.99)


def _names_index(est, names) -> list[int]:
    if isinstance(names, str):
        names = [names]
    names = list(names)
    unknown = [n for n in names if n not in est.names]
    if unknown:
        raise InputError(f"unknown variable(s) {unknown}: the estimate has {est.names}")
    if len(set(names)) != len(names) or not names:
        raise InputError(f"name each variable once, got {names}")
    return [est.names.index(n) for n in names]


def _is_diagonal(H) -> bool:
    off = H - np.diag(np.diag(H))
    return bool(np.all(off == 0.0))


def _plain(est) -> bool:
    """No boundary correction and no point mass: the raw kernel sum."""
    return getattr(est, "boundary", "none") in (None, "none") and \
        getattr(est, "point_mass_probability", None) in (None, 0.0)


# ---------------------------------------------------------------------------
# marginals
# ---------------------------------------------------------------------------

def marginal_is_exact(est, idx) -> bool:
    """Whether the marginal of the variables ``idx`` is an estimate of the same kind.

    Parameters
    ----------
    est : DensityEstimate
    idx : list of int
        Indices of the kept variables.

    Returns
    -------
    bool
        True for the Gaussian kernel, a product kernel with the kept variables
        leading (or no H cross terms between kept and dropped), a radial kernel
        when nothing is dropped; directional factors drop exactly, a spherical pair as one.
    """
    if getattr(est, "is_directional", False):
        return _directional_marginal_is_exact(est, idx)
    if est.kernel.name == "gaussian":
        return True
    if est.kernel.is_radial:
        return len(idx) == est.d
    # product kernels: kept variables leading, or H block-diagonal between kept and dropped
    dropped = [j for j in range(est.d) if j not in idx]
    if not dropped:
        return True
    if sorted(idx) == list(range(len(idx))) and list(idx) == sorted(idx):
        return True
    return bool(np.all(est.H[np.ix_(idx, dropped)] == 0.0))


def _linear_indices(est) -> list[int]:
    sphere = getattr(est, "sphere", None) or ()
    return [j for j, name in enumerate(est.names) if est.periods[j] is None and name not in sphere]


def _directional_marginal_is_exact(est, idx) -> bool:
    """Directional factors are separate factors of the product kernel: dropping them is
    exact; the linear block follows the usual rules; the spherical pair goes as one."""
    if est.sphere is not None and sum(est.names[j] in est.sphere for j in idx) == 1:
        return False
    lin = _linear_indices(est)
    kept = [j for j in idx if j in lin]
    dropped = [j for j in lin if j not in idx]
    if not kept or not dropped or est.kernel.name == "gaussian":
        return True
    if est.kernel.is_radial:
        return False
    pos = [lin.index(j) for j in kept]
    if pos == list(range(len(pos))):
        return True
    return bool(np.all(est.H[np.ix_(kept, dropped)] == 0.0))


def node_weights(g: xr.DataArray) -> np.ndarray:
    """Integration weight of every node of a gridded density (same shape as ``g``).

    Trapezoid weights along each axis; along a latitude/longitude pair
    carrying a ``cell_area`` coordinate, the node areas (see
    :mod:`mvkde.products.grid`).

    Parameters
    ----------
    g : xarray.DataArray
        A density on a grid, one dimension per variable.

    Returns
    -------
    ndarray
    """
    return _grid.GridWeights([g[d].values for d in g.dims], _sphere_axes(g)).full()


def _sphere_axes(g: xr.DataArray):
    if "cell_area" not in g.coords:
        return None
    lat, lon = g["cell_area"].dims
    return list(g.dims).index(lat), list(g.dims).index(lon)


def marginal(est, names):
    """The marginal estimate of ``names`` as a new estimate (exact cases only).

    Parameters
    ----------
    est : DensityEstimate
    names : str or list of str
        Variables to keep.

    Returns
    -------
    DensityEstimate
        Refitted on the kept columns with H's sub-block; InputError when not
        exact (:func:`marginal_is_exact`).
    """
    idx = _names_index(est, names)
    if not marginal_is_exact(est, idx):
        raise InputError(
            f"the marginal of {list(names)} is not an estimate of the same kind for a "
            f"{est.kernel.form} {est.kernel.name} kernel with this H: use marginal_grid(...) "
            "(numerical, always available), or put these variables first when fitting"
        )
    if est.support.point_mass is not None:
        return est._point_mass_marginal(idx)
    return est._refit(est.data[:, idx], idx, est.weights)


def marginal_grid(est, names, size=None, limits=None) -> xr.DataArray:
    """Marginal density of ``names`` by integrating the joint density on a grid.

    With a point mass on a variable that is integrated out, the density of
    the kept variables on the point mass is added, so the marginal integrates
    to 1; a kept point-mass variable's marginal is that of its continuous part.

    Parameters
    ----------
    est : DensityEstimate
    names : str or list of str
        Variables to keep, in the order of the result's dimensions.
    size, limits : optional
        The joint grid: nodes per variable (int or sequence; by default 2048, 256, 64 or 24
        for d = 1 to 3, else 24) and (lo, hi) per variable (sequence, or dict by name).

    Returns
    -------
    xarray.DataArray
    """
    idx = _names_index(est, names)
    support = est.support
    if support.sphere is not None and sum(est.names[j] in support.sphere for j in idx) == 1:
        raise InputError(f"{', '.join(support.sphere)} form one location on the sphere: keep both or neither")
    full = est.grid(size or DEFAULT_GRID.get(est.d, 24), limits)
    axes = [full[n].values for n in est.names]
    vals = _grid.integrate_out(full.values, axes, idx, sphere=_sphere_axes(full))
    pm = support.point_mass
    if pm is not None and pm.index not in idx and est.point_mass_probability > 0 and est.d > 1:
        others = [k for k in range(est.d) if k != pm.index]
        on_mass = est.point_mass_grid([full.sizes[est.names[k]] for k in others],
                                      limits=[(axes[k][0], axes[k][-1]) for k in others])
        vals = vals + _grid.integrate_out(on_mass.values, [axes[k] for k in others],
                                          [others.index(k) for k in idx])
    # integration keeps the kept axes in their original order; reorder as requested
    order = np.argsort(np.argsort(idx))
    vals = np.transpose(vals, order) if vals.ndim > 1 else vals
    kept = [est.names[j] for j in idx]
    coords = {n: full[n] for n in kept}
    if support.sphere is not None and support.sphere[0] in kept:
        coords["cell_area"] = full["cell_area"]
    attrs = dict(full.attrs)
    attrs["long_name"] = "marginal probability density of " + ", ".join(kept)
    attrs["units"] = support.density_units([est.units[j] for j in idx], kept)
    if pm is not None and pm.index in idx:
        attrs["note"] = f"continuous part of {pm.name}; its point mass is point_mass_probability"
    return xr.DataArray(vals, dims=kept, coords=coords, name="marginal_density", attrs=attrs)


# ---------------------------------------------------------------------------
# CDF and exceedance
# ---------------------------------------------------------------------------

def _exact_cdf_available(est) -> bool:
    return _plain(est) and (not est.kernel.is_radial) and _is_diagonal(est.H) \
        and est.kernel.univariate.order in (2, 4) and not getattr(est, "is_directional", False)


def _refuse_sphere(est, what: str) -> None:
    if getattr(est, "sphere", None) is not None:
        raise InputError(f"{what} is not defined for a location on the sphere ({', '.join(est.sphere)}): "
                         "use marginal_grid, conditional or hdr_levels, or drop the location")


def _exact_cdf(est, pts, upper: bool) -> np.ndarray:
    k = est.kernel.univariate
    h = np.sqrt(np.diag(est.H))
    n = est.n
    w = np.full(n, 1.0 / n) if est.weights is None else est.weights
    out = np.empty(pts.shape[0])
    step = max(1, (1 << 21) // n)
    for a in range(0, pts.shape[0], step):
        p = pts[a:a + step]
        prod = np.ones((p.shape[0], n))
        for j in range(est.d):
            u = (p[:, None, j] - est.data[None, :, j]) / h[j]
            c = k.unit_cdf(u)
            prod *= (1.0 - c) if upper else c
        out[a:a + step] = prod @ w
    return out


def _grid_cumulative(est, size, limits, upper: bool):
    g = est.grid(size or DEFAULT_GRID.get(est.d, 24), limits)
    axes = [g[n].values for n in est.names]
    return axes, _grid.cumulative(g.values, axes, upper=upper), g


def _interp(axes, vals, pts, upper: bool):
    clipped = np.column_stack([np.clip(pts[:, j], axes[j][0], axes[j][-1]) for j in range(len(axes))])
    f = interpolate.RegularGridInterpolator(axes, vals, method="linear")
    out = f(clipped)
    # beyond the grid in the direction of integration the probability is (numerically) zero
    for j, ax in enumerate(axes):
        out[(pts[:, j] > ax[-1]) if upper else (pts[:, j] < ax[0])] = 0.0
    return out


def _point_mass_part(est, pts, upper: bool, size) -> np.ndarray:
    """Probability carried by the point mass: at the bound of one variable, with the
    other variables following their density on the point-mass part."""
    p = est.point_mass_probability
    extra = np.zeros(pts.shape[0])
    if not p:
        return extra
    pm = est._point
    j = pm.index
    # X_j = bound exceeds x_j only below the bound; it is <= x_j from the bound on
    active = pts[:, j] < pm.bound if upper else pts[:, j] >= pm.bound
    if not active.any():
        return extra
    if est.d == 1:
        extra[active] = p
        return extra
    if pm.estimate is None:
        raise InputError(f"the density on the point mass of {pm.name} is not available: {pm.problem}")
    others = [k for k in range(est.d) if k != j]
    sub = pts[active][:, others]
    part = exceedance(pm.estimate, sub, size=size) if upper else cdf(pm.estimate, sub, size=size)
    extra[active] = p * part
    return extra


def _joint_probability(est, points, upper: bool, size, limits, what: str) -> np.ndarray:
    pts = est._points(points)
    _refuse_sphere(est, what)
    if _exact_cdf_available(est):
        return _exact_cdf(est, pts, upper=upper)
    if est.n == 0:  # every value at the point mass: no continuous part
        return _point_mass_part(est, pts, upper, size)
    axes, vals, _ = _grid_cumulative(est, size, limits, upper=upper)
    return _interp(axes, vals, pts, upper=upper) + _point_mass_part(est, pts, upper, size)


def cdf(est, points, *, size=None, limits=None) -> np.ndarray:
    """P(X_1 <= x_1, ..., X_d <= x_d) at each point (point masses included).

    Parameters
    ----------
    est : DensityEstimate
    points : array_like, shape (m, d), or pandas.DataFrame
    size, limits : optional
        The joint grid: nodes per variable (int or sequence; by default 2048, 256, 64 or 24
        for d = 1 to 3, else 24) and (lo, hi) per variable (sequence, or dict by name).
        Used only when no closed form applies (see the module docstring).

    Returns
    -------
    ndarray, shape (m,)
    """
    return _joint_probability(est, points, False, size, limits, "the joint CDF")


def exceedance(est, points, *, size=None, limits=None) -> np.ndarray:
    """P(X_1 > x_1, ..., X_d > x_d) at each point (joint exceedance, point masses included).

    Parameters
    ----------
    est : DensityEstimate
    points : array_like, shape (m, d), or pandas.DataFrame
    size, limits : optional
        The joint grid: nodes per variable (int or sequence; by default 2048, 256, 64 or 24
        for d = 1 to 3, else 24) and (lo, hi) per variable (sequence, or dict by name).
        Used only when no closed form applies (see the module docstring).

    Returns
    -------
    ndarray, shape (m,)
    """
    return _joint_probability(est, points, True, size, limits, "the joint exceedance probability")


def probability_grid(est, kind="exceedance", size=None, limits=None) -> xr.DataArray:
    """Joint CDF or exceedance probability at every node of a grid.

    Parameters
    ----------
    est : DensityEstimate
    kind : {'exceedance', 'cdf'}
    size, limits : optional
        The joint grid: nodes per variable (int or sequence; by default 2048, 256, 64 or 24
        for d = 1 to 3, else 24) and (lo, hi) per variable (sequence, or dict by name).

    Returns
    -------
    xarray.DataArray
        Probabilities clipped to [0, 1], named ``kind``.
    """
    if kind not in ("cdf", "exceedance"):
        raise InputError(f"kind must be 'cdf' or 'exceedance', got {kind!r}")
    axes, vals, g = _grid_cumulative(est, size, limits, upper=(kind == "exceedance"))
    long = ("joint non-exceedance probability P(X <= x)" if kind == "cdf"
            else "joint exceedance probability P(X > x)")
    attrs = {"long_name": long + " of " + ", ".join(est.names), "units": "1",
             "caution": g.attrs.get("caution", "")}
    return xr.DataArray(np.clip(vals, 0.0, 1.0), dims=g.dims, coords=g.coords, name=kind, attrs=attrs)


# ---------------------------------------------------------------------------
# quantiles
# ---------------------------------------------------------------------------

def quantiles(est, name, probs, *, size=None, limits=None) -> np.ndarray:
    """Marginal quantiles of one variable (inverse of its marginal CDF, point mass included).

    With ``size`` and ``limits`` of a joint grid (per variable), the marginal
    is integrated from that grid, exactly as a workflow's ``quantile_*``
    products are; without them, an exact marginal is evaluated on 4096 nodes
    where one exists, else the joint grid of the default size is integrated.

    Parameters
    ----------
    est : DensityEstimate
    name : str
    probs : float or array_like of float
        Probabilities strictly between 0 and 1.
    size, limits : optional
        The joint grid: nodes per variable (int or sequence; by default 2048, 256, 64 or 24
        for d = 1 to 3, else 24) and (lo, hi) per variable (sequence, or dict by name).

    Returns
    -------
    ndarray, shape (len(probs),)
    """
    probs = np.atleast_1d(np.asarray(probs, dtype=float))
    k = _names_index(est, [name])[0]
    pm = est.support.point_mass
    if est.n == 0 and pm is not None:  # every value at the point mass
        if k == pm.index:
            return np.full(probs.shape, float(pm.bound))
        if est._point.estimate is None:
            raise InputError(f"the density of {name} on the point mass is not available: {est._point.problem}")
        return quantiles(est._point.estimate, name, probs)
    if size is None and limits is None and (est.d == 1 or marginal_is_exact(est, [k])) and pm is None:
        m = (est if est.d == 1 else marginal(est, [name])).grid(4096)
    else:
        m = marginal_grid(est, [name], size, limits)
    base, bound = None, float("nan")
    if pm is not None and pm.index == k:
        base, bound = est.point_mass_probability, pm.bound
    return _grid.quantiles(m.values, m[name].values, probs, base=base, bound=bound)


# ---------------------------------------------------------------------------
# highest density regions
# ---------------------------------------------------------------------------

def hdr_levels(est, masses=DEFAULT_HDR_MASSES, *, size=None, limits=None) -> np.ndarray:
    """Density levels enclosing ``masses`` of the probability (highest-density regions).

    Of the gridded density (the continuous part when there is a point mass,
    normalised to its own mass), with the node weights of
    :func:`mvkde.products.grid.hdr_levels` (Hyndman 1996).

    Parameters
    ----------
    est : DensityEstimate
    masses : sequence of float
        Fractions strictly between 0 and 1.
    size, limits : optional
        The joint grid: nodes per variable (int or sequence; by default 2048, 256, 64 or 24
        for d = 1 to 3, else 24) and (lo, hi) per variable (sequence, or dict by name).

    Returns
    -------
    ndarray, shape (len(masses),)
    """
    g = est.grid(size or DEFAULT_GRID.get(est.d, 24), limits)
    return _grid.hdr_levels(g.values, node_weights(g), masses)


def mass_above(est, level, *, size=None, limits=None) -> np.ndarray:
    """Probability mass of the region where the density is at least ``level``.

    Parameters
    ----------
    est : DensityEstimate
    level : float or array_like of float
    size, limits : optional
        The joint grid: nodes per variable (int or sequence; by default 2048, 256, 64 or 24
        for d = 1 to 3, else 24) and (lo, hi) per variable (sequence, or dict by name).

    Returns
    -------
    ndarray, shape (len(level),)
    """
    g = est.grid(size or DEFAULT_GRID.get(est.d, 24), limits)
    return _grid.mass_above(g.values, node_weights(g), level)


# ---------------------------------------------------------------------------
# conditionals
# ---------------------------------------------------------------------------

def conditional(est, given: dict, *, size=None, limits=None) -> xr.DataArray:
    """Density of the other variables given values (or (lo, hi) bins) of ``given``.

    ``given`` maps variable names to a value or to a (lo, hi) bin; the result
    is normalised on the grid of the remaining variables so it integrates to 1.

    Parameters
    ----------
    est : DensityEstimate
    given : dict
        Variable name -> value or (lo, hi) bin (integrated on 65 nodes).
    size, limits : optional
        The joint grid: nodes per variable (int or sequence; by default 2048, 256, 64 or 24
        for d = 1 to 3, else 24) and (lo, hi) per variable (sequence, or dict by name).
        Here ``size`` is per remaining variable.

    Returns
    -------
    xarray.DataArray
        Its attribute ``conditioning_density`` is the normalising constant.
    """
    if not isinstance(given, dict) or not given:
        raise InputError("given must be a dict {variable: value or (lo, hi)}")
    gidx = _names_index(est, list(given))
    rest = [j for j in range(est.d) if j not in gidx]
    if not rest:
        raise InputError("conditioning on every variable leaves nothing to describe")
    size = size or DEFAULT_GRID.get(len(rest), 24)
    lims = est.default_limits() if limits is None else limits
    if isinstance(lims, dict):
        base = est.default_limits()
        lims = [tuple(lims.get(n, base[j])) for j, n in enumerate(est.names)]
    sizes = [size] * len(rest) if np.isscalar(size) else list(size)
    axes = {}
    for j, s in zip(rest, sizes):
        axes[j] = np.linspace(lims[j][0], lims[j][1], int(s))
    bins = {}
    for name, j in zip(given, gidx):
        v = given[name]
        if np.ndim(v) == 0:
            axes[j] = np.array([float(v)])
        else:
            lo, hi = map(float, v)
            if not lo < hi:
                raise InputError(f"bin for {name} must satisfy lo < hi, got {v}")
            axes[j] = np.linspace(lo, hi, 65)
            bins[j] = True
    ordered = [axes[j] for j in range(est.d)]
    mesh = np.meshgrid(*ordered, indexing="ij")
    pts = np.column_stack([m.ravel() for m in mesh])
    vals = _pdf_with_progress(est, pts, "conditional density").reshape([a.size for a in ordered])
    for j in sorted(gidx, reverse=True):
        if j in bins:
            vals = np.trapezoid(vals, ordered[j], axis=j)
        else:
            vals = np.take(vals, 0, axis=j)
    rest_axes = [axes[j] for j in rest]
    total = vals
    for ax in reversed(range(len(rest))):
        total = np.trapezoid(total, rest_axes[ax], axis=ax)
    if not total > 0:
        raise InputError(f"the estimate has no mass at the given values {given}: nothing to condition on")
    names = [est.names[j] for j in rest]
    attrs = {"long_name": f"conditional density of {', '.join(names)} given "
                          + ", ".join(f"{k}={v}" for k, v in given.items()),
             "units": density_units([est.units[j] for j in rest]),
             "conditioning_density": float(total)}
    return xr.DataArray(vals / total, dims=names, coords={n: (n, a) for n, a in zip(names, rest_axes)},
                        name="conditional_density", attrs=attrs)


def _pdf_with_progress(est, pts, label: str, pieces: int = 20) -> np.ndarray:
    """``est.pdf(pts)`` in pieces, with a progress bar where a terminal is attached (many points take seconds)."""
    if len(pts) < 50_000:
        return est.pdf(pts)
    chunks = np.array_split(np.arange(len(pts)), pieces)
    progress = Progress(len(chunks), label=f"parts of the {label}", prefix="mvkde", log_lines=False)
    out = np.empty(len(pts))
    for idx in chunks:
        out[idx] = est.pdf(pts[idx])
        progress.update()
    return out
