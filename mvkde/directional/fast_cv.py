"""Fast cross-validation of directional smoothing: a circle on a periodic lattice, a circle with one linear
variable on a 2-D lattice, the sphere with a KD-tree.

Circle (von Mises kernel): :func:`circular_cv` bins the angles linearly on a
fine periodic lattice; LSCV is then an FFT sum (Parseval: |FFT(counts)|^2
times the kernel's Fourier coefficients I_k(nu)/I_0(nu), self pairs removed
exactly) and MLCV needs the leave-one-out densities at the data, read from the
binned density on the lattice minus each point's own term.

Circle x line (von Mises x Gaussian product kernel): :func:`mixed_cv` bins
(angle, value) bilinearly on a lattice periodic along the angle and zero-padded
along the line; the same two criteria by 2-D FFTs, jointly over (nu, h).

Sphere (von Mises-Fisher kernel): :func:`sphere_likelihood_cv` is likelihood
cross-validation (Hall, Watson and Cabrera 1987, Biometrika 74, 751-762) with
neighbours found by a KD-tree on unit vectors and cut off where the kernel is
below ``1e-12`` of its peak; a point with no neighbour inside the cut-off gets
its nearest neighbour's term.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import optimize, special

from . import cv as _cv
from . import kernels as _dir
from .selectors import (TWO_PI, _linear_bins, _normalised, bessel_ratio, effective_size, normal_concentration,
                        von_mises_kernel_at)


# ---------------------------------------------------------------------------
# cross-validation on the periodic lattice
# ---------------------------------------------------------------------------

@dataclass
class ConcentrationChoice:
    """A concentration chosen by cross-validation (on the circle's lattice or the sphere's KD-tree).

    Parameters
    ----------
    kappa, criterion : float
    converged, at_edge : bool
    evaluations : int
    """

    kappa: float
    criterion: float
    converged: bool
    at_edge: bool
    evaluations: int


class _PeriodicLattice:
    """Binned sample on lattices of several sizes (cached), with what the criteria need."""

    def __init__(self, theta, w, oversampling):
        self.theta = np.mod(np.asarray(theta, dtype=float), TWO_PI)
        self.w = w
        self.a = w / (1.0 - w)                  # leave-one-out renormalisation
        self.oversampling = oversampling
        self.cache = {}
        # circular nearest neighbour of every point (the fallback of a vanishing leave-one-out density)
        order = np.argsort(self.theta)
        t = self.theta[order]
        nxt = np.roll(np.arange(t.size), -1)
        prv = np.roll(np.arange(t.size), 1)
        dn = np.mod(t[nxt] - t, TWO_PI)
        dp = np.mod(t - t[prv], TWO_PI)
        use_next = (dn < dp) | ((dn == dp) & (w[order][nxt] >= w[order][prv]))
        nn_sorted = np.where(use_next, nxt, prv)
        self.nn_dist = np.empty(t.size)
        self.nn_w = np.empty(t.size)
        self.nn_dist[order] = np.where(use_next, dn, dp)
        self.nn_w[order] = w[order][nn_sorted]

    def size_for(self, nu):
        target = self.oversampling * TWO_PI * math.sqrt(max(nu, 1.0))
        return int(max(256, 2 ** math.ceil(math.log2(target))))

    def binned(self, L):
        if L not in self.cache:
            c_w, lower, frac = _linear_bins(self.theta, self.w, L)
            c_a, _, _ = _linear_bins(self.theta, self.a, L)
            self.cache[L] = (np.fft.rfft(c_w), np.fft.rfft(c_a), lower, frac)
        return self.cache[L]

    def _spectrum(self, nu, L):
        kmax = min(L // 2, int(9.0 * math.sqrt(nu) + 30))
        k = np.arange(kmax + 1)
        rho = bessel_ratio(k, nu)
        double = np.full(kmax + 1, 2.0)         # k and -k, except k = 0 (and the Nyquist term)
        double[0] = 1.0
        if kmax == L // 2:
            double[-1] = 1.0
        return k, rho, double

    def self_term(self, nu, L, frac):
        """The binned self-pair of each point: ((1-f)^2 + f^2) K(0) + 2 f (1-f) K(delta)."""
        k0 = von_mises_kernel_at(0.0, nu)
        kd = von_mises_kernel_at(TWO_PI / L, nu)
        return ((1 - frac) ** 2 + frac ** 2) * k0 + 2 * frac * (1 - frac) * kd

    def lscv(self, nu):
        L = self.size_for(nu)
        W, A, _, frac = self.binned(L)
        k, rho, double = self._spectrum(nu, L)
        Wk, Ak = W[k], A[k]
        square = float(np.sum(double * rho * rho * np.abs(Wk) ** 2)) / TWO_PI
        pairs = float(np.sum(double * rho * np.real(np.conj(Ak) * Wk))) / TWO_PI
        pairs -= float(np.sum(self.a * self.w * self.self_term(nu, L, frac)))
        return square - 2.0 * pairs

    def leave_one_out(self, nu):
        """log f_{-i}(theta_i) from the lattice density interpolated at the data, self term removed."""
        L = self.size_for(nu)
        W, _, lower, frac = self.binned(L)
        k, rho, _ = self._spectrum(nu, L)
        spec = np.zeros(L // 2 + 1, dtype=complex)
        spec[k] = W[k] * rho
        g = np.fft.irfft(spec, L) * (L / TWO_PI)
        at = (1 - frac) * g[lower] + frac * g[(lower + 1) % L]
        loo = (at - self.w * self.self_term(nu, L, frac)) / (1.0 - self.w)
        log_nn = (np.log(self.nn_w) + nu * (np.cos(self.nn_dist) - 1.0)
                  - math.log(TWO_PI * special.i0e(nu)) - np.log1p(-self.w))
        # below 1e-9 of the peak the binned value is round-off: the nearest neighbour's term instead
        floor = 1e-9 * float(g.max())
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(loo > floor, np.log(np.maximum(loo, floor)), np.maximum(log_nn, np.log(np.maximum(loo, 1e-300))))

    def mlcv(self, nu):
        return -float(np.sum(self.w * self.leave_one_out(nu)))


def _bracket_then_brent(fun, start, lo, hi, step=0.7, xatol=1e-3):
    """Minimise fun(log nu) on [lo, hi]: walk from ``start`` in steps of ``step`` until the
    criterion rises on both sides (or an end is reached), then bounded Brent on the bracket."""
    cache = {}

    def f(v):
        v = float(min(max(v, lo), hi))
        if v not in cache:
            cache[v] = fun(v)
        return cache[v]

    x = min(max(start, lo), hi)
    fx = f(x)
    # which way is down
    right = min(x + step, hi)
    left = max(x - step, lo)
    direction = 1.0 if f(right) < fx else (-1.0 if f(left) < fx else 0.0)
    if direction:
        while True:
            nxt = min(max(x + direction * step, lo), hi)
            if nxt == x or f(nxt) >= fx:
                break
            x, fx = nxt, f(nxt)
    a, b = max(x - step, lo), min(x + step, hi)
    res = optimize.minimize_scalar(f, bounds=(a, b), method="bounded", options={"xatol": xatol})
    best = min(cache, key=cache.get)
    at_edge = best - lo < 1e-2 or hi - best < 1e-2
    return best, cache[best], bool(res.success), at_edge, len(cache)


def circular_cv(criterion, theta, weights=None, *, oversampling=16.0, search=7.0):
    """Least-squares (``"lscv"``) or likelihood (``"mlcv"``) cross-validation of the von
    Mises kernel's concentration for one circular variable, on a binned periodic lattice.

    LSCV(nu) = int f_hat^2 - 2 sum_i w_i f_{-i}(t_i) with, by Parseval,

        int f_hat^2 = (1/2 pi) sum_k rho_k^2 |W_k|^2,
        sum_i w_i f_{-i}(t_i) = (1/2 pi) sum_k rho_k Re(conj(A_k) W_k) - sum_i a_i w_i s_i,

    rho_k = I_k(nu)/I0(nu), W and A the discrete Fourier transforms of the
    weights ``w`` and of ``a = w / (1 - w)`` linearly binned on a periodic lattice
    of L nodes (L a power of two with at least ``oversampling`` nodes per kernel
    standard deviation 1/sqrt(nu)), ``s_i`` the binned self-pair of point i
    removed exactly.  MLCV maximises ``sum_i w_i log f_{-i}(t_i)``, the lattice
    density (one inverse FFT) interpolated linearly at the data minus the self
    term; where that leaves less than 1e-9 of the peak (round-off) the nearest
    neighbour's exact term is used.  Binning error falls as (lattice step)^2.

    The search runs over log nu within ``search`` of the Garcia-Portugues rule:
    steps of 0.7 downhill from the rule, then bounded Brent.  Costs O(n + L log L)
    per evaluation.

    Parameters
    ----------
    criterion : {'lscv', 'mlcv'}
    theta : array_like of float
        Angles in radians.
    weights : array_like of float, optional
        Sample weights (normalised here); equal when None.
    oversampling : float
        Lattice nodes per kernel standard deviation.
    search : float
        Half-width of the search in log nu.

    Returns
    -------
    ConcentrationChoice
    """
    theta = np.asarray(theta, dtype=float).ravel()
    w = _normalised(weights, theta.size)
    lat = _PeriodicLattice(theta, w, oversampling)
    nu0 = max(normal_concentration(theta, None if weights is None else w), 1e-2)
    lo = math.log(nu0) - search
    hi = min(math.log(nu0) + search, 2.0 * math.log(2 ** 18 / (oversampling * TWO_PI)))
    crit = lat.lscv if criterion == "lscv" else lat.mlcv
    x, fx, ok, at_edge, evals = _bracket_then_brent(lambda v: crit(math.exp(v)), math.log(nu0), lo, hi)
    return ConcentrationChoice(math.exp(x), fx, ok, at_edge, evals)


# ---------------------------------------------------------------------------
# one circular x one linear variable on a 2-D lattice (periodic x zero-padded)
# ---------------------------------------------------------------------------

#: kernel reach along the linear axis, in bandwidths, kept free of the FFT's wrap-around
_LIN_REACH = 9.0
#: largest lattice (nodes) of the mixed criteria: two cached spectra of 2^22 complex values are 128 MB
_MAX_NODES = 2 ** 22
#: most kernel terms summed directly per likelihood evaluation for points the lattice cannot resolve
_EXACT_BUDGET = 20_000_000


class _MixedLattice:
    """Weights binned bilinearly on lattices of (angle nodes M, linear step level), cached.

    The angle axis has M nodes over 2 pi (periodic); the linear axis has step
    ``delta = base * 2**-level`` and is padded by ``_LIN_REACH`` times the largest
    bandwidth that uses this level, so the circular convolution of the FFT equals
    the linear one on the data's range.
    """

    def __init__(self, theta, y, w, os_angle, os_lin):
        self.theta = np.mod(np.asarray(theta, dtype=float), TWO_PI)
        self.y, self.w = np.asarray(y, dtype=float), w
        self.a = w / (1.0 - w)
        self.os_angle, self.os_lin = os_angle, os_lin
        self.span = float(np.ptp(self.y)) or 1.0
        self.cache = {}

    def _nodes(self, level):
        delta = self.span * 2.0 ** -level
        return int(2 ** math.ceil(math.log2((self.span + 2.0 * _LIN_REACH * 2.0 * self.os_lin * delta) / delta + 2.0)))

    def lattice(self, nu, h):
        M = int(max(64, 2 ** math.ceil(math.log2(self.os_angle * TWO_PI * math.sqrt(max(nu, 1.0))))))
        level = math.ceil(math.log2(self.os_lin * self.span / h))      # delta <= h / os_lin
        # far corners of the search (large nu with small h): coarser linear steps, at most _MAX_NODES nodes
        while level > 0 and M * self._nodes(level) > _MAX_NODES:
            level -= 1
        key = (M, level)
        if key not in self.cache:
            if len(self.cache) >= 4:                                   # the few most recent lattices only
                self.cache.pop(next(iter(self.cache)))
            delta = self.span * 2.0 ** -level
            pad = _LIN_REACH * 2.0 * self.os_lin * delta              # h < 2 os_lin delta on this level
            N = self._nodes(level)
            pos_y = (self.y - (float(self.y.min()) - pad)) / delta
            ly = np.floor(pos_y).astype(np.int64)
            gy = pos_y - ly
            pos_t = self.theta * (M / TWO_PI)
            lt = np.floor(pos_t).astype(np.int64)
            gt = pos_t - lt
            lt %= M
            corners = [(ly * M + lt, (1 - gy) * (1 - gt)), (ly * M + (lt + 1) % M, (1 - gy) * gt),
                       ((ly + 1) * M + lt, gy * (1 - gt)), ((ly + 1) * M + (lt + 1) % M, gy * gt)]
            specs = []
            for v in (self.w, self.a):
                c = np.zeros(N * M)
                for idx, b in corners:
                    c += np.bincount(idx, weights=v * b, minlength=N * M)
                specs.append(np.fft.rfft2(c.reshape(N, M)))
            freq = np.fft.fftfreq(N, d=delta)
            self.cache[key] = (M, N, delta, specs[0], specs[1], corners, gt, gy, freq)
        return self.cache[key]

    @staticmethod
    def _angle_spectrum(nu, M):
        kmax = min(M // 2, int(9.0 * math.sqrt(nu) + 30))
        k = np.arange(kmax + 1)
        double = np.full(kmax + 1, 2.0)          # k and -k, except k = 0 (and the Nyquist term)
        double[0] = 1.0
        if kmax == M // 2:
            double[-1] = 1.0
        return k, bessel_ratio(k, nu), double

    def self_term(self, nu, h, M, delta, gt, gy):
        """Bilinearly binned self-pair of each point: S_angle(gt) S_lin(gy), S(g) = ((1-g)^2 + g^2) K(0) + 2 g (1-g) K(step)."""
        s_t = ((1 - gt) ** 2 + gt ** 2) * von_mises_kernel_at(0.0, nu) \
            + 2 * gt * (1 - gt) * von_mises_kernel_at(TWO_PI / M, nu)
        phi0 = 1.0 / (math.sqrt(TWO_PI) * h)
        s_y = ((1 - gy) ** 2 + gy ** 2) * phi0 + 2 * gy * (1 - gy) * phi0 * math.exp(-0.5 * (delta / h) ** 2)
        return s_t * s_y

    def lscv(self, nu, h):
        M, N, delta, W, A, _, gt, gy, freq = self.lattice(nu, h)
        k, rho, double = self._angle_spectrum(nu, M)
        gauss = np.exp(-0.5 * (TWO_PI * freq * h) ** 2)[:, None]
        Wk, Ak = W[:, k], A[:, k]
        norm = 1.0 / (TWO_PI * N * delta)
        square = norm * float(np.sum(double * rho ** 2 * gauss ** 2 * np.abs(Wk) ** 2))
        pairs = norm * float(np.sum(double * rho * gauss * np.real(np.conj(Ak) * Wk)))
        pairs -= float(np.sum(self.a * self.w * self.self_term(nu, h, M, delta, gt, gy)))
        return square - 2.0 * pairs

    def _exact_log_loo(self, nu, h, rows):
        """log f_{-i} by direct sums for the points ``rows`` (where the binned value is unreliable)."""
        t, y, w = self.theta, self.y, self.w
        lk = (nu * (np.cos(t[rows, None] - t[None, :]) - 1.0) - 0.5 * ((y[rows, None] - y[None, :]) / h) ** 2
              + np.log(w)[None, :])
        lk[np.arange(rows.size), rows] = -np.inf
        top = lk.max(axis=1)
        out = np.log(np.exp(lk - top[:, None]).sum(axis=1)) + top
        return out - math.log(TWO_PI * special.i0e(nu) * math.sqrt(TWO_PI) * h) - np.log1p(-w[rows])

    def mlcv(self, nu, h, floor=1e-4):
        M, N, delta, W, _, corners, gt, gy, freq = self.lattice(nu, h)
        k, rho, _ = self._angle_spectrum(nu, M)
        spec = np.zeros((N, M // 2 + 1), dtype=complex)
        spec[:, k] = W[:, k] * rho * np.exp(-0.5 * (TWO_PI * freq * h) ** 2)[:, None]
        g = (np.fft.irfft2(spec, s=(N, M)) * (M / (TWO_PI * delta))).ravel()
        at = sum(b * g[idx] for idx, b in corners)
        loo = (at - self.w * self.self_term(nu, h, M, delta, gt, gy)) / (1.0 - self.w)
        # far from the others (below ``floor`` of the peak) the binned value loses accuracy: direct sums there,
        # smallest first, up to _EXACT_BUDGET kernel terms (met only in far corners of the search)
        low = np.flatnonzero(loo < floor * float(g.max()))
        low = low[np.argsort(loo[low])][: max(1, _EXACT_BUDGET // self.w.size)]
        logs = np.log(np.maximum(loo, 1e-300))
        step = max(1, 2_000_000 // self.w.size)
        for start in range(0, low.size, step):
            rows = low[start:start + step]
            logs[rows] = self._exact_log_loo(nu, h, rows)
        return -float(np.sum(self.w * logs))


def mixed_cv(criterion, theta, lin, weights=None, *, os_angle=12.0, os_lin=12.0):
    """Joint binned cross-validation of the von Mises concentration nu of one circular
    variable and the Gaussian bandwidth h of one linear variable (product kernel
    VM_nu(angle) phi_h(lin), density per radian x per unit of the linear variable).

    The weights are binned bilinearly on a lattice of M angle nodes over 2 pi
    (periodic; at least ``os_angle`` nodes per 1/sqrt(nu)) by linear steps
    delta <= h / ``os_lin``, zero-padded by 9 bandwidths beyond the data so the
    FFT's wrap-around never reaches them.  The kernel's discrete Fourier transform
    on the lattice is (M / 2 pi)(1 / delta) rho_k exp(-(2 pi f h)^2 / 2), with
    rho_k = I_k(nu)/I_0(nu) the von Mises Fourier coefficients and the Gaussian's
    closed-form transform at the lattice frequencies f.  Then, as for
    :func:`circular_cv` and by Parseval,

        int f_hat^2 = (1 / (2 pi N delta)) sum_{k,f} rho_k^2 exp(-(2 pi f h)^2) |W_{k,f}|^2,
        sum_i w_i f_{-i}(X_i) = (1 / (2 pi N delta)) sum_{k,f} rho_k exp(-(2 pi f h)^2 / 2)
                                Re(conj(A_{k,f}) W_{k,f}) - sum_i a_i w_i s_i,

    W, A the 2-D FFTs of the binned weights and of a = w / (1 - w), s_i the
    binned self-pair (a product of the angle's and the linear axis's), and
    LSCV = int f_hat^2 - 2 sum_i w_i f_{-i}(X_i).  MLCV minimises
    -sum_i w_i log f_{-i}(X_i) with f_{-i}(X_i) = (f_hat(X_i) - w_i s_i) / (1 - w_i),
    f_hat on the lattice by one inverse FFT, read bilinearly at the data; points
    where that is below 1e-4 of the lattice peak get direct sums (all of them for
    n <= 4,470; beyond 2e7 kernel terms the lowest first, the rest keep the binned
    value -- only where nearly every point is isolated, far from any optimum).
    The lattice is capped at 2^22 nodes by coarser linear steps (again only in far
    corners: large nu with small h).  These are the
    criteria of :func:`mvkde.directional.cv.cross_validate` (Hall, Watson and
    Cabrera 1987, Biometrika 74, 751-762) with binning error of order (step)^2.

    The search is Nelder-Mead over (log nu, log h) from the same rules of thumb and
    within the same limits as the exact version (log nu within 7 of the Taylor rule,
    log h within 4 of the normal-scale rule); each evaluation costs O(n + MN log MN).

    Parameters
    ----------
    criterion : {'lscv', 'mlcv'}
    theta : array_like, shape (n,)
        Angles in radians.
    lin : array_like, shape (n,)
        The linear variable.
    weights : array_like, shape (n,), optional
        Sample weights (normalised here); equal when None.
    os_angle, os_lin : float
        Lattice nodes per kernel standard deviation along each axis.

    Returns
    -------
    CVResult
        As :func:`mvkde.directional.cv.cross_validate`: ``kappas`` (one), ``H_lin`` = [[h^2]].
    """
    theta = np.asarray(theta, dtype=float).ravel()
    y = np.asarray(lin, dtype=float).ravel()
    w = _normalised(weights, theta.size)
    n_eff = 1.0 / float(np.sum(w * w))
    lat = _MixedLattice(theta, y, w, os_angle, os_lin)
    k0 = max(_dir.taylor_rule_from_kappa(_dir.von_mises_mle(theta, w)[1], n_eff), 0.05)
    h0 = math.sqrt(float(_cv._normal_scale_lin(y[:, None], w, n_eff)[0, 0]))
    start = np.array([math.log(k0), math.log(h0)])
    bounds = [(start[0] - 7.0, start[0] + 7.0), (start[1] - 4.0, start[1] + 4.0)]
    crit = lat.lscv if criterion == "lscv" else lat.mlcv
    evaluations = [0]

    def objective(p):
        evaluations[0] += 1
        return crit(math.exp(p[0]), math.exp(p[1]))

    simplex = np.vstack([start, start + [0.5, 0.0], start + [0.0, 0.5]])
    res = optimize.minimize(objective, start, method="Nelder-Mead", bounds=bounds,
                            options={"xatol": 1e-4, "fatol": 1e-10, "initial_simplex": simplex, "maxiter": 600})
    x = res.x
    at_edge = any(v - b[0] < 1e-2 or b[1] - v < 1e-2 for v, b in zip(x, bounds))
    return _cv.CVResult(np.array([math.exp(x[0])]), None, np.array([[math.exp(2.0 * x[1])]]), float(res.fun),
                        bool(res.success), at_edge, theta.size, evaluations[0])


# ---------------------------------------------------------------------------
# sphere: likelihood cross-validation with neighbours from a KD-tree
# ---------------------------------------------------------------------------

#: the kernel's cut-off: terms below this fraction of the peak are dropped
SPHERE_CUTOFF = 1e-12




class _SphereNeighbours:
    def __init__(self, units, w):
        from scipy.spatial import cKDTree

        self.units = np.asarray(units, dtype=float)
        self.w = w
        self.n = self.units.shape[0]
        self.tree = cKDTree(self.units)
        d, idx = self.tree.query(self.units, k=2)
        # nearest other point (a duplicate may be listed first instead of the point itself)
        own = idx[:, 0] == np.arange(self.n)
        self.nn = np.where(own, idx[:, 1], idx[:, 0])
        self.nn_dot = np.clip(np.einsum("ij,ij->i", self.units, self.units[self.nn]), -1.0, 1.0)
        self.pairs_radius = -1.0
        self.pairs = None

    def _pairs(self, radius):
        if radius > self.pairs_radius:
            ij = self.tree.query_pairs(radius, output_type="ndarray")
            dot = np.clip(np.einsum("ij,ij->i", self.units[ij[:, 0]], self.units[ij[:, 1]]), -1.0, 1.0)
            self.pairs, self.pairs_radius = (ij[:, 0], ij[:, 1], dot), radius
        i, j, dot = self.pairs
        if radius < self.pairs_radius:
            keep = dot >= 1.0 - 0.5 * radius * radius
            return i[keep], j[keep], dot[keep]
        return i, j, dot

    def loglik(self, kappa):
        """sum_i w_i log f_{-i}(u_i) with f_{-i} = sum_{j != i} w_j vMF_kappa(u_i'u_j) / (1 - w_i)."""
        reach = -math.log(SPHERE_CUTOFF) / kappa          # kappa (1 - cos) beyond which the kernel is dropped
        logc = float(_dir.log_vmf_kernel(kappa, 1.0))     # log of the kernel's peak
        if reach >= 2.0 or self.n <= 400:                 # the cut-off covers the sphere: dense, chunked
            sums = np.empty(self.n)
            step = max(1, 2_000_000 // self.n)
            for a in range(0, self.n, step):
                e = np.exp(kappa * (np.clip(self.units[a:a + step] @ self.units.T, -1, 1) - 1.0))
                e[np.arange(e.shape[0]), np.arange(a, a + e.shape[0])] = 0.0
                sums[a:a + step] = e @ self.w
        else:
            i, j, dot = self._pairs(math.sqrt(2.0 * reach))
            e = np.exp(kappa * (dot - 1.0))
            sums = np.bincount(i, weights=e * self.w[j], minlength=self.n)
            sums += np.bincount(j, weights=e * self.w[i], minlength=self.n)
        log_nn = np.log(self.w[self.nn]) + kappa * (self.nn_dot - 1.0)
        with np.errstate(divide="ignore"):
            logs = np.where(sums > 0, np.log(np.maximum(sums, 1e-300)), log_nn)
        return float(np.sum(self.w * (logs + logc - np.log1p(-self.w))))


#: locations above this many are subsampled (seeded) for the sphere's likelihood CV
SPHERE_MAX_N = 3000


def sphere_likelihood_cv(units, weights=None, *, search=7.0, max_n=SPHERE_MAX_N, seed=0):
    """Likelihood cross-validation of the vMF concentration for locations on S^2 (Hall,
    Watson and Cabrera 1987), maximising ``sum_i w_i log f_{-i}(u_i)``.

    Pairs are found with a KD-tree on the unit vectors within the chord where
    ``kappa (1 - cos) = log(1e12)`` (the kernel is 1e-12 of its peak there); the
    list found for the smallest kappa tried is filtered for larger ones.  A point
    with no neighbour inside the cut-off gets its nearest neighbour's exact term.
    Where the cut-off covers the whole sphere (kappa < 14) the sums are dense.
    The search runs over log kappa, starting from ``1 / (median squared chord to
    the nearest neighbour)`` (the scale of the local spacing), within ``search``
    of it: steps of 0.7 downhill, then bounded Brent to 1 % in kappa.  Each
    evaluation costs the number of pairs within the cut-off: about n for spread-out
    locations, but up to (cluster size)^2 / 2 when a cluster is narrower than the
    cut-off radius (7.4 kernel standard deviations).  Measured: two clusters of
    1,000 locations (kappa 400 and 100) took 0.55 s against 0.77 s for the dense
    sums -- the cut-off saves little when the chosen kernel is not much narrower
    than the clusters; a binned (lattice on the sphere) criterion would be needed
    for O(n) cost there.  Above ``max_n`` locations a seeded subsample of ``max_n``
    is cross-validated and kappa is carried to the whole sample by the AMISE rate
    on S^2, kappa ~ h^-2 ~ n^(2/(q+4)) = n^(1/3) for q = 2 (Hall, Watson and Cabrera
    1987; Garcia-Portugues 2013): the cost stays that of ``max_n`` locations.

    Parameters
    ----------
    units : array_like, shape (n, 3)
        Unit vectors.
    weights : array_like of float, optional
        Sample weights (normalised here); equal when None.
    search : float
        Half-width of the search in log kappa.
    max_n : int
        Largest sample cross-validated as it is; larger ones are subsampled.
    seed : int
        Seed of the subsample.

    Returns
    -------
    ConcentrationChoice
    """
    units = np.asarray(units, dtype=float)
    n = units.shape[0]
    if n > max_n:
        rng = np.random.default_rng(seed)
        p = None if weights is None else _normalised(weights, n)
        idx = np.sort(rng.choice(n, max_n, replace=False, p=p))
        r = sphere_likelihood_cv(units[idx], None, search=search, max_n=max_n, seed=seed)
        n_eff = float(n) if weights is None else effective_size(_normalised(weights, n))
        scale = (max(n_eff, max_n) / max_n) ** (1.0 / 3.0)
        return ConcentrationChoice(r.kappa * scale, r.criterion, r.converged, r.at_edge, r.evaluations)
    w = _normalised(weights, units.shape[0])
    nb = _SphereNeighbours(units, w)
    chord2 = np.maximum(2.0 * (1.0 - nb.nn_dot), 1e-12)
    start = math.log(max(1.0 / float(np.median(chord2)), 1e-2))
    lo, hi = start - search, start + search
    x, fx, ok, at_edge, evals = _bracket_then_brent(lambda v: -nb.loglik(math.exp(v)), start, lo, hi,
                                                    xatol=1e-2)
    return ConcentrationChoice(math.exp(x), fx, ok, at_edge, evals)
