r"""Univariate rules: Sheather-Jones solve-the-equation and improved Sheather-Jones.

Sheather & Jones (1991), solve-the-equation
    ``h = [R(phi) / (n psi4_hat(alpha2(h)))]^{1/5}`` with ``R(phi) = 1/(2 sqrt(pi))``,
    ``psi_r_hat(g) = [n(n-1)]^{-1} sum_i sum_j g^{-r-1} phi^{(r)}((X_i - X_j)/g)``
    (diagonal included) and ``alpha2(h) = C (psi4_hat(a) / -psi6_hat(b))^{1/7} h^{5/7}``,
    ``C = (2 phi^{(4)}(0) / R(phi))^{1/7} = 1.357``: the bias-annihilating
    pilot for psi4, ``g^7 = 2 phi^{(4)}(0) / (-psi6 n)``, with n eliminated
    through the AMISE relation ``n = R / (psi4 h^5)``.  The pilots a and b
    are the bias-annihilating pilots for psi4 and psi6 under a normal
    reference with scale ``s = min(sd, IQR/1.349)``: ``psi6 = -15/(16 sqrt(pi) s^7)``
    and ``psi8 = 105/(32 sqrt(pi) s^9)`` give ``a = 1.241 s n^{-1/7}`` and
    ``b = 1.230 s n^{-1/9}``.  The functionals come from the same binned or
    exact pair sums as the multivariate selectors.

Botev, Grotowski & Kroese (2010), improved Sheather-Jones (diffusion)
    The data are rescaled to [0, 1] (range widened by a tenth on each
    side) and binned on 2^14 nodes; the cosine coefficients ``a_k`` of the
    binned density (a type-II DCT) give ``||f_t^{(s)}||^2 = 2 pi^{2s}
    sum_k k^{2s} (a_k/2)^2 exp(-k^2 pi^2 t)`` for the Gaussian-smoothed
    (diffusion time t = h^2) density.  Starting from order l = 7, each
    ``||f^{(s)}||^2`` is estimated at the time
    ``t_s = (2 c_s K_s / (n ||f^{(s+1)}||^2))^{2/(3+2s)}``, ``K_s = (2s-1)!!/sqrt(2 pi)``,
    ``c_s = (1 + 2^{-(s+1/2)})/3``, down to s = 2, and the bandwidth solves
    the fixed point ``t = (2 n sqrt(pi) ||f''||^2)^{-2/5}`` (the AMISE
    relation).  No normal reference is used at any stage, which is why the
    rule copes with multimodal samples.

References
----------
Sheather, S. J. & Jones, M. C. (1991). A reliable data-based bandwidth
selection method for kernel density estimation. J. R. Statist. Soc. B 53, 683-690.
Botev, Z. I., Grotowski, J. F. & Kroese, D. P. (2010). Kernel density
estimation via diffusion. Ann. Statist. 38, 2916-2957 (Sec. 5 and the
algorithm of its appendix).
"""

from __future__ import annotations

import math

import numpy as np
from scipy import fft as _fft
from scipy import optimize

from .functionals import BinnedSums, ExactSums, Prepared, diag_derivative

__all__ = ["sheather_jones", "improved_sheather_jones"]

_R_PHI = 1.0 / (2.0 * math.sqrt(math.pi))
_PHI4_0 = 3.0 / math.sqrt(2.0 * math.pi)
_PHI6_0 = -15.0 / math.sqrt(2.0 * math.pi)


def _weighted_iqr(x, w):
    order = np.argsort(x)
    cw = np.cumsum(w[order])
    cw /= cw[-1]
    q1 = x[order][np.searchsorted(cw, 0.25)]
    q3 = x[order][np.searchsorted(cw, 0.75)]
    return q3 - q1


def _psi(sums, prep, cell, g, order):
    vals = sums.derivative_sums(np.array([cell]), np.array([g]), order)
    r = (order,)
    sw2 = prep.sw2[cell]
    total = vals[r][0] + sw2 * diag_derivative(r, 1) * g ** (-1 - order)
    return total / (1.0 - sw2)


def sheather_jones(prep: Prepared, *, binned=None):
    """Solve-the-equation bandwidth for every (univariate) cell of ``prep``.

    Parameters
    ----------
    prep : Prepared
        Cells of one variable.
    binned : bool, optional
        Binned or exact pair sums; binned by default when a cell has more than 500 data.

    Returns
    -------
    list of dict
        One per cell, like :func:`run_selector` (H in data units).
    """
    C = prep.cells
    n_max = max(len(z) for z in prep.z)
    binned = n_max > 500 if binned is None else binned
    out = []
    # pilots in sphered units (sd = 1)
    scales = np.array([min(1.0, _weighted_iqr(z[:, 0], w) / 1.349) for z, w in zip(prep.z, prep.w)])
    scales = np.where(scales > 0, scales, 1.0)
    n = prep.n_eff
    psi6_nr = -15.0 / (16.0 * math.sqrt(math.pi) * scales ** 7)
    psi8_nr = 105.0 / (32.0 * math.sqrt(math.pi) * scales ** 9)
    a = (2.0 * _PHI4_0 / (-psi6_nr * n)) ** (1.0 / 7.0)
    b = (-2.0 * _PHI6_0 / (psi8_nr * n)) ** (1.0 / 9.0)
    if binned:
        hns = np.sqrt(prep.c_ns)
        sums = BinnedSums(prep, max_sd=np.maximum(3.0 * hns, 1.5 * b), min_sd=0.01 * hns)
    else:
        sums = ExactSums(prep)
    const = (2.0 * _PHI4_0 / _R_PHI) ** (1.0 / 7.0)
    for c in range(C):
        sd_a = _psi(sums, prep, c, a[c], 4)
        td_b = -_psi(sums, prep, c, b[c], 6)
        details = dict(evaluation="binned" if binned else "exact", pilot_a=float(a[c]), pilot_b=float(b[c]))
        converged, at_edge = True, False
        if not (sd_a > 0 and td_b > 0):
            h = math.sqrt(prep.c_ns[c])
            converged = False
            details["note"] = "pilot functionals have the wrong sign; normal scale used"
        else:
            ratio = (sd_a / td_b) ** (1.0 / 7.0)

            def eq(logh):
                h = math.exp(logh)
                alpha2 = const * ratio * h ** (5.0 / 7.0)
                p4 = _psi(sums, prep, c, alpha2, 4)
                if p4 <= 0:
                    return -logh - 50.0
                return logh - 0.2 * math.log(_R_PHI / (n[c] * p4))

            h0 = math.sqrt(prep.c_ns[c])
            lo, hi = math.log(h0 * 0.02), math.log(h0 * 3.0)
            flo, fhi = eq(lo), eq(hi)
            if flo < 0 < fhi:
                logh = optimize.brentq(eq, lo, hi, xtol=1e-10)
                h = math.exp(logh)
            else:
                h = math.exp(lo if flo >= 0 else hi)
                converged, at_edge = False, True
        sd = prep.A[c, 0, 0]
        out.append(dict(H=np.array([[(h * sd) ** 2]]), criterion=float("nan"), converged=converged,
                        at_edge=at_edge, details=details))
    return out


def _fixed_point_map(t, n, k2, a2, order=7):
    """xi gamma^[l](t) of Botev et al. (2010): the time the AMISE relation gives."""
    f = 2.0 * math.pi ** (2 * order) * np.sum(k2 ** order * a2 * np.exp(-k2 * math.pi ** 2 * t))
    for s in range(order - 1, 1, -1):
        k0 = np.prod(np.arange(1, 2 * s, 2)) / math.sqrt(2 * math.pi)
        cst = (1.0 + 0.5 ** (s + 0.5)) / 3.0
        if f <= 0:
            return math.inf
        time = (2.0 * cst * k0 / (n * f)) ** (2.0 / (3.0 + 2.0 * s))
        f = 2.0 * math.pi ** (2 * s) * np.sum(k2 ** s * a2 * np.exp(-k2 * math.pi ** 2 * time))
    if f <= 0:
        return math.inf
    return (2.0 * n * math.sqrt(math.pi) * f) ** (-0.4)


def improved_sheather_jones(prep: Prepared, x_list, *, grid_size=2 ** 14):
    """Diffusion bandwidth of Botev et al. (2010) for each univariate sample.

    Parameters
    ----------
    prep : Prepared
        The cells' weights, effective sizes and normal-scale fallbacks.
    x_list : list of array_like
        The samples in data units, one per cell.
    grid_size : int, optional
        Number of bins of the discrete cosine transform.

    Returns
    -------
    list of dict
        One per cell, like :func:`run_selector` (H in data units).
    """
    out = []
    for c, x in enumerate(x_list):
        x = np.asarray(x, dtype=float).ravel()
        w = prep.w[c]
        n = prep.n_eff[c]
        xmin, xmax = x.min(), x.max()
        span = xmax - xmin
        lo, hi = xmin - span / 10.0, xmax + span / 10.0
        R = hi - lo
        # linear binning onto the bin centres (k + 1/2)/M of [0, 1]
        u = (x - lo) / R * grid_size - 0.5
        i0 = np.clip(np.floor(u).astype(np.int64), 0, grid_size - 2)
        fr = np.clip(u - i0, 0.0, 1.0)
        counts = (np.bincount(i0, weights=w * (1 - fr), minlength=grid_size)
                  + np.bincount(i0 + 1, weights=w * fr, minlength=grid_size))
        a = _fft.dct(counts / counts.sum(), type=2)
        k2 = np.arange(1, grid_size, dtype=float) ** 2
        a2 = (a[1:] / 2.0) ** 2
        converged, at_edge = True, False
        details = dict(evaluation="binned", grid_size=grid_size)

        def eq(t):
            return t - _fixed_point_map(t, n, k2, a2)

        try:
            if eq(1e-12) < 0 < eq(0.1):
                t = optimize.brentq(eq, 1e-12, 0.1, xtol=1e-14, rtol=1e-12)
            else:
                raise ValueError
            h = math.sqrt(t) * R
        except ValueError:
            h = math.sqrt(prep.c_ns[c]) * prep.A[c, 0, 0]
            converged = False
            details["note"] = "the diffusion fixed point has no root in (0, 0.1); normal scale used"
        out.append(dict(H=np.array([[h * h]]), criterion=float("nan"), converged=converged,
                        at_edge=at_edge, details=details))
    return out
