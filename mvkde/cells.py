"""The batch door: many cells fitted and evaluated on one shared grid at once.

A per-cell run (one density per station, grid cell, season) is many small
problems.  :func:`fit_cells` takes the samples of a block of cells and
returns a :class:`CellBatch` whose arrays have the cell axis first: the
densities on the shared grid, the bandwidth matrices, diagnostics, the point
mass and the per-cell products asked for.  The pipeline calls this function
and nothing else of the library; :func:`mvkde.fit` is the door for one
sample.

Cells without bounds, point masses or directions are selected and evaluated
as one array problem (:func:`mvkde.bandwidth.select_many`, one binned FFT
for the block in :func:`mvkde.engines.evaluate_grid_many`).  Other settings
are fitted cell by cell through :func:`mvkde.fit`; ``CellBatch.path`` says
which path ran and why.  Either way every cell gives the numbers
``fit(sample, ...).grid(...)`` gives for it.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np

from . import bandwidth as _bandwidth
from . import engines as _engines
from . import products as _products
from .errors import MvkdeError, MvkdeWarning
from .estimator import fit
from .kernels import get_kernel, get_multivariate_kernel

__all__ = ["fit_cells", "CellBatch", "CellProducts", "engine_work_bytes"]


def engine_work_bytes() -> int:
    """Bytes of scratch memory one evaluation task may hold (the direct engine's chunks)."""
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


def _per_cell_reason(bandwidth, bounds, point_masses, periods, sphere, products: CellProducts) -> str:
    """Why a batch cannot take the one-array path ('' when it can)."""
    if bounds is not None and any(b is not None for b in bounds):
        return "bounded variables are fitted cell by cell"
    if point_masses is not None and any(t is not None for t in point_masses):
        return "point masses are fitted cell by cell"
    if periods is not None and any(p is not None for p in periods):
        return "circular variables are fitted cell by cell"
    if sphere is not None:
        return "a location on the sphere is fitted cell by cell"
    if not isinstance(bandwidth, str):
        return "a given bandwidth matrix is applied cell by cell"
    if products.any:
        return "per-cell products need each cell's estimate"
    return ""


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
    reason = _per_cell_reason(bandwidth, bounds, point_masses, periods, sphere, products)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", MvkdeWarning)  # the caller reports through the diagnostics
        if not reason:
            try:
                _fill_batched(batch, samples, kernel, form, bandwidth, parametrization, engine)
                return batch
            except (MvkdeError, np.linalg.LinAlgError):
                reason = "a cell was refused: fitted cell by cell so only that cell is flagged"
        batch.path = "per cell: " + reason
        options = dict(kernel=kernel, form=form, bandwidth=bandwidth, parametrization=parametrization,
                       engine=engine, names=names, units=units, bounds=bounds, boundary=boundary,
                       point_masses=point_masses, periods=periods, sphere=sphere)
        for c, (x, key) in enumerate(zip(samples, keys)):
            _fill_one(batch, c, x, options, products, key)
    return batch


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


def _fill_batched(batch: CellBatch, samples, kernel, form, bandwidth, parametrization, engine) -> None:
    d = len(batch.axes)
    mk = get_multivariate_kernel(get_kernel(kernel).name, form, d)
    results = _bandwidth.select_many(bandwidth, samples, None, kernel=mk.name, form=mk.form,
                                     parametrization=parametrization)
    values, choices = _engines.evaluate_grid_many(batch.axes, samples, None, [r.matrix for r in results], mk,
                                                  engine)
    for c, (r, choice) in enumerate(zip(results, choices)):
        batch.density[c] = values[c]
        batch.H[c] = r.H
        batch.converged[c] = bool(r.converged)
        batch.at_edge[c] = bool(r.at_edge)
        batch.engine[c] = choice.engine


def _fill_one(batch: CellBatch, c: int, x, options: dict, products: CellProducts, key) -> None:
    limits = [(a[0], a[-1]) for a in batch.axes]
    size = [len(a) for a in batch.axes]
    try:
        est = fit(x, **options)
        grid = est.grid(size, limits=limits)
        batch.density[c] = grid.values
        batch.H[c] = est.H
        batch.converged[c] = bool(est.bandwidth.converged)
        batch.at_edge[c] = bool(est.bandwidth.at_edge)
        batch.engine[c] = str(grid.attrs.get("engine", ""))
        j = _point_mass_index(options["point_masses"])
        if j is not None:
            batch.point_mass_probability[c] = est.point_mass_probability
            if len(size) > 1:
                keep = [k for k in range(len(size)) if k != j]
                pm = est.point_mass_grid([size[k] for k in keep], limits=[limits[k] for k in keep])
                batch.density_at_point_mass[c] = pm.values
        if products.any:
            for name, value in _cell_products(est, products, size, limits, key).items():
                value = np.asarray(value, dtype=float)
                if name not in batch.products:
                    batch.products[name] = np.full((batch.n_cells,) + value.shape, np.nan)
                batch.products[name][c] = value
    except (MvkdeError, np.linalg.LinAlgError) as exc:
        batch.density[c] = np.nan
        batch.H[c] = np.nan
        batch.errors[c] = f"{type(exc).__name__}: {exc}"


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
