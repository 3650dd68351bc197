r"""Data-driven bandwidth matrices for the Gaussian kernel: LSCV, SCV, plug-in, MLCV.

All selectors work on the sphered sample ``Z = A^{-1}(X - mean)`` (``A A' = S``
the sample covariance) and return ``H = A H_z A'``.  The criteria are
equivariant -- ``C_X(H) = |A|^{-1} C_Z(A^{-1} H A^{-T})`` for LSCV, SCV and
the AMISE -- so sphering changes nothing but the conditioning of the grid
and of the search; the pilot bandwidths are ``g^2 I`` in sphered
coordinates, as Duong & Hazelton (2003) recommend.  Sums below run over the
weights ``w_i`` (summing to one; ``w_i = 1/n`` without weights), and
``n`` stands for the effective size ``1 / sum w_i^2``.

Parametrisations (``theta`` is what the optimiser moves; H stays symmetric
positive definite for every theta):

* ``full``: ``H_z = c L L'`` with L lower triangular, log-diagonal (log-Cholesky);
* ``diagonal``: ``H = c diag(S) diag(exp(theta))``;
* ``scalar``: ``H = c exp(theta) S`` (a multiple of the sample covariance);

where ``c`` is the normal-scale factor, so ``theta = 0`` is the
normal-scale matrix.  The search region is ``lo <= eig(H relative to the
normal-scale matrix) <= hi``; a result on its edge is flagged ``at_edge``.

Criteria (Gaussian kernel; ``phi_S`` the N(0, S) density; ``OD`` an
off-diagonal double sum, see :mod:`.functionals`):

LSCV (Rudemo 1982; Bowman 1984; Wand & Jones 1995, eq. 4.10)
    ``int fhat^2 - 2 sum_i w_i fhat_{-i}(X_i)``
    ``= sum_i w_i^2 phi_{2H}(0) + OD[phi_{2H}] - 2 OD[phi_H] / (1 - sum w_i^2)``,
    leaving one point out with the other weights renormalised.  For equal
    weights this is ``n^{-1}(4 pi)^{-d/2}|H|^{-1/2} + [n(n-1)]^{-1}
    sum_{i != j} [(1 - 1/n) phi_{2H} - 2 phi_H](X_i - X_j)``.

SCV (Hall, Marron & Park 1992; Duong & Hazelton 2005)
    The integrated squared bias ``int (K_H * f - f)^2`` is estimated by
    replacing f with the pilot estimate ``L_G * f_n``; as ``phi_A * phi_B =
    phi_{A+B}``, ``int (K_H*L_G*f_n - L_G*f_n)^2 = sum_ij w_i w_j
    (phi_{2H+2G} - 2 phi_{H+2G} + phi_{2G})(X_i - X_j)`` (diagonal included,
    which keeps the estimate non-negative), and
    ``SCV(H) = n^{-1}(4 pi)^{-d/2}|H|^{-1/2} + that sum``.  Expanding the
    bracket in H gives ``(1/4) vec H' Psi4_hat(2G) vec H`` to leading order,
    the plug-in bias with pilot ``2G``; the pilot is therefore taken as
    ``2G = g4^2 I`` with g4 the plug-in pilot below.

Plug-in (Wand & Jones 1994; Duong & Hazelton 2003)
    ``AMISE(H) = n^{-1}(4 pi)^{-d/2}|H|^{-1/2} + (1/4) sum_{ijkl} H_ij H_kl
    psi_{ijkl}``, with ``psi_{ijkl} = int f_{ijkl} f`` (two integrations by
    parts turn ``int (tr H D^2 f)^2`` into this form; for d = 2 it is
    ``vech(H)' Psi4 vech(H)`` with the usual Psi4 matrix).  ``psi_r`` is
    estimated by ``sum_ij w_i w_j D^r phi_{g^2 I}(Z_i - Z_j)``, diagonal
    included.  Two stages: the sixth-order functionals with a
    normal-reference pilot g6, then g4 from them, then the fourth-order
    tensor, then the minimisation of the AMISE (convex in H).

    Pilots (SAMSE, Duong & Hazelton 2003): one g for all functionals of
    order 2k, minimising the summed squared asymptotic bias over all
    tensor entries I,
    ``bias_I(g) = n^{-1} g^{-d-2k} A_I + g^2 B_I``,
    ``A_I = D^I phi_I(0)``, ``B_I = (1/2) sum_m psi_{I + 2 e_m}``.
    With ``s = sum A_I^2``, ``t = sum A_I B_I``, ``u = sum B_I^2`` and
    ``q = n g^{d+2k+2}``, setting the derivative to zero gives
    ``4u q^2 - 2(d+2k-2) t q - 2(d+2k) s = 0``, i.e.
    ``q = 2(d+2k) s / (sqrt((d+2k-2)^2 t^2 + 8(d+2k) u s) - (d+2k-2) t)``.
    For d = 1 this is the bias-annihilating pilot of Sheather & Jones (1991).
    Gaussian moments give the constants in closed form
    (``sum_I E[Z^I]^2 = E[(Z'Z_2)^{2k}] = (2k-1)!! E|Z|^{2k}``):
    ``s = (2 pi)^{-d} (2k-1)!! d(d+2)...(d+2k-2)``; for the normal reference
    (identity covariance in sphered coordinates), with ``W ~ N(0, I/2)``,
    ``t = -(1/2)(2 pi)^{-3d/2} pi^{d/2} (2k-1)!! E|W|^{2k+2}`` and
    ``u = (1/4)(2 pi)^{-2d} pi^d (2k-1)!! 2^{-k-1} (d+2k) E|W|^{2k+2}``.

MLCV (Habbema, Hermans & van den Broek 1974; Duin 1976)
    maximise ``sum_i w_i log fhat_{-i}(X_i)``.

References
----------
Bowman, A. W. (1984). Biometrika 71, 353-360.
Duong, T. & Hazelton, M. L. (2003). Plug-in bandwidth matrices for bivariate
kernel density estimation. J. Nonparametr. Stat. 15, 17-30.
Duong, T. & Hazelton, M. L. (2005). Cross-validation bandwidth matrices for
multivariate kernel density estimation. Scand. J. Statist. 32, 485-506.
Hall, P., Marron, J. S. & Park, B. U. (1992). Smoothed cross-validation.
Probab. Theory Relat. Fields 92, 1-20.
Rudemo, M. (1982). Scand. J. Statist. 9, 65-78.
Sheather, S. J. & Jones, M. C. (1991). J. R. Statist. Soc. B 53, 683-690.
Wand, M. P. & Jones, M. C. (1994). Multivariate plug-in bandwidth selection.
Comput. Statist. 9, 97-116.
"""

from __future__ import annotations

import math

import numpy as np

from .functionals import (BinnedSums, ExactSums, Prepared, diag_derivative, multi_indices,
                          tensor_from_values)
from .optimize import batch_minimize

__all__ = ["run_selector", "CRITERIA", "samse_normal_constants", "samse_q", "plugin_pilots"]

CRITERIA = ("lscv", "scv", "plugin", "mlcv")

#: search region, eigenvalues of H relative to the normal-scale matrix
REGION_HIGH = 4.0
_REGION_LOW = {1: 0.02 ** 2, 2: 0.1 ** 2, 3: 0.2 ** 2}
#: starts, as multiples of the normal-scale matrix
#: (SCV's criterion is smooth -- its pilot 2G is in every term -- and the
#: plug-in AMISE is convex in H: one start each)
STARTS = {"lscv": (0.25, 0.5, 1.0), "scv": (1.0,), "mlcv": (0.25, 0.5, 1.0), "plugin": (1.0,)}
#: Newton iterations after which only the best start of each cell goes on
#: (the starts have by then reached their basins; the others would cost as much
#: again to finish in a basin that is not the lowest found)
KEEP_AFTER = {"lscv": 3, "mlcv": 3}
#: largest sample for which "auto" uses the exact O(n^2) sums
EXACT_MAX_N = 500


def region_low(d: int) -> float:
    """Lower end of the search region: smallest eigenvalue of H relative to the normal-scale matrix.

    Parameters
    ----------
    d : int

    Returns
    -------
    float
    """
    return _REGION_LOW.get(d, 0.2 ** 2)


# ---------------------------------------------------------------------------
# SAMSE pilot constants
# ---------------------------------------------------------------------------

def _df(m: int) -> int:
    return 1 if m <= 0 else m * _df(m - 2)


def _norm_moment(d: int, m: int) -> float:
    """E|Z|^{2m} = d (d+2) ... (d+2m-2) for Z ~ N(0, I_d)."""
    return float(np.prod([d + 2 * i for i in range(m)])) if m > 0 else 1.0


def samse_normal_constants(d: int, k: int):
    """(s, t, u) of the SAMSE pilot for order-2k functionals, normal reference.

    Parameters
    ----------
    d, k : int

    Returns
    -------
    s, t, u : float
    """
    s = (2 * math.pi) ** (-d) * _df(2 * k - 1) * _norm_moment(d, k)
    ew = 2.0 ** (-(k + 1)) * _norm_moment(d, k + 1)                     # E|W|^{2k+2}
    t = -0.5 * (2 * math.pi) ** (-1.5 * d) * math.pi ** (0.5 * d) * _df(2 * k - 1) * ew
    u = 0.25 * (2 * math.pi) ** (-2 * d) * math.pi ** d * _df(2 * k - 1) * 2.0 ** (-k - 1) * (d + 2 * k) * ew
    return s, t, u


def samse_q(d: int, k: int, s, t, u):
    """q = n g^{d+2k+2} minimising the summed squared bias (see module notes).

    Parameters
    ----------
    d, k : int
    s, t, u : float or ndarray
        Constants as from :func:`samse_normal_constants` or estimated.

    Returns
    -------
    float or ndarray
    """
    a = d + 2 * k - 2
    root = np.sqrt(a * a * t * t + 8.0 * (d + 2 * k) * u * s)
    with np.errstate(divide="ignore"):
        return 2.0 * (d + 2 * k) * s / np.maximum(root - a * t, 1e-300)


def _full_diag_values(d, order, g, sw2):
    """Diagonal (i = j) terms sum_i w_i^2 D^r phi_{g^2 I}(0) per multi-index."""
    return {r: sw2 * diag_derivative(r, d) * g ** (-d - order) for r in multi_indices(d, order)}


def _laplacian_tensor(vals6, d, batch):
    """T_{ijkl} = sum_m psi_{ijkl + 2 e_m} from order-6 values."""
    contracted = {}
    for r in multi_indices(d, 4):
        acc = 0.0
        for m in range(d):
            rr = list(r)
            rr[m] += 2
            acc = acc + vals6[tuple(rr)]
        contracted[r] = acc
    return tensor_from_values(contracted, d, 4, batch)


def plugin_pilots(prep: Prepared, sums, cells):
    """Two-stage SAMSE pilots and the estimated fourth-order tensor.

    Parameters
    ----------
    prep : Prepared
    sums : BinnedSums or ExactSums
    cells : array_like of int, shape (b,)

    Returns
    -------
    psi4 : ndarray, shape (b, d, d, d, d)
    g4, g6 : ndarray, shape (b,)
        In sphered coordinates.
    """
    d = prep.d
    cells = np.asarray(cells)
    n = prep.n_eff[cells]
    sw2 = prep.sw2[cells]
    b = len(cells)
    s6, t6, u6 = samse_normal_constants(d, 3)
    g6 = (samse_q(d, 3, s6, t6, u6) / n) ** (1.0 / (d + 8))
    vals6 = sums.derivative_sums(cells, g6, 6)
    diag6 = _full_diag_values(d, 6, g6, sw2)
    vals6 = {r: vals6[r] + diag6[r] for r in vals6}
    B = 0.5 * _laplacian_tensor(vals6, d, b)                          # (b, d, d, d, d)
    s4 = (2 * math.pi) ** (-d) * 3 * d * (d + 2)
    t4 = (2 * math.pi) ** (-0.5 * d) * 3.0 * np.einsum("biijj->b", B)
    u4 = np.einsum("bijkl,bijkl->b", B, B)
    g4 = (samse_q(d, 2, s4, t4, u4) / n) ** (1.0 / (d + 6))
    vals4 = sums.derivative_sums(cells, g4, 4)
    diag4 = _full_diag_values(d, 4, g4, sw2)
    psi4 = tensor_from_values({r: vals4[r] + diag4[r] for r in vals4}, d, 4, b)
    return psi4, g4, g6


def _normal_reference_g4(d, n):
    s4 = (2 * math.pi) ** (-d) * 3 * d * (d + 2)
    _, t, u = samse_normal_constants(d, 2)
    return (samse_q(d, 2, s4, t, u) / n) ** (1.0 / (d + 6))


# ---------------------------------------------------------------------------
# parametrisations
# ---------------------------------------------------------------------------

class Parametrization:
    """Map theta -> H_z (sphered coordinates) for one of full / diagonal / scalar.

    theta has one row of ``p`` numbers per matrix: the log-diagonal and the lower triangle of a Cholesky factor
    (full), log relative variances (diagonal) or a log factor (scalar), all relative to the normal-scale matrix.

    Parameters
    ----------
    kind : {'full', 'diagonal', 'scalar'}
    prep : Prepared
    low, high : float
        Search region: eigenvalues of H relative to the normal-scale matrix.
    """

    def __init__(self, kind: str, prep: Prepared, low: float, high: float):
        self.kind, self.prep, self.low, self.high = kind, prep, low, high
        d = prep.d
        self.d = d
        self.tril = np.tril_indices(d, -1)
        self.p = {"full": d * (d + 1) // 2, "diagonal": d, "scalar": 1}[kind]
        if kind == "diagonal":
            # A^{-1} diag(S) A^{-T}: columns of A^{-1} scaled by the variances
            Ainv = np.linalg.inv(prep.A)
            self._Ainv = Ainv
            self._var = np.diagonal(prep.cov, axis1=1, axis2=2)

    def start(self, factors, cells) -> np.ndarray:
        """theta of ``factors`` times the normal-scale matrix, one row per cell.

        Parameters
        ----------
        factors : array_like, shape (b,)
            Positive multiples of the normal-scale matrix.
        cells : array_like of int, shape (b,)

        Returns
        -------
        ndarray, shape (b, p)
        """
        th = np.zeros((len(cells), self.p))
        f = np.log(np.asarray(factors, dtype=float))
        if self.kind == "full":
            th[:, :self.d] = 0.5 * f[:, None]
        else:
            th[:] = f[:, None]
        return th

    def matrices(self, cells, theta) -> np.ndarray:
        """H_z (sphered coordinates) of each row of ``theta``.

        Parameters
        ----------
        cells : array_like of int, shape (b,)
        theta : ndarray, shape (b, p)

        Returns
        -------
        ndarray, shape (b, d, d)
        """
        d = self.d
        c = self.prep.c_ns[cells]
        if self.kind == "full":
            L = np.zeros((theta.shape[0], d, d))
            idx = np.arange(d)
            L[:, idx, idx] = np.exp(theta[:, :d])
            L[:, self.tril[0], self.tril[1]] = theta[:, d:]
            return c[:, None, None] * (L @ np.swapaxes(L, 1, 2))
        if self.kind == "diagonal":
            Ai = self._Ainv[cells]
            D = self._var[cells] * np.exp(theta)
            return c[:, None, None] * np.einsum("bij,bj,bkj->bik", Ai, D, Ai)
        return (c * np.exp(theta[:, 0]))[:, None, None] * np.eye(d)[None]

    def data_matrices(self, cells, theta) -> np.ndarray:
        """H in data coordinates (diagonal matrices built exactly diagonal).

        Parameters
        ----------
        cells, theta
            As for :meth:`matrices`.

        Returns
        -------
        ndarray, shape (b, d, d)
        """
        if self.kind == "diagonal":
            v = self.prep.c_ns[cells][:, None] * self._var[cells] * np.exp(theta)
            return np.einsum("bj,jk->bjk", v, np.eye(self.d))
        Hz = self.matrices(cells, theta)
        H = self.prep.to_data_coordinates(Hz, cells)
        return 0.5 * (H + np.swapaxes(H, 1, 2))

    def relative_eigenvalues(self, cells, theta) -> np.ndarray:
        """Eigenvalues of H relative to the normal-scale matrix (diagonal, scalar: exp(theta)).

        Parameters
        ----------
        cells, theta
            As for :meth:`matrices`.

        Returns
        -------
        ndarray, shape (b, d) or (b, p)
        """
        if self.kind == "full":
            Hz = self.matrices(cells, theta) / self.prep.c_ns[cells][:, None, None]
            return np.linalg.eigvalsh(Hz)
        return np.exp(theta)

    def inside(self, cells, theta) -> np.ndarray:
        """Whether every relative eigenvalue is finite and within [low, high].

        Parameters
        ----------
        cells, theta
            As for :meth:`matrices`.

        Returns
        -------
        ndarray of bool, shape (b,)
        """
        ev = self.relative_eigenvalues(cells, theta)
        return np.all((ev >= self.low) & (ev <= self.high) & np.isfinite(ev), axis=1)

    def edge(self, cells, theta) -> np.ndarray:
        """Whether some relative eigenvalue lies within 5 % of ``low`` or ``high``.

        Parameters
        ----------
        cells, theta
            As for :meth:`matrices`.

        Returns
        -------
        ndarray of bool, shape (b,)
        """
        ev = self.relative_eigenvalues(cells, theta)
        return np.any((ev <= self.low * 1.05) | (ev >= self.high / 1.05), axis=1)

    def spread(self) -> np.ndarray:
        """Largest eigenvalue of H_z at relative size 1 (for grid padding).

        Returns
        -------
        ndarray, shape (cells,)
            Ones unless the parametrization is diagonal.
        """
        if self.kind != "diagonal":
            return np.ones(self.prep.cells)
        M = np.einsum("cij,cj,ckj->cik", self._Ainv, self._var, self._Ainv)
        return np.linalg.eigvalsh(M)[:, -1]


# ---------------------------------------------------------------------------
# criteria
# ---------------------------------------------------------------------------

def _logdet(H):
    return np.linalg.slogdet(H)[1]


def _phi0(S, d):
    """phi_S(0) = (2 pi)^{-d/2} |S|^{-1/2}."""
    return np.exp(-0.5 * _logdet(S)) * (2 * math.pi) ** (-0.5 * d)


def _lscv(prep, sums, cells, Hz, extra):
    d = prep.d
    sw2 = prep.sw2[cells]
    od2, od1 = sums.gauss_sums(cells, Hz, [(2, 0), (1, 0)])
    return sw2 * _phi0(2.0 * Hz, d) + od2 - 2.0 * od1 / (1.0 - sw2)


def _scv(prep, sums, cells, Hz, extra):
    d = prep.d
    sw2 = prep.sw2[cells]
    G = extra["G"][cells]
    od = sums.gauss_sums(cells, Hz, [(2, 2), (1, 2), (0, 2)], G=G)
    diag = _phi0(2 * Hz + 2 * G, d) - 2 * _phi0(Hz + 2 * G, d) + _phi0(2 * G, d)
    return sw2 * _phi0(2.0 * Hz, d) + sw2 * diag + od[0] - 2 * od[1] + od[2]


def _amise(prep, sums, cells, Hz, extra):
    d = prep.d
    psi = extra["psi4"][cells]
    bias = np.einsum("bij,bijkl,bkl->b", Hz, psi, Hz)
    return prep.sw2[cells] * _phi0(2.0 * Hz, d) + 0.25 * bias


def _mlcv(prep, sums, cells, Hz, extra):
    out = np.empty(len(cells))
    for cell in np.unique(cells):
        sel = np.flatnonzero(cells == cell)
        w = prep.w[cell]
        loo = sums.loo_sums(int(cell), Hz[sel]) / (1.0 - w)[None, :]
        with np.errstate(divide="ignore", invalid="ignore"):
            ll = np.where(loo > 0, np.log(np.where(loo > 0, loo, 1.0)), -np.inf) @ w
        out[sel] = -ll
    return out


_CRITERION_FUNCTIONS = {"lscv": _lscv, "scv": _scv, "plugin": _amise, "mlcv": _mlcv}


# ---------------------------------------------------------------------------
# driver
# ---------------------------------------------------------------------------

def run_selector(method: str, prep: Prepared, parametrization: str, *, binned=None, starts=None):
    """Select Gaussian-kernel bandwidth matrices for every cell of ``prep``.

    Parameters
    ----------
    method : {'lscv', 'scv', 'plugin', 'mlcv'}
    prep : Prepared
    parametrization : {'full', 'diagonal', 'scalar'}
    binned : bool, optional
        Binned FFT sums or exact sums; by default binned for d <= 3 and more than ``EXACT_MAX_N`` data.
    starts : sequence of float, optional
        Starting multiples of the normal-scale matrix (default ``STARTS[method]``).

    Returns
    -------
    list of dict
        One per cell, with keys ``H`` (data coordinates), ``criterion`` (in data coordinates),
        ``converged``, ``at_edge``, ``details``.

    Long because it is the one driver of every criterion for a block of cells:
    starts, the vectorised Newton search, keeping the best start per cell and
    the edge checks share the same per-cell arrays.
    """
    d = prep.d
    C = prep.cells
    cells_all = np.arange(C)
    low, high = region_low(d), REGION_HIGH
    par = Parametrization(parametrization, prep, low, high)
    if binned is None:
        binned = d <= 3 and max(len(z) for z in prep.z) > EXACT_MAX_N
    if binned and d > 3:
        binned = False

    g4_ref = _normal_reference_g4(d, prep.n_eff)
    if binned:
        s6, t6, u6 = samse_normal_constants(d, 3)
        g6_ref = (samse_q(d, 3, s6, t6, u6) / prep.n_eff) ** (1.0 / (d + 8))
        if method in ("plugin", "scv"):
            # every SCV kernel contains phi_{2G}, 2G = g4^2 I, and the plug-in
            # touches the data only through its pilots: resolve and pad for
            # the pilot scale (a data-based g4 below a third of its normal
            # reference is not expected), not for H
            widest = np.maximum(g6_ref, 1.3 * g4_ref) ** 2
            if method == "scv":
                widest = np.maximum(widest, 2.0 * high * prep.c_ns * np.minimum(par.spread(), 4.0)
                                    + (1.3 * g4_ref) ** 2)
            sums = BinnedSums(prep, np.sqrt(widest), g4_ref / 3.0, delta=g4_ref / 5.0)
        else:
            spread = np.minimum(par.spread(), 4.0)
            max_sd = np.sqrt(2.0 * high * prep.c_ns * spread)
            min_sd = 0.7 * np.sqrt(low * prep.c_ns)
            sums = BinnedSums(prep, max_sd, min_sd)
    else:
        sums = ExactSums(prep)

    extra = {}
    details = [dict(evaluation="binned" if binned else "exact") for _ in range(C)]
    if binned:
        for dd in details:
            dd.update(grid_size=sums.size, frequencies=sums.nfreq)
    if method in ("plugin", "scv"):
        psi4, g4, g6 = plugin_pilots(prep, sums, cells_all)
        extra["psi4"] = psi4
        extra["G"] = (0.5 * g4 ** 2)[:, None, None] * np.eye(d)[None]
        for c in range(C):
            details[c].update(pilot_g4=float(g4[c]), pilot_g6=float(g6[c]))
    crit = _CRITERION_FUNCTIONS[method]

    factors = STARTS[method] if starts is None else tuple(starts)
    ns = len(factors)
    row_cells = np.repeat(cells_all, ns)
    theta0 = par.start(np.tile(factors, C), row_cells)

    def fun(rows, theta):
        cells = row_cells[rows]
        val = np.full(len(rows), np.inf)
        ok = par.inside(cells, theta)
        if np.any(ok):
            Hz = par.matrices(cells[ok], theta[ok])
            val[ok] = crit(prep, sums, cells[ok], Hz, extra)
        return np.where(np.isfinite(val), val, np.inf)

    if method == "plugin" and parametrization == "scalar":
        # closed form: AMISE(h^2 I) = n^-1 (4pi)^{-d/2} h^-d + h^4/4 sum_ij psi_iijj
        psi = extra["psi4"]
        bsum = np.einsum("biijj->b", psi)
        h2 = (d * prep.sw2 * (4 * math.pi) ** (-0.5 * d) / bsum) ** (2.0 / (d + 4))
        ratio = np.clip(h2 / prep.c_ns, low, high)
        theta = np.log(ratio)[:, None]
        value = fun(cells_all * ns, theta)
        conv = np.ones(C, dtype=bool)
        best_rows = np.arange(C)
        theta_best = theta
        iters = 0
    else:
        theta, value, conv, iters = batch_minimize(fun, theta0, groups=row_cells,
                                                   keep_after=KEEP_AFTER.get(method))
        vals = value.reshape(C, ns)
        pick = np.argmin(np.where(np.isfinite(vals), vals, np.inf), axis=1)
        best_rows = cells_all * ns + pick
        theta_best = theta[best_rows]
        value = value[best_rows]
        conv = conv[best_rows]
    H = par.data_matrices(cells_all, theta_best)
    edge = par.edge(cells_all, theta_best)
    logdetA = np.sum(np.log(np.abs(np.diagonal(prep.A, axis1=1, axis2=2))), axis=1)
    if method == "mlcv":
        crit_x = -value - logdetA         # log-likelihood in data units
    else:
        crit_x = value * np.exp(-logdetA)
    out = []
    for c in range(C):
        dt = details[c]
        dt["iterations"] = int(iters)
        dt["relative_eigenvalues"] = par.relative_eigenvalues(cells_all[c:c + 1], theta_best[c:c + 1])[0].tolist()
        out.append(dict(H=H[c], criterion=float(crit_x[c]), converged=bool(conv[c]) or bool(edge[c]),
                        at_edge=bool(edge[c]), details=dt))
    return out
