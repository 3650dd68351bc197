"""Products written next to the density in a workflow's output (pipeline layer).

Two kinds:

* per-cell products computed inside the block tasks from each cell's fitted
  estimate (exceedance at thresholds, standard error, random draws, density
  at points, bootstrap bands) arrive as arrays and are labelled here by
  :func:`add_cell_products`;
* grid products (marginals, joint CDF and exceedance on the grid, HDR
  levels, marginal quantiles) are computed for every cell at once from the
  gridded density by :func:`add_grid_products`, with the trapezoid rule on
  the shared grid.

A point mass (dry days) sits at the bound of its variable, below every grid
node of that variable: it adds to CDFs and to the marginals of the other
variables, never to exceedance probabilities on the grid.
"""

from __future__ import annotations

import numpy as np
import xarray as xr
from scipy import integrate

from .units import density_units

CAUTION_PRODUCTS = ("Probabilities are those of the estimate on the evaluation grid; beyond the "
                    "observed range they are extrapolation.")


def _trapezoid_weights(axis: np.ndarray) -> np.ndarray:
    w = np.zeros(axis.size)
    dx = np.diff(axis)
    w[:-1] += dx / 2
    w[1:] += dx / 2
    return w


def add_cell_products(ds: xr.Dataset, results: dict, settings, lead: list, squeeze) -> None:
    names = list(settings.names)
    p = settings.products
    if not p:
        return
    thr = p["thresholds"]
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
                    "units": "1", "band_level": p["band_level"], "replicates": p["bootstrap"]})
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
            "seed": p["seed"], "note": "columns follow the variable coordinate; units those of each variable"})
    if "density_at_point" in results:
        pts = p["points"]
        ds.coords.update({f"point_{v}": ("point", pts[:, k]) for k, v in enumerate(names)})
        ds["density_at_point"] = (lead + ["point"], squeeze(results["density_at_point"]), {
            "long_name": "density of the estimate at the requested points (continuous part)",
            "units": ds["density"].attrs["units"]})
    if "sector_probability" in results:
        from .gridded import _sector_names, _speed_edges

        direction, speed = _sector_names(settings)
        k = p["sectors"]
        period = settings.periods[names.index(direction)]
        edges = _speed_edges(settings)
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
                "band_level": p["band_level"], "replicates": p["bootstrap"]})


def add_grid_products(ds: xr.Dataset, spec: dict, names: list, pm_index, pm_bound=float("nan")) -> None:
    if not (spec["marginals"] or spec["cdf"] or spec["exceedance"] or spec["hdr_masses"] or spec["quantiles"]):
        return
    d = len(names)
    dens = ds["density"].values
    nlead = dens.ndim - d
    axes = [ds[v].values for v in names]
    weights = [_trapezoid_weights(a) for a in axes]
    units = [ds[v].attrs.get("units", "") for v in names]
    pm_name = names[pm_index] if pm_index is not None else None
    p_mass = ds["point_mass_probability"].values if pm_index is not None else None
    at_mass = ds["density_at_point_mass"].values if (pm_index is not None and d > 1) else None

    def integrate_except(arr, keep_axes, var_axes):
        out = arr
        for k in sorted(set(range(len(var_axes))) - set(keep_axes), reverse=True):
            out = np.tensordot(out, weights[var_axes[k]], axes=([nlead + k], [0]))
        return out

    marginals = {}
    for k, v in enumerate(names):
        m = integrate_except(np.nan_to_num(dens, nan=0.0), [k], list(range(d)))
        if at_mass is not None and k != pm_index:
            others = [j for j in range(d) if j != pm_index]
            m = m + integrate_except(np.nan_to_num(at_mass, nan=0.0), [others.index(k)], others)
        nan_cells = np.isnan(dens).reshape(dens.shape[:nlead] + (-1,)).all(axis=-1)
        m[nan_cells] = np.nan
        marginals[v] = m
        if spec["marginals"]:
            attrs = {"long_name": f"marginal probability density of {v}", "units": density_units([units[k]])}
            if v == pm_name:
                attrs["note"] = "continuous part; the point mass is point_mass_probability"
            ds[f"marginal_{v}"] = (list(ds["density"].dims[:nlead]) + [v], m, attrs)

    if spec["cdf"] or spec["exceedance"]:
        clean = np.nan_to_num(dens, nan=0.0)
        nan_cells = np.isnan(dens)
        if spec["cdf"]:
            c = clean
            for k in range(d):
                c = integrate.cumulative_trapezoid(c, axes[k], axis=nlead + k, initial=0.0)
            if pm_index is not None:
                if d == 1:
                    c = c + p_mass[..., None]
                else:
                    others = [j for j in range(d) if j != pm_index]
                    cm = np.nan_to_num(at_mass, nan=0.0)
                    for i, j in enumerate(others):
                        cm = integrate.cumulative_trapezoid(cm, axes[j], axis=nlead + i, initial=0.0)
                    c = c + np.expand_dims(cm, nlead + pm_index)
            c[nan_cells] = np.nan
            ds["cdf"] = (ds["density"].dims, np.clip(c, 0, 1), {
                "long_name": "joint non-exceedance probability P(" + ", ".join(f"{v} <= {v}" for v in names)
                             + ") at each grid node", "units": "1", "caution": CAUTION_PRODUCTS})
        if spec["exceedance"]:
            e = clean
            for k in range(d):
                ax = nlead + k
                e = np.flip(integrate.cumulative_trapezoid(np.flip(e, axis=ax), -np.flip(axes[k]), axis=ax,
                                                           initial=0.0), axis=ax)
            e[nan_cells] = np.nan
            ds["exceedance"] = (ds["density"].dims, np.clip(e, 0, 1), {
                "long_name": "joint exceedance probability P(" + ", ".join(f"{v} > {v}" for v in names)
                             + ") at each grid node", "units": "1", "caution": CAUTION_PRODUCTS})

    if spec["hdr_masses"]:
        masses = np.asarray(spec["hdr_masses"])
        w = weights[0]
        for k in range(1, d):
            w = np.multiply.outer(w, weights[k])
        flat = np.nan_to_num(dens, nan=0.0).reshape(dens.shape[:nlead] + (-1,))
        wflat = w.ravel()
        order = np.argsort(-flat, axis=-1)
        fs = np.take_along_axis(flat, order, axis=-1)
        cum = np.cumsum(fs * wflat[order], axis=-1)
        total = cum[..., -1:]
        with np.errstate(invalid="ignore", divide="ignore"):
            frac = cum / total
        levels = np.empty(flat.shape[:-1] + (masses.size,))
        it = np.ndindex(flat.shape[:-1])
        for idx in it:
            pos = np.searchsorted(frac[idx], masses)
            levels[idx] = fs[idx][np.clip(pos, 0, fs.shape[-1] - 1)]
        levels[np.isnan(dens).reshape(dens.shape[:nlead] + (-1,)).all(axis=-1)] = np.nan
        ds.coords["hdr_mass"] = ("hdr_mass", masses, {"long_name": "probability enclosed by the region", "units": "1"})
        attrs = {"long_name": "highest-density-region level: the density above which the given mass lies "
                              "(Hyndman 1996)", "units": ds["density"].attrs["units"]}
        if pm_index is not None:
            attrs["note"] = "of the continuous part, normalised to its own mass"
        ds["hdr_level"] = (list(ds["density"].dims[:nlead]) + ["hdr_mass"], levels, attrs)

    if spec["quantiles"]:
        probs = np.asarray(spec["quantiles"])
        ds.coords["probability"] = ("probability", probs, {"long_name": "non-exceedance probability", "units": "1"})
        for k, v in enumerate(names):
            m = marginals[v]
            c = integrate.cumulative_trapezoid(np.nan_to_num(m, nan=0.0), axes[k], axis=-1, initial=0.0)
            base = np.zeros(m.shape[:-1])
            if k == pm_index:
                base = np.nan_to_num(p_mass, nan=0.0)
            total = base + c[..., -1]
            q = np.full(m.shape[:-1] + (probs.size,), np.nan)
            bound = float(pm_bound) if k == pm_index else np.nan
            for idx in np.ndindex(m.shape[:-1]):
                if not np.isfinite(m[idx]).all() or total[idx] <= 0:
                    continue
                cdf = (base[idx] + c[idx]) / total[idx]
                keep = np.concatenate([[True], np.diff(cdf) > 0])
                vals = np.interp(probs, cdf[keep], axes[k][keep])
                if k == pm_index:  # probabilities inside the point mass map to the bound
                    vals = np.where(probs <= base[idx] / total[idx], bound, vals)
                q[idx] = vals
            attrs = {"long_name": f"marginal quantile of {v}", "units": units[k]}
            ds[f"quantile_{v}"] = (list(ds["density"].dims[:nlead]) + ["probability"], q, attrs)
