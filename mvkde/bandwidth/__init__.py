"""Bandwidth-matrix selection.

``select(method, data, weights, ...)`` returns a :class:`BandwidthResult`;
``select_many(method, samples, ...)`` does the same for a list of cells,
binning them together and optimising all of them in one vectorised pass.

Selectors (``SELECTORS``):

========== ================================================================
normal     normal scale (Wand & Jones 1995, Sec. 4.4)
lscv       least-squares cross-validation (Rudemo 1982; Bowman 1984)
scv        smoothed cross-validation (Hall, Marron & Park 1992; Duong & Hazelton 2005)
plugin     two-stage plug-in with SAMSE pilots (Wand & Jones 1994; Duong & Hazelton 2003)
mlcv       likelihood cross-validation (Habbema et al. 1974; Duin 1976)
sj         Sheather & Jones (1991) solve-the-equation, d = 1 only
isj        improved Sheather-Jones, Botev, Grotowski & Kroese (2010), d = 1 only
========== ================================================================

Every data-driven selector works with the Gaussian kernel, whose density
functionals have closed forms, and transfers the matrix to the requested
kernel by the canonical rescaling (:func:`kernel_rescaling`).
"""

from __future__ import annotations

import warnings

import numpy as np

from ..errors import BandwidthError, InputError, MvkdeWarning, check_choice
from .functionals import prepare
from .matrix import BandwidthMatrix
from .normal import effective_size, kernel_rescaling, normal_scale, weighted_covariance
from .result import BandwidthResult
from .selectors import CRITERIA, EXACT_MAX_N, run_selector
from .univariate import improved_sheather_jones, sheather_jones

PARAMETRIZATIONS = ("full", "diagonal", "scalar")
UNIVARIATE_ONLY = ("sj", "isj")

#: block size of select_many: cells binned and optimised together
BLOCK_CELLS = 64


def _criterion_selector(method):
    def selector(data, weights, *, kernel="gaussian", form="product", parametrization="full",
                 binned=None):
        return select_many(method, [data], None if weights is None else [weights], kernel=kernel,
                           form=form, parametrization=parametrization, binned=binned,
                           _checked=True)[0]
    selector.__name__ = method
    selector.__doc__ = f"{method} selector for one sample (see mvkde.bandwidth)."
    return selector


SELECTORS = {
    "normal": normal_scale,
    "lscv": _criterion_selector("lscv"),
    "scv": _criterion_selector("scv"),
    "plugin": _criterion_selector("plugin"),
    "mlcv": _criterion_selector("mlcv"),
    "sj": _criterion_selector("sj"),
    "isj": _criterion_selector("isj"),
}

__all__ = [
    "BandwidthMatrix",
    "BandwidthResult",
    "PARAMETRIZATIONS",
    "SELECTORS",
    "select",
    "select_many",
    "check_sample_rank",
    "effective_size",
    "kernel_rescaling",
    "normal_scale",
    "weighted_covariance",
]


def check_sample_rank(data: np.ndarray, weights, names) -> None:
    """Refuse samples that cannot carry a d x d matrix.

    A constant variable, collinear variables, or fewer than d + 2 distinct
    points (d + 1 points always span a simplex whose covariance is singular
    in practice for selection: the criteria then run to H -> 0).

    Parameters
    ----------
    data : ndarray, shape (n, d)
    weights : ndarray, shape (n,), or None
    names : list of str
        Variable names used in the messages.

    Raises
    ------
    BandwidthError
        If a variable is constant, variables are collinear or there are fewer than d + 2 distinct points.
    """
    n, d = data.shape
    cov = weighted_covariance(data, weights) if n > 1 else np.zeros((d, d))
    sd = np.sqrt(np.clip(np.diag(cov), 0.0, None))
    scale = np.maximum([np.abs(data[:, j]).max() for j in range(d)], 1.0) if n else np.ones(d)
    const = [names[j] for j in range(d) if not sd[j] > 1e-12 * scale[j]]
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
    # distinct points, counted along a fixed generic direction (a 1-D sort,
    # much cheaper than unique rows; two distinct points coincide on it with
    # probability zero)
    direction = np.cos(np.arange(1, d + 1) * 1.2345)
    distinct = np.unique(np.einsum("ij,j->i", data, direction)).size if n else 0
    if distinct < d + 2:
        raise BandwidthError(
            f"the sample of {', '.join(names)} has only {distinct} distinct points; choosing a "
            f"{d} x {d} bandwidth matrix needs at least {d + 2}: give the bandwidth matrix explicitly"
        )


def _check_method(method, d):
    method = check_choice("bandwidth", method, SELECTORS)
    if method in UNIVARIATE_ONLY and d > 1:
        others = ", ".join(m for m in SELECTORS if m not in UNIVARIATE_ONLY)
        raise InputError(
            f"bandwidth {method!r} is a univariate rule and the data have {d} variables: "
            f"use one of {others} for d > 1"
        )
    return method


def select(method, data, weights=None, *, kernel="gaussian", form="product",
           parametrization="full", names=None, binned=None) -> BandwidthResult:
    """Choose a bandwidth matrix for ``data`` (n, d) with selector ``method``.

    Parameters
    ----------
    method : str
        A name in ``SELECTORS``.
    data : (n, d) array
    weights : (n,) array or None
        Non-negative weights (normalised here); the sample size in the
        formulas becomes Kish's effective size.
    kernel, form : str
        Kernel the matrix is for (selection uses the Gaussian kernel and the
        canonical rescaling).
    parametrization : {"full", "diagonal", "scalar"}
    names : list of str, optional
        Variable names used in error messages.
    binned : bool or None
        Binned FFT sums (True), exact O(n^2) sums (False) or automatic
        (exact for n <= 500 or d > 3).

    Returns
    -------
    BandwidthResult
        The matrix, the method and the parametrization; its warnings are also issued as MvkdeWarning.
    """
    data = np.asarray(data, dtype=float)
    if data.ndim == 1:
        data = data[:, None]
    n, d = data.shape
    method = _check_method(method, d)
    parametrization = check_choice("parametrization", parametrization, PARAMETRIZATIONS)
    names = list(names) if names is not None else [f"x{j}" for j in range(d)]
    check_sample_rank(data, weights, names)
    if method == "normal":
        out = normal_scale(data, weights, kernel=kernel, form=form, parametrization=parametrization)
    else:
        out = SELECTORS[method](data, weights, kernel=kernel, form=form,
                                parametrization=parametrization, binned=binned)
    if isinstance(out, BandwidthResult):
        result = out
    else:
        result = BandwidthResult(BandwidthMatrix.from_matrix(out, d), method, parametrization)
    for message in result.warnings:
        warnings.warn(message, MvkdeWarning, stacklevel=2)
    return result


def select_many(method, samples, weights=None, *, kernel="gaussian", form="product",
                parametrization="full", binned=None, names=None, _checked=False):
    """Choose a bandwidth matrix for each sample of a list of cells.

    Cells are processed in blocks of up to ``BLOCK_CELLS``: one linear
    binning and one FFT per block, and one vectorised optimisation for all
    cells and starts of the block.  Warnings are attached to each result
    (``result.warnings``), not issued, so a batch run can collect them.

    Parameters
    ----------
    method : str
    samples : list of (n_c, d) arrays (same d)
    weights : list of (n_c,) arrays or None entries, or None
    kernel, form, parametrization, binned : as in :func:`select`

    Returns
    -------
    list of BandwidthResult, one per cell.
    """
    samples = [np.asarray(s, dtype=float) for s in samples]
    samples = [s[:, None] if s.ndim == 1 else s for s in samples]
    if not samples:
        return []
    d = samples[0].shape[1]
    if any(s.ndim != 2 or s.shape[1] != d for s in samples):
        raise InputError("samples must all be (n, d) arrays with the same number of variables d")
    method = _check_method(method, d)
    parametrization = check_choice("parametrization", parametrization, PARAMETRIZATIONS)
    if weights is not None and len(weights) != len(samples):
        raise InputError(f"weights has {len(weights)} entries for {len(samples)} samples")
    wlist = [None] * len(samples) if weights is None else list(weights)
    names = list(names) if names is not None else [f"x{j}" for j in range(d)]
    if not _checked:
        for c, (s, w) in enumerate(zip(samples, wlist)):
            try:
                check_sample_rank(s, w, names)
            except BandwidthError as err:
                raise BandwidthError(f"cell {c}: {err}") from None
    rescale = kernel_rescaling(kernel, form, d) if kernel != "gaussian" else 1.0

    results = []
    if method == "normal":
        for s, w in zip(samples, wlist):
            H = normal_scale(s, w, kernel=kernel, form=form, parametrization=parametrization)
            results.append(BandwidthResult(BandwidthMatrix.from_matrix(H, d), method, parametrization))
        return results
    # a cell's choice between exact and binned sums is its own (by its size, as
    # for a single sample), so a cell gets the same matrix in any block
    kinds = [binned if binned is not None else (s.shape[0] > EXACT_MAX_N and d <= 3) for s in samples]
    results = [None] * len(samples)
    for kind in dict.fromkeys(kinds):
        members = [c for c, k in enumerate(kinds) if k == kind]
        for start in range(0, len(members), BLOCK_CELLS):
            chunk = members[start:start + BLOCK_CELLS]
            block = [samples[c] for c in chunk]
            prep = prepare(block, [wlist[c] for c in chunk])
            if method == "sj":
                raw = sheather_jones(prep, binned=binned)
            elif method == "isj":
                raw = improved_sheather_jones(prep, [s[:, 0] for s in block])
            else:
                raw = run_selector(method, prep, parametrization, binned=kind)
            for c, r in zip(chunk, raw):
                results[c] = _to_result(r, method, parametrization, rescale, d)
    return results


def _to_result(raw, method, parametrization, rescale, d) -> BandwidthResult:
    H = raw["H"] * rescale
    messages = []
    if raw["at_edge"]:
        messages.append(
            f"bandwidth {method!r}: the optimum lies on the edge of the search region "
            f"(relative eigenvalues {np.round(raw['details'].get('relative_eigenvalues', []), 4).tolist()} "
            "of H over the normal-scale matrix); the sample may be clustered, rounded or "
            "heavy-tailed -- check the estimate or try bandwidth='plugin'"
        )
    elif not raw["converged"]:
        messages.append(f"bandwidth {method!r}: the optimiser did not converge; "
                        "the matrix returned is the best point found")
    if "note" in raw["details"]:
        messages.append(f"bandwidth {method!r}: {raw['details']['note']}")
    try:
        matrix = BandwidthMatrix.from_matrix(H, d)
    except BandwidthError:
        raise BandwidthError(f"bandwidth {method!r} produced an unusable matrix {H.tolist()}; "
                             "give the bandwidth matrix explicitly") from None
    details = dict(raw["details"])
    if rescale != 1.0:
        details["kernel_rescaling"] = rescale
    return BandwidthResult(matrix, method, parametrization, criterion=raw["criterion"],
                           converged=raw["converged"], at_edge=raw["at_edge"], warnings=messages,
                           details=details)
