"""Directional kernels: von Mises on the circle, von Mises-Fisher on the sphere.

Circular variables (wind direction in degrees, day of year, hour of day) are
mapped to angles ``theta = 2 pi x / period`` and smoothed with the von Mises
kernel

    VM(theta; kappa) = exp(kappa cos theta) / (2 pi I0(kappa)),

which, as a density in the variable's own units, is ``VM * 2 pi / period``.
For large kappa it is close to a normal with variance ``1/kappa`` (angle
units), so the *equivalent variance* ``(period / 2 pi)^2 / kappa`` is what
mvkde reports in the bandwidth matrix for a circular variable.

Locations on the Earth (latitude, longitude in degrees) are mapped to unit
vectors and smoothed with the von Mises-Fisher kernel on S^2,

    vMF(x; mu, kappa) = kappa / (4 pi sinh kappa) exp(kappa mu'x),

a density per steradian; divided by R^2 (R the Earth's mean radius) it is a
density per unit area, so its sum over a lat/lon grid weighted by cell areas
is one.

Concentration rules
-------------------
* Taylor (2008, Comput. Statist. Data Anal. 52, 3493-3500), circle:
  ``nu = [3 n k^2 I2(2k) / (4 pi^{1/2} I0(k)^2)]^{2/5}`` with k the von Mises
  maximum-likelihood concentration of the sample.
* Garcia-Portugues (2013, Electron. J. Statist. 7, 1655-1685), sphere S^2:
  ``h = [8 sinh^2 k / (k n ((1 + 4k^2) sinh 2k - 2k cosh 2k))]^{1/6}``,
  ``kappa = 1/h^2``.
* Likelihood and least-squares cross-validation (Hall, Watson & Cabrera 1987,
  Biometrika 74, 751-762), exact O(n^2) sums, with the linear variables'
  bandwidths chosen jointly for mixed samples.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import optimize, special

from .errors import InputError

EARTH_RADIUS_KM = 6371.0088  # IUGG mean radius


# ---------------------------------------------------------------------------
# kernels
# ---------------------------------------------------------------------------

def log_i0(kappa):
    """log I0(kappa), stable for large kappa (i0e = I0 e^{-kappa})."""
    kappa = np.asarray(kappa, dtype=float)
    return np.log(special.i0e(kappa)) + kappa


def von_mises(theta, kappa):
    """von Mises density in angle units (matches scipy.stats.vonmises.pdf)."""
    theta = np.asarray(theta, dtype=float)
    return np.exp(kappa * (np.cos(theta) - 1.0)) / (2.0 * math.pi * special.i0e(kappa))


def log_vmf_const(kappa):
    """log of kappa / (4 pi sinh kappa), stable for large kappa."""
    kappa = np.asarray(kappa, dtype=float)
    small = kappa < 1e-8
    k = np.where(small, 1.0, kappa)
    log_sinh = k + np.log1p(-np.exp(-2.0 * k)) - math.log(2.0)
    out = np.log(k) - math.log(4.0 * math.pi) - log_sinh
    return np.where(small, -math.log(4.0 * math.pi), out)


def vmf(cos_angle, kappa):
    """von Mises-Fisher density on S^2 (per steradian) at cosine of the angle to the mean."""
    c = np.asarray(cos_angle, dtype=float)
    return np.exp(log_vmf_const(kappa) + kappa * c)


def to_angle(x, period):
    return 2.0 * math.pi * np.asarray(x, dtype=float) / period


def lonlat_to_unit(lat_deg, lon_deg) -> np.ndarray:
    """Unit vectors (..., 3) from latitude and longitude in degrees."""
    lat = np.deg2rad(np.asarray(lat_deg, dtype=float))
    lon = np.deg2rad(np.asarray(lon_deg, dtype=float))
    c = np.cos(lat)
    return np.stack([c * np.cos(lon), c * np.sin(lon), np.sin(lat)], axis=-1)


def equivalent_variance(kappa, period):
    """(period / 2 pi)^2 / kappa: the small-angle variance of the von Mises kernel."""
    return (period / (2.0 * math.pi)) ** 2 / kappa


def kappa_from_variance(variance, period):
    return (period / (2.0 * math.pi)) ** 2 / variance


# ---------------------------------------------------------------------------
# maximum likelihood concentration
# ---------------------------------------------------------------------------

def _a1_inverse(r):
    """Solve I1(k)/I0(k) = r (Fisher 1993, Sec. 4.5.5 approximation, then Newton)."""
    r = float(min(max(r, 1e-12), 1 - 1e-12))
    if r < 0.53:
        k = 2 * r + r ** 3 + 5 * r ** 5 / 6
    elif r < 0.85:
        k = -0.4 + 1.39 * r + 0.43 / (1 - r)
    else:
        k = 1 / (r ** 3 - 4 * r ** 2 + 3 * r)
    for _ in range(50):
        a = special.i1e(k) / special.i0e(k)
        da = 1 - a / k - a * a
        step = (a - r) / da
        k = max(k - step, 1e-12)
        if abs(step) < 1e-12 * max(k, 1):
            break
    return k


def von_mises_mle(theta, weights=None) -> tuple[float, float]:
    """(mean direction, concentration) maximum-likelihood estimates."""
    w = np.full(len(theta), 1.0 / len(theta)) if weights is None else weights
    c = np.sum(w * np.cos(theta))
    s = np.sum(w * np.sin(theta))
    return math.atan2(s, c), _a1_inverse(math.hypot(c, s))


def vmf_mle_kappa(units: np.ndarray, weights=None) -> float:
    """Concentration MLE on S^2: solve coth k - 1/k = R-bar."""
    w = np.full(len(units), 1.0 / len(units)) if weights is None else weights
    rbar = float(np.linalg.norm(w @ units))
    rbar = min(max(rbar, 1e-9), 1 - 1e-12)
    f = lambda k: 1.0 / math.tanh(k) - 1.0 / k - rbar  # noqa: E731
    return optimize.brentq(f, 1e-8, 1e8)


# ---------------------------------------------------------------------------
# rules of thumb
# ---------------------------------------------------------------------------

def taylor_rule(theta, weights=None) -> float:
    """Taylor (2008) plug-in concentration nu for the von Mises kernel."""
    n = len(theta) if weights is None else 1.0 / np.sum(weights ** 2)
    _, k = von_mises_mle(theta, weights)
    # I2(2k)/I0(k)^2 with exponential scaling: e^{2k} cancels
    ratio = special.ive(2, 2 * k) / special.i0e(k) ** 2
    return float((3 * n * k * k * ratio / (4 * math.sqrt(math.pi))) ** 0.4)


def circle_rule_h(theta, weights=None) -> float:
    """Garcia-Portugues (2013) circle rule h; concentration 1/h^2."""
    n = len(theta) if weights is None else 1.0 / np.sum(weights ** 2)
    _, k = von_mises_mle(theta, weights)
    num = 4 * math.sqrt(math.pi) * special.i0e(k) ** 2
    den = k * n * (2 * special.ive(1, 2 * k) + 3 * k * special.ive(2, 2 * k))
    return float((num / den) ** 0.2)


def sphere_rule_h(units, weights=None) -> float:
    """Garcia-Portugues (2013) rule on S^2; concentration 1/h^2."""
    n = len(units) if weights is None else 1.0 / np.sum(weights ** 2)
    k = vmf_mle_kappa(units, weights)
    return sphere_rule_h_from_kappa(k, n)


def sphere_rule_h_from_kappa(k: float, n: float) -> float:
    # 8 sinh^2 k / (k n ((1 + 4k^2) sinh 2k - 2k cosh 2k)); divide through by e^{2k}
    e = math.exp(-2 * k)
    sinh2 = ((1 - e) / 2) ** 2               # sinh^2 k e^{-2k}
    s2k = (1 - e * e) / 2                    # sinh 2k e^{-2k}
    c2k = (1 + e * e) / 2                    # cosh 2k e^{-2k}
    return float((8 * sinh2 / (k * n * ((1 + 4 * k * k) * s2k - 2 * k * c2k))) ** (1 / 6))


def circle_rule_h_from_kappa(k: float, n: float) -> float:
    num = 4 * math.sqrt(math.pi) * special.i0e(k) ** 2
    den = k * n * (2 * special.ive(1, 2 * k) + 3 * k * special.ive(2, 2 * k))
    return float((num / den) ** 0.2)


def taylor_rule_from_kappa(k: float, n: float) -> float:
    ratio = special.ive(2, 2 * k) / special.i0e(k) ** 2
    return float((3 * n * k * k * ratio / (4 * math.sqrt(math.pi))) ** 0.4)


# ---------------------------------------------------------------------------
# cross-validation for mixed (circular x linear) product kernels
# ---------------------------------------------------------------------------

def _pair_terms(theta, lin):
    """cos of angle differences (n, n, c) and linear differences (n, n, l)."""
    dc = np.cos(theta[:, None, :] - theta[None, :, :]) if theta.size else None
    dl = lin[:, None, :] - lin[None, :, :] if lin.size else None
    return dc, dl


def _log_kernel_matrix(kappas, chol, dc, dl, n):
    """log of the product kernel values for every pair (n, n), diagonal included."""
    out = np.zeros((n, n))
    if dc is not None:
        for j, k in enumerate(kappas):
            out += k * (dc[:, :, j] - 1.0) - math.log(2 * math.pi) - np.log(special.i0e(k))
    if dl is not None:
        L = chol
        q = dl.shape[2]
        z = np.linalg.solve(L, dl.reshape(-1, q).T).T.reshape(n, n, q)
        out += -0.5 * np.sum(z * z, axis=2) - 0.5 * q * math.log(2 * math.pi) - np.sum(np.log(np.diag(L)))
    return out


def likelihood_cv(theta, lin, weights=None, *, max_n=2000, seed=0):
    """Concentrations and linear Gaussian H maximising the leave-one-out log-likelihood.

    ``theta`` (n, c) angles in radians, ``lin`` (n, l) linear variables.
    Returns (kappas (c,), H_lin (l, l), criterion, converged).
    """
    theta = np.atleast_2d(theta.T).T if theta.ndim == 1 else theta
    n = theta.shape[0] if theta.size else lin.shape[0]
    idx = np.arange(n)
    if n > max_n:  # O(n^2): select on a random subsample, documented
        idx = np.random.default_rng(seed).choice(n, max_n, replace=False)
    th, li = theta[idx], lin[idx]
    m = len(idx)
    w = None if weights is None else weights[idx] / weights[idx].sum()
    dc, dl = _pair_terms(th, li)
    c, q = th.shape[1], li.shape[1]
    k0 = np.array([max(taylor_rule(th[:, j]), 0.5) for j in range(c)])
    if q:
        cov = np.atleast_2d(np.cov(li.T))
        L0 = np.linalg.cholesky(cov * m ** (-2.0 / (q + 4)))
    else:
        L0 = np.zeros((0, 0))
    tril = np.tril_indices(q)

    def unpack(p):
        kap = np.exp(p[:c])
        L = np.zeros((q, q))
        if q:
            L[tril] = p[c:]
            L[np.diag_indices(q)] = np.exp(L[np.diag_indices(q)])
        return kap, L

    def loss(p):
        kap, L = unpack(p)
        lk = _log_kernel_matrix(kap, L, dc, dl, m)
        np.fill_diagonal(lk, -np.inf)
        if w is None:
            lse = special.logsumexp(lk, axis=1) - math.log(m - 1)
            return -float(np.mean(lse))
        ww = np.broadcast_to(w, (m, m)).copy()
        np.fill_diagonal(ww, 0.0)
        ww /= ww.sum(axis=1, keepdims=True)
        lse = special.logsumexp(lk, axis=1, b=ww)
        return -float(np.sum(w * lse))

    p0 = np.log(k0)
    if q:
        Lp = L0.copy()
        Lp[np.diag_indices(q)] = np.log(np.diag(L0))
        p0 = np.concatenate([p0, Lp[tril]])
    res = optimize.minimize(loss, p0, method="Nelder-Mead",
                            options={"xatol": 1e-4, "fatol": 1e-8, "maxiter": 400 * len(p0)})
    kap, L = unpack(res.x)
    return kap, L @ L.T, float(res.fun), bool(res.success)


def lscv_mixed(theta, lin, *, max_n=2000, seed=0):
    """Joint least-squares CV for von Mises x Gaussian product kernels.

    LSCV = n^{-2} sum_{i,j} C_c(ij) C_l(ij) - 2 [n(n-1)]^{-1} sum_{i != j} K_c(ij) K_l(ij), with the
    convolutions C_c = I0(k sqrt(2 + 2 cos d)) / (2 pi I0(k)^2) per circular variable (Hall,
    Watson & Cabrera 1987) and C_l = phi_{2H}(d) for the linear block (phi_A * phi_B = phi_{A+B}).
    Returns (kappas, H_lin, criterion, converged).
    """
    n = theta.shape[0]
    idx = np.arange(n)
    if n > max_n:
        idx = np.random.default_rng(seed).choice(n, max_n, replace=False)
    th, li = theta[idx], lin[idx]
    m = len(idx)
    dc, dl = _pair_terms(th, li)
    c, q = th.shape[1], li.shape[1]
    tril = np.tril_indices(q)
    k0 = np.array([max(taylor_rule(th[:, j]), 0.5) for j in range(c)])
    L0 = np.linalg.cholesky(np.atleast_2d(np.cov(li.T)) * m ** (-2.0 / (q + 4))) if q else np.zeros((0, 0))

    def unpack(p):
        kap = np.exp(p[:c])
        L = np.zeros((q, q))
        if q:
            L[tril] = p[c:]
            L[np.diag_indices(q)] = np.exp(L[np.diag_indices(q)])
        return kap, L

    def crit(p):
        kap, L = unpack(p)
        log_conv = np.zeros((m, m))
        for j, k in enumerate(kap):
            r = k * np.sqrt(np.maximum(2 + 2 * dc[:, :, j], 0.0))
            log_conv += np.log(special.i0e(r)) + r - 2 * k - math.log(2 * math.pi) - 2 * np.log(special.i0e(k))
        if q:
            L2 = math.sqrt(2.0) * L
            z = np.linalg.solve(L2, dl.reshape(-1, q).T).T.reshape(m, m, q)
            log_conv += -0.5 * np.sum(z * z, axis=2) - 0.5 * q * math.log(2 * math.pi) - np.sum(np.log(np.diag(L2)))
        term1 = np.exp(log_conv).sum() / m ** 2
        lk = _log_kernel_matrix(kap, L, dc, dl, m)
        np.fill_diagonal(lk, -np.inf)
        term2 = 2.0 * np.exp(lk).sum() / (m * (m - 1))
        return term1 - term2

    p0 = np.log(k0)
    if q:
        Lp = L0.copy()
        Lp[np.diag_indices(q)] = np.log(np.diag(L0))
        p0 = np.concatenate([p0, Lp[tril]])
    res = optimize.minimize(crit, p0, method="Nelder-Mead",
                            options={"xatol": 1e-4, "fatol": 1e-12, "maxiter": 400 * len(p0)})
    kap, L = unpack(res.x)
    return kap, L @ L.T, float(res.fun), bool(res.success)


def lscv_circular(theta, weights=None, *, max_n=3000, seed=0):
    """Concentration minimising least-squares CV for a von Mises kernel (one circular variable).

    LSCV(k) = int f^2 - (2/n) sum_i f_{-i}(theta_i), with the closed form
    int VM_k(t - a) VM_k(t - b) dt = I0(k sqrt(2 + 2 cos(a - b))) / (2 pi I0(k)^2)
    (Hall, Watson & Cabrera 1987).
    """
    theta = np.asarray(theta, dtype=float).ravel()
    n = theta.size
    if n > max_n:
        theta = np.random.default_rng(seed).choice(theta, max_n, replace=False)
        n = max_n
    dc = np.cos(theta[:, None] - theta[None, :])

    def crit(logk):
        k = math.exp(logk)
        r = k * np.sqrt(np.maximum(2 + 2 * dc, 0.0))
        # I0(r) / I0(k)^2 = i0e(r) e^{r - 2k} / i0e(k)^2
        conv = special.i0e(r) * np.exp(r - 2 * k) / (2 * math.pi * special.i0e(k) ** 2)
        term1 = conv.sum() / n ** 2
        kv = np.exp(k * (dc - 1)) / (2 * math.pi * special.i0e(k))
        np.fill_diagonal(kv, 0.0)
        term2 = 2.0 * kv.sum() / (n * (n - 1))
        return term1 - term2

    k0 = max(taylor_rule(theta), 0.5)
    res = optimize.minimize_scalar(crit, bounds=(math.log(k0) - 4, math.log(k0) + 4), method="bounded",
                                   options={"xatol": 1e-5})
    return float(math.exp(res.x)), float(res.fun), bool(res.success)


def likelihood_cv_sphere(units, weights=None, *, max_n=3000, seed=0):
    """vMF concentration maximising the leave-one-out log-likelihood on S^2."""
    n = units.shape[0]
    if n > max_n:
        units = units[np.random.default_rng(seed).choice(n, max_n, replace=False)]
        n = max_n
    g = units @ units.T
    np.fill_diagonal(g, -np.inf)

    def loss(logk):
        k = math.exp(logk)
        lk = log_vmf_const(k) + k * g
        return -float(np.mean(special.logsumexp(lk, axis=1) - math.log(n - 1)))

    k0 = 1.0 / sphere_rule_h(units) ** 2
    res = optimize.minimize_scalar(loss, bounds=(math.log(k0) - 5, math.log(k0) + 5), method="bounded",
                                   options={"xatol": 1e-5})
    return float(math.exp(res.x)), float(res.fun), bool(res.success)


def check_period(period, name) -> float:
    try:
        p = float(period)
    except (TypeError, ValueError):
        raise InputError(f"period of {name} must be a positive number (for example 360 for degrees)") from None
    if not (math.isfinite(p) and p > 0):
        raise InputError(f"period of {name} must be a positive number (for example 360 for degrees), got {period!r}")
    return p


def cell_areas_km2(lat_edges_deg, lon_edges_deg, radius_km=EARTH_RADIUS_KM) -> np.ndarray:
    """Areas (km^2) of lat/lon cells given their edges: R^2 dlon (sin lat2 - sin lat1)."""
    lat = np.deg2rad(np.asarray(lat_edges_deg, dtype=float))
    lon = np.deg2rad(np.asarray(lon_edges_deg, dtype=float))
    band = np.abs(np.diff(np.sin(lat)))
    width = np.abs(np.diff(lon))
    return radius_km ** 2 * np.outer(band, width)
