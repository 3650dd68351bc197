"""One block of cells: its samples as arrays, one call of the library's batch door, a typed result.

:func:`process_block` is the dask task.  It drops missing values per cell
(and counts them), splits each cell's samples by season or month, subsamples
long records (seeded by the cell, so results never depend on the block
layout), hands every usable sample of the block to
:func:`mvkde.cells.fit_cells` in ONE call, and returns a :class:`BlockResult`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..cells import CellProducts, fit_cells
from ..errors import ConfigError, InputError, MvkdeError
from ..estimator import fit
from ..products.grid import node_weights
from .readers import read_points

__all__ = ["FLAGS", "GRID_MASS_TOLERANCE", "CellSettings", "BlockResult", "settings_for", "check_settings",
           "process_block"]

#: bit flags of the ``flags`` output variable (CF flag_masks / flag_meanings)
FLAGS = {
    "too_few_samples": 1,
    "fit_failed": 2,
    "bandwidth_not_converged": 4,
    "bandwidth_at_edge": 8,
    "grid_mass_off_by_more_than_1_percent": 16,
    "subsampled": 32,
    "grid_too_coarse_for_the_bandwidth": 64,
}
GRID_MASS_TOLERANCE = 0.01
#: a grid node spacing above this many kernel standard deviations (sqrt H_jj) along a variable is too
#: coarse: the trapezoid rule's error on a Gaussian bump is about exp(-2 pi^2 (sd/spacing)^2), 1.6e-4 at
#: 1.5 sd, and grows fast beyond; near a bound, where the density is steep, a coarser grid biases the
#: integrated products (measured: 40 nodes over 0-60 mm gave grid masses up to 1.40)
COARSE_SPACING = 1.5


@dataclass
class CompareSettings:
    """What a block task needs to compare each label with the reference label (``[compare]``).

    Attributes
    ----------
    axis : int
        Which entry of ``split_shape`` is the compared label dim.
    reference : int
        Index of the reference label along it.
    alpha : float
        ``compare.alpha``.
    bootstrap : int
        ``products.bootstrap``.
    band_level : float
        ``products.band_level``.
    """

    axis: int                 # which entry of split_shape is the compared label dim
    reference: int            # index of the reference label along it
    alpha: float
    bootstrap: int
    band_level: float


@dataclass
class CellSettings:
    """Everything a block task needs to fit a cell (small and picklable).

    Attributes
    ----------
    names, units : list of str
        Variable names and units.
    kernel, form, bandwidth, parametrization, engine : str
        The ``[estimator]`` options of :func:`mvkde.fit`.
    bounds : list of (float, float) or None, or None
        Bounds per variable (None: unbounded); None when no variable has bounds.
    boundary : str or None
        Boundary method; None without bounds.
    point_masses, periods : list of float or None, or None
        Point-mass threshold and period per variable; None when no variable has one.
    axes : list of ndarray
        The shared evaluation axes, one per variable.
    min_samples : int
        Fewer valid samples give NaN and ``too_few_samples``.
    max_samples : int or None
        Longer records are subsampled (seeded by the cell).
    seed : int
        ``estimator.seed``.
    n_splits, n_cell_dims : int
        Sample sets per cell (label combinations x seasons) and number of cell dims.
    sphere : list of str or None
        ``estimator.sphere``: latitude and longitude variables.
    products : CellProducts
        The products computed per cell.
    refuse_outside_bounds : bool
    n_season : int
    split_shape : tuple of int
    compare : CompareSettings or None
        These four: see the comments on the fields.
    """

    names: list
    units: list
    kernel: str
    form: str
    bandwidth: str
    parametrization: str
    bounds: list | None
    boundary: str | None
    point_masses: list | None
    periods: list | None
    engine: str
    axes: list
    min_samples: int
    max_samples: int | None
    seed: int
    n_splits: int
    n_cell_dims: int
    sphere: list | None = None
    products: CellProducts = field(default_factory=CellProducts)
    #: refuse values outside the bounds inside the task (a lazy run has not looked at the data before)
    refuse_outside_bounds: bool = False
    #: season/month splits within one label combination (n_splits = label combinations x n_season)
    n_season: int = 1
    #: the split axis as output dims: one size per label dim (window, source), then the season split
    split_shape: tuple = ()
    #: [compare]: None, or CompareSettings
    compare: "CompareSettings | None" = None


    @property
    def d(self) -> int:
        return len(self.names)

    @property
    def point_mass_index(self) -> int | None:
        if self.point_masses is None:
            return None
        return next((j for j, t in enumerate(self.point_masses) if t is not None), None)

    def fit_kwargs(self) -> dict:
        """Keyword arguments of :func:`mvkde.fit` and :func:`mvkde.cells.fit_cells`.

        Returns
        -------
        dict
        """
        return dict(kernel=self.kernel, form=self.form, bandwidth=self.bandwidth,
                    parametrization=self.parametrization, engine=self.engine, names=self.names,
                    units=self.units, bounds=self.bounds, boundary=self.boundary if self.bounds else None,
                    periods=self.periods, sphere=tuple(self.sphere) if self.sphere else None,
                    point_masses=self.point_masses)


def settings_for(plan, axes) -> CellSettings:
    """The cell settings of a planned run on the shared grid ``axes``.

    Parameters
    ----------
    plan : Plan
        The planned run.
    axes : list of array_like or None
        The shared evaluation axes (from :func:`~mvkde.pipeline.axes.resolve_axes`); None or empty: none yet.

    Returns
    -------
    CellSettings
    """
    wf = plan.workflow
    est, inp = wf["estimator"], wf["input"]
    vars_ = [wf.variable(v) for v in plan.names]
    bounds = [tuple(t["bounds"]) if t["bounds"] else None for t in vars_]
    periods = [t["period"] for t in vars_]
    masses = [t["point_mass"] for t in vars_]
    has_bounds = any(b is not None for b in bounds)
    return CellSettings(
        names=plan.names, units=plan.units, kernel=est["kernel"], form=est["form"],
        bandwidth=est["bandwidth"], parametrization=est["parametrization"],
        bounds=bounds if has_bounds else None,
        boundary=est["boundary"] if has_bounds else None,
        point_masses=masses if any(m is not None for m in masses) else None,
        periods=periods if any(p is not None for p in periods) else None,
        engine=est["engine"], axes=[np.asarray(a, dtype=float) for a in axes] if axes else [],
        min_samples=inp["min_samples"], max_samples=inp["max_samples"], seed=est["seed"],
        n_splits=plan.n_splits, n_cell_dims=len(plan.cell_dims), sphere=est.get("sphere"),
        products=_cell_products(wf, plan), n_season=plan.n_season, split_shape=plan.split_shape,
        compare=_compare_settings(wf, plan))


def compared_dim(wf, plan) -> str | None:
    """The label dim ``[compare]`` compares along (None without a reference).

    Parameters
    ----------
    wf : Workflow
        The validated workflow.
    plan : Plan
        The planned run (its first label dim is the default).

    Returns
    -------
    str or None
    """
    ref = wf["compare"]["reference"]
    if ref is None:
        return None
    return wf["compare"]["dim"] or plan.label_dims[0]


def _compare_settings(wf, plan) -> CompareSettings | None:
    dim = compared_dim(wf, plan)
    if dim is None:
        return None
    prod = wf["products"]
    return CompareSettings(axis=plan.label_dims.index(dim),
                           reference=plan.label_names[dim].index(wf["compare"]["reference"]),
                           alpha=float(wf["compare"]["alpha"]), bootstrap=int(prod["bootstrap"]),
                           band_level=float(prod["band_level"]))


def _cell_products(wf, plan) -> CellProducts:
    """The [products] that are computed per cell from its fitted estimate."""
    prod = wf["products"]
    points = None
    if prod["points"] is not None:
        points = read_points(prod["points"], plan.names, wf.source)
    return CellProducts(
        thresholds=np.asarray(prod["thresholds"], dtype=float).reshape(-1, len(plan.names)),
        samples=int(prod["samples"]), points=points, bootstrap=int(prod["bootstrap"]),
        band_level=float(prod["band_level"]), standard_error=bool(prod["standard_error"]),
        seed=int(wf["estimator"]["seed"]), sectors=int(prod["sectors"]),
        speed_classes=list(prod["speed_classes"]))


def check_settings(wf, plan) -> None:
    """Refuse, before any work, [estimator] and [variables] settings the library refuses.

    A dry run of :func:`mvkde.fit` on a small synthetic sample inside the
    declared support surfaces any combination the library refuses, named by
    the workflow keys.

    Parameters
    ----------
    wf : Workflow
        The validated workflow (for messages).
    plan : Plan
        The planned run.
    """
    settings = settings_for(plan, None)
    try:
        fit(_probe_sample(settings), **{**settings.fit_kwargs(), "bandwidth": "normal"})
    except MvkdeError as exc:
        raise ConfigError(f"{wf.source}: the [estimator] and [variables] settings are refused by mvkde.fit: "
                          f"{exc}") from None


def _probe_sample(settings: CellSettings, n: int = 60) -> np.ndarray:
    rng = np.random.default_rng(0)
    cols = []
    for j in range(settings.d):
        lo, hi = (settings.bounds[j] if settings.bounds and settings.bounds[j] else (-math.inf, math.inf))
        t = settings.point_masses[j] if settings.point_masses else None
        period = settings.periods[j] if settings.periods else None
        sphere = list(settings.sphere or [])
        if settings.names[j] in sphere:
            span = 60.0 if sphere.index(settings.names[j]) == 0 else 180.0
            col = rng.uniform(-span, span, n)
        elif period is not None:
            col = rng.uniform(0, period, n)
        elif math.isfinite(lo) and math.isfinite(hi):
            base = lo if t is None else t
            col = base + (hi - base) * rng.uniform(0.1, 0.9, n)
        elif math.isfinite(lo):
            col = (lo if t is None else t) + rng.exponential(1.0, n) + 1e-3
        elif math.isfinite(hi):
            col = hi - rng.exponential(1.0, n) - 1e-3
        else:
            col = rng.normal(size=n)
        if t is not None:
            col[: n // 4] = t
        cols.append(col)
    return np.column_stack(cols)


# ---------------------------------------------------------------------------
# the block task
# ---------------------------------------------------------------------------

@dataclass
class BlockResult:
    """What one block task returns.

    Attributes
    ----------
    arrays : dict of str to ndarray
        Output arrays over (cell of the block, split, ...): ``density``,
        ``n_samples``, ``bandwidth``, diagnostics, point mass and per-cell
        products.
    failures : list of (int, int, str)
        (cell index in the run, split index, reason) of every cell the
        estimator refused.
    engines : set of str
        Evaluation engines used in the block.
    paths : set of str
        How the batch door computed the block (``CellBatch.path``).
    """

    arrays: dict
    failures: list = field(default_factory=list)
    engines: set = field(default_factory=set)
    paths: set = field(default_factory=set)


def _block_samples(vals, codes, S, settings, first_cell, arrays, members=None):
    """The usable samples of every cell of the block per split, with counts and flags filled in.

    Yields ``(cell, split, samples)``, cell by cell and the splits of a cell in order.
    Split ``s`` is label combination ``s // n_season`` and season ``s % n_season``; ``members``
    (label combinations, cells, samples) says which samples carry each label (a sample in two
    overlapping windows is in both).  The missing values and the usable samples are counted
    for the whole block at once; a cell whose samples are all usable is copied whole.
    """
    ncell, n = vals.shape[:2]
    finite = np.isfinite(vals[..., 0])
    for j in range(1, vals.shape[2]):
        finite &= np.isfinite(vals[..., j])

    def member_of(s, c=slice(None)):
        member = codes[c] == (s % settings.n_season)
        if members is not None:
            member = member & members[s // settings.n_season, c]
        return member

    usable = np.empty((ncell, S), dtype=np.int64)
    for s in range(S):
        member = member_of(s)
        arrays["n_missing"][:, s] = (member & ~finite).sum(axis=1)
        usable[:, s] = (member & finite).sum(axis=1)
    for c in range(ncell):
        for s in range(S):
            x = vals[c].copy() if usable[c, s] == n else vals[c][member_of(s, c) & finite[c]]
            if settings.max_samples is not None and len(x) > settings.max_samples:
                rng = np.random.default_rng([settings.seed, first_cell + c, s])
                x = x[np.sort(rng.choice(len(x), settings.max_samples, replace=False))]
                arrays["flags"][c, s] |= FLAGS["subsampled"]
            arrays["n_samples"][c, s] = len(x)
            if len(x) < settings.min_samples:
                arrays["flags"][c, s] |= FLAGS["too_few_samples"]
                continue
            yield c, s, x


def _empty_arrays(ncell: int, S: int, settings: CellSettings) -> dict:
    d = settings.d
    grid_shape = tuple(len(a) for a in settings.axes)
    j = settings.point_mass_index
    out = {
        "density": np.full((ncell, S) + grid_shape, np.nan),
        "n_samples": np.zeros((ncell, S), dtype=np.int32),
        "n_missing": np.zeros((ncell, S), dtype=np.int32),
        "bandwidth": np.full((ncell, S, d, d), np.nan),
        "grid_mass": np.full((ncell, S), np.nan),
        "bandwidth_converged": np.zeros((ncell, S), dtype=np.int8),
        "flags": np.zeros((ncell, S), dtype=np.uint8),
        "failure_reason": np.full((ncell, S), "", dtype=object),
    }
    if j is not None:
        out["point_mass_probability"] = np.full((ncell, S), np.nan)
        if d > 1:
            other_shape = tuple(n for k, n in enumerate(grid_shape) if k != j)
            out["density_at_point_mass"] = np.full((ncell, S) + other_shape, np.nan)
    return out


def process_block(values, codes, first_cell: int, tile_shape: tuple, settings: CellSettings,
                  members=None) -> BlockResult:
    """One dask task: every cell (and split) of a block, fitted and evaluated.

    ``values`` has shape (*tile_shape, *sample_shape, d); ``codes`` (split index
    per sample, -1 for no sample) broadcasts to ``values.shape[:-1]``.
    Missing values are dropped per cell and counted; a cell with fewer valid
    samples than ``settings.min_samples`` or refused by the library gets NaN
    and a flag.  ``first_cell`` and the cell's position seed its subsample, so
    results do not depend on how cells are grouped into blocks.  ``members`` (label
    combinations first, then broadcastable like ``codes``) labels the samples by window and
    source; with ``[compare]`` every (cell, label) is compared with the cell's reference label
    in the same task (:func:`_compare_block`).

    Parameters
    ----------
    values : array_like
        Samples of the block, as above.
    codes : array_like of int
        Split index per sample, as above.
    first_cell : int
        Flat index in the run of the block's first cell.
    tile_shape : tuple of int
        Block shape over the cell dims.
    settings : CellSettings
        What to fit and evaluate.
    members : array_like of bool, optional
        Label membership of every sample, as above; None without labels.

    Returns
    -------
    BlockResult
    """
    values = np.asarray(values, dtype=float)
    d = settings.d
    if settings.refuse_outside_bounds:
        _refuse_outside_bounds(values, settings)
    ncell = int(np.prod(tile_shape)) if tile_shape else 1
    vals = values.reshape(ncell, -1, d)
    codes = np.broadcast_to(np.asarray(codes), values.shape[:-1]).reshape(ncell, -1)
    S = settings.n_splits
    if members is not None:
        members = np.asarray(members, dtype=bool)
        members = np.stack([np.broadcast_to(m, values.shape[:-1]).reshape(ncell, -1) for m in members])
    arrays = _empty_arrays(ncell, S, settings)
    todo, where = [], []
    for c, s, x in _block_samples(vals, codes, S, settings, first_cell, arrays, members):
        todo.append(x)
        where.append((c, s))

    batch = fit_cells(todo, axes=settings.axes, products=settings.products,
                      keys=[(first_cell + c, s) for c, s in where], **settings.fit_kwargs())
    result = BlockResult(arrays, paths={batch.path})
    _store_batch(result, batch, where, settings, first_cell)
    if settings.compare is not None:
        _compare_block(result, todo, where, batch.errors, settings, first_cell)
    return result


def _compare_block(result: BlockResult, samples, where, errors, settings: CellSettings, first_cell: int) -> None:
    """Every (cell, label) of the block against the cell's reference label, in one batch of pairs.

    The arrays are over (cell, split) like the densities, NaN at the reference label's splits
    (the output drops them).  The common H, the refits, the local test, the exceedances and the
    bootstrap go through :func:`mvkde.compare_cells.compare_pairs_cells` once per block.
    """
    cmp_ = settings.compare
    arrays = result.arrays
    ncell, S = arrays["flags"].shape
    shape = settings.split_shape
    usable = {cs: k for k, cs in enumerate(where) if errors[k] is None}
    refs, others, places = [], [], []
    for (c, s), k in usable.items():
        index = list(np.unravel_index(s, shape))
        if index[cmp_.axis] == cmp_.reference:
            continue
        index[cmp_.axis] = cmp_.reference
        r = int(np.ravel_multi_index(tuple(index), shape))
        if (c, r) in usable:
            refs.append(samples[usable[(c, r)]])
            others.append(samples[k])
            places.append((c, s))
    grid_shape = tuple(len(a) for a in settings.axes)
    thresholds = settings.products.thresholds
    m = len(thresholds)
    arrays["density_difference"] = np.full((ncell, S) + grid_shape, np.nan)
    arrays["density_change_significant"] = np.zeros((ncell, S) + grid_shape, dtype=np.int8)
    arrays["common_bandwidth"] = np.full((ncell, S, settings.d, settings.d), np.nan)
    if m:
        for name in ("probability_ratio",) + (("probability_ratio_lower", "probability_ratio_upper")
                                               if cmp_.bootstrap else ()):
            arrays[name] = np.full((ncell, S, m), np.nan)
    if settings.point_mass_index is not None:
        arrays["point_mass_probability_change"] = np.full((ncell, S), np.nan)
    if not places:
        return
    from ..compare_cells import compare_pairs_cells  # here: scipy.stats and friends, about 0.2 s to import

    kw = settings.fit_kwargs()
    bandwidth = kw.pop("bandwidth")
    given = None if isinstance(bandwidth, str) else np.repeat(np.asarray(bandwidth, float)[None], len(places), 0)
    kw.pop("parametrization")
    out = compare_pairs_cells(refs, others, axes=settings.axes, selector=bandwidth if given is None else "plugin",
                              parametrization=settings.parametrization, H=given,
                              thresholds=thresholds if m else None, alpha=cmp_.alpha,
                              bootstrap=cmp_.bootstrap, band_level=cmp_.band_level, seed=settings.seed,
                              keys=[(first_cell + c, s) for c, s in places], **kw)
    for p, (c, s) in enumerate(places):
        if out["errors"][p] is not None:
            continue
        arrays["density_difference"][c, s] = out["difference"][p]
        arrays["density_change_significant"][c, s] = out["significant"][p]
        arrays["common_bandwidth"][c, s] = out["H"][p]
        if m:
            arrays["probability_ratio"][c, s] = out["ratio"][p]
            if cmp_.bootstrap:
                arrays["probability_ratio_lower"][c, s] = out["lower"][p]
                arrays["probability_ratio_upper"][c, s] = out["upper"][p]
        if "point_mass_change" in out:
            arrays["point_mass_probability_change"][c, s] = out["point_mass_change"][p]


def _refuse_outside_bounds(values: np.ndarray, settings: CellSettings) -> None:
    """The check ``axes.resolve_axes`` makes before a run, made per block when nothing was read before."""
    if not settings.bounds:
        return
    for j, pair in enumerate(settings.bounds):
        if pair is None:
            continue
        x = values[..., j]
        x = x[np.isfinite(x)]
        if not x.size:
            continue
        lo, hi = float(x.min()), float(x.max())
        if lo < pair[0] or hi > pair[1]:
            side, value = ("down to", lo) if lo < pair[0] else ("up to", hi)
            raise InputError(f"variable {settings.names[j]} has values {side} {value:.6g}, outside "
                             f"bounds[{settings.names[j]!r}] = ({pair[0]:g}, {pair[1]:g}): fix the bounds "
                             "or the data")


def _store_batch(result: BlockResult, batch, where, settings: CellSettings, first_cell: int) -> None:
    """Copy the batch's per-cell results into the block arrays, with diagnostics."""
    arrays = result.arrays
    j = settings.point_mass_index
    d = settings.d
    weights = node_weights(settings.axes, periods=settings.periods, sphere=_sphere_axes(settings))
    other = [k for k in range(d) if k != j]
    other_weights = node_weights([settings.axes[k] for k in other]) if (j is not None and d > 1) else None
    ncell, S = arrays["flags"].shape
    spacings = _linear_spacings(settings)
    for k, (c, s) in enumerate(where):
        for name, value in batch.products.items():
            if name not in arrays:
                arrays[name] = np.full((ncell, S) + value.shape[1:], np.nan)
            arrays[name][c, s] = value[k]
        if batch.errors[k] is not None:
            arrays["flags"][c, s] |= FLAGS["fit_failed"]
            arrays["failure_reason"][c, s] = batch.errors[k]
            result.failures.append((first_cell + c, s, batch.errors[k]))
            continue
        arrays["density"][c, s] = batch.density[k]
        arrays["bandwidth"][c, s] = batch.H[k]
        arrays["bandwidth_converged"][c, s] = int(batch.converged[k])
        result.engines.add(batch.engine[k])
        if not batch.converged[k]:
            arrays["flags"][c, s] |= FLAGS["bandwidth_not_converged"]
        if batch.at_edge[k]:
            arrays["flags"][c, s] |= FLAGS["bandwidth_at_edge"]
        if _too_coarse(batch.H[k], spacings):
            arrays["flags"][c, s] |= FLAGS["grid_too_coarse_for_the_bandwidth"]
        mass = float(np.sum(batch.density[k] * weights))
        if j is not None:
            p = float(batch.point_mass_probability[k])
            arrays["point_mass_probability"][c, s] = p
            if d > 1:
                arrays["density_at_point_mass"][c, s] = batch.density_at_point_mass[k]
                mass += float(np.sum(batch.density_at_point_mass[k] * other_weights))
            else:
                mass += p
        arrays["grid_mass"][c, s] = mass
        if abs(mass - 1.0) > GRID_MASS_TOLERANCE:
            arrays["flags"][c, s] |= FLAGS["grid_mass_off_by_more_than_1_percent"]


def _linear_spacings(settings: CellSettings) -> list:
    """(index, node spacing) of every linear (not circular, not spherical) variable with two nodes or more."""
    directional = set(settings.sphere or ()) | {v for v, p in zip(settings.names, settings.periods or ())
                                                if p is not None}
    return [(j, axis[1] - axis[0]) for j, (name, axis) in enumerate(zip(settings.names, settings.axes))
            if name not in directional and len(axis) >= 2]


def _too_coarse(H, spacings) -> bool:
    """True when the node spacing of a linear variable exceeds ``COARSE_SPACING`` kernel standard deviations.

    ``spacings`` is :func:`_linear_spacings` of the run's settings.
    """
    for j, spacing in spacings:
        if np.isfinite(H[j, j]) and spacing > COARSE_SPACING * np.sqrt(H[j, j]):
            return True
    return False


def _sphere_axes(settings: CellSettings):
    """Indices (latitude, longitude) of a spherical location among the variables, or None."""
    if not settings.sphere:
        return None
    return settings.names.index(settings.sphere[0]), settings.names.index(settings.sphere[1])
