"""Exact MISE of the von Mises-kernel density estimate for a von Mises mixture (test helper).

For a density f on the circle with Fourier coefficients phi_f(k) = int f(t) e^{-ikt} dt
and a kernel with coefficients phi_K(k), Parseval gives, for the estimate from n
independent draws,

    MISE = (1/2 pi) sum_k [ n^{-1} (1 - |phi_f(k)|^2) phi_K(k)^2 + |phi_f(k)|^2 (1 - phi_K(k))^2 ]

(the circular form of Wand & Jones 1995, eq. 2.11; REFERENCES.md section 7, re-derived:
E phi_fhat(k) = phi_K(k) phi_f(k), Var phi_fhat(k) = n^{-1} phi_K(k)^2 (1 - |phi_f(k)|^2)).
A von Mises component VM(mu, kappa) has phi(k) = e^{-ik mu} I_k(kappa)/I0(kappa), the von
Mises kernel of concentration nu has phi_K(k) = I_k(nu)/I0(nu) (the generating function
e^{x cos t} = sum_k I_k(x) e^{ikt}).  Exponentially scaled Bessel functions keep the
ratios finite for any concentration; the k = 0 term is zero and the k, -k terms are equal.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import optimize, special


def fourier(mixture, k):
    """phi_f(k) of a mixture given as [(weight, mean, kappa), ...]."""
    k = np.asarray(k, dtype=float)
    return sum(p * np.exp(-1j * k * m) * special.ive(k, kap) / special.i0e(kap) for p, m, kap in mixture)


def exact_mise(nu, mixture, n):
    """MISE of the von Mises kernel estimate (concentration nu) for the mixture, n draws."""
    kmax = int(10.0 * math.sqrt(max(nu, max(c[2] for c in mixture), 1.0)) + 40)
    k = np.arange(1, kmax + 1)
    phi2 = np.abs(fourier(mixture, k)) ** 2
    rho = special.ive(k, nu) / special.i0e(nu)
    return float(np.sum((1.0 - phi2) * rho ** 2 / n + phi2 * (1.0 - rho) ** 2) / math.pi)


def optimal_concentration(mixture, n):
    """(nu, MISE) minimising the exact MISE over log nu."""
    res = optimize.minimize_scalar(lambda v: exact_mise(math.exp(v), mixture, n), bounds=(-3.0, 12.0),
                                   method="bounded", options={"xatol": 1e-6})
    return math.exp(res.x), float(res.fun)


def sample(mixture, n, rng):
    """n draws (radians, in [0, 2 pi)) from the mixture."""
    comp = rng.choice(len(mixture), size=n, p=[c[0] for c in mixture])
    out = np.empty(n)
    for j, (_, m, kap) in enumerate(mixture):
        sel = comp == j
        out[sel] = rng.vonmises(m, kap, int(sel.sum()))
    return np.mod(out, 2 * math.pi)
