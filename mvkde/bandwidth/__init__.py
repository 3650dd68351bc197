"""Bandwidth-matrix selection.

``select(method, data, weights, ...)`` returns a :class:`BandwidthResult`.
Selectors are registered in ``SELECTORS``: a function
``f(data, weights, *, kernel, form, parametrization) -> ndarray | BandwidthResult``.
"""

from __future__ import annotations

import warnings

import numpy as np

from ..errors import BandwidthError, MvkdeWarning, check_choice
from .matrix import BandwidthMatrix
from .normal import effective_size, kernel_rescaling, normal_scale, weighted_covariance
from .result import BandwidthResult

PARAMETRIZATIONS = ("full", "diagonal", "scalar")

SELECTORS = {
    "normal": normal_scale,
}

__all__ = [
    "BandwidthMatrix",
    "BandwidthResult",
    "PARAMETRIZATIONS",
    "SELECTORS",
    "select",
    "check_sample_rank",
    "effective_size",
    "kernel_rescaling",
    "normal_scale",
    "weighted_covariance",
]


def check_sample_rank(data: np.ndarray, weights, names) -> None:
    """Refuse samples that cannot carry a d x d matrix: constant or collinear variables."""
    n, d = data.shape
    cov = weighted_covariance(data, weights)
    sd = np.sqrt(np.clip(np.diag(cov), 0.0, None))
    scale = np.maximum(np.abs(data).max(axis=0), 1.0)
    const = [names[j] for j in range(d) if sd[j] <= 1e-12 * scale[j]]
    if const:
        raise BandwidthError(
            f"variable(s) {', '.join(const)} are constant in this sample: a bandwidth cannot be "
            "chosen from them; drop them or give the bandwidth matrix explicitly"
        )
    if d > 1:
        corr = cov / np.outer(sd, sd)
        eig, vec = np.linalg.eigh(corr)
        if eig[0] <= 1e-10:
            involved = [names[j] for j in np.flatnonzero(np.abs(vec[:, 0]) > 1e-3)]
            raise BandwidthError(
                f"variables {', '.join(involved)} are collinear in this sample (one is an exact "
                "linear function of the others): drop one of them"
            )


def select(method, data, weights=None, *, kernel="gaussian", form="product",
           parametrization="full", names=None) -> BandwidthResult:
    """Choose a bandwidth matrix for ``data`` (n, d) with selector ``method``."""
    method = check_choice("bandwidth", method, SELECTORS)
    parametrization = check_choice("parametrization", parametrization, PARAMETRIZATIONS)
    n, d = data.shape
    names = list(names) if names is not None else [f"x{j}" for j in range(d)]
    check_sample_rank(data, weights, names)
    out = SELECTORS[method](data, weights, kernel=kernel, form=form, parametrization=parametrization)
    if isinstance(out, BandwidthResult):
        result = out
    else:
        result = BandwidthResult(BandwidthMatrix.from_matrix(out, d), method, parametrization)
    for message in result.warnings:
        warnings.warn(message, MvkdeWarning, stacklevel=3)
    return result
