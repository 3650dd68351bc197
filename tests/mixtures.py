"""Normal-mixture targets with the exact MISE and ISE of the Gaussian-kernel estimate.

MISE(H) = n^{-1}(4 pi)^{-d/2}|H|^{-1/2} + w'[(1 - 1/n) Omega_2 - 2 Omega_1 + Omega_0] w,
(Omega_a)_{ll'} = phi_{aH + Sigma_l + Sigma_l'}(mu_l - mu_l')      (Wand & Jones 1993, JASA 88;
Marron & Wand 1992 for d = 1).  The ISE of one sample follows from phi_A * phi_B = phi_{A+B}.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import optimize


class Mixture:
    def __init__(self, weights, means, covs):
        self.w = np.asarray(weights, dtype=float)
        self.mu = np.atleast_2d(np.asarray(means, dtype=float))
        covs = np.asarray(covs, dtype=float)
        if covs.ndim == 1:                     # univariate: variances
            covs = covs[:, None, None]
        self.S = covs
        self.d = self.mu.shape[1]

    def sample(self, n, rng):
        comp = rng.choice(len(self.w), size=n, p=self.w)
        z = rng.standard_normal((n, self.d))
        L = np.linalg.cholesky(self.S)
        return self.mu[comp] + np.einsum("nij,nj->ni", L[comp], z)


def _phi(x, S):
    """phi_S(x) for x (..., d), S (..., d, d) broadcast."""
    d = S.shape[-1]
    Sinv = np.linalg.inv(S)
    q = np.einsum("...i,...ij,...j->...", x, Sinv, x)
    return np.exp(-0.5 * q) / np.sqrt((2 * math.pi) ** d * np.linalg.det(S))


def _omega(m, H, a):
    diff = m.mu[:, None, :] - m.mu[None, :, :]
    S = a * H[None, None] + m.S[:, None] + m.S[None, :]
    return _phi(diff, S)


def mise(m: Mixture, H, n: int) -> float:
    H = np.atleast_2d(H)
    d = m.d
    var = (4 * math.pi) ** (-d / 2) / math.sqrt(np.linalg.det(H)) / n
    bias = m.w @ ((1 - 1 / n) * _omega(m, H, 2) - 2 * _omega(m, H, 1) + _omega(m, H, 0)) @ m.w
    return float(var + bias)


def ise(m: Mixture, x, H) -> float:
    """Exact ISE of the Gaussian-kernel estimate with matrix H on sample x."""
    x = np.asarray(x, dtype=float).reshape(len(x), -1)
    H = np.atleast_2d(H)
    n, d = x.shape
    L = np.linalg.cholesky(2 * H)
    y = np.linalg.solve(L, x.T).T
    y2 = np.einsum("ij,ij->i", y, y)
    total = 0.0
    for a in range(0, n, 2000):
        q = y2[a:a + 2000, None] + y2[None, :] - 2 * y[a:a + 2000] @ y.T
        total += np.exp(-0.5 * np.maximum(q, 0)).sum()
    ff = total / n ** 2 / np.sqrt((2 * math.pi) ** d * np.linalg.det(2 * H))
    cross = sum(m.w[l] * _phi(x - m.mu[l], H + m.S[l]).mean() for l in range(len(m.w)))
    f2 = m.w @ _omega(m, H, 0) @ m.w
    return float(ff - 2 * cross + f2)


def mise_optimal(m: Mixture, n: int, parametrization="full", start=None):
    """H minimising the exact MISE (log-Cholesky / log-diagonal search)."""
    d = m.d
    mean = m.w @ m.mu
    cov = sum(w * (S + np.outer(mu - mean, mu - mean)) for w, mu, S in zip(m.w, m.mu, m.S))
    H0 = (4 / (d + 2)) ** (2 / (d + 4)) * n ** (-2 / (d + 4)) * cov if start is None else start
    tril = np.tril_indices(d, -1)
    if parametrization == "full":
        L0 = np.linalg.cholesky(H0)
        th0 = np.concatenate([np.log(np.diag(L0)), L0[tril]])

        def to_H(th):
            L = np.zeros((d, d))
            L[np.diag_indices(d)] = np.exp(th[:d])
            L[tril] = th[d:]
            return L @ L.T
    else:
        th0 = np.log(np.diag(H0))

        def to_H(th):
            return np.diag(np.exp(th))
    best = None
    for f in (0.3, 1.0):                      # two starts: multimodal targets want less smoothing
        th = th0.copy()
        th[:d] += 0.5 * math.log(f) if parametrization == "full" else math.log(f)
        r = optimize.minimize(lambda t: math.log(mise(m, to_H(t), n)), th, method="Nelder-Mead",
                              options=dict(xatol=1e-8, fatol=1e-12, maxiter=4000))
        if best is None or r.fun < best.fun:
            best = r
    H = to_H(best.x)
    return H, mise(m, H, n)


# Marron & Wand (1992), Ann. Statist. 20, Table 1 (N(mean, sd^2) components)
MARRON_WAND = {
    1: Mixture([1.0], [[0.0]], [1.0]),
    2: Mixture([0.2, 0.2, 0.6], [[0.0], [0.5], [13 / 12]], [1.0, (2 / 3) ** 2, (5 / 9) ** 2]),
    6: Mixture([0.5, 0.5], [[-1.0], [1.0]], [(2 / 3) ** 2, (2 / 3) ** 2]),
    8: Mixture([0.75, 0.25], [[0.0], [1.5]], [1.0, (1 / 3) ** 2]),
}

# Wand & Jones (1993), JASA 88, bivariate set (as transcribed in the shared notes)
_C7 = [[4 / 9, 4 / 15], [4 / 15, 4 / 9]]
WAND_JONES = {
    1: Mixture([1.0], [[0, 0]], [np.diag([0.25, 1.0])]),
    2: Mixture([1.0], [[0, 0]], [[[1, 0.7], [0.7, 1]]]),
    5: Mixture([0.5, 0.5], [[-1, 0], [1, 0]], [np.eye(2) * 4 / 9, np.eye(2) * 4 / 9]),
    7: Mixture([0.5, 0.5], [[-1, 1], [1, -1]], [_C7, _C7]),
}
