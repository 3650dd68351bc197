"""Normal-scale (normal-reference) bandwidth matrices.

For the Gaussian kernel and a normal density with covariance Sigma, the
AMISE-optimal bandwidth matrix is

    H_NS = (4 / (d + 2))^{2/(d+4)} n^{-2/(d+4)} Sigma

(Wand & Jones 1995, Sec. 4.4; for d = 1 this is the 1.0592 sigma n^{-1/5}
rule, Silverman 1986 eq. 3.28).  It equals scipy.stats.gaussian_kde's
``silverman_factor()**2 * covariance``.

For another kernel with unit covariance the AMISE is
``R(K)/(n |H|^{1/2}) + (1/4) vech(H)' Psi4 vech(H)`` -- the bias term does
not depend on the kernel because mu2 = 1 -- so the optimal H scales as
``R(K)^{2/(d+4)}``: ``H_K = (R(K)/R(phi))^{2/(d+4)} H_phi``.  This is the
canonical (equivalent-kernel) rescaling (Marron & Nolan 1988) written for
unit-covariance kernels.
"""

from __future__ import annotations

import numpy as np

from ..kernels import get_multivariate_kernel


def effective_size(weights: np.ndarray | None, n: int) -> float:
    """Kish's effective sample size (sum w)^2 / sum w^2 (n without weights).

    Parameters
    ----------
    weights : ndarray, shape (n,), or None
    n : int
        Sample size.

    Returns
    -------
    float
    """
    if weights is None:
        return float(n)
    w = np.asarray(weights, dtype=float)
    return float(w.sum() ** 2 / np.sum(w * w))


def weighted_covariance(data: np.ndarray, weights: np.ndarray | None) -> np.ndarray:
    """Unbiased (reliability-weighted) covariance, as numpy.cov(aweights=...).

    Parameters
    ----------
    data : ndarray, shape (n, d)
    weights : ndarray, shape (n,), or None

    Returns
    -------
    ndarray, shape (d, d)
    """
    if weights is None:
        return np.atleast_2d(np.cov(data, rowvar=False))
    return np.atleast_2d(np.cov(data, rowvar=False, aweights=weights))


def kernel_rescaling(kernel: str, form: str, d: int) -> float:
    """Factor ``(R(K)/R(phi))^{2/(d+4)}`` taking a Gaussian-optimal H to kernel K.

    Parameters
    ----------
    kernel : str
        Kernel name.
    form : {'product', 'spherical'}
    d : int

    Returns
    -------
    float
    """
    rk = get_multivariate_kernel(kernel, form, d).roughness
    rg = get_multivariate_kernel("gaussian", "product", d).roughness
    return (rk / rg) ** (2.0 / (d + 4))


def normal_scale_factor(n_eff: float, d: int) -> float:
    """(4/(d+2))^{2/(d+4)} n^{-2/(d+4)}.

    Parameters
    ----------
    n_eff : float
        (Effective) sample size.
    d : int

    Returns
    -------
    float
    """
    return (4.0 / (d + 2.0)) ** (2.0 / (d + 4.0)) * n_eff ** (-2.0 / (d + 4.0))


def normal_scale(data, weights, *, kernel="gaussian", form="product", parametrization="full"):
    """Normal-scale matrix for ``kernel``; 'diagonal' keeps only the variances,
    'full' and 'scalar' (a multiple of the sample covariance) coincide here.

    Parameters
    ----------
    data : ndarray, shape (n, d)
    weights : ndarray, shape (n,), or None
        The sample size becomes Kish's effective size.
    kernel : str, optional
    form : {'product', 'spherical'}, optional
    parametrization : {'full', 'diagonal', 'scalar'}, optional

    Returns
    -------
    ndarray, shape (d, d)
    """
    n, d = data.shape
    cov = weighted_covariance(data, weights)
    if parametrization == "diagonal":
        cov = np.diag(np.diag(cov))
    factor = normal_scale_factor(effective_size(weights, n), d)
    if kernel != "gaussian":
        factor *= kernel_rescaling(kernel, form, d)
    return factor * cov
