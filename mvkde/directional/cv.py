"""Joint cross-validation of directional and linear smoothing: exact pair sums.

Likelihood and least-squares cross-validation (Hall, Watson & Cabrera 1987,
Biometrika 74, 751-762) for product kernels of von Mises (circles), von
Mises-Fisher (the sphere) and Gaussian (linear block) factors, with the
linear variables' bandwidths chosen jointly for mixed samples.  The pairwise
cosines, inner products and products of linear differences are computed once,
so each Nelder-Mead step is a few (n, n) array passes; samples above
``max_n`` are subsampled (seeded).  One circular variable alone uses the
binned criteria of :mod:`mvkde.directional.selectors` instead.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import optimize, special

from ..errors import InputError
from .kernels import (log_vmf_const, log_vmf_kernel, sphere_rule_h_from_kappa, taylor_rule_from_kappa, vmf_mle_kappa,
                      von_mises_mle)


def _log_circle_kernel(k, cos_d):
    """log VM_k at angle differences with cosine ``cos_d`` (per radian)."""
    return k * (cos_d - 1.0) - math.log(2.0 * math.pi) - math.log(special.i0e(k))


def _log_circle_convolution(k, cos_d):
    """log of int VM_k(t - a) VM_k(t - b) dt = I0(k sqrt(2 + 2 cos(a - b))) / (2 pi I0(k)^2)
    (Hall, Watson & Cabrera 1987, Biometrika 74, Sec. 3)."""
    r = k * np.sqrt(np.maximum(2.0 + 2.0 * cos_d, 0.0))
    return np.log(special.i0e(r)) + r - 2.0 * k - math.log(2.0 * math.pi) - 2.0 * math.log(special.i0e(k))


def _log_sphere_convolution(k, dot):
    """log of int vMF_k(x; a) vMF_k(x; b) dx = C(k)^2 / C(k |a + b|), C(k) = k / (4 pi sinh k)
    (the product of two vMF kernels is an unnormalised vMF with mean k(a + b))."""
    r = k * np.sqrt(np.maximum(2.0 + 2.0 * dot, 0.0))
    return 2.0 * float(log_vmf_const(k)) - log_vmf_const(r)


class PairTerms:
    """Pairwise quantities of one sample that every cross-validation criterion reuses:
    cosines of angle differences (one (n, n) matrix per circular variable), inner
    products of unit vectors (sphere) and products of linear differences
    ``(x_ia - x_ja)(x_ib - x_jb)`` for a <= b, so that a new H costs a weighted sum
    of matrices instead of a triangular solve per pair.

    Parameters
    ----------
    theta : array_like, shape (n, c), optional
        Angles in radians of the circular variables.
    units : ndarray, shape (n, 3), optional
        Unit vectors of a location on the sphere.
    lin : array_like, shape (n, q), optional
        Values of the linear variables.
    """

    def __init__(self, theta=None, units=None, lin=None):
        mats = [a for a in (theta, units, lin) if a is not None and np.size(a)]
        self.n = mats[0].shape[0]
        theta = np.zeros((self.n, 0)) if theta is None else np.asarray(theta, float).reshape(self.n, -1)
        lin = np.zeros((self.n, 0)) if lin is None else np.asarray(lin, float).reshape(self.n, -1)
        self.cos = [np.cos(theta[:, j][:, None] - theta[:, j][None, :]) for j in range(theta.shape[1])]
        self.dot = None if units is None else np.clip(units @ units.T, -1.0, 1.0)
        self.q = lin.shape[1]
        self.products = {}
        for a in range(self.q):
            da = lin[:, a][:, None] - lin[:, a][None, :]
            for b in range(a, self.q):
                db = da if b == a else lin[:, b][:, None] - lin[:, b][None, :]
                self.products[a, b] = da * db

    def quadratic(self, Hinv, out):
        """Add -(X_i - X_j)' H^{-1} (X_i - X_j) / 2 for every pair to ``out`` (in place).

        Parameters
        ----------
        Hinv : ndarray, shape (q, q)
            Inverse of the linear block's bandwidth matrix.
        out : ndarray, shape (n, n)
            Accumulator, modified in place.

        Returns
        -------
        ndarray
            ``out``.
        """
        tmp = np.empty_like(out)
        for (a, b), p in self.products.items():
            np.multiply(p, -0.5 * (Hinv[a, b] if a == b else 2.0 * Hinv[a, b]), out=tmp)
            out += tmp
        return out


def _row_logsumexp(a: np.ndarray) -> np.ndarray:
    """log sum_j exp(a_ij) per row; overwrites ``a`` (the matrices here are large and
    scipy's general logsumexp copies them several times)."""
    top = a.max(axis=1)
    top[~np.isfinite(top)] = 0.0
    a -= top[:, None]
    np.exp(a, out=a)
    with np.errstate(divide="ignore"):
        return np.log(a.sum(axis=1)) + top


@dataclass
class CVResult:
    """Concentrations and linear bandwidth matrix chosen by a cross-validation criterion.

    Parameters
    ----------
    kappas : ndarray, shape (c,)
        von Mises concentration per circular variable.
    kappa_sphere : float or None
        The spherical location's vMF concentration, if any.
    H_lin : ndarray, shape (q, q)
        Gaussian bandwidth matrix of the linear block.
    criterion : float
        The criterion at the optimum (negative log-likelihood for "mlcv").
    converged : bool
        Whether the optimiser reported success.
    at_edge : bool
        Whether the optimum lies on the edge of the search region.
    n_used : int
        Sample size after subsampling.
    evaluations : int
        Number of criterion evaluations.
    """

    kappas: np.ndarray          # one per circular variable
    kappa_sphere: float | None  # the spherical location's concentration, if any
    H_lin: np.ndarray           # (q, q) Gaussian bandwidth matrix of the linear block
    criterion: float
    converged: bool
    at_edge: bool
    n_used: int
    evaluations: int


def _normal_scale_lin(lin, w, n_eff):
    q = lin.shape[1]
    cov = np.atleast_2d(np.cov(lin, rowvar=False, aweights=w))
    return (4.0 / (q + 2.0)) ** (2.0 / (q + 4.0)) * n_eff ** (-2.0 / (q + 4.0)) * cov


def cross_validate(criterion, theta=None, units=None, lin=None, weights=None, *, parametrization="full",
                   max_n=2000, seed=0) -> CVResult:
    """Joint cross-validation of von Mises concentrations (circular variables), a von
    Mises-Fisher concentration (a location on S^2) and a Gaussian bandwidth matrix
    for the linear variables, for the product kernel of all of them.

    Long because the objective and its parameter unpacking are closures over the
    pair terms computed once at the top (cosines, inner products, products of
    linear differences): split apart, each piece would pass them all around.

    ``criterion`` is ``"mlcv"`` -- maximise the leave-one-out log-likelihood
    sum_i w_i log f_{-i}(X_i) (Hall, Watson & Cabrera 1987, for the circular
    and spherical kernels; Habbema, Hermans & van den Broek 1974) -- or
    ``"lscv"``, minimise

        int f^2 - 2 sum_i w_i f_{-i}(X_i),

    where ``int f^2 = sum_{ij} w_i w_j C(X_i - X_j)`` with C the kernel convolved with
    itself: I0(k sqrt(2 + 2 cos d)) / (2 pi I0(k)^2) on the circle (Hall, Watson &
    Cabrera 1987), C(k)^2 / C(k |a + b|) for the vMF kernel and phi_{2H} for the
    Gaussian (phi_A * phi_B = phi_{A+B}).  ``f_{-i}`` is the leave-one-out
    estimate with weights renormalised over j != i.  Exact O(n^2) sums; a sample
    larger than ``max_n`` is subsampled (seeded) for the selection.

    Optimised by Nelder-Mead over log-concentrations and the
    Cholesky factor of H ('full'), its log-diagonal ('diagonal') or a log-multiple of
    the normal-scale matrix ('scalar'), each within a bounded region around the
    rules of thumb; ``at_edge`` flags an optimum on its edge (rounded or tied data
    drive cross-validation to no smoothing).

    Parameters
    ----------
    criterion : {'mlcv', 'lscv'}
    theta : array_like, shape (n, c), optional
        Angles in radians.
    units : ndarray, shape (n, 3), optional
        Unit vectors.
    lin : array_like, shape (n, q), optional
        Linear values.
    weights : array_like, shape (n,), optional
        Sample weights (renormalised); equal when None.
    parametrization : {'full', 'diagonal', 'scalar'}
    max_n : int
        Largest sample used as it is.
    seed : int
        Seed of the subsample.

    Returns
    -------
    CVResult
    """
    arrays = [a for a in (theta, units, lin) if a is not None and np.size(a)]
    n = arrays[0].shape[0]
    theta = np.zeros((n, 0)) if theta is None else np.asarray(theta, float).reshape(n, -1)
    lin = np.zeros((n, 0)) if lin is None else np.asarray(lin, float).reshape(n, -1)
    w = None if weights is None else np.asarray(weights, float)
    if n > max_n:
        idx = np.random.default_rng(seed).choice(n, max_n, replace=False)
        theta, lin = theta[idx], lin[idx]
        units = None if units is None else units[idx]
        w = None if w is None else w[idx]
        n = max_n
    w = np.full(n, 1.0 / n) if w is None else w / w.sum()
    n_eff = 1.0 / float(np.sum(w * w))
    c, q = theta.shape[1], lin.shape[1]
    pairs = PairTerms(theta, units, lin)

    # starting point: the rules of thumb
    k0 = [max(taylor_rule_from_kappa(von_mises_mle(theta[:, j], w)[1], n_eff), 0.05) for j in range(c)]
    ks0 = None if units is None else 1.0 / sphere_rule_h_from_kappa(vmf_mle_kappa(units, w), n_eff) ** 2
    H0 = _normal_scale_lin(lin, w, n_eff) if q else np.zeros((0, 0))
    if q and parametrization == "diagonal":
        H0 = np.diag(np.diag(H0))
    L0 = np.linalg.cholesky(H0) if q else H0
    tril = np.tril_indices(q)

    start, bounds = [], []
    for k in k0 + ([ks0] if ks0 is not None else []):
        start.append(math.log(k))
        bounds.append((math.log(k) - 7.0, math.log(k) + 7.0))
    if q:
        if parametrization == "scalar":
            start.append(0.0)
            bounds.append((-8.0, 8.0))
        elif parametrization == "diagonal":
            for a in range(q):
                v = math.log(L0[a, a])
                start.append(v)
                bounds.append((v - 4.0, v + 4.0))
        else:
            for a, b in zip(*tril):
                v = math.log(L0[a, a]) if a == b else L0[a, b]
                start.append(v)
                bounds.append((v - 4.0, v + 4.0) if a == b else (None, None))
    start = np.asarray(start)
    n_dir = c + (ks0 is not None)

    def unpack(p):
        kap = np.exp(p[:c])
        ks = math.exp(p[c]) if ks0 is not None else None
        if not q:
            return kap, ks, H0
        rest = p[n_dir:]
        if parametrization == "scalar":
            return kap, ks, H0 * math.exp(rest[0])
        L = np.zeros((q, q))
        if parametrization == "diagonal":
            L[np.diag_indices(q)] = np.exp(rest)
        else:
            L[tril] = rest
            L[np.diag_indices(q)] = np.exp(L[np.diag_indices(q)])
        return kap, ks, L @ L.T

    logw = np.log(w)
    self_share = np.log1p(-w)

    def log_kernel(kap, ks, H, conv):
        out = np.zeros((n, n))
        for j, k in enumerate(kap):
            out += (_log_circle_convolution if conv else _log_circle_kernel)(k, pairs.cos[j])
        if ks is not None:
            out += (_log_sphere_convolution if conv else log_vmf_kernel)(ks, pairs.dot)
        if q:
            Hs = 2.0 * H if conv else H
            sign, logdet = np.linalg.slogdet(Hs)
            pairs.quadratic(np.linalg.inv(Hs), out)
            out -= 0.5 * q * math.log(2 * math.pi) + 0.5 * logdet
        return out

    evaluations = [0]

    def objective(p):
        evaluations[0] += 1
        kap, ks, H = unpack(p)
        lk = log_kernel(kap, ks, H, conv=False)
        np.fill_diagonal(lk, -np.inf)
        lk += logw[None, :]
        loo = _row_logsumexp(lk) - self_share
        if criterion == "mlcv":
            return -float(np.sum(w * loo))
        lc = log_kernel(kap, ks, H, conv=True)
        lc += logw[None, :]
        square = float(np.exp(_row_logsumexp(lc)) @ w)
        return square - 2.0 * float(np.sum(w * np.exp(loo)))

    if start.size == 1:
        lo, hi = bounds[0]
        res = optimize.minimize_scalar(lambda v: objective(np.array([v])), bounds=(lo, hi), method="bounded",
                                       options={"xatol": 1e-4})
        x, fun, ok = np.array([res.x]), float(res.fun), bool(res.success)
    else:
        simplex = np.vstack([start] + [start + 0.5 * np.eye(start.size)[i] for i in range(start.size)])
        res = optimize.minimize(objective, start, method="Nelder-Mead", bounds=bounds,
                                options={"xatol": 1e-4, "fatol": 1e-10, "initial_simplex": simplex,
                                         "maxiter": 300 * start.size})
        x, fun, ok = res.x, float(res.fun), bool(res.success)
    at_edge = any(b[0] is not None and (v - b[0] < 1e-2 or b[1] - v < 1e-2) for v, b in zip(x, bounds))
    kap, ks, H = unpack(x)
    return CVResult(np.asarray(kap, float), ks, H, fun, ok, at_edge, n, evaluations[0])


def likelihood_cv(theta, lin, weights=None, *, max_n=2000, seed=0):
    """Joint likelihood CV for circular x linear Gaussian product kernels.
    Returns (kappas, H_lin, criterion, converged); see :func:`cross_validate`.

    Parameters
    ----------
    theta : array_like, shape (n, c)
        Angles in radians.
    lin : array_like, shape (n, q)
        Linear values.
    weights : array_like, shape (n,), optional
    max_n, seed : int
        As for :func:`cross_validate`.

    Returns
    -------
    kappas : ndarray, shape (c,)
    H_lin : ndarray, shape (q, q)
    criterion : float
    converged : bool
    """
    r = cross_validate("mlcv", theta=theta, lin=lin, weights=weights, max_n=max_n, seed=seed)
    return r.kappas, r.H_lin, r.criterion, r.converged


def lscv_mixed(theta, lin, weights=None, *, max_n=2000, seed=0):
    """Joint least-squares CV for circular x linear Gaussian product kernels.
    Returns (kappas, H_lin, criterion, converged); see :func:`cross_validate`.

    Parameters
    ----------
    theta : array_like, shape (n, c)
        Angles in radians.
    lin : array_like, shape (n, q)
        Linear values.
    weights : array_like, shape (n,), optional
    max_n, seed : int
        As for :func:`cross_validate`.

    Returns
    -------
    kappas : ndarray, shape (c,)
    H_lin : ndarray, shape (q, q)
    criterion : float
    converged : bool
    """
    r = cross_validate("lscv", theta=theta, lin=lin, weights=weights, max_n=max_n, seed=seed)
    return r.kappas, r.H_lin, r.criterion, r.converged


def lscv_circular(theta, weights=None, *, max_n=3000, seed=0):
    """Least-squares CV concentration for one circular variable: (kappa, criterion, converged).

    Parameters
    ----------
    theta : array_like, shape (n,)
        Angles in radians.
    weights : array_like, shape (n,), optional
    max_n, seed : int
        As for :func:`cross_validate`.

    Returns
    -------
    kappa : float
    criterion : float
    converged : bool
    """
    r = cross_validate("lscv", theta=np.asarray(theta, float).reshape(-1, 1), weights=weights,
                       max_n=max_n, seed=seed)
    return float(r.kappas[0]), r.criterion, r.converged


def likelihood_cv_sphere(units, weights=None, *, max_n=3000, seed=0):
    """Likelihood CV vMF concentration on S^2: (kappa, criterion, converged).

    Parameters
    ----------
    units : ndarray, shape (n, 3)
        Unit vectors.
    weights : array_like, shape (n,), optional
    max_n, seed : int
        As for :func:`cross_validate`.

    Returns
    -------
    kappa : float
    criterion : float
    converged : bool
    """
    r = cross_validate("mlcv", units=units, weights=weights, max_n=max_n, seed=seed)
    return float(r.kappa_sphere), r.criterion, r.converged


