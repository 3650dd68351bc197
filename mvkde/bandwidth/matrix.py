"""The bandwidth matrix as an object: one place owns the Cholesky factor,
the log-determinant and whitening, so no caller inverts H by hand."""

from __future__ import annotations

import numpy as np
from scipy import linalg

from ..errors import BandwidthError


class BandwidthMatrix:
    """A symmetric positive definite d x d bandwidth matrix H.

    H is the covariance matrix of the scaled kernel (DESIGN.md contract).
    Whitening uses the lower Cholesky factor ``L`` (``H = L L'``): the
    whitened offset of ``x`` is ``z = L^{-1} x`` so that ``z`` has identity
    covariance under the scaled kernel.

    Build it with :meth:`from_matrix` (validates), :meth:`from_cholesky`
    or :meth:`from_diagonal`.

    Parameters
    ----------
    H, L : ndarray, shape (d, d)
        The matrix and its lower Cholesky factor, taken as they are (not checked).
    """

    __slots__ = ("_H", "_L", "_log_det")

    def __init__(self, H: np.ndarray, L: np.ndarray):
        self._H = H
        self._L = L
        self._log_det = 2.0 * float(np.sum(np.log(np.diag(L))))

    # -- factories -------------------------------------------------------
    @classmethod
    def from_matrix(cls, H, d: int | None = None, *, argument: str = "bandwidth") -> "BandwidthMatrix":
        """Validate ``H`` (shape, finiteness, symmetry, positive definiteness).

        Parameters
        ----------
        H : array_like, shape (d, d)
            A scalar is accepted when ``d`` is 1.  Symmetrised within a relative 1e-10.
        d : int, optional
            Number of variables the matrix must match.
        argument : str, optional
            Name of the argument, for the messages.

        Returns
        -------
        BandwidthMatrix

        Raises
        ------
        BandwidthError
            If ``H`` is not a finite, symmetric, positive definite d x d matrix.
        """
        try:
            H = np.array(H, dtype=float)
        except (TypeError, ValueError):
            raise BandwidthError(f"{argument} must be a selector name or a d x d matrix of numbers") from None
        if H.ndim == 0 and d == 1:
            H = H.reshape(1, 1)
        if H.ndim != 2 or H.shape[0] != H.shape[1]:
            raise BandwidthError(f"{argument} matrix must be square, got shape {H.shape}")
        if d is not None and H.shape[0] != d:
            raise BandwidthError(
                f"{argument} matrix is {H.shape[0]} x {H.shape[1]} but the data have {d} variables"
            )
        if not np.all(np.isfinite(H)):
            raise BandwidthError(f"{argument} matrix has non-finite entries")
        scale = max(float(np.max(np.abs(H))), np.finfo(float).tiny)
        if np.max(np.abs(H - H.T)) > 1e-10 * scale:
            raise BandwidthError(f"{argument} matrix is not symmetric: H[i, j] must equal H[j, i]")
        H = 0.5 * (H + H.T)
        try:
            L = linalg.cholesky(H, lower=True)
        except linalg.LinAlgError:
            eig = np.linalg.eigvalsh(H)
            raise BandwidthError(
                f"{argument} matrix is not positive definite (smallest eigenvalue {eig.min():.3g}); "
                "a bandwidth matrix must be a covariance matrix"
            ) from None
        if np.min(np.diag(L)) <= 1e-150:
            raise BandwidthError(f"{argument} matrix is singular")
        return cls(H, L)

    @classmethod
    def from_cholesky(cls, L) -> "BandwidthMatrix":
        """From a lower Cholesky factor (its upper triangle is ignored; not validated).

        Parameters
        ----------
        L : array_like, shape (d, d)

        Returns
        -------
        BandwidthMatrix
        """
        L = np.tril(np.asarray(L, dtype=float))
        return cls(L @ L.T, L)

    @classmethod
    def from_diagonal(cls, variances) -> "BandwidthMatrix":
        """A diagonal matrix from per-variable kernel variances.

        Parameters
        ----------
        variances : array_like, shape (d,)
            Positive and finite.

        Returns
        -------
        BandwidthMatrix

        Raises
        ------
        BandwidthError
            If a variance is not positive and finite.
        """
        v = np.asarray(variances, dtype=float)
        if np.any(~np.isfinite(v)) or np.any(v <= 0):
            raise BandwidthError("bandwidth variances must be positive and finite")
        return cls(np.diag(v), np.diag(np.sqrt(v)))

    # -- properties ------------------------------------------------------
    @property
    def matrix(self) -> np.ndarray:
        return self._H.copy()

    @property
    def cholesky(self) -> np.ndarray:
        return self._L.copy()

    @property
    def d(self) -> int:
        return self._H.shape[0]

    @property
    def log_det(self) -> float:
        """log |H|."""
        return self._log_det

    @property
    def sqrt_det(self) -> float:
        """|H|^{1/2}, the volume factor of the scaled kernel."""
        return float(np.exp(0.5 * self._log_det))

    @property
    def scales(self) -> np.ndarray:
        """Per-variable kernel standard deviations sqrt(H_ii)."""
        return np.sqrt(np.diag(self._H))

    # -- whitening -------------------------------------------------------
    def whiten(self, x: np.ndarray) -> np.ndarray:
        """``L^{-1} x`` applied to the rows of ``x`` (shape (..., d)).

        Parameters
        ----------
        x : array_like, shape (..., d)

        Returns
        -------
        ndarray, shape (..., d)
        """
        x = np.asarray(x, dtype=float)
        flat = x.reshape(-1, self.d)
        if self.d > 8:
            z = linalg.solve_triangular(self._L, flat.T, lower=True, check_finite=False).T
            return z.reshape(x.shape)
        # forward substitution column by column: for the small d of density estimation this
        # avoids a BLAS call whose thread start-up costs milliseconds on small inputs
        L = self._L
        z = np.empty_like(flat)
        for i in range(self.d):
            acc = flat[:, i].copy()
            for j in range(i):
                acc -= L[i, j] * z[:, j]
            z[:, i] = acc / L[i, i]
        return z.reshape(x.shape)

    def colorize(self, z: np.ndarray) -> np.ndarray:
        """``L z`` applied to rows: maps unit-covariance draws to covariance H.

        Parameters
        ----------
        z : array_like, shape (..., d)

        Returns
        -------
        ndarray, shape (..., d)
        """
        z = np.asarray(z, dtype=float)
        out = np.zeros_like(z)
        for i in range(self.d):  # L z row by row, no BLAS call for small d
            for j in range(i + 1):
                out[..., i] += self._L[i, j] * z[..., j]
        return out

    def scaled(self, factor: float) -> "BandwidthMatrix":
        """``factor * H``.

        Parameters
        ----------
        factor : float
            Positive.

        Returns
        -------
        BandwidthMatrix
        """
        return BandwidthMatrix(self._H * factor, self._L * np.sqrt(factor))

    def __repr__(self) -> str:
        return f"BandwidthMatrix({np.array2string(self._H, precision=4)})"
