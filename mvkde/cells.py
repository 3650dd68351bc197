"""The batch door: many cells fitted and evaluated on one shared grid at once.

A per-cell run (one density per station, grid cell, season) is many small
problems.  :func:`fit_cells` takes the samples of a block of cells and
returns a :class:`CellBatch` whose arrays have the cell axis first: the
densities on the shared grid, the bandwidth matrices, diagnostics, the point
mass and the per-cell products asked for.  The pipeline calls this function
and nothing else of the library; :func:`mvkde.fit` is the door for one
sample.

Every cell runs the steps of :func:`mvkde.fit` (so both doors give the same
numbers), advanced together: the bandwidth selections of a round (the
continuous parts, then the other variables on a point mass) are answered by
one :func:`mvkde.bandwidth.select_many` call, and every boundary model (none,
reflection, renormalisation, the linear boundary kernel) hands its grid over
as kernel-sum pieces that the whole block evaluates in one
:func:`mvkde.engines.evaluate_grid_many` call (one binning, one batched FFT);
the other variables on a point mass are a second, (d-1)-dimensional batch.
Circular variables are batched too: their von Mises kernels times the linear
block's kernel (reflected or not) are kernel sums with periodic axes
(``DirectionalModel.grid_pieces``), which the binned engine convolves
circularly along those axes (:mod:`mvkde.engines.periodic`); their
smoothing goes through the same rounds: the von Mises mixture plug-in
concentrations of a round (one EM for the block,
:func:`mvkde.directional.selectors.mixture_plugin_concentrations`) and the
linear block's bandwidth (``select_many``); cross-validated concentrations
(alone, or jointly with the linear block) and the sphere's concentration are
chosen cell by cell and ``CellBatch.path`` says so.
Models that are not kernel sums on a regular lattice (spherical locations,
the transformation, beta and gamma kernels, masks) are evaluated cell by
cell, and ``CellBatch.path`` says which and why.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np

from . import bandwidth as _bandwidth
from . import engines as _engines
from . import products as _products
from .errors import MvkdeError, MvkdeWarning
from .boundary import methods as _methods
from .estimator import fit_steps
from .steps import ConcentrationRequest

__all__ = ["fit_cells", "CellBatch", "CellProducts", "engine_work_bytes", "warm_up"]


def warm_up() -> None:
    """Load the compiled binning loops now (numba and its cached machine code, about 0.8 s).

    A scheduler calls this before it forks worker processes, so that each
    worker starts with them loaded instead of loading them itself.
    """
    from .engines.compiled import warm

    warm()


def engine_work_bytes() -> int:
    """Bytes of scratch memory one evaluation task may hold (the direct engine's chunks).

    Returns
    -------
    int
    """
    return int(_engines.exact.CHUNK_ELEMENTS) * 8


@dataclass
class CellProducts:
    """Per-cell products asked of :func:`fit_cells` (each needs the cell's fitted estimate).

    Attributes
    ----------
    thresholds : ndarray, shape (m, d)
        Points at which the joint exceedance probability is wanted.
    samples : int
        Random draws per cell (0 for none).
    points : ndarray, shape (p, d), or None
        Points at which the density is wanted.
    bootstrap : int
        Bootstrap replicates for percentile bands (0 for none).
    band_level : float
        Coverage of the bands.
    standard_error : bool
        Whether to return the variance factor R(K) / (n |H|^{1/2}).
    sectors : int
        Direction sectors of a wind-rose table (0 for none).
    speed_classes : list of float
        Edges of the speed classes of the wind-rose table (empty: the rule of
        :func:`mvkde.products.speed_class_edges`).
    seed : int
        Seed of draws and bootstrap replicates (combined with each cell's key).
    """

    thresholds: np.ndarray = field(default_factory=lambda: np.empty((0, 0)))
    samples: int = 0
    points: np.ndarray | None = None
    bootstrap: int = 0
    band_level: float = 0.9
    standard_error: bool = False
    sectors: int = 0
    speed_classes: list = field(default_factory=list)
    seed: int = 0

    @property
    def any(self) -> bool:
        """True when some product needs each cell's fitted estimate."""
        return bool(len(self.thresholds) or self.samples or self.points is not None or self.bootstrap
                    or self.standard_error or self.sectors)


@dataclass
class CellBatch:
    """Results of :func:`fit_cells`; every array has the cell axis first.

    Attributes
    ----------
    names : list of str
        Variable names (the grid's dimensions, in order).
    axes : list of ndarray
        The shared evaluation grid.
    density : ndarray, shape (C, *grid)
        Density of each cell on the grid (NaN for a refused cell); with a
        point mass, the continuous part.
    H : ndarray, shape (C, d, d)
        Bandwidth matrices (NaN for a refused cell).
    converged, at_edge : ndarray of bool, shape (C,)
        Diagnostics of the bandwidth selection.
    engine : list of str
        Evaluation engine of each cell ("" for a refused cell).
    errors : list of str or None
        Why a cell was refused (None for a cell that got a density).
    point_mass_probability : ndarray, shape (C,), or None
        Probability of the point mass, when a variable declares one.
    density_at_point_mass : ndarray, shape (C, *other grid), or None
        Density of the other variables on the point mass (integrates to the
        point-mass probability).
    products : dict of str to ndarray
        Per-cell products (see :class:`CellProducts`), cell axis first.
    path : str
        How the batch was computed: ``"batched"`` or ``"per cell: REASON"``.
    """

    names: list
    axes: list
    density: np.ndarray
    H: np.ndarray
    converged: np.ndarray
    at_edge: np.ndarray
    engine: list
    errors: list
    point_mass_probability: np.ndarray | None = None
    density_at_point_mass: np.ndarray | None = None
    products: dict = field(default_factory=dict)
    path: str = "batched"

    @property
    def n_cells(self) -> int:
        return self.density.shape[0]


def fit_cells(samples, *, axes, names=None, units=None, kernel="gaussian", form="product", bandwidth="plugin",
              parametrization="full", bounds=None, boundary=None, point_masses=None, periods=None, sphere=None,
              engine="auto", products: CellProducts | None = None, keys=None) -> CellBatch:
    """Fit and evaluate many samples (cells) on one shared grid.

    Parameters
    ----------
    samples : list of ndarray, each (n_c, d)
        One sample per cell (missing values already dropped).
    axes : list of ndarray
        The shared evaluation grid, one increasing axis per variable.
    names, units : list of str, optional
        Variable names and units (default ``x0, x1, ...``).
    kernel, form, bandwidth, parametrization, bounds, boundary, point_masses, periods, sphere, engine
        As in :func:`mvkde.fit`; the same settings for every cell.
    products : CellProducts, optional
        Per-cell products to compute from each cell's estimate.
    keys : list of tuple of int, optional
        A key per cell that seeds its random draws and bootstrap replicates,
        so results do not depend on how cells are grouped into batches
        (default: the position in ``samples``).

    Returns
    -------
    CellBatch
        Arrays with the cell axis first.  A cell the estimator refuses (too
        few distinct values, a singular sample) gets NaN and its reason in
        ``errors``; the other cells are unaffected.

    Notes
    -----
    Every cell runs the steps of :func:`mvkde.fit` (:func:`mvkde.estimator.fit_steps`)
    in lock step: the bandwidth selections a round of cells asks for (the
    continuous parts, then the other variables on a point mass) are answered
    by one :func:`mvkde.bandwidth.select_many` call, and the grids of all
    cells are evaluated together: each boundary model gives its grid as
    kernel-sum pieces (reflected images, moment-weighted copies, reweighted
    data; ``grid_pieces``), all pieces of the block go through one
    :func:`mvkde.engines.evaluate_grid_many` call (one binning and one
    batched FFT), and each cell's pieces are combined as its single estimate
    combines them; circular variables give pieces with periodic axes (von
    Mises kernels, circular FFT convolution).  Models that are not kernel
    sums on the binned engine (spherical locations, transformation,
    beta/gamma kernels, masks) are evaluated cell by cell; ``CellBatch.path``
    says which and why.
    """
    products = products or CellProducts()
    axes = [np.asarray(a, dtype=float) for a in axes]
    d = len(axes)
    names = list(names) if names is not None else [f"x{j}" for j in range(d)]
    units = list(units) if units is not None else [""] * d
    keys = list(keys) if keys is not None else [(k, 0) for k in range(len(samples))]
    batch = _empty_batch(len(samples), names, axes, point_masses)
    if not samples:
        return batch
    options = dict(kernel=kernel, form=form, bandwidth=bandwidth, parametrization=parametrization,
                   engine=engine, names=names, units=units, bounds=bounds, boundary=boundary,
                   point_masses=point_masses, periods=periods, sphere=sphere)
    notes: list = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", MvkdeWarning)  # the caller reports through the diagnostics
        estimates = _fit_all(samples, options, batch.errors, notes)
        _boundary_notes(estimates, notes)
        _fill_grids(batch, estimates, notes)
        _selection_notes(estimates, notes)
        if products.any:
            notes.append("per-cell products are computed from each cell's estimate")
            limits = [(a[0], a[-1]) for a in axes]
            size = [len(a) for a in axes]
            for c, (est, key) in enumerate(zip(estimates, keys)):
                if est is None or batch.errors[c] is not None:
                    continue
                try:
                    _store_products(batch, c, _cell_products(est, products, size, limits, key))
                except (MvkdeError, np.linalg.LinAlgError) as exc:
                    _refuse(batch, c, exc)
    batch.path = "batched" if not notes else "batched; per cell: " + "; ".join(dict.fromkeys(notes))
    return batch


def _boundary_notes(estimates, notes: list) -> None:
    """Record where a boundary method other than the one asked for was used (and why), for the provenance."""
    used: dict = {}
    for est in estimates:
        choice = "" if est is None else str(est.attrs.get("boundary_choice", ""))
        if "not applicable" in choice or "reflection used" in choice:
            used[choice] = used.get(choice, 0) + 1
    for choice, count in used.items():
        notes.append(f"boundary of {count} cell(s): {choice}")


def _selection_notes(estimates, notes: list) -> None:
    """Record the smoothing choices made cell by cell, for the provenance: cross-validated
    concentrations (alone or jointly with the linear block) and the sphere's concentration.
    The mixture plug-in concentrations and the linear block's separable selections are
    answered for the whole block (``_select_round``); the closed-form rules cost O(n) per cell."""
    for est in estimates:
        attrs = {} if est is None else est.attrs
        for key, value in attrs.items():
            value = str(value)
            if key.startswith("concentration_method_") and "cross-validation" in value:
                if "joint" in value:
                    notes.append(f"smoothing by {value}: the criterion couples the concentrations and the "
                                 "linear block, so it is minimised cell by cell")
                else:
                    notes.append(f"concentration by {value}, cell by cell")


def _refuse(batch: CellBatch, c: int, exc) -> None:
    batch.density[c] = np.nan
    batch.H[c] = np.nan
    if batch.point_mass_probability is not None:
        batch.point_mass_probability[c] = np.nan
    if batch.density_at_point_mass is not None:
        batch.density_at_point_mass[c] = np.nan
    batch.errors[c] = f"{type(exc).__name__}: {exc}"


def _store_products(batch: CellBatch, c: int, values: dict) -> None:
    for name, value in values.items():
        value = np.asarray(value, dtype=float)
        if name not in batch.products:
            batch.products[name] = np.full((batch.n_cells,) + value.shape, np.nan)
        batch.products[name][c] = value


# ---------------------------------------------------------------------------
# fitting: every cell's fit steps in lock step, selections answered together
# ---------------------------------------------------------------------------

def _fit_all(samples, options: dict, errors: list, notes: list) -> list:
    """The fitted estimate of every cell (None for a refused cell, its reason in ``errors``)."""
    C = len(samples)
    estimates: list = [None] * C
    steps = [fit_steps(x, **options) for x in samples]
    pending: dict = {}

    def advance(c, how, value=None):
        try:
            if how == "start":
                request = next(steps[c])
            elif how == "throw":
                request = steps[c].throw(value)
            else:
                request = steps[c].send(value)
        except StopIteration as stop:
            estimates[c] = stop.value
        except (MvkdeError, np.linalg.LinAlgError) as exc:
            errors[c] = f"{type(exc).__name__}: {exc}"
        else:
            pending[c] = request

    for c in range(C):
        advance(c, "start")
    while pending:
        todo, pending = pending, {}
        for requests in _groups(todo).values():
            for c, answer in zip(requests, _select_round([todo[c] for c in requests])):
                advance(c, "throw" if isinstance(answer, BaseException) else "send", answer)
    return estimates


def _groups(requests: dict) -> dict:
    """Requests that one select_many call can answer, grouped."""
    out: dict = {}
    for c, r in requests.items():
        if isinstance(r, ConcentrationRequest):
            out.setdefault(("concentration",), []).append(c)
            continue
        key = (r.method, r.data.shape[1], r.kernel, r.form, r.parametrization, r.weights is None)
        out.setdefault(key, []).append(c)
    return out


def _select_round(requests) -> list:
    """One BandwidthResult (or the error select would raise) per request, chosen together;
    concentration requests: ``(nu, mixture)`` per request, the EM of all run together."""
    if isinstance(requests[0], ConcentrationRequest):
        return ConcentrationRequest.answer_many(requests)
    answers: list = [None] * len(requests)
    good = []
    for k, r in enumerate(requests):
        try:
            _bandwidth.check_sample_rank(r.data, r.weights, r.names)
            good.append(k)
        except MvkdeError as exc:
            answers[k] = exc
    if not good:
        return answers
    first = requests[good[0]]
    try:
        results = _bandwidth.select_many(
            first.method, [requests[k].data for k in good],
            None if first.weights is None else [requests[k].weights for k in good],
            kernel=first.kernel, form=first.form, parametrization=first.parametrization, names=first.names,
            _checked=True)
    except (MvkdeError, np.linalg.LinAlgError):
        # one cell spoils the block: answer each alone so only that cell is refused
        for k in good:
            r = requests[k]
            try:
                answers[k] = _bandwidth.select(r.method, r.data, r.weights, kernel=r.kernel, form=r.form,
                                               parametrization=r.parametrization, names=r.names)
            except (MvkdeError, np.linalg.LinAlgError) as exc:
                answers[k] = exc
        return answers
    for k, result in zip(good, results):
        answers[k] = result
    return answers


# ---------------------------------------------------------------------------
# grids: the pieces of every cell's model in one engine call
# ---------------------------------------------------------------------------

_PER_CELL_MODELS = {
    # DirectionalModel: its own per_cell_reason (sphere, transformed linear block)
    "Transformation": "boundary='transform' is evaluated point by point in the transformed space, cell by cell",
    "BetaKernel": "beta kernels are not convolutions: summed directly, cell by cell",
    "GammaKernel": "gamma kernels are not convolutions: summed directly, cell by cell",
    "MaskRenormalization": "the mask's edge correction is evaluated cell by cell",
}


def _model_pieces(model, axes, notes: list):
    pieces = getattr(model, "grid_pieces", None)
    pieces = pieces(axes) if pieces is not None else None
    if pieces is None:
        why = getattr(model, "per_cell_reason", None) or _PER_CELL_MODELS.get(type(model).__name__)
        if why:
            notes.append(why)
    return pieces


def _evaluate_many(estimates: dict, axes, notes: list) -> dict:
    """Grid of each estimate (``{c: est}``) as ``est.grid`` computes it: cell -> values or error."""
    out: dict = {}
    batched = {}
    for c, est in estimates.items():
        try:
            pieces = _model_pieces(est._model, axes, notes)
            if pieces is None:
                out[c] = est._evaluate_grid(axes)
            else:
                batched[c] = pieces
        except (MvkdeError, np.linalg.LinAlgError) as exc:
            out[c] = exc
    if not batched:
        return out
    cells = list(batched)
    first = estimates[cells[0]]
    try:
        values, choices = _methods.evaluate_pieces(axes, [batched[c][0] for c in cells], first.kernel, first.engine)
    except (MvkdeError, np.linalg.LinAlgError):
        values = None
    for k, c in enumerate(cells):
        est = estimates[c]
        try:
            if values is None:
                out[c] = est._evaluate_grid(axes)
            else:
                out[c] = est._finish_grid(axes, batched[c][1](values[k]), choices[k])
        except (MvkdeError, np.linalg.LinAlgError) as exc:
            out[c] = exc
    return out


def _fill_grids(batch: CellBatch, estimates: list, notes: list) -> None:
    axes = batch.axes
    d = len(axes)
    good = {c: est for c, est in enumerate(estimates) if est is not None}
    for c, value in _evaluate_many(good, axes, notes).items():
        if isinstance(value, BaseException):
            _refuse(batch, c, value)
            continue
        est = good[c]
        batch.density[c] = value
        batch.H[c] = est.H
        batch.converged[c] = bool(est.bandwidth.converged)
        batch.at_edge[c] = bool(est.bandwidth.at_edge)
        batch.engine[c] = str(est.attrs.get("engine", ""))
        if est._point is not None:
            batch.point_mass_probability[c] = est.point_mass_probability
    if batch.point_mass_probability is None or d == 1:
        return
    # the other variables on the point mass: a second batch on the other axes
    index = next((est._point.index for est in estimates if est is not None and est._point is not None), None)
    if index is None:
        return
    other_axes = [a for k, a in enumerate(axes) if k != index]
    parts = {}
    for c, est in good.items():
        if batch.errors[c] is not None:
            continue
        pm = est._point
        if pm.estimate is not None:
            parts[c] = pm.estimate
        elif pm.count == 0:
            batch.density_at_point_mass[c] = 0.0
        else:
            try:
                est.point_mass_grid([len(a) for a in other_axes], limits=[(a[0], a[-1]) for a in other_axes])
            except (MvkdeError, np.linalg.LinAlgError) as exc:
                _refuse(batch, c, exc)
    for c, value in _evaluate_many(parts, other_axes, notes).items():
        if isinstance(value, BaseException):
            _refuse(batch, c, value)
        else:
            batch.density_at_point_mass[c] = value * good[c]._point.probability


def _empty_batch(C: int, names, axes, point_masses) -> CellBatch:
    d = len(axes)
    shape = tuple(len(a) for a in axes)
    batch = CellBatch(names, axes, np.full((C,) + shape, np.nan), np.full((C, d, d), np.nan),
                      np.zeros(C, dtype=bool), np.zeros(C, dtype=bool), [""] * C, [None] * C)
    j = _point_mass_index(point_masses)
    if j is not None:
        batch.point_mass_probability = np.full(C, np.nan)
        if d > 1:
            batch.density_at_point_mass = np.full((C,) + tuple(n for k, n in enumerate(shape) if k != j), np.nan)
    return batch


def _point_mass_index(point_masses) -> int | None:
    if point_masses is None:
        return None
    return next((j for j, t in enumerate(point_masses) if t is not None), None)


def _cell_products(est, p: CellProducts, size, limits, key) -> dict:
    """Per-cell products from one fitted estimate."""
    out = {}
    thresholds = p.thresholds
    if len(thresholds):
        out["exceedance_at_threshold"] = est.exceedance(thresholds)
    if p.standard_error:
        # R(K) / (n |H|^{1/2}): the variance of f_hat(x) divided by f(x)
        out["variance_factor"] = float(_products.standard_error(est, np.ones(1))[0] ** 2)
    if p.sectors:
        direction, speed = _products.direction_and_speed(est)
        k = est.names.index(speed)
        edges = _products.speed_class_edges(limits[k][0], limits[k][1], p.speed_classes)
        out["sector_probability"] = est.sector_table(direction, speed, p.sectors, edges).values
    seed = [p.seed, int(key[0]), int(key[1])]
    if p.samples:
        out["samples"] = est.sample(p.samples, seed=seed + [1])
    if p.points is not None:
        out["density_at_point"] = est.pdf(p.points)
    if p.bootstrap:
        def stat(b):
            g = b.grid(size, limits=limits).values.ravel()
            return np.concatenate([g, b.exceedance(thresholds)]) if len(thresholds) else g
        draws = _products.bootstrap(est, stat, p.bootstrap, seed=seed + [2])
        a = (1 - p.band_level) / 2
        lo, hi = np.quantile(draws, [a, 1 - a], axis=0)
        m = int(np.prod(size))
        out["density_lower"], out["density_upper"] = lo[:m].reshape(size), hi[:m].reshape(size)
        if len(thresholds):
            out["exceedance_lower"], out["exceedance_upper"] = lo[m:], hi[m:]
    return out
