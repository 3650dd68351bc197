"""Evaluation engines and the automatic choice between them.

Every engine evaluates ``f(x) = sum_i w_i |H|^{-1/2} K(L^{-1}(x - X_i))`` for a
unit-covariance kernel K.  Entry points:

* :func:`evaluate_points`    -- density at scattered points, shape (m,);
* :func:`evaluate_grid`      -- density on the tensor grid given by ``axes``;
* :func:`evaluate_grid_many` -- densities of many cells on one shared grid
  (the per-cell pipeline), shape (cells, *grid).

All return the values and the :class:`EngineChoice` (engine, reason and
details) that the estimate stores in its attributes.

Engines
-------
exact
    Chunked direct sums (``exact.py``): any kernel, any point set, exact.
binned
    Linear binning + FFT convolution on regular grids, d <= 4, with the
    binning error estimated and held below ``tol`` x peak (``binned.py``).
tree
    KD-tree neighbour sums on the whitened data (``tree.py``): exact for
    compact kernels at a cost that grows with the neighbours; for the
    Gaussian kernel truncated with a stated bound.

``engine="auto"`` picks by n, m, d, grid or points and the kernel, and says
why; an impossible request (binned at scattered points, binned with d > 4,
binned on an irregular grid) is refused naming the engine that works.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field

import numpy as np

from ..bandwidth.matrix import BandwidthMatrix
from ..errors import InputError, MvkdeWarning, check_choice
from ..kernels import MultivariateKernel, unit_ball_volume
from . import binned, exact, periodic, tree

ENGINES = ("auto", "exact", "binned", "tree")

# below this many kernel evaluations (n x m) direct sums are as fast as anything
DIRECT_LIMIT = 2_000_000
# auto falls back from a binned grid that misses its tolerance only up to this many terms
FALLBACK_LIMIT = 500_000_000
# tree sums pay when fewer than this fraction of the data are neighbours of a point
TREE_FRACTION = 0.2

__all__ = ["ENGINES", "EngineChoice", "choose", "evaluate_grid", "evaluate_grid_many",
           "evaluate_points", "exact", "binned", "periodic", "tree", "validate_engine"]


@dataclass(frozen=True)
class EngineChoice:
    """The engine picked for an evaluation and why.

    Parameters
    ----------
    engine : {'exact', 'binned', 'tree'}
    reason : str
        One sentence saying why this engine was used.
    details : dict, optional
        Further facts (e.g. the binned engine's refinement and error estimate); not compared.
    """

    engine: str
    reason: str
    details: dict = field(default_factory=dict, compare=False)

    def as_attrs(self) -> dict:
        """The choice as estimate attributes.

        Returns
        -------
        dict
            ``engine``, ``engine_reason`` and ``engine_<key>`` for each entry of ``details``.
        """
        out = {"engine": self.engine, "engine_reason": self.reason}
        for key, value in self.details.items():
            out[f"engine_{key}"] = value
        return out


def validate_engine(name) -> str:
    """Check an engine name.

    Parameters
    ----------
    name : str
        One of :data:`ENGINES`.

    Returns
    -------
    str
        ``name``, checked.

    Raises
    ------
    InputError
        If ``name`` is not one of :data:`ENGINES`.
    """
    return check_choice("engine", name, ENGINES)


def neighbour_fraction(data: np.ndarray, bw: BandwidthMatrix, kernel: MultivariateKernel) -> float:
    """Rough share of the data inside one kernel support (compact kernels).

    Support volume |H|^{1/2} V_z over the volume of a normal law with the
    data's covariance, (2 pi e)^{d/2} |S|^{1/2} (its entropy volume).

    Parameters
    ----------
    data : ndarray, shape (n, d)
        The sample (at most about 100 000 rows of it are used for the covariance).
    bw : BandwidthMatrix
    kernel : MultivariateKernel

    Returns
    -------
    float
        The share, at most 1; 1 for non-compact kernels or a singular data covariance.
    """
    d = kernel.d
    if not kernel.is_compact:
        return 1.0
    if kernel.is_radial:
        vz = unit_ball_volume(d) * kernel.radius ** d
    else:
        vz = (2.0 * kernel.univariate.unit_radius) ** d
    cov = np.atleast_2d(np.cov(data[:: max(1, data.shape[0] // 100_000)].T))
    sign, logdet = np.linalg.slogdet(cov)
    if sign <= 0:
        return 1.0
    log_frac = math.log(vz) + 0.5 * bw.log_det - 0.5 * d * math.log(2 * math.pi * math.e) - 0.5 * logdet
    return float(min(1.0, math.exp(log_frac)))


def choose(requested: str, *, kind: str, n: int, m: int, d: int, kernel: MultivariateKernel,
           regular: bool = True, fraction: float | None = None) -> EngineChoice:
    """Pick an engine for ``m`` evaluation nodes (``kind`` is 'grid' or 'points').

    Parameters
    ----------
    requested : {'auto', 'exact', 'binned', 'tree'}
        The engine asked for; anything but ``'auto'`` is checked and kept.
    kind : {'grid', 'points'}
    n, m, d : int
        Number of data, of evaluation nodes and of variables.
    kernel : MultivariateKernel
    regular : bool, optional
        The grid axes are evenly spaced.
    fraction : float, optional
        Estimated share of the data within one kernel support (compact kernels), for the tree.

    Returns
    -------
    EngineChoice

    Raises
    ------
    InputError
        If ``'binned'`` is requested for points, for d above ``binned.MAX_DIM`` or for an uneven grid.
    """
    requested = validate_engine(requested)
    work = n * m
    if requested == "binned":
        if kind != "grid":
            raise InputError("engine 'binned' evaluates on regular grids only (the estimate's grid()); "
                             "for scattered points use engine='exact' (or 'tree' for compact kernels)")
        if d > binned.MAX_DIM:
            raise InputError(f"engine 'binned' handles at most {binned.MAX_DIM} variables, the data have "
                             f"{d}: use engine='exact' (or 'tree' for compact kernels)")
        if not regular:
            raise InputError("engine 'binned' needs evenly spaced grid axes with at least 2 nodes each: "
                             "use engine='exact' for this grid")
        return EngineChoice("binned", "requested by the caller")
    if requested == "exact":
        return EngineChoice("exact", "requested by the caller")
    if requested == "tree":
        if kernel.is_compact:
            return EngineChoice("tree", "requested by the caller")
        return EngineChoice("tree", "requested by the caller; Gaussian kernel truncated at a radius "
                                    f"that keeps the error below {tree.DEFAULT_TOL:g} x peak")
    # auto
    compact_tree = kernel.is_compact and fraction is not None and fraction < TREE_FRACTION
    if kind == "grid" and d <= binned.MAX_DIM and regular and work > DIRECT_LIMIT:
        if kernel.univariate.smoothness != "discontinuous":
            return EngineChoice("binned", f"regular grid of {m} nodes, n={n} data, d={d}: binned FFT "
                                          f"convolution costs far less than {work:.3g} direct kernel terms")
    if work > DIRECT_LIMIT and compact_tree:
        return EngineChoice("tree", f"compact kernel with about {fraction:.2g} of the n={n} data in one "
                                    f"support: KD-tree neighbour sums instead of {work:.3g} direct terms")
    why = []
    if work <= DIRECT_LIMIT:
        why.append(f"n x m = {work} kernel terms is small")
    elif kind == "grid" and d > binned.MAX_DIM:
        why.append(f"d={d} is beyond the binned engine's {binned.MAX_DIM}")
    elif kind == "grid" and not regular:
        why.append("the grid is not evenly spaced")
    elif kind == "grid" and kernel.univariate.smoothness == "discontinuous":
        why.append("the uniform kernel's jump makes binning errors first order")
    elif kind == "points" and not kernel.is_compact:
        why.append("Gaussian kernel at scattered points (exact sums, no truncation)")
    elif kind == "points":
        why.append(f"about {fraction:.2g} of the data lie in one kernel support: a tree would not prune")
    return EngineChoice("exact", "direct sums: " + "; ".join(why))


def _as_bw(bw, d) -> BandwidthMatrix:
    return bw if isinstance(bw, BandwidthMatrix) else BandwidthMatrix.from_matrix(bw, d)


def _fraction(data, bw, kernel, work):
    if kernel.is_compact and work > DIRECT_LIMIT:
        return neighbour_fraction(data, bw, kernel)
    return None


def evaluate_points(points, data, weights, bw, kernel, engine="auto", *, log=False, tol=None):
    """Density (or log density) at ``points`` (m, d).

    Parameters
    ----------
    points : ndarray, shape (m, d)
    data : ndarray, shape (n, d)
    weights : ndarray, shape (n,), or None
    bw : BandwidthMatrix or ndarray, shape (d, d)
    kernel : MultivariateKernel
    engine : {'auto', 'exact', 'tree'}, optional
        ``'binned'`` is refused at scattered points.
    log : bool, optional
        Return the log density.
    tol : float, optional
        Truncation tolerance of the tree engine's Gaussian kernel
        (relative to the peak density; default 1e-3).

    Returns
    -------
    values : ndarray, shape (m,)
    choice : EngineChoice
    """
    bw = _as_bw(bw, data.shape[1])
    n, d = data.shape
    m = points.shape[0]
    choice = choose(engine, kind="points", n=n, m=m, d=d, kernel=kernel,
                    fraction=_fraction(data, bw, kernel, n * m))
    if choice.engine == "tree":
        vals = tree.density(points, data, weights, bw, kernel, tol=tol or tree.DEFAULT_TOL)
        if log:
            with np.errstate(divide="ignore"):
                return np.log(np.maximum(vals, 0.0)), choice
        return vals, choice
    if log:
        return exact.log_density(points, data, weights, bw, kernel), choice
    return exact.density(points, data, weights, bw, kernel), choice


def _mesh_points(axes) -> np.ndarray:
    mesh = np.meshgrid(*axes, indexing="ij")
    return np.column_stack([g.ravel() for g in mesh])


def _binned_choice(choice: EngineChoice, info: binned.BinnedInfo) -> EngineChoice:
    details = {"refinement": "x".join(map(str, info.refinement)),
               "error_estimate": float(info.error_estimate),
               "tolerance": float(info.tolerance),
               "tolerance_met": int(info.met)}
    return EngineChoice("binned", f"{choice.reason}; {info.describe()}", details)


def evaluate_grid(axes, data, weights, bw, kernel, engine="auto", *, tol=None):
    """Density on the tensor grid ``axes`` (a list of d increasing 1-D arrays).

    Parameters
    ----------
    axes : list of ndarray
    data : ndarray, shape (n, d)
    weights : ndarray, shape (n,), or None
    bw : BandwidthMatrix or ndarray, shape (d, d)
    kernel : MultivariateKernel
    engine : {'auto', 'exact', 'binned', 'tree'}, optional
    tol : float, optional
        Binned engine's target max binning error relative to the peak (default 1e-3).

    Returns
    -------
    values : ndarray, shape (len(axes[0]), ..., len(axes[d-1]))
    choice : EngineChoice

    See Also
    --------
    evaluate_grid_many : the same for many cells at once.
    """
    values, choices = evaluate_grid_many(axes, [data], [weights], [bw], kernel, engine, tol=tol)
    return values[0], choices[0]


def evaluate_grid_many(axes, samples, weights, bws, kernel, engine="auto", *, tol=None, periods=None):
    """Densities of many cells on one shared grid.

    Parameters
    ----------
    axes : list of d increasing 1-D arrays (the grid shared by all cells)
    samples : list of (n_c, d) arrays, one per cell
    weights : None, or a list with None or an (n_c,) array per cell
    bws : list of BandwidthMatrix (or d x d arrays), one per cell
    kernel : MultivariateKernel (the same for all cells)
    engine : {"auto", "exact", "binned", "tree"}
    tol : float, optional
        Binned engine's target max binning error relative to each cell's
        peak (default 1e-3).
    periods : list of (float or None), optional
        Per axis: the period of a circular axis (von Mises kernel; its diagonal entry in H is the
        equivalent variance (P / 2 pi)^2 / kappa), None for a linear axis.  A
        :class:`periodic.PeriodicBandwidth` per cell carries the periods itself.

    Returns
    -------
    values : (cells, *grid) array
    choices : list of EngineChoice, one per cell

    Notes
    -----
    Cells that use the binned engine are binned together into one
    (cells, lattice...) array and transformed with one batched FFT along
    the grid axes; each cell gets its own kernel spectrum since H differs
    per cell.  Under ``engine="auto"`` a cell whose binned error estimate
    cannot be brought below ``tol`` within the lattice size limit is
    recomputed with direct sums; under ``engine="binned"`` it is kept and an
    MvkdeWarning says by how much the estimate exceeds the tolerance.
    """
    axes, samples, weights = _checked_cells(axes, samples, weights, bws)
    d = len(axes)
    cells = len(samples)
    tol = binned.DEFAULT_TOL if tol is None else float(tol)
    if periods is not None and any(p is not None for p in periods):
        bws = [periodic.PeriodicBandwidth.from_matrix(b, periods) for b in bws]
    if bws and isinstance(bws[0], periodic.PeriodicBandwidth):
        return _periodic_grid_many(axes, samples, weights, bws, kernel, validate_engine(engine), tol)
    bws = [_as_bw(b, d) for b in bws]
    shape = tuple(len(a) for a in axes)
    m = math.prod(shape)
    regular = binned.regular_spacing(axes) is not None
    values = np.empty((cells,) + shape)
    choices: list = [None] * cells
    batch = []
    for c in range(cells):
        n = samples[c].shape[0]
        choice = choose(engine, kind="grid", n=n, m=m, d=d, kernel=kernel, regular=regular,
                        fraction=_fraction(samples[c], bws[c], kernel, n * m))
        if choice.engine == "binned":
            batch.append((c, choice))
        else:
            choices[c] = choice
            values[c] = _direct_grid(choice.engine, axes, samples[c], weights[c], bws[c], kernel, shape)
    if batch:
        idx = [c for c, _ in batch]
        # under "auto" the lattice may not cost more than the direct sums it replaces
        # (about 5 direct kernel terms per lattice node for the transforms)
        limit = binned.MAX_LATTICE
        if engine == "auto":
            smallest = min(samples[c].shape[0] for c in idx) * m
            limit = int(min(limit, max(1 << 16, smallest // 5)))
        vals, infos = binned.grid_density_many(axes, [samples[c] for c in idx],
                                               [weights[c] for c in idx], [bws[c] for c in idx],
                                               kernel, tol, max_lattice=limit)
        for (c, choice), v, info in zip(batch, vals, infos):
            if info.met:
                values[c] = v
                choices[c] = _binned_choice(choice, info)
            elif engine == "auto" and samples[c].shape[0] * m <= FALLBACK_LIMIT:
                n = samples[c].shape[0]
                frac = _fraction(samples[c], bws[c], kernel, n * m)
                name = "tree" if (frac is not None and frac < TREE_FRACTION) else "exact"
                fallback = EngineChoice(name, f"binned error estimate {info.error_estimate:.2g} x peak "
                                              f"stayed above the tolerance {tol:g} within a lattice no "
                                              f"dearer than direct sums: {name} sums instead")
                values[c] = _direct_grid(name, axes, samples[c], weights[c], bws[c], kernel, shape)
                choices[c] = fallback
            else:
                if engine == "auto":
                    choice = EngineChoice("binned", f"{choice.reason}; direct sums ({samples[c].shape[0] * m:.3g} "
                                                    "terms) would be far dearer than a binning error above "
                                                    "the tolerance")
                warnings.warn(f"binned engine: estimated binning error {info.error_estimate:.2g} x peak "
                              f"exceeds the tolerance {tol:g} (lattice size limit reached); use "
                              "engine='exact' for an exact grid, or a coarser tolerance",
                              MvkdeWarning, stacklevel=3)
                values[c] = v
                choices[c] = _binned_choice(choice, info)
    return values, choices


def _checked_cells(axes, samples, weights, bws):
    """Axes, samples and normalised weights of evaluate_grid_many, checked."""
    axes = [np.asarray(a, dtype=float) for a in axes]
    d = len(axes)
    cells = len(samples)
    samples = [np.asarray(x, dtype=float) for x in samples]
    if weights is None:
        weights = [None] * cells
    if len(weights) != cells or len(bws) != cells:
        raise InputError(f"evaluate_grid_many: {cells} samples but {len(weights)} weights and "
                         f"{len(bws)} bandwidths; give one of each per cell")
    for c, x in enumerate(samples):
        if x.ndim != 2 or x.shape[1] != d:
            raise InputError(f"sample of cell {c} has shape {x.shape}; expected (n, {d}) for a "
                             f"{d}-dimensional grid")
    return axes, samples, [None if w is None else np.asarray(w, dtype=float) / np.sum(w) for w in weights]


def _direct_grid(engine, axes, data, weights, bw, kernel, shape):
    pts = _mesh_points(axes)
    if engine == "tree":
        return tree.density(pts, data, weights, bw, kernel).reshape(shape)
    return exact.density(pts, data, weights, bw, kernel).reshape(shape)


def _periodic_grid_many(axes, samples, weights, pbws, kernel, engine, tol):
    """evaluate_grid_many for product kernels with periodic axes (:mod:`periodic`).

    ``auto``: binned when n x m is above DIRECT_LIMIT and the grid and kernel allow it
    (:func:`periodic.binnable`), else exact sums; ``binned``: binned when allowed, else exact
    sums and the reason; ``tree``: exact sums (the tree does not wrap).  Under ``auto`` a cell
    whose binned error estimate stays above ``tol`` gets exact sums when they cost at most
    FALLBACK_LIMIT terms, as in :func:`evaluate_grid_many`.
    """
    shape = tuple(len(a) for a in axes)
    m = math.prod(shape)
    values = np.empty((len(samples),) + shape)
    choices: list = [None] * len(samples)
    why_not = periodic.binnable(axes, pbws[0], kernel)
    batch = []
    for c, x in enumerate(samples):
        n = x.shape[0]
        if engine in ("auto", "binned") and not why_not and (engine == "binned" or n * m > DIRECT_LIMIT):
            how = "requested by the caller" if engine == "binned" else (
                f"regular grid of {m} nodes, n={n} data: binned FFT convolution (von Mises kernels, "
                f"periodic on the circular axes) costs far less than {n * m:.3g} direct kernel terms")
            batch.append((c, EngineChoice("binned", how)))
            continue
        if engine == "exact":
            why = "requested by the caller"
        elif engine in ("auto", "binned") and why_not:
            why = f"direct sums: {why_not}"
        elif engine == "tree":
            why = "direct sums: the tree engine does not handle periodic axes"
        else:
            why = f"direct sums: n x m = {n * m} kernel terms is small"
        choices[c] = EngineChoice("exact", f"{why} (von Mises kernels on the circular axes)")
        values[c] = periodic.direct_grid(axes, x, weights[c], pbws[c], kernel)
    if batch:
        idx = [c for c, _ in batch]
        limit = binned.MAX_LATTICE
        if engine == "auto":
            limit = int(min(limit, max(1 << 16, min(samples[c].shape[0] for c in idx) * m // 5)))
        vals, infos = periodic.grid_density_many(axes, [samples[c] for c in idx], [weights[c] for c in idx],
                                                 [pbws[c] for c in idx], kernel, tol, max_lattice=limit)
        for (c, choice), v, info in zip(batch, vals, infos):
            if not info.met and engine == "auto" and samples[c].shape[0] * m <= FALLBACK_LIMIT:
                choices[c] = EngineChoice("exact", f"binned error estimate {info.error_estimate:.2g} x peak "
                                                   f"stayed above the tolerance {tol:g}: exact sums of the "
                                                   "von Mises product kernel instead")
                values[c] = periodic.direct_grid(axes, samples[c], weights[c], pbws[c], kernel)
                continue
            if not info.met:
                warnings.warn(f"binned engine: estimated binning error {info.error_estimate:.2g} x peak "
                              f"exceeds the tolerance {tol:g} (lattice size limit reached); use "
                              "engine='exact' for an exact grid, or a coarser tolerance", MvkdeWarning, stacklevel=3)
            values[c] = v
            choices[c] = _binned_choice(choice, info)
    return values, choices
