"""A sample as fit() receives it: an array, a DataFrame or a Dataset turned into (values, names, units), checked."""

from __future__ import annotations

import numpy as np
import pandas as pd
import xarray as xr

from .errors import InputError

__all__ = ["as_table", "check_sample"]


def as_table(data, names=None, units=None):
    """(values (n, d) float, names, units) from an array, DataFrame or Dataset.

    Parameters
    ----------
    data : array_like, pandas.DataFrame, pandas.Series, xarray.Dataset or xarray.DataArray
        The sample; a Dataset's variables are flattened into columns.
    names : sequence of str, optional
        Variable names (default: the columns' or ``x0``, ``x1``, ...).
    units : sequence of str or dict name -> str, optional
        Units (default: those found in the attributes, else "").

    Returns
    -------
    values : ndarray, shape (n, d)
    names : list of str
    units : list of str
    """
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


def check_sample(values, names, weights):
    """Refuse non-finite values, too few samples (n < d + 1) and bad weights.

    Parameters
    ----------
    values : ndarray, shape (n, d)
    names : list of str
    weights : array_like, shape (n,), optional

    Returns
    -------
    values : ndarray, shape (n, d)
    weights : ndarray, shape (n,), or None
        Normalised to sum 1.
    """
    n, d = values.shape
    _check_finite(values, names)
    if n < d + 1:
        raise InputError(f"data have {n} samples for {d} variables: at least {d + 1} are needed")
    return values, _check_weights(weights, n)
