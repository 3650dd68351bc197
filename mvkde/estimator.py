"""``fit`` and the fitted estimate.

The estimate is

    f(x) = sum_i w_i |H|^{-1/2} K(L^{-1} (x - X_i)),      H = L L',  sum_i w_i = 1,

with K a unit-covariance kernel (product or spherical form), so that H is the
covariance matrix of the scaled kernel whatever the kernel (Wand & Jones
1995, Ch. 4).  With the Gaussian kernel this is exactly
scipy.stats.gaussian_kde with ``covariance = H``.

Long because ``fit`` and the estimate live together: the estimate refits
itself through ``fit`` (exact marginals, bootstrap replicates, the density on
a point mass), and splitting them would make an import circle.  The steps of
``fit`` are short functions below it; turning data into arrays is
:mod:`mvkde.sample`, the point-mass models are :mod:`mvkde.boundary.point_mass`.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import xarray as xr

from . import boundary as _boundary
from .boundary import point_mass as _point_mass
from .directional import model as _directional
from .directional import node_areas_km2
from .directional import spec as _directional_spec
from . import engines as _engines
from . import products as _products
from .bandwidth import BandwidthMatrix, BandwidthResult, PARAMETRIZATIONS, select
from .errors import InputError, MvkdeError, check_choice
from .kernels import FORMS, get_kernel, get_multivariate_kernel
from . import sample as _sample
from .steps import ConcentrationRequest, SelectionRequest
from .support import Support
from .units import density_units

__all__ = ["fit", "DensityEstimate", "CAUTION"]

CAUTION = (
    "A kernel density estimate summarises the sample it was given: tails beyond the observed "
    "range are extrapolation, and short records understate extremes. It supports, and does not "
    "replace, the design values, codes and licensed engineering or hydrological practice that "
    "apply locally; defer to them for any decision that affects safety."
)


# ---------------------------------------------------------------------------
# fit
# ---------------------------------------------------------------------------

def fit(data, *, kernel="gaussian", form="product", bandwidth="plugin", parametrization="full",
        bounds=None, boundary=None, weights=None, periods=None, engine="auto",
        names=None, units=None, point_masses=None, mask=None, outside="error",
        sphere=None) -> "DensityEstimate":
    """Fit a multivariate kernel density estimate.

    (Long because of this docstring: the body is a short sequence of steps,
    each a function below.)

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
        Boundary-correction method for bounded variables: ``"none"``,
        ``"reflect"``, ``"renormalize"`` (divided pointwise by the kernel mass
        inside the support), ``"renormalize-kernel"`` (each kernel divided by
        its own mass inside the support), ``"linear"`` (Jones
        1993), ``"transform"`` (log/logit; a bandwidth selector then works in
        the transformed space and ``H`` is in that space), ``"beta"`` (Chen
        1999) or ``"gamma"`` (Chen 2000).  None picks the default measured
        best in ``benchmarks/boundary_ise.md`` (see README, "Bounded
        variables").
    weights : (n,) array or None
        Non-negative sample weights (normalised to sum to one).
    periods : list of float or None
        Period per variable for circular variables (360 for degrees, 365.25 for
        the day of the year), None for linear ones.  A circular variable is
        smoothed with the von Mises kernel in product with the others; its
        data are taken modulo the period, its grid spans one period and
        ``H`` holds its equivalent variance (period/2 pi)^2 / kappa
        (``concentrations`` holds kappa).  See README, "Directions and
        locations".
    engine : {"auto", "exact", ...}
        Evaluation engine; "auto" chooses and records why.
    names, units : list of str, optional
        Override names and units found in ``data``.
    point_masses : list or None
        One entry per variable, None or a threshold t: values <= t of that
        variable count as its lower bound (a point mass, e.g. dry days with
        t = 1 mm).  At most one variable; it needs a finite lower bound.  The
        estimate then has ``point_mass_probability``, ``grid`` is the density
        of the continuous part (that variable > t, integrating to 1 - p) and
        ``point_mass_grid`` the density of the other variables on the point
        mass (integrating to p).
    mask : xarray.DataArray of bool, optional
        An irregular support (land mask, catchment) on a regular grid with one
        dimension per variable: the estimate is edge-corrected by the kernel
        mass inside the mask (the mask convolved with the kernel) and is zero
        outside it.  ``grid()`` with no size and limits uses the mask's grid.
    outside : {"error", "drop"}
        Data outside the bounds (or the mask): refuse with the count, the
        variable and the worst value, or drop them and record the count in
        ``attrs["n_dropped_outside_support"]``.
    sphere : (str, str), optional
        Names of a latitude and a longitude variable (degrees) forming one
        location on the Earth: smoothed with the von Mises-Fisher kernel on
        the unit sphere; the density is then per km^2 of the Earth's
        surface (``mvkde.directional.node_areas_km2`` gives grid-node areas;
        grids carry them as the ``cell_area`` coordinate).

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
    return run_steps(fit_steps(data, kernel=kernel, form=form, bandwidth=bandwidth,
                               parametrization=parametrization, bounds=bounds, boundary=boundary,
                               weights=weights, periods=periods, engine=engine, names=names, units=units,
                               point_masses=point_masses, mask=mask, outside=outside, sphere=sphere))


def run_steps(steps) -> "DensityEstimate":
    """Drive :func:`fit_steps` for one sample, answering each request alone (a block of one)."""
    try:
        request = next(steps)
        while True:
            try:
                if isinstance(request, ConcentrationRequest):
                    result = ConcentrationRequest.answer_many([request])[0]
                else:
                    result = select(request.method, request.data, request.weights, kernel=request.kernel,
                                    form=request.form, parametrization=request.parametrization,
                                    names=request.names)
            except MvkdeError as err:
                request = steps.throw(err)
                continue
            request = steps.send(result)
    except StopIteration as stop:
        return stop.value


def fit_steps(data, *, kernel="gaussian", form="product", bandwidth="plugin", parametrization="full",
              bounds=None, boundary=None, weights=None, periods=None, engine="auto",
              names=None, units=None, point_masses=None, mask=None, outside="error", sphere=None):
    """:func:`fit` as a generator: yields a :class:`~mvkde.steps.SelectionRequest` for each bandwidth
    it must choose (the continuous part or the linear block of a directional estimate, then the
    other variables on a point mass) and a :class:`~mvkde.steps.ConcentrationRequest` for each
    circular variable's mixture plug-in concentration, is sent the answer (or thrown the
    selector's error), and returns the estimate.

    :func:`fit` answers with :func:`mvkde.bandwidth.select`; the batch door
    (:mod:`mvkde.cells`) advances many cells together and answers a round of
    requests with one :func:`mvkde.bandwidth.select_many` call.
    """
    values, names, units = _sample.as_table(data, names, units)
    values, w = _sample.check_sample(values, names, weights)
    d = values.shape[1]
    mk = get_multivariate_kernel(get_kernel(kernel).name, check_choice("form", form, FORMS), d)
    parametrization = check_choice("parametrization", parametrization, PARAMETRIZATIONS)
    engine = _engines.validate_engine(engine)
    outside = check_choice("outside", outside, _boundary.OUTSIDE_OPTIONS)

    # 1. the support of each variable, described once
    support, spec, mask_spec = _declare_support(names, values, bounds, periods, sphere, point_masses, mask)
    if spec is not None:
        values = _directional_spec.wrap(values, spec)
    values, w, n_dropped = _drop_outside(values, w, support, mask_spec, outside, names)
    box = list(support.bounds)

    # 2. a point mass: the continuous part lies above the threshold
    point = _point_mass.split(support.point_mass, values, w)
    cont_values, cont_w, cont_box = _continuous_part(values, w, box, point, names)

    # 3. smoothing and the model of the continuous part
    options = dict(kernel=mk.name, form=mk.form, bandwidth=bandwidth, parametrization=parametrization,
                   engine=engine, boundary=boundary)
    concentrations, attrs = {}, {}
    if cont_values.shape[0] == 0:
        method, result, model = "none", _point_mass.no_bandwidth(d), _point_mass.EmptyModel(d)
    elif spec is not None:
        model, result, method, concentrations, attrs = yield from _directional.fit_model(
            cont_values, cont_w, names, spec, mk, bandwidth, parametrization, cont_box, boundary, engine)
    else:
        method, result, model, note = yield from _fit_linear(cont_values, cont_w, cont_box, mask_spec, names,
                                                             mk, options)
        if note:
            attrs["boundary_choice"] = note

    # 4. the other variables' density on the point mass
    if point is not None:
        yield from _fit_point_part(point, values, w, support, names, units, options, result)

    est = DensityEstimate(cont_values, cont_w, names, units, mk, result, cont_box, method, engine, model=model,
                          point_mass=point, mask=mask_spec, support=support, concentrations=concentrations)
    est.attrs.update(attrs)
    est.attrs["n_dropped_outside_support"] = n_dropped
    return est


def _declare_support(names, values, bounds, periods, sphere, point_masses, mask):
    """(Support, directional spec or None, mask or None) from fit's arguments, checked."""
    d = len(names)
    box = _boundary.parse_bounds(bounds, d, names)
    mask_spec = _boundary.parse_mask(mask, names) if mask is not None else None
    spec = _directional_spec.parse(periods, sphere, names, d)
    if spec is not None:
        _directional_spec.check_support(spec, values, box, names, point_masses, mask)
    declared = _point_mass.declare(point_masses, box, names)
    pair = None if spec is None or spec.sphere is None else (names[spec.sphere[0]], names[spec.sphere[1]])
    support = Support(tuple(names), tuple(tuple(b) for b in box),
                      tuple(spec.periods) if spec is not None else (None,) * d, pair, declared)
    return support, spec, mask_spec


def _drop_outside(values, w, support: Support, mask_spec, outside, names):
    """Refuse data outside the support, or drop them and return how many were dropped."""
    d = values.shape[1]
    box = list(support.bounds)
    out_rows = _boundary.outside_rows(values, box)
    if mask_spec is not None:
        out_rows |= ~_boundary.in_mask(values, *mask_spec)
    if not out_rows.any():
        return values, w, 0
    if outside == "error":
        _boundary.check_inside(values, box, names)
        raise InputError(f"{int(out_rows.sum())} sample(s) lie outside the mask: fix the mask or the "
                         "data, or pass outside='drop' to drop them (the count dropped is recorded)")
    n_dropped = int(out_rows.sum())
    values = values[~out_rows]
    if w is not None:
        w = w[~out_rows]
        if w.sum() <= 0:
            raise InputError("every sample with weight lies outside the support")
        w = w / w.sum()
    if values.shape[0] < d + 1:
        raise InputError(f"only {values.shape[0]} samples remain after dropping {n_dropped} outside the support: "
                         f"at least {d + 1} are needed")
    return values, w, n_dropped


def _continuous_part(values, w, box, point, names):
    """The samples above a point mass (all samples without one), their weights and support."""
    if point is None:
        return values, w, box
    d = values.shape[1]
    keep = ~point.rows
    cont_values = values[keep]
    cont_box = list(box)
    cont_box[point.index] = (point.threshold, box[point.index][1])
    n_cont = cont_values.shape[0]
    if 0 < n_cont < d + 1:
        raise InputError(f"only {n_cont} value(s) of {names[point.index]} exceed the point-mass "
                         f"threshold {point.threshold}: at least {d + 1} are needed for the continuous part")
    cont_w = None if (w is None or n_cont == 0) else w[keep] / w[keep].sum()
    return cont_values, cont_w, cont_box


def _fit_linear(values, w, box, mask_spec, names, mk, options):
    """Boundary method, bandwidth and model for linear variables: (method, result, model, note).

    ``boundary=None`` and ``"linear"`` ask for the linear boundary kernel
    (Jones 1993); where it cannot apply (a kernel or H that does not
    factorise over the bounded variables) reflection is used and the note
    says why.
    """
    boundary, bandwidth = options["boundary"], options["bandwidth"]
    d = values.shape[1]
    if mask_spec is not None:
        if boundary not in (None, "renormalize", "mask"):
            raise InputError(f"with mask= the edge correction is the kernel mass inside the mask; "
                             f"boundary={boundary!r} cannot use a mask: pass boundary=None")
        method = "mask"
    else:
        method = _boundary.validate_method(boundary, box)
        _boundary.check_method(method, box, values, names)
    sel_values = _boundary.selection_data(method, values, box) if method != "mask" else values
    if isinstance(bandwidth, str):
        result = yield SelectionRequest(bandwidth, sel_values, w, mk.name, mk.form, options["parametrization"],
                                        list(names))
    elif isinstance(bandwidth, BandwidthResult):
        result = bandwidth
    else:
        result = BandwidthResult(BandwidthMatrix.from_matrix(bandwidth, d), "given", options["parametrization"])
    note = ""
    if method not in ("none", "mask") and boundary in (None, "linear"):
        note = f"linear boundary kernel ({'default' if boundary is None else 'asked for'})"
    try:
        model = _boundary.build_model(method, values, w, result.matrix, mk, box, options["engine"], names,
                                      mask=mask_spec)
    except InputError as err:
        if boundary not in (None, "linear") or method in ("none", "mask"):
            raise
        note = f"linear boundary kernel not applicable ({err}); used {_boundary.DEFAULT_FALLBACK!r}"
        method = _boundary.DEFAULT_FALLBACK
        model = _boundary.build_model(method, values, w, result.matrix, mk, box, options["engine"], names)
    return method, result, model, note


def _fit_point_part(point, values, w, support: Support, names, units, options, result) -> None:
    """The density of the other variables on the point mass (``point.estimate``)."""
    d = values.shape[1]
    if d == 1 or point.count == 0:
        return
    others = [k for k in range(d) if k != point.index]
    sub_support = support.subset(others)
    bandwidth = options["bandwidth"]
    if not isinstance(bandwidth, str):
        bandwidth = np.asarray(result.H)[np.ix_(others, others)]
    periods = list(sub_support.periods) if any(p is not None for p in sub_support.periods) else None
    try:
        point.estimate = yield from fit_steps(values[point.rows][:, others], kernel=options["kernel"], form=options["form"],
                             bandwidth=bandwidth, parametrization=options["parametrization"],
                             bounds=[None if periods and periods[i] is not None else b
                                     for i, b in enumerate(sub_support.bounds)],
                             boundary=options["boundary"], periods=periods, sphere=sub_support.sphere,
                             weights=None if w is None else w[point.rows], engine=options["engine"],
                             names=[names[k] for k in others], units=[units[k] for k in others])
    except MvkdeError as err:
        point.problem = str(err)


# ---------------------------------------------------------------------------
# the estimate
# ---------------------------------------------------------------------------


def _column_range(x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per-column min and max of an (n, d) array, one contiguous column at a time
    (``x.min(axis=0)`` on a C-ordered (n, 2) array was 30 x slower)."""
    return (np.array([x[:, j].min() for j in range(x.shape[1])]),
            np.array([x[:, j].max() for j in range(x.shape[1])]))


class DensityEstimate:
    """A fitted kernel density estimate.  Build it with :func:`mvkde.fit`.

    Parameters
    ----------
    data : ndarray, shape (n, d)
        The sample (the continuous part when there is a point mass).
    weights : ndarray, shape (n,), or None
        Normalised sample weights; None for equal weights.
    names, units : list of str
        Variable names and units, in column order.
    kernel : mvkde.kernels.MultivariateKernel
        The d-variate kernel.
    bandwidth : mvkde.bandwidth.BandwidthResult
        The bandwidth matrix H and how it was chosen.
    bounds : list of (float, float)
        Support (lo, hi) per variable (infinite for an open side).
    boundary : str
        Boundary method name.
    engine : str
        Evaluation engine name.
    model : object, optional
        A fitted boundary model; built from the arguments above when None.
    point_mass : object, optional
        The fitted point-mass part, or None.
    mask : (ndarray, list of ndarray), optional
        Mask values and their grid axes, or None.
    support : mvkde.support.Support, optional
        Where each variable lives; linear variables on ``bounds`` when None.
    concentrations : dict, optional
        Concentration kappa of each directional variable's kernel, by name.
    """

    def __init__(self, data, weights, names, units, kernel, bandwidth: BandwidthResult,
                 bounds, boundary, engine, *, model=None, point_mass=None, mask=None, support=None,
                 concentrations=None):
        self.data = data
        self.weights = weights
        self.names = list(names)
        self.units = list(units)
        self.kernel = kernel
        self.bandwidth = bandwidth
        self.bounds = bounds
        self.boundary = boundary
        self.engine = engine
        self._model = model if model is not None else _boundary.build_model(
            boundary, data, weights, bandwidth.matrix, kernel, bounds, engine, self.names)
        self._point = point_mass
        self._mask = mask
        self.attrs: dict = dict(self._model.attrs)
        #: where each variable lives (bounds, period, spherical pair, point mass)
        self.support: Support = support if support is not None else Support.linear(self.names, bounds)
        #: concentration kappa of each directional variable's kernel (name -> kappa)
        self.concentrations: dict = dict(concentrations or {})

    @property
    def periods(self) -> list:
        """Period per variable (None for a linear one)."""
        return list(self.support.periods)

    @property
    def sphere(self) -> tuple | None:
        """(latitude name, longitude name) of a spherical location, or None."""
        return self.support.sphere

    @property
    def is_directional(self) -> bool:
        """True when a variable is circular or a pair is a location on the sphere."""
        return self.support.is_directional

    # -- point mass ------------------------------------------------------
    @property
    def point_mass_probability(self) -> float:
        """Probability of the point mass (0.0 when no variable declares one)."""
        return 0.0 if self._point is None else self._point.probability

    @property
    def _continuous_share(self) -> float:
        return 1.0 - self.point_mass_probability

    def point_mass_grid(self, size=64, limits=None) -> xr.DataArray:
        """Density of the other variables on the point-mass part, integrating to p.

        For one variable, a 0-d DataArray holding p.  ``limits`` may be given for
        the other variables (a list in their order or a dict by name).

        Parameters
        ----------
        size : int or sequence of int
            Grid nodes per other variable (default 64).
        limits : sequence of (lo, hi) or dict name -> (lo, hi), optional
            Grid range of the other variables.

        Returns
        -------
        xarray.DataArray
            The density on the point mass (dimensions: the other variables), or
            the 0-d probability p for a one-variable estimate.

        Raises
        ------
        InputError
            If the estimate has no point mass, or its density on the point mass
            could not be fitted.
        """
        if self._point is None:
            raise InputError("point_mass_grid: this estimate has no point mass; fit with point_masses=[...]")
        pm = self._point
        attrs = {"long_name": f"point mass of {pm.name} at its bound ({pm.name} <= {pm.threshold})",
                 "part": "point mass", "caution": CAUTION}
        attrs.update(pm.as_attrs())
        if self.d == 1:
            attrs["units"] = "1"
            return xr.DataArray(pm.probability, name="point_mass_probability", attrs=attrs)
        if pm.estimate is None:
            if pm.count == 0:
                others = [n for n in self.names if n != pm.name]
                base = self.grid(size, limits={k: v for k, v in (limits or {}).items()}
                                 if isinstance(limits, dict) else None)
                zero = base.isel({pm.name: 0}, drop=True) * 0.0
                zero.attrs = {**attrs, "units": density_units([u for n, u in zip(self.names, self.units)
                                                               if n != pm.name])}
                return zero.transpose(*others).rename("density")
            raise InputError(f"point_mass_grid: the density on the point mass of {pm.name} could not be "
                             f"fitted from its {pm.count} sample(s): {pm.problem}")
        g = pm.estimate.grid(size, limits) * pm.probability
        g.attrs = {**pm.estimate._grid_attrs(), **attrs}
        g.attrs["long_name"] = (f"density of {', '.join(pm.estimate.names)} on the point mass of {pm.name} "
                                f"({pm.name} <= {pm.threshold}); integrates to the point-mass probability")
        return g.rename("density")

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
        n = f"n={self.n}"
        if self._point is not None:
            # n counts only the continuous part: say so, with the rows at the point mass beside it
            pm = self._point
            n += (f" above the point mass {pm.name} <= {pm.threshold:g} ({pm.rows.size:,} rows, "
                  f"{pm.count:,} at the point mass)")
        return (f"DensityEstimate(names={self.names}, {n}, kernel={self.kernel.name!r}, "
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
        values, choice = self._model.density(pts, log=log)
        if choice is not None:
            self.attrs.update(choice.as_attrs())
        share = self._continuous_share
        if share != 1.0:
            values = values + math.log(share) if log else values * share
        return self._outside_support(pts, values, -np.inf if log else 0.0)

    def _evaluate_grid(self, axes) -> np.ndarray:
        values, choice = self._model.grid(axes)
        return self._finish_grid(axes, values, choice)

    def _finish_grid(self, axes, values, choice) -> np.ndarray:
        """The model's grid as the estimate's: the continuous share, zero outside the support
        (shared with the batch door, which evaluates many models' grids together)."""
        if choice is not None:
            self.attrs.update(choice.as_attrs())
        values = np.asarray(values) * self._continuous_share
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
        """Density at ``points`` ((m, d) array or DataFrame with the variables as columns).

        Parameters
        ----------
        points : array_like, shape (m, d), or pandas.DataFrame
            Evaluation points; a 1-d array is one point (or m points when d = 1).

        Returns
        -------
        ndarray, shape (m,)
            Density values, 0 outside the bounds.
        """
        return self._evaluate(self._points(points))

    def logpdf(self, points) -> np.ndarray:
        """Log density; for the Gaussian kernel a log-sum-exp that stays finite in far tails.

        Parameters
        ----------
        points : array_like, shape (m, d), or pandas.DataFrame
            Evaluation points, as for :meth:`pdf`.

        Returns
        -------
        ndarray, shape (m,)
            Log density values, -inf outside the bounds.
        """
        return self._evaluate(self._points(points), log=True)

    __call__ = pdf

    # -- grids -------------------------------------------------------------
    def default_limits(self) -> list[tuple[float, float]]:
        """Data range widened by the kernel's reach (4 sd for the Gaussian), cut at the bounds.

        With ``boundary="transform"`` the widening is done in the transformed
        space (where H lives) and mapped back; with a mask, the mask's grid.
        A circular variable gets one period from 0 and a spherical location the
        whole globe.

        Returns
        -------
        list of (float, float)
            (lo, hi) per variable.
        """
        if self._mask is not None:
            return [(float(ax[0]), float(ax[-1])) for ax in self._mask[1]]
        if self.is_directional:
            return self._directional_limits()
        if self.boundary == "transform":
            y = self._model.data
            reach = 4.0 * np.sqrt(np.diag(self.H))
            lo = _boundary.inverse_transform((y.min(axis=0) - reach)[None, :], self.bounds)[0]
            hi = _boundary.inverse_transform((y.max(axis=0) + reach)[None, :], self.bounds)[0]
            return [(float(min(a, b)), float(max(a, b))) for a, b in zip(lo, hi)]
        H = self.H
        if self.kernel.is_compact:
            # extent of the kernel's support along each axis
            L = self.bandwidth.matrix.cholesky
            if not self.kernel.is_radial:
                reach = np.abs(L).sum(axis=1) * self.kernel.univariate.unit_radius
            else:
                reach = np.sqrt(np.diag(H)) * self.kernel.radius
        else:
            reach = 4.0 * np.sqrt(np.diag(H))
        lo, hi = _column_range(self.data)
        lo, hi = lo - reach, hi + reach
        out = []
        for j, (blo, bhi) in enumerate(self.bounds):
            out.append((max(lo[j], blo), min(hi[j], bhi)))
        return out

    def _directional_limits(self) -> list[tuple[float, float]]:
        """One period from 0 for a circular variable, the whole globe for a spherical
        location, and the usual reach-widened data range for the linear variables."""
        out = []
        lat_lon = {} if self.sphere is None else {self.sphere[0]: (-90.0, 90.0), self.sphere[1]: (-180.0, 180.0)}
        lin = [j for j, name in enumerate(self.names) if self.periods[j] is None and name not in lat_lon]
        if lin:
            H = self.H[np.ix_(lin, lin)]
            if self.kernel.is_compact:
                reach = np.sqrt(np.diag(H)) * (self.kernel.radius if self.kernel.is_radial
                                               else self.kernel.univariate.unit_radius * math.sqrt(len(lin)))
            else:
                reach = 4.0 * np.sqrt(np.diag(H))
            data = self.data[:, lin]
            if self.boundary == "transform":
                box = [self.bounds[j] for j in lin]
                y = _boundary.forward_transform(data, box)
                lo = _boundary.inverse_transform((y.min(axis=0) - reach)[None, :], box)[0]
                hi = _boundary.inverse_transform((y.max(axis=0) + reach)[None, :], box)[0]
            else:
                lo, hi = _column_range(data)
                lo, hi = lo - reach, hi + reach
            lin_limits = {j: (max(float(min(a, b)), self.bounds[j][0]), min(float(max(a, b)), self.bounds[j][1]))
                          for j, a, b in zip(lin, lo, hi)}
        for j, name in enumerate(self.names):
            if self.periods[j] is not None:
                out.append((0.0, float(self.periods[j])))
            elif name in lat_lon:
                out.append(lat_lon[name])
            else:
                out.append(lin_limits[j])
        return out

    def _grid_spec(self, size, limits):
        if size is None:
            if self._mask is not None and limits is None:
                return [ax.copy() for ax in self._mask[1]]
            size = 64
        if np.isscalar(size):
            size = [int(size)] * self.d
        size = [int(s) for s in size]
        if len(size) != self.d or any(s < 2 for s in size):
            raise InputError(f"grid size must be an integer >= 2 or {self.d} of them, got {size}")
        # the default limits scan the data (milliseconds at n = 10^5): only when needed
        needs_default = (limits is None or (isinstance(limits, dict) and len(limits) < self.d)
                         or (not isinstance(limits, dict) and any(l is None for l in limits)))
        default = self.default_limits() if needs_default else [None] * self.d
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

    def grid(self, size=None, limits=None, *, clip_negative=False) -> xr.DataArray:
        """Density on a regular grid (of the continuous part when there is a point mass).

        Parameters
        ----------
        size : int or sequence of int
            Nodes per variable (default 64; with a mask and no limits, the
            mask's own grid).
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
        if self.kernel.univariate.order > 2 or self.boundary == "linear":
            cell = np.prod([a[1] - a[0] for a in axes])
            neg = float(-values[values < 0].sum() * cell)
            attrs["negative_mass"] = neg
            if clip_negative and neg > 0:
                total = values.sum()
                values = np.maximum(values, 0.0)
                values *= total / values.sum()
                attrs["negative_mass_clipped"] = 1
        coords = {name: (name, ax, {"units": u} if u else {}) for name, ax, u in zip(self.names, axes, self.units)}
        for j, name in enumerate(self.names):
            if self.periods[j] is not None:
                coords[name][2]["period"] = float(self.periods[j])
        if self.sphere is not None:
            lat, lon = self.sphere
            coords[lat][2].setdefault("units", "degrees_north")
            coords[lon][2].setdefault("units", "degrees_east")
            area = node_areas_km2(axes[self.names.index(lat)], axes[self.names.index(lon)])
            coords["cell_area"] = ((lat, lon), area, {
                "units": "km2", "long_name": "area of the Earth's surface each grid node stands for "
                "(trapezoid rule on the sphere); sum(density * cell_area) over the location is the probability"})
        return xr.DataArray(values, dims=self.names, coords=coords, name="density", attrs=attrs)

    def _grid_attrs(self) -> dict:
        if self.sphere is not None:
            rest = [u for n, u in zip(self.names, self.units) if n not in self.sphere]
            other = density_units(rest)
            units = "km-2" if other == "1" else f"km-2 {other}" if "/" not in other else \
                "1/(km2 " + other[3:-1] + ")"
        else:
            units = density_units(self.units)
        attrs = {
            "long_name": "joint probability density of " + ", ".join(self.names),
            "units": units,
            "kernel": self.kernel.name,
            "kernel_form": self.kernel.form,
            "bandwidth_matrix": self.H.ravel().tolist(),
            "bandwidth_matrix_note": "row-major d x d bandwidth matrix H (covariance of the scaled kernel)",
            "boundary": self.boundary,
            "support_bounds": [float(v) for pair in self.bounds for v in pair],
            "support_bounds_note": "lo, hi per variable (inf for an open side)",
            "n_samples": self.n,
            "caution": CAUTION,
        }
        attrs.update(self.bandwidth.as_attrs())
        attrs.update({k: v for k, v in self.attrs.items() if isinstance(v, (str, int, float))})
        if self._point is not None:
            pm = self._point
            attrs.update(pm.as_attrs())
            attrs["part"] = "continuous"
            attrs["long_name"] = (f"joint probability density of {', '.join(self.names)} on the continuous "
                                  f"part ({pm.name} > {pm.threshold}); integrates to 1 - point_mass_probability")
        return attrs

    def negative_mass(self, size=128, limits=None) -> float:
        """Integral of the negative part (non-zero only for fourth-order kernels and the
        linear boundary kernel).

        Parameters
        ----------
        size : int or sequence of int
            Grid nodes per variable.
        limits : sequence of (lo, hi) or dict name -> (lo, hi), optional
            Grid range, as for :meth:`grid`.

        Returns
        -------
        float
            The negative mass on the grid (0.0 when the estimate cannot be negative).
        """
        if self.kernel.univariate.order == 2 and self.boundary != "linear":
            return 0.0
        return float(self.grid(size, limits).attrs["negative_mass"])

    # -- sampling --------------------------------------------------------
    def sample(self, n: int, seed=None) -> np.ndarray:
        """Draw ``n`` points from the estimate, shape (n, d).

        The draws respect the bounds: how depends on the boundary method
        (``attrs["boundary_sampling"]``: folding for reflection, truncated kernels
        for renormalisation, the transformed-space bootstrap for transformation,
        rejection for the others).  With a point mass, a Binomial(n, p) share of
        the draws sit on the bound of that variable, the other variables drawn
        from their density on the point mass.

        Parameters
        ----------
        n : int
            Number of draws (non-negative).
        seed : int or numpy.random.Generator, optional
            Seed for :func:`numpy.random.default_rng`.

        Returns
        -------
        ndarray, shape (n, d)
            The draws, columns in the order of ``names``.
        """
        n = int(n)
        if n < 0:
            raise InputError(f"sample size must be non-negative, got {n}")
        rng = np.random.default_rng(seed)
        if self._point is None:
            return self._model.sample(n, rng)
        pm = self._point
        k = int(rng.binomial(n, pm.probability))
        out = np.empty((n, self.d))
        out[k:] = self._model.sample(n - k, rng) if n - k else np.empty((0, self.d))
        if k:
            out[:k, pm.index] = pm.bound
            if self.d > 1:
                if pm.estimate is None:
                    raise InputError(f"cannot sample the point mass of {pm.name}: {pm.problem}")
                others = [j for j in range(self.d) if j != pm.index]
                out[:k, others] = pm.estimate.sample(k, rng)
        return out[rng.permutation(n)]

    # -- products (mvkde.products) -----------------------------------------
    def _refit(self, data, idx, weights=None) -> "DensityEstimate":
        """An estimate of the same kind on ``data`` (columns: the variables ``idx``), with H's sub-block.

        Used for exact marginals and bootstrap replicates.
        """
        idx = list(idx)
        return fit(data, kernel=self.kernel.name, form=self.kernel.form, bandwidth=self.H[np.ix_(idx, idx)],
                   weights=weights, engine=self.engine, names=[self.names[j] for j in idx],
                   units=[self.units[j] for j in idx], **self._fit_options(idx))

    def _point_mass_marginal(self, idx) -> "DensityEstimate":
        """Marginal of ``idx`` for an estimate with a point mass (exact parts only).

        Keeping the point-mass variable: the continuous part's marginal with the
        same point mass, the other kept variables following their marginal on
        it.  Dropping it: the mixture (1 - p) x continuous marginal + p x the
        marginal of the density on the point mass.
        """
        pm = self._point
        idx = list(idx)
        cont = self._refit(self.data[:, idx], idx, self.weights) if self.n else None
        others = [k for k in range(self.d) if k != pm.index]
        on_mass = None
        kept_others = [k for k in idx if k != pm.index]
        if pm.estimate is not None and kept_others:
            on_mass = pm.estimate.marginal([self.names[k] for k in kept_others])
        if cont is None:
            raise InputError("the continuous part is empty (every value is at the point mass): use "
                             "point_mass_grid(...)")
        if pm.index in idx:
            declaration = self.support.subset(idx).point_mass
            part = _point_mass.PointMassPart(declaration, pm.rows, pm.probability)
            part.estimate, part.problem = on_mass, pm.problem
            return DensityEstimate(cont.data, cont.weights, cont.names, cont.units, cont.kernel, cont.bandwidth,
                                   cont.bounds, cont.boundary, cont.engine, model=cont._model, point_mass=part,
                                   support=self.support.subset(idx))
        if pm.probability > 0 and on_mass is None:
            raise InputError(f"the density of {', '.join(self.names[k] for k in kept_others)} on the point mass of "
                             f"{pm.name} is not available ({pm.problem or 'no values on it'}): use marginal_grid(...)")
        model = _point_mass.Mixture(cont, on_mass, pm.probability)
        est = DensityEstimate(cont.data, cont.weights, cont.names, cont.units, cont.kernel, cont.bandwidth,
                              cont.bounds, cont.boundary, cont.engine, model=model, support=cont.support)
        est.attrs["marginal_note"] = (f"mixture over the point mass of {pm.name}: (1 - {pm.probability:.4g}) x the "
                                      "continuous part's marginal + the marginal on the point mass; H is that of "
                                      "the continuous part")
        return est

    def _fit_options(self, idx) -> dict:
        """Keyword arguments of :func:`fit` that rebuild this estimate's support for the
        variables ``idx`` (used for marginals and bootstrap refits)."""
        bounds = [self.bounds[j] for j in idx]
        boundary = self.boundary if self.boundary not in ("mask",) else None
        if boundary not in (None, "none") and not _boundary.has_bounds(bounds):
            boundary = None
        out = {"bounds": bounds, "boundary": boundary}
        if self.is_directional:
            kept = [self.names[j] for j in idx]
            if any(self.periods[j] is not None for j in idx):
                out["periods"] = [self.periods[j] for j in idx]
            if self.sphere is not None:
                inside = [n for n in self.sphere if n in kept]
                if len(inside) == 1:
                    raise InputError(f"{inside[0]} is half of the spherical location {self.sphere}: keep both "
                                     "or neither")
                if inside:
                    out["sphere"] = self.sphere
        return out

    def marginal(self, names) -> "DensityEstimate":
        """Marginal estimate of ``names`` (exact: Gaussian kernel, or product kernel with the
        kept variables leading); otherwise see :meth:`marginal_grid`.

        Parameters
        ----------
        names : str or list of str
            Variables to keep.

        Returns
        -------
        DensityEstimate
            The estimate of the kept variables (see :func:`mvkde.products.marginal`).
        """
        return _products.marginal(self, names)

    def marginal_grid(self, names, size=None, limits=None) -> xr.DataArray:
        """Marginal density of ``names`` integrated numerically from the joint grid.

        Parameters
        ----------
        names : str or list of str
            Variables to keep, in the order of the result's dimensions.
        size : int or sequence of int, optional
            Nodes per variable of the joint grid.
        limits : sequence of (lo, hi) or dict name -> (lo, hi), optional
            Range of the joint grid.

        Returns
        -------
        xarray.DataArray
            The marginal density (see :func:`mvkde.products.marginal_grid`).
        """
        return _products.marginal_grid(self, names, size, limits)

    def conditional(self, given: dict, size=None, limits=None) -> xr.DataArray:
        """Density of the other variables given values or (lo, hi) bins of ``given``.

        Parameters
        ----------
        given : dict
            Variable name -> value, or -> (lo, hi) bin.
        size : int or sequence of int, optional
            Nodes per remaining variable.
        limits : sequence of (lo, hi) or dict name -> (lo, hi), optional
            Grid range.

        Returns
        -------
        xarray.DataArray
            The conditional density (see :func:`mvkde.products.conditional`).
        """
        return _products.conditional(self, given, size=size, limits=limits)

    def cdf(self, points, *, size=None, limits=None) -> np.ndarray:
        """Joint CDF P(X <= x componentwise), point masses included.

        Parameters
        ----------
        points : array_like, shape (m, d), or pandas.DataFrame
            Evaluation points.
        size : int or sequence of int, optional
            Nodes per variable of the grid used when no closed form applies.
        limits : sequence of (lo, hi) or dict name -> (lo, hi), optional
            Range of that grid.

        Returns
        -------
        ndarray, shape (m,)
            Probabilities (see :func:`mvkde.products.cdf`).
        """
        return _products.cdf(self, points, size=size, limits=limits)

    def exceedance(self, points, *, size=None, limits=None) -> np.ndarray:
        """Joint exceedance P(X > x componentwise), point masses included.

        Parameters
        ----------
        points : array_like, shape (m, d), or pandas.DataFrame
            Evaluation points.
        size : int or sequence of int, optional
            Nodes per variable of the grid used when no closed form applies.
        limits : sequence of (lo, hi) or dict name -> (lo, hi), optional
            Range of that grid.

        Returns
        -------
        ndarray, shape (m,)
            Probabilities (see :func:`mvkde.products.exceedance`).
        """
        return _products.exceedance(self, points, size=size, limits=limits)

    def probability_grid(self, kind="exceedance", size=None, limits=None) -> xr.DataArray:
        """Joint CDF ('cdf') or exceedance ('exceedance') at every grid node.

        Parameters
        ----------
        kind : {'exceedance', 'cdf'}
            Which probability.
        size : int or sequence of int, optional
            Nodes per variable.
        limits : sequence of (lo, hi) or dict name -> (lo, hi), optional
            Grid range.

        Returns
        -------
        xarray.DataArray
            Probabilities in [0, 1] on the grid (see :func:`mvkde.products.probability_grid`).
        """
        return _products.probability_grid(self, kind, size, limits)

    def quantiles(self, name, probs, *, size=None, limits=None) -> np.ndarray:
        """Marginal quantiles of variable ``name`` (point mass included; see :func:`mvkde.products.quantiles`).

        Parameters
        ----------
        name : str
            The variable.
        probs : float or array_like of float
            Probabilities, strictly between 0 and 1.
        size : int or sequence of int, optional
            Nodes per variable of a joint grid to integrate the marginal from.
        limits : sequence of (lo, hi) or dict name -> (lo, hi), optional
            Range of that grid.

        Returns
        -------
        ndarray, shape (len(probs),)
            The quantiles.
        """
        return _products.quantiles(self, name, probs, size=size, limits=limits)

    def hdr_levels(self, masses=(0.5, 0.9, 0.99), *, size=None, limits=None) -> np.ndarray:
        """Density levels whose upper sets enclose ``masses`` of the probability.

        Parameters
        ----------
        masses : sequence of float
            Probability fractions, strictly between 0 and 1.
        size : int or sequence of int, optional
            Nodes per variable of the grid.
        limits : sequence of (lo, hi) or dict name -> (lo, hi), optional
            Grid range.

        Returns
        -------
        ndarray, shape (len(masses),)
            Density levels (see :func:`mvkde.products.hdr_levels`).
        """
        return _products.hdr_levels(self, masses, size=size, limits=limits)

    def mass_above(self, level, *, size=None, limits=None) -> np.ndarray:
        """Probability of the region where the density is at least ``level``.

        Parameters
        ----------
        level : float or array_like of float
            Density level(s).
        size : int or sequence of int, optional
            Nodes per variable of the grid.
        limits : sequence of (lo, hi) or dict name -> (lo, hi), optional
            Grid range.

        Returns
        -------
        ndarray, shape (len(level),)
            Fraction of the grid's mass at or above each level.
        """
        return _products.mass_above(self, level, size=size, limits=limits)

    def sector_table(self, direction, speed, sectors=16, speed_edges=None):
        """Joint probability per direction sector and speed class (see
        :func:`mvkde.products.sector_table`).

        Parameters
        ----------
        direction : str
            The circular variable.
        speed : str
            The linear variable.
        sectors : int
            Number of direction sectors (at least 2).
        speed_edges : array_like of float, optional
            Speed class edges; by default five equal classes over the grid limits.

        Returns
        -------
        xarray.DataArray
            Probabilities with dimensions ("sector", "speed_class").
        """
        return _products.sector_table(self, direction, speed, sectors, speed_edges)

    def standard_error(self, points) -> np.ndarray:
        """Asymptotic pointwise standard error of the density at ``points``.

        Parameters
        ----------
        points : array_like, shape (m, d), or pandas.DataFrame
            Evaluation points.

        Returns
        -------
        ndarray, shape (m,)
            Standard errors (see :func:`mvkde.products.standard_error`).
        """
        return _products.standard_error(self, self.pdf(points))

    def bootstrap_bands(self, points=None, *, kind="density", level=0.9, replicates=200, seed=None):
        """Percentile bootstrap band (lower, upper) for the density or exceedance.

        Parameters
        ----------
        points : array_like, shape (m, d), or pandas.DataFrame, optional
            Evaluation points; None for the nodes of the default grid.
        kind : {'density', 'exceedance'}
            The statistic.
        level : float
            Coverage of the band, strictly between 0 and 1.
        replicates : int
            Number of bootstrap resamples (at least 2).
        seed : int or numpy.random.Generator, optional
            Seed for :func:`numpy.random.default_rng`.

        Returns
        -------
        lower, upper : ndarray, shape (m,)
            The band's ends (see :func:`mvkde.products.bootstrap_bands`).
        """
        return _products.bootstrap_bands(self, points, kind=kind, level=level,
                                         replicates=replicates, seed=seed)
