"""``fit`` and the fitted estimate.

The estimate is

    f(x) = sum_i w_i |H|^{-1/2} K(L^{-1} (x - X_i)),      H = L L',  sum_i w_i = 1,

with K a unit-covariance kernel (product or spherical form), so that H is the
covariance matrix of the scaled kernel whatever the kernel (Wand & Jones
1995, Ch. 4).  With the Gaussian kernel this is exactly
scipy.stats.gaussian_kde with ``covariance = H``.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import xarray as xr

from . import boundary as _boundary
from . import engines as _engines
from . import products as _products
from .bandwidth import BandwidthMatrix, BandwidthResult, PARAMETRIZATIONS, select
from .errors import InputError, check_choice
from .kernels import FORMS, get_kernel, get_multivariate_kernel
from .units import density_units

__all__ = ["fit", "DensityEstimate", "CAUTION"]

CAUTION = (
    "A kernel density estimate summarises the sample it was given: tails beyond the observed "
    "range are extrapolation, and short records understate extremes. It supports, and does not "
    "replace, the design values, codes and licensed engineering or hydrological practice that "
    "apply locally; defer to them for any decision that affects safety."
)


# ---------------------------------------------------------------------------
# input handling
# ---------------------------------------------------------------------------

def _as_table(data, names=None, units=None):
    """(values (n, d) float, names, units) from an array, DataFrame or Dataset."""
    found_units: dict[str, str] = {}
    if isinstance(data, xr.Dataset):
        cols = list(data.data_vars)
        if not cols:
            raise InputError("data: the Dataset has no data variables")
        sizes = {c: data[c].size for c in cols}
        if len(set(sizes.values())) != 1:
            raise InputError(f"data: the Dataset's variables have different sizes {sizes}; "
                             "select variables on the same dimensions")
        values = np.column_stack([_numeric(data[c].values.ravel(), c) for c in cols])
        found_units = {c: str(data[c].attrs.get("units", "")) for c in cols}
        found_names = [str(c) for c in cols]
    elif isinstance(data, xr.DataArray):
        name = str(data.name) if data.name is not None else "x0"
        values = _numeric(data.values.ravel(), name)[:, None]
        found_units = {name: str(data.attrs.get("units", ""))}
        found_names = [name]
    elif isinstance(data, pd.DataFrame):
        cols = list(data.columns)
        values = np.column_stack([_numeric(data[c].to_numpy(), c) for c in cols]) if cols else np.empty((0, 0))
        found_names = [str(c) for c in cols]
        found_units = dict(data.attrs.get("units", {})) if isinstance(data.attrs.get("units"), dict) else {}
    elif isinstance(data, pd.Series):
        name = str(data.name) if data.name is not None else "x0"
        values = _numeric(data.to_numpy(), name)[:, None]
        found_names = [name]
    else:
        try:
            values = np.asarray(data, dtype=float)
        except (TypeError, ValueError):
            raise InputError("data must be a numeric (n, d) array, a pandas DataFrame or an xarray Dataset") from None
        if values.ndim == 1:
            values = values[:, None]
        if values.ndim != 2:
            raise InputError(f"data must be two-dimensional (n samples, d variables), got shape {values.shape}")
        found_names = [f"x{j}" for j in range(values.shape[1])]
    d = values.shape[1] if values.ndim == 2 else 0
    if d == 0:
        raise InputError("data have no variables")
    if names is not None:
        names = [str(n) for n in names]
        if len(names) != d:
            raise InputError(f"names has {len(names)} entries but the data have {d} variables")
        found_names = names
    if len(set(found_names)) != d:
        raise InputError(f"variable names must be distinct, got {found_names}")
    if units is None:
        units = [found_units.get(n, "") for n in found_names]
    elif isinstance(units, dict):
        units = [str(units.get(n, "")) for n in found_names]
    else:
        units = [str(u) for u in units]
        if len(units) != d:
            raise InputError(f"units has {len(units)} entries but the data have {d} variables")
    return values, found_names, units


def _numeric(col, name) -> np.ndarray:
    try:
        return np.asarray(col, dtype=float)
    except (TypeError, ValueError):
        raise InputError(f"variable {name!r} is not numeric: convert or drop it before fitting") from None


def _check_finite(values, names):
    bad = ~np.isfinite(values)
    if bad.any():
        parts = []
        for j, name in enumerate(names):
            nan = int(np.isnan(values[:, j]).sum())
            inf = int(np.isinf(values[:, j]).sum())
            if nan:
                parts.append(f"{nan} NaN in {name}")
            if inf:
                parts.append(f"{inf} infinite in {name}")
        raise InputError(f"data contain missing or infinite values ({', '.join(parts)}): "
                         "drop or fill them before fitting")


def _check_weights(weights, n):
    if weights is None:
        return None
    try:
        w = np.asarray(weights, dtype=float).ravel()
    except (TypeError, ValueError):
        raise InputError("weights must be numbers") from None
    if w.shape[0] != n:
        raise InputError(f"weights has {w.shape[0]} entries but the data have {n} rows")
    if not np.all(np.isfinite(w)):
        raise InputError("weights contain NaN or infinite values")
    if np.any(w < 0):
        raise InputError(f"weights must be non-negative ({int((w < 0).sum())} negative)")
    total = w.sum()
    if total <= 0:
        raise InputError("weights are all zero: at least one sample must carry weight")
    return w / total


# ---------------------------------------------------------------------------
# fit
# ---------------------------------------------------------------------------

def fit(data, *, kernel="gaussian", form="product", bandwidth="normal", parametrization="full",
        bounds=None, boundary=None, weights=None, periods=None, engine="auto",
        names=None, units=None) -> "DensityEstimate":
    """Fit a multivariate kernel density estimate.

    Parameters
    ----------
    data : (n, d) array, pandas DataFrame or xarray Dataset
        Samples in rows, variables in columns.  Names come from the columns
        or data variables (``x0, x1, ...`` for an unnamed array), units from
        the variables' ``units`` attributes.
    kernel : str
        One of ``uniform, triangular, epanechnikov, biweight, triweight,
        cosine, gaussian``; the opt-in fourth-order kernels ``gaussian4`` and
        ``epanechnikov4`` can go negative (see ``negative_mass``).
    form : {"product", "spherical"}
        Product of univariate kernels, or the radially symmetric kernel.
    bandwidth : str or (d, d) array
        A selector name (``"normal"``, ...) or a symmetric positive definite
        bandwidth matrix H, the covariance of the scaled kernel.
    parametrization : {"full", "diagonal", "scalar"}
        Shape of the matrix a selector may choose.
    bounds : list of (lo, hi) or None
        Per-variable support; None for an open side.
    boundary : str or None
        Boundary-correction method for bounded variables.
    weights : (n,) array or None
        Non-negative sample weights (normalised to sum to one).
    periods : list of float or None
        Period per variable for circular variables, None for linear ones.
    engine : {"auto", "exact", ...}
        Evaluation engine; "auto" chooses and records why.
    names, units : list of str, optional
        Override names and units found in ``data``.

    Returns
    -------
    DensityEstimate

    Examples
    --------
    >>> import numpy as np, mvkde
    >>> x = np.random.default_rng(1).normal(size=(500, 2))
    >>> est = mvkde.fit(x, kernel="epanechnikov")
    >>> est.names
    ['x0', 'x1']
    >>> float(est.grid(32).sum()) > 0
    True
    """
    values, names, units = _as_table(data, names, units)
    n, d = values.shape
    _check_finite(values, names)
    if n < d + 1:
        raise InputError(f"data have {n} samples for {d} variables: at least {d + 1} are needed")
    w = _check_weights(weights, n)
    mk = get_multivariate_kernel(get_kernel(kernel).name, check_choice("form", form, FORMS), d)
    parametrization = check_choice("parametrization", parametrization, PARAMETRIZATIONS)
    engine = _engines.validate_engine(engine)

    box = _boundary.parse_bounds(bounds, d, names)
    _boundary.check_inside(values, box, names)
    method = _boundary.validate_method(boundary, box)
    if periods is not None:
        if len(list(periods)) != d:
            raise InputError(f"periods has {len(list(periods))} entries but the data have {d} variables")
        if any(p is not None for p in periods):
            raise InputError("circular variables (periods) are not supported yet; pass periods=None")

    if isinstance(bandwidth, str):
        result = select(bandwidth, values, w, kernel=mk.name, form=mk.form,
                        parametrization=parametrization, names=names)
    elif isinstance(bandwidth, BandwidthResult):
        result = bandwidth
    else:
        result = BandwidthResult(BandwidthMatrix.from_matrix(bandwidth, d), "given", parametrization)

    return DensityEstimate(values, w, names, units, mk, result, box, method, engine)


# ---------------------------------------------------------------------------
# the estimate
# ---------------------------------------------------------------------------

class DensityEstimate:
    """A fitted kernel density estimate.  Build it with :func:`mvkde.fit`."""

    def __init__(self, data, weights, names, units, kernel, bandwidth: BandwidthResult,
                 bounds, boundary, engine):
        self.data = data
        self.weights = weights
        self.names = list(names)
        self.units = list(units)
        self.kernel = kernel
        self.bandwidth = bandwidth
        self.bounds = bounds
        self.boundary = boundary
        self.engine = engine
        self.attrs: dict = {}

    # -- basic facts -----------------------------------------------------
    @property
    def H(self) -> np.ndarray:
        """The d x d bandwidth matrix: the covariance of the scaled kernel."""
        return self.bandwidth.H

    @property
    def d(self) -> int:
        return self.data.shape[1]

    @property
    def n(self) -> int:
        return self.data.shape[0]

    @property
    def n_effective(self) -> float:
        if self.weights is None:
            return float(self.n)
        return float(1.0 / np.sum(self.weights ** 2))

    def __repr__(self) -> str:
        return (f"DensityEstimate(names={self.names}, n={self.n}, kernel={self.kernel.name!r}, "
                f"form={self.kernel.form!r}, bandwidth={self.bandwidth.method!r})")

    # -- evaluation --------------------------------------------------------
    def _points(self, points) -> np.ndarray:
        if isinstance(points, pd.DataFrame):
            missing = [n for n in self.names if n not in points.columns]
            if missing:
                raise InputError(f"points lack column(s) {', '.join(missing)}; the estimate has {self.names}")
            pts = points[self.names].to_numpy(dtype=float)
        else:
            try:
                pts = np.asarray(points, dtype=float)
            except (TypeError, ValueError):
                raise InputError("points must be numbers: an (m, d) array or a DataFrame") from None
            if pts.ndim == 0:
                pts = pts.reshape(1, 1)
            if pts.ndim == 1:
                pts = pts[:, None] if self.d == 1 else pts[None, :]
        if pts.ndim != 2 or pts.shape[1] != self.d:
            raise InputError(f"points have shape {pts.shape} but the estimate has {self.d} variables "
                             f"({', '.join(self.names)}): pass an (m, {self.d}) array")
        return pts

    def _evaluate(self, pts: np.ndarray, log: bool = False) -> np.ndarray:
        values, choice = _engines.evaluate_points(pts, self.data, self.weights, self.bandwidth.matrix,
                                                  self.kernel, self.engine, log=log)
        self.attrs.update(choice.as_attrs())
        return self._outside_support(pts, values, -np.inf if log else 0.0)

    def _evaluate_grid(self, axes) -> np.ndarray:
        values, choice = _engines.evaluate_grid(axes, self.data, self.weights, self.bandwidth.matrix,
                                                self.kernel, self.engine)
        self.attrs.update(choice.as_attrs())
        mesh = np.meshgrid(*axes, indexing="ij")
        pts = np.column_stack([g.ravel() for g in mesh])
        return self._outside_support(pts, values.ravel(), 0.0).reshape(values.shape)

    def _outside_support(self, pts, values, fill):
        if not _boundary.has_bounds(self.bounds):
            return values
        outside = np.zeros(pts.shape[0], dtype=bool)
        for j, (lo, hi) in enumerate(self.bounds):
            outside |= (pts[:, j] < lo) | (pts[:, j] > hi)
        values = values.copy()
        values[outside] = fill
        return values

    def pdf(self, points) -> np.ndarray:
        """Density at ``points`` ((m, d) array or DataFrame with the variables as columns)."""
        return self._evaluate(self._points(points))

    def logpdf(self, points) -> np.ndarray:
        """Log density; for the Gaussian kernel a log-sum-exp that stays finite in far tails."""
        return self._evaluate(self._points(points), log=True)

    __call__ = pdf

    # -- grids -------------------------------------------------------------
    def default_limits(self) -> list[tuple[float, float]]:
        """Data range widened by the kernel's reach (4 sd for the Gaussian), cut at the bounds."""
        H = self.H
        if self.kernel.is_compact:
            # extent of the kernel's support along each axis
            L = self.bandwidth.matrix.cholesky
            if not self.kernel.is_radial:
                reach = np.abs(L).sum(axis=1) * self.kernel.kernel.unit_radius
            else:
                reach = np.sqrt(np.diag(H)) * self.kernel.radius
        else:
            reach = 4.0 * np.sqrt(np.diag(H))
        lo = self.data.min(axis=0) - reach
        hi = self.data.max(axis=0) + reach
        out = []
        for j, (blo, bhi) in enumerate(self.bounds):
            out.append((max(lo[j], blo), min(hi[j], bhi)))
        return out

    def _grid_spec(self, size, limits):
        if np.isscalar(size):
            size = [int(size)] * self.d
        size = [int(s) for s in size]
        if len(size) != self.d or any(s < 2 for s in size):
            raise InputError(f"grid size must be an integer >= 2 or {self.d} of them, got {size}")
        default = self.default_limits()
        if limits is None:
            limits = default
        elif isinstance(limits, dict):
            unknown = [k for k in limits if k not in self.names]
            if unknown:
                raise InputError(f"grid limits name unknown variable(s) {unknown}; variables are {self.names}")
            limits = [tuple(limits.get(n, default[j])) for j, n in enumerate(self.names)]
        else:
            limits = [tuple(l) if l is not None else default[j] for j, l in enumerate(limits)]
            if len(limits) != self.d:
                raise InputError(f"grid limits have {len(limits)} entries for {self.d} variables")
        for name, (lo, hi) in zip(self.names, limits):
            if not (math.isfinite(lo) and math.isfinite(hi) and lo < hi):
                raise InputError(f"grid limits for {name} must be finite with lo < hi, got ({lo}, {hi})")
        axes = [np.linspace(lo, hi, s) for (lo, hi), s in zip(limits, size)]
        return axes

    def grid(self, size=64, limits=None, *, clip_negative=False) -> xr.DataArray:
        """Density on a regular grid.

        Parameters
        ----------
        size : int or sequence of int
            Nodes per variable.
        limits : sequence of (lo, hi) or dict name -> (lo, hi), optional
            Grid range per variable; defaults to the data range widened by
            the kernel's reach and cut at the bounds.
        clip_negative : bool
            For fourth-order kernels: set negative values to zero and
            renormalise so the grid integrates to what it did before.

        Returns
        -------
        xarray.DataArray
            Dimension i named ``names[i]`` with coordinate
            ``numpy.linspace(lo_i, hi_i, size_i)``.
        """
        axes = self._grid_spec(size, limits)
        values = self._evaluate_grid(axes)
        attrs = self._grid_attrs()
        if self.kernel.kernel.order > 2:
            cell = np.prod([a[1] - a[0] for a in axes])
            neg = float(-values[values < 0].sum() * cell)
            attrs["negative_mass"] = neg
            if clip_negative and neg > 0:
                total = values.sum()
                values = np.maximum(values, 0.0)
                values *= total / values.sum()
                attrs["negative_mass_clipped"] = 1
        coords = {name: (name, ax, {"units": u} if u else {}) for name, ax, u in zip(self.names, axes, self.units)}
        return xr.DataArray(values, dims=self.names, coords=coords, name="density", attrs=attrs)

    def _grid_attrs(self) -> dict:
        attrs = {
            "long_name": "joint probability density of " + ", ".join(self.names),
            "units": density_units(self.units),
            "kernel": self.kernel.name,
            "kernel_form": self.kernel.form,
            "bandwidth_matrix": self.H.ravel().tolist(),
            "bandwidth_matrix_note": "row-major d x d bandwidth matrix H (covariance of the scaled kernel)",
            "boundary": self.boundary,
            "n_samples": self.n,
            "caution": CAUTION,
        }
        attrs.update(self.bandwidth.as_attrs())
        attrs.update({k: v for k, v in self.attrs.items() if isinstance(v, (str, int, float))})
        return attrs

    def negative_mass(self, size=128, limits=None) -> float:
        """Integral of the negative part (non-zero only for fourth-order kernels)."""
        if self.kernel.kernel.order == 2:
            return 0.0
        return float(self.grid(size, limits).attrs["negative_mass"])

    # -- sampling --------------------------------------------------------
    def sample(self, n: int, seed=None) -> np.ndarray:
        """Draw ``n`` points from the estimate (the smoothed bootstrap), shape (n, d)."""
        n = int(n)
        if n < 0:
            raise InputError(f"sample size must be non-negative, got {n}")
        rng = np.random.default_rng(seed)
        idx = rng.choice(self.n, size=n, p=self.weights)
        noise = self.bandwidth.matrix.colorize(self.kernel.sample(n, rng))
        return self.data[idx] + noise

    # -- products (mvkde.products) -----------------------------------------
    def marginal(self, names) -> "DensityEstimate":
        """Marginal estimate of ``names`` (exact: Gaussian kernel, or product kernel with the
        kept variables leading); otherwise see :meth:`marginal_grid`."""
        return _products.marginal(self, names)

    def marginal_grid(self, names, size=None, limits=None) -> xr.DataArray:
        """Marginal density of ``names`` integrated numerically from the joint grid."""
        return _products.marginal_grid(self, names, size, limits)

    def conditional(self, given: dict, size=None, limits=None) -> xr.DataArray:
        """Density of the other variables given values or (lo, hi) bins of ``given``."""
        return _products.conditional(self, given, size=size, limits=limits)

    def cdf(self, points, *, size=None) -> np.ndarray:
        """Joint CDF P(X <= x componentwise)."""
        return _products.cdf(self, points, size=size)

    def exceedance(self, points, *, size=None) -> np.ndarray:
        """Joint exceedance P(X > x componentwise)."""
        return _products.exceedance(self, points, size=size)

    def probability_grid(self, kind="exceedance", size=None, limits=None) -> xr.DataArray:
        """Joint CDF ('cdf') or exceedance ('exceedance') at every grid node."""
        return _products.probability_grid(self, kind, size, limits)

    def quantiles(self, name, probs) -> np.ndarray:
        """Marginal quantiles of variable ``name``."""
        return _products.quantiles(self, name, probs)

    def hdr_levels(self, masses=(0.5, 0.9, 0.99), *, size=None) -> np.ndarray:
        """Density levels whose upper sets enclose ``masses`` of the probability."""
        return _products.hdr_levels(self, masses, size=size)

    def mass_above(self, level, *, size=None) -> np.ndarray:
        """Probability of the region where the density is at least ``level``."""
        return _products.mass_above(self, level, size=size)

    def standard_error(self, points) -> np.ndarray:
        """Asymptotic pointwise standard error of the density at ``points``."""
        return _products.standard_error(self, self.pdf(points))

    def bootstrap_bands(self, points=None, *, kind="density", level=0.9, replicates=200, seed=None):
        """Percentile bootstrap band (lower, upper) for the density or exceedance."""
        return _products.bootstrap_bands(self, points, kind=kind, level=level,
                                         replicates=replicates, seed=seed)

