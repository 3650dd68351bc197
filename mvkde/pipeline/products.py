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
from ..units import density_units

CAUTION_PRODUCTS = ("Probabilities are those of the estimate on the evaluation grid; beyond the "
                    "observed range they are extrapolation.")


def add_cell_products(ds: xr.Dataset, results: dict, settings, lead: list, squeeze) -> None:
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
