"""Products written next to the density in a workflow's output: labels and grid products.

Two kinds:

* per-cell products computed inside the block tasks from each cell's fitted
  estimate (exceedance at thresholds, standard error, random draws, density
  at points, bootstrap bands) arrive as arrays and are labelled here by
  :func:`add_cell_products`;
* grid products (marginals, joint CDF and exceedance on the grid, HDR
  levels, marginal quantiles) are computed for every cell at once from the
  gridded density by :func:`add_grid_products`, through the same functions
  the estimate and the pictures use (:mod:`mvkde.products.grid`).

A point mass (dry days) sits at the bound of its variable, below every grid
node of that variable: it adds to CDFs and to the marginals of the other
variables, never to exceedance probabilities on the grid.
"""

from __future__ import annotations

import numpy as np
import xarray as xr

from ..products import grid as _grid
from ..products import speed_class_edges
from ..products.return_periods import RETURN_PERIOD_CAUTION
from ..units import density_units

CAUTION_PRODUCTS = ("Probabilities are those of the estimate on the evaluation grid; beyond the "
                    "observed range they are extrapolation.")


def add_cell_products(ds: xr.Dataset, results: dict, settings, lead: list, squeeze) -> None:
    """Label the per-cell products of the block tasks and add them to ``ds`` in place.

    Parameters
    ----------
    ds : xarray.Dataset
        The output, holding ``density`` already.
    results : dict
        The assembled block arrays (``BlockResult.arrays`` of every block).
    settings : CellSettings
        The cell settings (variables and ``products``).
    lead : list of str
        The cell dims then the split dims.
    squeeze : callable
        Reshapes an array's flat split axis into the split dims.
    """
    names = list(settings.names)
    p = settings.products
    thr = p.thresholds
    if len(thr):
        tcoords = {f"threshold_{v}": ("threshold", thr[:, k]) for k, v in enumerate(names)}
        ds.coords.update(tcoords)
        if "exceedance_at_threshold" in results:
            ds["exceedance_at_threshold"] = (lead + ["threshold"], squeeze(results["exceedance_at_threshold"]), {
                "long_name": "joint exceedance probability P(" + ", ".join(f"{v} > threshold_{v}" for v in names)
                             + ")", "units": "1", "caution": CAUTION_PRODUCTS})
        for side in ("lower", "upper"):
            key = f"exceedance_{side}"
            if key in results:
                ds[key] = (lead + ["threshold"], squeeze(results[key]), {
                    "long_name": f"{side} bound of the percentile bootstrap band of exceedance_at_threshold",
                    "units": "1", "band_level": p.band_level, "replicates": p.bootstrap})
    if "variance_factor" in results:
        factor = squeeze(results["variance_factor"])
        dens = ds["density"].values
        expand = factor.reshape(factor.shape + (1,) * len(names))
        ds["density_standard_error"] = (lead + names, np.sqrt(np.maximum(dens, 0.0) * expand), {
            "long_name": "asymptotic pointwise standard error of the density, sqrt(f R(K) / (n |H|^(1/2))) "
                         "(Wand & Jones 1995, Sec. 4.3)", "units": ds["density"].attrs["units"]})
    if "samples" in results:
        ds.coords["variable"] = ("variable", np.array(names))
        ds["samples"] = (lead + ["draw", "variable"], squeeze(results["samples"]), {
            "long_name": "random draws from each cell's estimate (smoothed bootstrap)",
            "seed": p.seed, "note": "columns follow the variable coordinate; units those of each variable"})
    if "density_at_point" in results:
        pts = p.points
        ds.coords.update({f"point_{v}": ("point", pts[:, k]) for k, v in enumerate(names)})
        ds["density_at_point"] = (lead + ["point"], squeeze(results["density_at_point"]), {
            "long_name": "density of the estimate at the requested points (continuous part)",
            "units": ds["density"].attrs["units"]})
    if "sector_probability" in results:
        di = next(k for k, per in enumerate(settings.periods) if per is not None)
        direction, speed = names[di], names[1 - di]
        k = p.sectors
        period = settings.periods[di]
        axis = settings.axes[1 - di]
        edges = speed_class_edges(axis[0], axis[-1], p.speed_classes)
        ds.coords["sector"] = ("sector", np.arange(k) * period / k,
                               {"long_name": f"centre of the {direction} sector", "units": ds[direction].attrs.get("units", "")})
        ds.coords["speed_lower"] = ("speed_class", edges[:-1], {"long_name": f"lower edge of the {speed} class"})
        ds.coords["speed_upper"] = ("speed_class", edges[1:], {"long_name": f"upper edge of the {speed} class"})
        ds["sector_probability"] = (lead + ["sector", "speed_class"], squeeze(results["sector_probability"]), {
            "long_name": f"joint probability per {direction} sector and {speed} class (wind-rose numbers)",
            "units": "1"})
    for side in ("lower", "upper"):
        key = f"density_{side}"
        if key in results:
            ds[key] = (lead + names, squeeze(results[key]), {
                "long_name": f"{side} bound of the percentile bootstrap band of the density (H held fixed: "
                             "the band covers the smoothed density)", "units": ds["density"].attrs["units"],
                "band_level": p.band_level, "replicates": p.bootstrap})


def add_grid_products(ds: xr.Dataset, spec: dict, names: list, pm_index, pm_bound=float("nan"),
                      sphere=None) -> None:
    """Marginals, joint CDF and exceedance grids, HDR levels and marginal quantiles of every cell.

    ``spec`` is the workflow's [products]; ``sphere`` the (latitude, longitude)
    indices of a location on the sphere, integrated with the node areas.

    Parameters
    ----------
    ds : xarray.Dataset
        The output, holding ``density``; changed in place.
    spec : dict
    names : list of str
        The variables.
    pm_index : int or None
        Index of the variable with a point mass.
    pm_bound : float, optional
        The point-mass threshold (its variable's lower bound).
    sphere : tuple of int, optional
    """
    if not (spec["marginals"] or spec["cdf"] or spec["exceedance"] or spec["hdr_masses"] or spec["quantiles"]):
        return
    d = len(names)
    dens = ds["density"].values
    nlead = dens.ndim - d
    lead_dims = list(ds["density"].dims[:nlead])
    axes = [ds[v].values for v in names]
    weights = _grid.GridWeights(axes, sphere)
    units = [ds[v].attrs.get("units", "") for v in names]
    pm_name = names[pm_index] if pm_index is not None else None
    p_mass = ds["point_mass_probability"].values if pm_index is not None else None
    at_mass = ds["density_at_point_mass"].values if (pm_index is not None and d > 1) else None
    others = [j for j in range(d) if j != pm_index]
    other_weights = _grid.GridWeights([axes[j] for j in others]) if at_mass is not None else None
    clean = np.nan_to_num(dens, nan=0.0)
    nan_cells = np.isnan(dens).reshape(dens.shape[:nlead] + (-1,)).all(axis=-1)

    marginals = {}
    for k, v in enumerate(names):
        if sphere is not None and k in sphere:
            continue  # half of a location: no marginal of its own
        m = weights.integrate(clean, [k], nlead)
        if at_mass is not None and k != pm_index:
            m = m + other_weights.integrate(np.nan_to_num(at_mass, nan=0.0), [others.index(k)], nlead)
        m[nan_cells] = np.nan
        marginals[v] = m
        if spec["marginals"]:
            attrs = {"long_name": f"marginal probability density of {v}", "units": density_units([units[k]])}
            if v == pm_name:
                attrs["note"] = "continuous part; the point mass is point_mass_probability"
            ds[f"marginal_{v}"] = (lead_dims + [v], m, attrs)

    if spec["cdf"]:
        c = _grid.cumulative(clean, axes, upper=False, nlead=nlead)
        if pm_index is not None:
            if d == 1:
                c = c + p_mass[..., None]
            else:
                cm = _grid.cumulative(np.nan_to_num(at_mass, nan=0.0), [axes[j] for j in others], upper=False,
                                      nlead=nlead)
                c = c + np.expand_dims(cm, nlead + pm_index)
        c[np.isnan(dens)] = np.nan
        ds["cdf"] = (ds["density"].dims, np.clip(c, 0, 1), {
            "long_name": "joint non-exceedance probability P(" + ", ".join(f"{v} <= {v}" for v in names)
                         + ") at each grid node", "units": "1", "caution": CAUTION_PRODUCTS})
    if spec["exceedance"]:
        e = _grid.cumulative(clean, axes, upper=True, nlead=nlead)
        e[np.isnan(dens)] = np.nan
        ds["exceedance"] = (ds["density"].dims, np.clip(e, 0, 1), {
            "long_name": "joint exceedance probability P(" + ", ".join(f"{v} > {v}" for v in names)
                         + ") at each grid node", "units": "1", "caution": CAUTION_PRODUCTS})

    if spec["hdr_masses"]:
        masses = np.asarray(spec["hdr_masses"])
        levels = _grid.hdr_levels(dens, weights.full(), masses, nlead)
        ds.coords["hdr_mass"] = ("hdr_mass", masses, {"long_name": "probability enclosed by the region", "units": "1"})
        attrs = {"long_name": "highest-density-region level: the density above which the given mass lies "
                              "(Hyndman 1996)", "units": ds["density"].attrs["units"]}
        if pm_index is not None:
            attrs["note"] = "of the continuous part, normalised to its own mass"
        ds["hdr_level"] = (lead_dims + ["hdr_mass"], levels, attrs)

    if spec["quantiles"]:
        probs = np.asarray(spec["quantiles"])
        ds.coords["probability"] = ("probability", probs, {"long_name": "non-exceedance probability", "units": "1"})
        for k, v in enumerate(names):
            if v not in marginals:
                continue
            base = p_mass if k == pm_index else None
            q = _grid.quantiles(marginals[v], axes[k], probs, base=base,
                                bound=float(pm_bound) if k == pm_index else float("nan"))
            ds[f"quantile_{v}"] = (lead_dims + ["probability"], q,
                                   {"long_name": f"marginal quantile of {v}", "units": units[k]})


# ---------------------------------------------------------------------------
# joint return periods
# ---------------------------------------------------------------------------

def cdf_at_thresholds(density, axes, thresholds, nlead, *, point_mass_probability=None, density_at_point_mass=None,
                      pm_index=None, pm_bound=None) -> np.ndarray:
    """Joint CDF P(X <= t componentwise) at each threshold row from gridded densities (leading cell axes).

    The grid's cumulative trapezoid sums (:func:`mvkde.products.grid.cumulative`, as the ``cdf``
    product) interpolated multilinearly at t, t clipped to the grid (the CDF is 0 at the first node,
    the whole grid mass beyond the last); the point mass (at its bound) adds p x the CDF of the
    other variables on it where t reaches the bound.  Returns (*lead, m).

    Parameters
    ----------
    density : array_like
        (*lead, *grid) densities; a cell all NaN gives NaN.
    axes : list of array_like
        The grid axes.
    thresholds : array_like
        (m, d) threshold rows (one row may be given as (d,)).
    nlead : int
        Number of leading axes.
    point_mass_probability : array_like, optional
        (*lead,) probability of the point mass.
    density_at_point_mass : array_like, optional
        (*lead, *other grid) density of the other variables on the point mass (d > 1).
    pm_index : int, optional
        Index of the variable with the point mass.
    pm_bound : float, optional
        Where the point mass sits.

    Returns
    -------
    numpy.ndarray
        (*lead, m), clipped to [0, 1].
    """
    t = np.atleast_2d(np.asarray(thresholds, dtype=float))
    d = len(axes)
    clean = np.nan_to_num(np.asarray(density, dtype=float), nan=0.0)
    out = _lower_at(_grid.cumulative(clean, axes, upper=False, nlead=nlead), axes, t, nlead)
    if pm_index is not None and point_mass_probability is not None:
        p = np.asarray(point_mass_probability, dtype=float)
        if d == 1:
            part = np.repeat(p[..., None], t.shape[0], axis=-1)
        else:
            others = [k for k in range(d) if k != pm_index]
            at = np.nan_to_num(np.asarray(density_at_point_mass, dtype=float), nan=0.0)
            sub = [axes[k] for k in others]
            part = _lower_at(_grid.cumulative(at, sub, upper=False, nlead=nlead), sub, t[:, others], nlead)
        out = out + np.where(t[:, pm_index] >= pm_bound, part, 0.0)
    nan = np.isnan(np.asarray(density, dtype=float)).reshape(np.shape(density)[:nlead] + (-1,)).all(axis=-1)
    out[nan] = np.nan
    return np.clip(out, 0.0, 1.0)


def _lower_at(cum, axes, t, nlead) -> np.ndarray:
    """Multilinear interpolation of (*lead, *grid) node values at the rows of t -> (*lead, m)."""
    cols = []
    for row in t:
        out = cum
        for a, x in zip(axes, row):
            a = np.asarray(a, dtype=float)
            w = np.zeros(a.size)
            x = min(max(float(x), a[0]), a[-1])
            i = int(np.clip(np.searchsorted(a, x, side="right") - 1, 0, a.size - 2)) if a.size > 1 else 0
            if a.size == 1:
                w[0] = 1.0
            else:
                f = (x - a[i]) / (a[i + 1] - a[i])
                w[i], w[i + 1] = 1.0 - f, f
            out = np.tensordot(out, w, axes=([nlead], [0]))
        cols.append(out)
    return np.stack(cols, axis=-1)


def add_return_periods(ds: xr.Dataset, settings, rates, cdims: list, split: list, pm_bound=None) -> None:
    """``cdf_at_threshold``, ``observations_per_year``, ``return_period_and`` and ``return_period_or``.

    T_AND = 1 / (lambda exceedance_at_threshold) and T_OR = 1 / (lambda (1 - cdf_at_threshold)), both
    from the numbers the file holds (Salvadori & De Michele 2004); lambda per split (a season's
    samples per year are its own days).

    Parameters
    ----------
    ds : xarray.Dataset
        The output, holding ``density`` and ``exceedance_at_threshold``; changed in place.
    settings : CellSettings
        The cell settings (variables, axes, thresholds).
    rates : array_like
        Observations per year of every split, in the split shape.
    cdims, split : list of str
        The cell dims and the split dims.
    pm_bound : float, optional
        Where the point mass sits (its variable's lower bound).
    """
    names = list(settings.names)
    lead = cdims + split
    thr = settings.products.thresholds
    j = settings.point_mass_index
    nlead = len(lead)
    cdf = cdf_at_thresholds(ds["density"].values, settings.axes, thr, nlead,
                            point_mass_probability=ds["point_mass_probability"].values if j is not None else None,
                            density_at_point_mass=(ds["density_at_point_mass"].values
                                                   if j is not None and "density_at_point_mass" in ds else None),
                            pm_index=j, pm_bound=pm_bound)
    ds["cdf_at_threshold"] = (lead + ["threshold"], cdf, {
        "long_name": "joint non-exceedance probability P(" + ", ".join(f"{v} <= threshold_{v}" for v in names)
                     + "), from the density grid (cumulative trapezoid sums, as the cdf product)",
        "units": "1", "caution": CAUTION_PRODUCTS})
    rates = np.asarray(rates, dtype=float)
    ds["observations_per_year"] = (split, rates, {
        "long_name": "observations per year lambda of the return periods (samples of the split per year of "
                     "its label, or products.observations_per_year)", "units": "year-1"})
    lam = rates.reshape((1,) * len(cdims) + rates.shape + (1,))
    exceed = ds["exceedance_at_threshold"].values
    with np.errstate(divide="ignore", invalid="ignore"):
        t_and = 1.0 / (lam * exceed)
        t_or = 1.0 / (lam * (1.0 - cdf))
    common = {"units": "year", "observations_per_year": "the observations_per_year variable",
              "reference": "Salvadori, G. & De Michele, C. (2004). Frequency analysis via copulas: theoretical "
                           "aspects and applications to hydrological events. Water Resources Research 40, "
                           "W12511",
              "caution": RETURN_PERIOD_CAUTION + " " + CAUTION_PRODUCTS}
    ds["return_period_and"] = (lead + ["threshold"], t_and, {
        "long_name": "joint return period of every variable exceeding its threshold: "
                     "1 / (observations_per_year x exceedance_at_threshold)", **common})
    ds["return_period_or"] = (lead + ["threshold"], t_or, {
        "long_name": "joint return period of at least one variable exceeding its threshold: "
                     "1 / (observations_per_year x (1 - cdf_at_threshold))", **common})


# ---------------------------------------------------------------------------
# comparison of labels
# ---------------------------------------------------------------------------

COMPARE_NAMES = ("density_difference", "density_change_significant", "probability_ratio",
                 "probability_ratio_lower", "probability_ratio_upper", "point_mass_probability_change",
                 "common_bandwidth")


def add_comparison(ds: xr.Dataset, plan, settings, results: dict, squeeze, lead: list) -> None:
    """The [compare] outputs, over ``DIM_compared`` (the labels other than the reference).

    Parameters
    ----------
    ds : xarray.Dataset
        The output, holding ``density``; changed in place.
    plan : Plan
        The planned run (its label dims and names).
    settings : CellSettings
        The cell settings; ``settings.compare`` is set.
    results : dict
        The assembled block arrays.
    squeeze : callable
        Reshapes an array's flat split axis into the split dims.
    lead : list of str
        The cell dims then the split dims.
    """
    from ..comparison import COMPARE_CAUTION  # here: the comparison imports scipy.stats (about 0.2 s)

    cmp_ = settings.compare
    names = list(settings.names)
    dim = plan.label_dims[cmp_.axis]
    labels = plan.label_names[dim]
    keep = [i for i in range(len(labels)) if i != cmp_.reference]
    new = f"{dim}_compared"
    axis = len(plan.cell_dims) + cmp_.axis
    dims = [new if x == dim else x for x in lead]
    reference = labels[cmp_.reference]
    ds.coords[new] = (new, np.asarray([labels[i] for i in keep]), {
        "long_name": f"{dim} compared with the reference {dim} {reference!r}", "reference": reference})
    units = ds["density"].attrs["units"]
    test = ("local kernel two-sample z test with a common bandwidth matrix (Duong, Koch & Wand 2009, Biometrical "
            "Journal 51, 504-521; Duong 2013), false discovery rate over the tested nodes of each cell by "
            "Benjamini & Hochberg (1995), statsmodels multipletests")
    common_h = ("both samples of a pair refitted with ONE bandwidth matrix H, chosen by estimator.bandwidth on "
                "the two samples pooled (a given matrix is used as it is), so the smoothing bias cancels under "
                "the null")
    base = {"reference": reference, "compared_dim": dim, "alpha": cmp_.alpha, "common_bandwidth": common_h,
            "caution": COMPARE_CAUTION}
    attrs = {
        "density_difference": {"long_name": f"density of the {dim} minus density of the reference {dim} "
                                            f"{reference!r}, both with the common bandwidth matrix",
                               "units": units, **base},
        "density_change_significant": {"long_name": "1 where the density difference is significant by the local "
                                                    "test (0 elsewhere, at untested nodes below the floor and "
                                                    "where there is no comparison)", "units": "1", "test": test,
                                       "floor": 0.05, "floor_note": "nodes where the mean of the two densities is "
                                       "below 0.05 x its largest value in the cell are not tested", **base},
        "probability_ratio": {"long_name": "P_label(X > threshold) / P_reference(X > threshold), componentwise "
                                           "joint exceedance, both from the common-H densities on the grid",
                              "units": "1", "note": "without products.bootstrap there are no interval limits",
                              **base},
        "point_mass_probability_change": {"long_name": "point-mass probability of the label minus that of the "
                                                       "reference", "units": "1", **base},
        "common_bandwidth": {"long_name": "common bandwidth matrix H of the pair", "choice": common_h},
    }
    for side in ("lower", "upper"):
        attrs[f"probability_ratio_{side}"] = {
            "long_name": f"{side} limit of the bootstrap percentile interval of probability_ratio", "units": "1",
            "band_level": settings.products.band_level, "replicates": cmp_.bootstrap,
            "bootstrap": "each label's sample resampled independently; H held fixed at the common matrix",
            **base}
    for name in COMPARE_NAMES:
        if name not in results:
            continue
        arr = np.take(squeeze(results[name]), keep, axis=axis)
        rest = arr.ndim - len(lead)
        tail = (names if name in ("density_difference", "density_change_significant") else
                ["threshold"] if name.startswith("probability_ratio") else
                ["variable_row", "variable_column"] if name == "common_bandwidth" else [])[:rest]
        ds[name] = (dims + tail, arr, attrs[name])
