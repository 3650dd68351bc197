"""Chen's asymmetric boundary kernels: beta kernels on an interval, gamma kernels on a half-line.

They are not convolutions (the kernel's shape changes with the evaluation
point), so no binned engine serves them: they are summed directly, chunk by
chunk.  A cell with them is fitted one at a time by the batch door.

References
----------
Chen, S. X. (1999). Beta kernel estimators for density functions.
Computational Statistics & Data Analysis 31, 131-145.
Chen, S. X. (2000). Probability density function estimation using gamma
kernels. Annals of the Institute of Statistical Mathematics 52, 471-480.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import special

from .. import engines as _engines
from ..errors import InputError
from .methods import _Base, _envelope_sample, _panels, bounded_axes


# ---------------------------------------------------------------------------
# asymmetric kernels (Chen 1999, 2000)
# ---------------------------------------------------------------------------

class _Asymmetric(_Base):
    """Product of asymmetric kernels on bounded axes and the univariate kernel on
    the others; needs a diagonal H (product form only)."""

    sample_note = ("rejection from the reflection estimate; envelope estimated from pilot draws "
                   "(approximate where the envelope is exceeded)")
    alternative = "reflect"

    def __init__(self, *args):
        super().__init__(*args)
        H = self.bw.matrix
        off = H - np.diag(np.diag(H))
        if self.d > 1 and np.abs(off).max() > 1e-12 * np.abs(H).max():
            raise InputError(
                f"boundary={self.name!r} is a product of one-dimensional kernels and cannot honour a "
                "correlated (full) bandwidth matrix: use parametrization='diagonal', or "
                f"boundary='{self.alternative}', which handles a correlated H")
        if self.kernel.is_radial:
            raise InputError(f"boundary={self.name!r} is available in the product form only: use "
                             f"form='product' or boundary='{self.alternative}'")
        self.h = np.sqrt(np.diag(H))
        self.B = bounded_axes(self.box)
        self.b = {j: self._smoothing(j) for j in self.B}
        self.attrs.update({f"{self.name}_b_{self.names[j]}": float(v) for j, v in self.b.items()})
        self.constant = 1.0
        self.constant = float(self.w @ self._kernel_masses())
        self.attrs["boundary_mass_before_normalisation"] = self.constant

    def _factor(self, j, x, X):
        """(len(x), len(X)) matrix of the axis-j kernel at evaluation x for data X."""
        if j in self.b:
            return self._asym(j, x[:, None], X[None, :])
        h = self.h[j]
        return self.kernel.univariate.unit((x[:, None] - X[None, :]) / h) / h

    # True while the kernel masses are integrated in the kernel's own coordinate
    # (unit interval for beta, offset from the bound for gamma) rather than in x
    _native = False

    def _kernel_masses(self):
        self._native = True
        try:
            return self._native_kernel_masses()
        finally:
            self._native = False

    def _native_kernel_masses(self):
        out = np.ones(self.data.shape[0])
        for j in self.B:
            a, b = self._range(j)
            x, q = _panels(a, b, 1500)
            X = self.data[:, j]
            mass = np.zeros(X.size)
            step = max(1, (1 << 21) // x.size)
            for s in range(0, X.size, step):
                mass[s:s + step] = q @ self._asym(j, x[:, None], X[None, s:s + step])
            out *= mass
        return out

    def density(self, pts, log=False):
        n = self.data.shape[0]
        out = np.empty(pts.shape[0])
        step = max(1, (1 << 21) // max(n, 1))
        for s in range(0, pts.shape[0], step):
            p = pts[s:s + step]
            m = np.ones((p.shape[0], n))
            for j in range(self.d):
                m *= self._factor(j, p[:, j], self.data[:, j])
            out[s:s + step] = m @ self.w
        out /= self.constant
        choice = _engines.EngineChoice("direct", f"{self.name} kernels are not convolutions: direct sums")
        if log:
            with np.errstate(divide="ignore"):
                return np.log(out), choice
        return out, choice

    def grid(self, axes):
        mesh = np.meshgrid(*axes, indexing="ij")
        pts = np.column_stack([g.ravel() for g in mesh])
        v, choice = self.density(pts)
        return v.reshape(mesh[0].shape), choice

    def grid_pieces(self, axes):
        # not a convolution: no kernel-sum pieces, summed directly per model
        return None

    def sample(self, n, rng):
        return _envelope_sample(self, n, rng)


class BetaKernel(_Asymmetric):
    """Chen (1999) beta kernel estimator (his first estimator) on two-sided bounds:
    with ``z = (x - lo)/(hi - lo)``, the kernel at z for a datum ``Z_i`` is the
    Beta(z/b + 1, (1 - z)/b + 1) density at ``Z_i``, divided by ``hi - lo``.

    Smoothing parameter: the Beta kernel at z has variance ~ b z(1 - z); b is
    chosen so that its average over the sample equals the rescaled bandwidth
    variance, ``b = (H_jj/(hi - lo)^2) / mean(Z(1 - Z))`` (b ~ h^2, the rate of
    Chen 1999).  The estimate is divided by its total mass (1 + O(b) before).
    """

    name = "beta"
    alternative = "reflect"

    def _smoothing(self, j):
        lo, hi = self.box[j]
        z = (self.data[:, j] - lo) / (hi - lo)
        spread = float(self.w @ (z * (1.0 - z)))
        return (self.h[j] / (hi - lo)) ** 2 / max(spread, 1e-6)

    def _range(self, j):
        return (0.0, 1.0)

    def _asym(self, j, x, X):
        lo, hi = self.box[j]
        width = hi - lo
        b = self.b[j]
        # the mass integral passes x already on [0, 1]; evaluation passes data units
        z = x if self._native else (x - lo) / width
        Z = (X - lo) / width
        a1 = z / b + 1.0
        a2 = (1.0 - z) / b + 1.0
        with np.errstate(divide="ignore", invalid="ignore"):
            logk = special.xlogy(a1 - 1.0, Z) + special.xlog1py(a2 - 1.0, -Z) - special.betaln(a1, a2)
        out = np.exp(logk)
        out = np.where((z >= 0) & (z <= 1), out, 0.0)
        return out if self._native else out / width



class GammaKernel(_Asymmetric):
    """Chen (2000) modified gamma kernel estimator on a one-sided bound.

    With ``s = x - lo`` (or ``hi - x``), the kernel at s for a datum ``S_i`` is
    the Gamma(shape rho_b(s), scale b) density at ``S_i`` with
    ``rho_b(s) = s/b`` for ``s >= 2b`` and ``(s/(2b))^2 + 1`` for ``s < 2b``
    (continuous: both equal 2 at s = 2b).  Smoothing parameter: the kernel's
    variance is about ``b s + b^2``; b solves ``b mean(S) + b^2 = H_jj``.
    The estimate is divided by its total mass (1 + O(b) before).
    """

    name = "gamma"
    alternative = "reflect"

    def _smoothing(self, j):
        s = self._offset(j, self.data[:, j])
        m = float(self.w @ s)
        h2 = self.h[j] ** 2
        return 0.5 * (-m + math.sqrt(m * m + 4.0 * h2))

    def _offset(self, j, x):
        lo, hi = self.box[j]
        return x - lo if math.isfinite(lo) else hi - x

    def _range(self, j):
        top = float(self._offset(j, self.data[:, j]).max())
        b = self.b[j]
        return (0.0, top + 12.0 * math.sqrt(b * top + b * b) + 40.0 * b)


    def _asym(self, j, x, X):
        b = self.b[j]
        s = x if self._native else self._offset(j, x)
        S = self._offset(j, X)
        rho = modified_gamma_shape(s, b)
        with np.errstate(divide="ignore", invalid="ignore"):
            logk = special.xlogy(rho - 1.0, S) - S / b - rho * math.log(b) - special.gammaln(rho)
        return np.where(s >= 0, np.exp(logk), 0.0)


def modified_gamma_shape(s, b):
    """rho_b(s) of Chen (2000): s/b for s >= 2b, (s/(2b))^2 + 1 below.

    Parameters
    ----------
    s : array_like
        Distances from the bound.
    b : float
        Smoothing parameter.

    Returns
    -------
    ndarray
    """
    s = np.asarray(s, dtype=float)
    return np.where(s >= 2.0 * b, s / b, (s / (2.0 * b)) ** 2 + 1.0)
