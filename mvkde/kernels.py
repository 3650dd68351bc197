"""Kernel family: univariate kernels, their constants, and the product and
spherical (radially symmetric) multivariate forms.

Every kernel handed to the estimator is scaled to **unit covariance**: the
scaled d-variate kernel ``K_H(x) = |H|^{-1/2} K(H^{-1/2} x)`` then has
covariance ``H`` whatever the kernel (contract in DESIGN.md).  The raw
kernels below are defined on their usual standard support (``[-1, 1]`` for
the compact ones) and are rescaled by ``s = sqrt(mu2)``:
``K_unit(u) = s^d K(s u)``.

Notes
-----
For a univariate kernel K, ``R(K) = int K^2`` and ``mu2(K) = int u^2 K``.
The asymptotic MISE of a kernel density estimate is proportional to
``(R(K)^2 mu2(K))^{2/5} n^{-4/5}`` (Silverman 1986, Sec. 3.3.2; Wand & Jones
1995, Sec. 2.7); the Epanechnikov kernel minimises ``R(K)^2 mu2(K)`` among
non-negative kernels (Epanechnikov 1969), and the efficiency of a kernel is
``sqrt((R^2 mu2)_Epa / (R^2 mu2)_K)`` -- the ratio of sample sizes that give
the same AMISE.

A d-variate kernel with unit covariance and ``H = h^2 I`` has
``AMISE* ~ R(K)^{4/(d+4)} n^{-4/(d+4)}``, so the sample-size efficiency of
two unit-covariance kernels is the ratio of their roughnesses
``R(K_ref) / R(K)``.

The spherical form of a univariate kernel with profile ``k(r)`` (``K(u) =
k(|u|)``) is ``K_s(x) = c k(|x|)``, with
``1/c = |S^{d-1}| int_0^a r^{d-1} k(r) dr`` and ``|S^{d-1}| = d pi^{d/2} /
Gamma(d/2 + 1)``.  For the polynomial profiles ``(1 - r^p)^q`` the radial
integrals are Beta functions, ``int_0^1 r^m (1 - r^p)^q dr = B((m+1)/p, q+1)/p``,
and for the Gaussian profile ``int_0^inf r^m e^{-r^2/2} dr = 2^{(m-1)/2}
Gamma((m+1)/2)``, so the constants are exact; only the cosine profile uses
adaptive quadrature (to machine precision).

References
----------
Epanechnikov, V. A. (1969). Non-parametric estimation of a multivariate
probability density. Theory Probab. Appl. 14, 153-158.
Silverman, B. W. (1986). Density Estimation for Statistics and Data Analysis.
Chapman & Hall. Sec. 3.3 and eq. 4.4.
Wand, M. P. & Jones, M. C. (1995). Kernel Smoothing. Chapman & Hall. Table 2.1.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from functools import lru_cache
from typing import Callable

import numpy as np
from scipy import special

from .errors import InputError, closest_names

__all__ = [
    "Kernel",
    "MultivariateKernel",
    "KERNEL_NAMES",
    "HIGHER_ORDER_NAMES",
    "FORMS",
    "get_kernel",
    "get_multivariate_kernel",
    "kernel_table",
]


# ---------------------------------------------------------------------------
# univariate kernels on their standard support
# ---------------------------------------------------------------------------

@dataclass(frozen=True)
class Kernel:
    """A univariate kernel on its standard support.

    Attributes
    ----------
    name : str
    radius : float
        Half-width of the support on the standard scale (``inf`` for the
        Gaussian family).
    roughness : float
        ``R(K) = int K(u)^2 du`` on the standard scale.
    mu2 : float
        ``int u^2 K(u) du`` on the standard scale.  Zero for higher-order
        kernels, whose scale is that of their second-order parent.
    smoothness : str
        Smoothness class of an estimate built with this kernel.
    order : int
        2 for the ordinary (non-negative) kernels, 4 for the opt-in
        fourth-order kernels that can go negative.
    profile_powers : (p, q) or None
        ``K(u)`` proportional to ``(1 - |u|^p)^q`` on ``|u| <= 1``; used for
        exact radial constants and for sampling.
    parent : str
        For a higher-order kernel, the second-order kernel whose scale it uses.
    """

    name: str
    radius: float
    roughness: float
    mu2: float
    smoothness: str
    order: int = 2
    profile_powers: tuple[int, int] | None = None
    parent: str = ""
    description: str = ""
    _fn: Callable[[np.ndarray], np.ndarray] = field(default=None, repr=False, compare=False)

    def __call__(self, u):
        """K(u) on the standard scale."""
        return self._fn(np.asarray(u, dtype=float))

    # -- unit-variance form ---------------------------------------------
    @property
    def scale(self) -> float:
        """``s = sqrt(mu2)`` of the second-order parent: ``K_unit(u) = s K(s u)``."""
        if self.order == 2:
            return math.sqrt(self.mu2)
        return math.sqrt(get_kernel(self.parent).mu2)

    @property
    def unit_radius(self) -> float:
        """Support half-width of the unit-variance kernel."""
        return self.radius / self.scale

    def unit(self, u):
        """The unit-variance kernel ``s K(s u)``.

        Parameters
        ----------
        u : float or array_like
            Offsets on the unit-variance scale.

        Returns
        -------
        ndarray
        """
        s = self.scale
        return s * self._fn(s * np.asarray(u, dtype=float))

    def cdf(self, u):
        """Integrated kernel ``int_{-inf}^u K`` on the standard scale (closed forms).

        Parameters
        ----------
        u : float or array_like
            Offsets on the standard scale.

        Returns
        -------
        ndarray
        """
        return _CDF[self.name](np.asarray(u, dtype=float))

    def unit_cdf(self, u):
        """Integrated unit-variance kernel.

        Parameters
        ----------
        u : float or array_like
            Offsets on the unit-variance scale.

        Returns
        -------
        ndarray
        """
        return self.cdf(self.scale * np.asarray(u, dtype=float))

    @property
    def unit_roughness(self) -> float:
        return self.scale * self.roughness

    @property
    def factor(self) -> float:
        """Scale-free AMISE factor ``R(K)^2 mu2(K)`` (second-order kernels)."""
        return self.roughness ** 2 * self.mu2

    @property
    def is_nonnegative(self) -> bool:
        return self.order == 2

    @property
    def is_compact(self) -> bool:
        return math.isfinite(self.radius)


def _poly(p, q, const):
    def fn(u):
        a = np.abs(u)
        out = np.zeros_like(a)
        inside = a <= 1.0
        out[inside] = const * (1.0 - a[inside] ** p) ** q
        return out

    return fn


def _uniform(u):
    return np.where(np.abs(u) <= 1.0, 0.5, 0.0)


def _cosine(u):
    return np.where(np.abs(u) <= 1.0, (np.pi / 4.0) * np.cos(np.pi * np.clip(u, -1, 1) / 2.0), 0.0)


def _gaussian(u):
    return np.exp(-0.5 * u * u) / math.sqrt(2.0 * math.pi)


def _gaussian4(u):
    # (3 - u^2)/2 phi(u): the fourth-order Gaussian kernel (Wand & Jones 1995, Sec. 2.8)
    return 0.5 * (3.0 - u * u) * _gaussian(u)


def _epanechnikov4(u):
    # (15/32)(3 - 10 u^2 + 7 u^4) on [-1, 1]: fourth-order Epanechnikov-type kernel
    a = np.abs(u)
    return np.where(a <= 1.0, (15.0 / 32.0) * (3.0 - 10.0 * u * u + 7.0 * u ** 4), 0.0)


_KERNELS: dict[str, Kernel] = {}


def _register(k: Kernel) -> None:
    _KERNELS[k.name] = k


_register(Kernel("uniform", 1.0, 0.5, 1.0 / 3.0, "discontinuous", profile_powers=(2, 0),
                 description="flat; discontinuous estimate", _fn=_uniform))
_register(Kernel("triangular", 1.0, 2.0 / 3.0, 1.0 / 6.0, "continuous", profile_powers=(1, 1),
                 description="1 - |u|; continuous, kinked estimate", _fn=_poly(1, 1, 1.0)))
_register(Kernel("epanechnikov", 1.0, 0.6, 0.2, "continuous", profile_powers=(2, 1),
                 description="3/4 (1 - u^2); the most efficient non-negative kernel",
                 _fn=_poly(2, 1, 0.75)))
_register(Kernel("biweight", 1.0, 5.0 / 7.0, 1.0 / 7.0, "once differentiable", profile_powers=(2, 2),
                 description="15/16 (1 - u^2)^2", _fn=_poly(2, 2, 15.0 / 16.0)))
_register(Kernel("triweight", 1.0, 350.0 / 429.0, 1.0 / 9.0, "twice differentiable",
                 profile_powers=(2, 3), description="35/32 (1 - u^2)^3", _fn=_poly(2, 3, 35.0 / 32.0)))
_register(Kernel("cosine", 1.0, math.pi ** 2 / 16.0, 1.0 - 8.0 / math.pi ** 2, "continuous",
                 description="pi/4 cos(pi u / 2)", _fn=_cosine))
_register(Kernel("gaussian", math.inf, 1.0 / (2.0 * math.sqrt(math.pi)), 1.0, "smooth",
                 description="standard normal; smooth estimate, unbounded support", _fn=_gaussian))
# Fourth-order kernels: explicit opt-in, they take negative values.
# R(K4) for the Gaussian: int ((3 - u^2)/2)^2 phi^2 = 27 / (32 sqrt(pi))  [calc]
_register(Kernel("gaussian4", math.inf, 27.0 / (32.0 * math.sqrt(math.pi)), 0.0, "smooth", order=4,
                 parent="gaussian", description="fourth-order Gaussian; can go negative", _fn=_gaussian4))
# R = (15/32)^2 int (3 - 10u^2 + 7u^4)^2 = 5/4  [calc]
_register(Kernel("epanechnikov4", 1.0, 1.25, 0.0, "continuous", order=4, parent="epanechnikov",
                 description="fourth-order Epanechnikov; can go negative", _fn=_epanechnikov4))

def _poly_cdf(coeffs, denom):
    """CDF of a polynomial kernel on [-1, 1]: (sum c_k u^k) / denom, clipped to [0, 1]."""
    def fn(u):
        v = np.clip(u, -1.0, 1.0)
        return np.polynomial.polynomial.polyval(v, coeffs) / denom
    return fn


def _triangular_cdf(u):
    v = np.clip(u, -1.0, 1.0)
    return np.where(v < 0, 0.5 * (1 + v) ** 2, 1 - 0.5 * (1 - v) ** 2)


# int_{-1}^u K: integrate the polynomial kernels term by term [calc]
_CDF = {
    "uniform": _poly_cdf([1, 1], 2.0),
    "triangular": _triangular_cdf,
    "epanechnikov": _poly_cdf([2, 3, 0, -1], 4.0),
    "biweight": _poly_cdf([8, 15, 0, -10, 0, 3], 16.0),
    "triweight": _poly_cdf([16, 35, 0, -35, 0, 21, 0, -5], 32.0),
    "cosine": lambda u: 0.5 * (1 + np.sin(np.pi * np.clip(u, -1.0, 1.0) / 2.0)),
    "gaussian": lambda u: special.ndtr(u),
    "gaussian4": lambda u: special.ndtr(u) + 0.5 * u * np.exp(-0.5 * u * u) / math.sqrt(2 * math.pi),
    "epanechnikov4": _poly_cdf([16, 45, 0, -50, 0, 21], 32.0),
}


KERNEL_NAMES = ("uniform", "triangular", "epanechnikov", "biweight", "triweight", "cosine", "gaussian")
HIGHER_ORDER_NAMES = ("gaussian4", "epanechnikov4")
FORMS = ("product", "spherical")


def get_kernel(name: str) -> Kernel:
    """Look up a univariate kernel by name (case-insensitive).

    Parameters
    ----------
    name : str
        One of ``KERNEL_NAMES`` or ``HIGHER_ORDER_NAMES``.

    Returns
    -------
    Kernel

    Raises
    ------
    InputError
        For an unknown name, with the closest valid names.
    """
    if not isinstance(name, str):
        raise InputError(f"kernel must be a name, one of {', '.join(KERNEL_NAMES)}; got {name!r}")
    key = name.strip().lower()
    if key in _KERNELS:
        return _KERNELS[key]
    raise InputError(
        f"unknown kernel {name!r}: valid kernels are {', '.join(KERNEL_NAMES)} "
        f"(fourth-order, opt-in: {', '.join(HIGHER_ORDER_NAMES)})" + closest_names(key, _KERNELS)
    )


# ---------------------------------------------------------------------------
# radial integrals (exact where a closed form exists)
# ---------------------------------------------------------------------------

def _sphere_area(d: int) -> float:
    """Surface area of the unit sphere S^{d-1} in R^d: d pi^{d/2} / Gamma(d/2 + 1)."""
    return d * math.pi ** (d / 2.0) / math.gamma(d / 2.0 + 1.0)


def unit_ball_volume(d: int) -> float:
    """c_d = pi^{d/2} / Gamma(d/2 + 1).

    Parameters
    ----------
    d : int

    Returns
    -------
    float
    """
    return math.pi ** (d / 2.0) / math.gamma(d / 2.0 + 1.0)


def _radial_moment(kernel: Kernel, m: int, power: int = 1) -> float:
    """``int_0^a r^m k(r)^power dr`` for the kernel profile (unnormalised shape).

    The profile is the kernel with its univariate constant removed, so the
    answer does not depend on that constant.
    """
    name = kernel.name
    if name == "gaussian":
        # int_0^inf r^m exp(-power r^2 / 2) dr
        return 2.0 ** ((m - 1) / 2.0) * math.gamma((m + 1) / 2.0) / power ** ((m + 1) / 2.0)
    if kernel.profile_powers is not None:
        p, q = kernel.profile_powers
        if name == "uniform":
            return 1.0 / (m + 1)
        return special.beta((m + 1) / p, q * power + 1) / p
    if name == "cosine":
        from scipy import integrate  # only here: importing it costs about 0.14 s of every run

        val, _ = integrate.quad(lambda r: r ** m * math.cos(math.pi * r / 2.0) ** power, 0.0, 1.0,
                                epsabs=0, epsrel=1e-13, limit=200)
        return val
    raise InputError(f"kernel {name!r} has no spherical form")


# ---------------------------------------------------------------------------
# multivariate forms
# ---------------------------------------------------------------------------

@dataclass(frozen=True)
class MultivariateKernel:
    """A d-variate kernel with unit covariance, in product or spherical form.

    ``evaluate(z)`` takes whitened offsets ``z = W (x - X_i)`` (``W H W' = I``)
    with shape ``(..., d)`` and returns ``K(z)``; the estimator divides by
    ``|H|^{1/2}``.  Build it with :func:`get_multivariate_kernel`.

    Parameters
    ----------
    univariate : Kernel
        The one-variable kernel it is built from (``est.kernel.univariate``; ``est.kernel.name``
        is the name ``fit(kernel=...)`` takes).
    form : {'product', 'spherical'}
    d : int
    const : float
        Spherical: normalising constant of the raw profile; product: 1.
    scale : float
        s, with K_unit(z) = s^d K(s z).
    roughness : float
        R of the unit-covariance d-variate kernel.
    radius : float
        Support radius of the unit-covariance kernel (inf for the Gaussian).
    """

    univariate: Kernel
    form: str
    d: int
    const: float          # spherical: normalising constant of the raw profile; product: 1
    scale: float          # s: K_unit(z) = s^d K(s z)
    roughness: float      # R of the unit-covariance d-variate kernel
    radius: float         # support radius of the unit-covariance kernel (inf for Gaussian)

    @property
    def name(self) -> str:
        return self.univariate.name

    @property
    def is_compact(self) -> bool:
        return math.isfinite(self.radius)

    @property
    def is_radial(self) -> bool:
        """True when evaluated from |z| (spherical form of a non-Gaussian kernel, d > 1)."""
        return self.form == "spherical" and self.d > 1 and self.univariate.name != "gaussian"

    def evaluate(self, z: np.ndarray) -> np.ndarray:
        """K(z) at whitened offsets.

        Parameters
        ----------
        z : array_like, shape (..., d)

        Returns
        -------
        ndarray, shape (...)
        """
        z = np.asarray(z, dtype=float)
        if not self.is_radial:
            out = self.univariate.unit(z[..., 0])
            for j in range(1, self.d):
                out = out * self.univariate.unit(z[..., j])
            return out
        return self.evaluate_radial(np.einsum("...j,...j->...", z, z))

    def evaluate_radial(self, r2: np.ndarray) -> np.ndarray:
        """Spherical form from squared whitened distances ``r2 = |z|^2``.

        Parameters
        ----------
        r2 : ndarray

        Returns
        -------
        ndarray, shape of ``r2``
        """
        s = self.scale
        rs = np.sqrt(np.maximum(r2, 0.0)) * s
        # raw univariate kernel, divided by its 1-D constant, is the profile k(r)
        prof = self.univariate(rs) / self.univariate(np.zeros(1))[0]
        return (s ** self.d) * self.const * prof

    def log_evaluate_gaussian(self, r2: np.ndarray) -> np.ndarray:
        """log K for the Gaussian kernel from ``r2 = |z|^2`` (either form).

        Parameters
        ----------
        r2 : ndarray

        Returns
        -------
        ndarray, shape of ``r2``
        """
        return -0.5 * r2 - 0.5 * self.d * math.log(2.0 * math.pi)

    def sample(self, n: int, rng: np.random.Generator) -> np.ndarray:
        """Draws from the unit-covariance kernel, shape ``(n, d)``.

        Parameters
        ----------
        n : int
        rng : numpy.random.Generator

        Returns
        -------
        ndarray, shape (n, d)

        Raises
        ------
        InputError
            For a fourth-order kernel (it takes negative values).
        """
        k = self.univariate
        if k.order != 2:
            raise InputError(
                f"kernel {k.name!r} takes negative values and is not a probability law: "
                "sampling needs a non-negative kernel (for example 'epanechnikov' or 'gaussian')"
            )
        d = self.d
        if k.name == "gaussian":
            return rng.standard_normal((n, d))
        if not self.is_radial:
            return _sample_univariate(k, (n, d), rng) / k.scale
        # spherical: uniform direction times a radius with density ~ r^{d-1} k(r)
        direction = rng.standard_normal((n, d))
        direction /= np.linalg.norm(direction, axis=1, keepdims=True)
        if k.profile_powers is not None and k.name != "triangular":
            q = 0 if k.name == "uniform" else k.profile_powers[1]
            radius = np.sqrt(rng.beta(d / 2.0, q + 1.0, size=n))  # r^2 ~ Beta(d/2, q+1)
        elif k.name == "triangular":
            radius = rng.beta(d, 2.0, size=n)  # r^{d-1}(1 - r)
        else:  # cosine: rejection from r ~ Beta(d, 1)
            radius = np.empty(0)
            while radius.size < n:
                r = rng.beta(d, 1.0, size=2 * n)
                keep = rng.random(2 * n) < np.cos(np.pi * r / 2.0)
                radius = np.concatenate([radius, r[keep]])
            radius = radius[:n]
        return direction * radius[:, None] / self.scale


def _sample_univariate(k: Kernel, shape, rng) -> np.ndarray:
    """Draws from the standard-scale univariate kernel."""
    if k.name == "triangular":
        return rng.random(shape) - rng.random(shape)
    if k.name == "cosine":
        return (2.0 / np.pi) * np.arcsin(2.0 * rng.random(shape) - 1.0)
    q = 0 if k.name == "uniform" else k.profile_powers[1]
    # (1 - u^2)^q on [-1, 1]  <=>  (u + 1)/2 ~ Beta(q + 1, q + 1)
    return 2.0 * rng.beta(q + 1.0, q + 1.0, size=shape) - 1.0


@lru_cache(maxsize=None)
def get_multivariate_kernel(name: str, form: str, d: int) -> MultivariateKernel:
    """The unit-covariance d-variate kernel ``name`` in ``form`` (cached).

    Parameters
    ----------
    name : str
        Univariate kernel name (see :func:`get_kernel`).
    form : {'product', 'spherical'}
    d : int
        Dimension (at least 1).

    Returns
    -------
    MultivariateKernel
    """
    k = get_kernel(name)
    if not isinstance(form, str) or form.strip().lower() not in FORMS:
        raise InputError(f"unknown kernel form {form!r}: valid forms are {', '.join(FORMS)}"
                         + closest_names(str(form), FORMS))
    form = form.strip().lower()
    d = int(d)
    if d < 1:
        raise InputError(f"dimension must be at least 1, got {d}")
    if form == "product" or d == 1 or k.name == "gaussian":
        # the Gaussian product kernel is already spherical
        s = k.scale
        radius = k.unit_radius if k.is_compact else math.inf
        if form == "product" and k.is_compact:
            radius = k.unit_radius * math.sqrt(d)  # corner of the cube
        return MultivariateKernel(k, form, d, 1.0, s, k.unit_roughness ** d, radius)
    if k.order != 2:
        raise InputError(
            f"kernel {k.name!r} is available in the product form only; use form='product'"
        )
    area = _sphere_area(d)
    const = 1.0 / (area * _radial_moment(k, d - 1))
    # per-coordinate second moment of the raw spherical kernel: (1/d) int |x|^2 K
    mu2 = const * area * _radial_moment(k, d + 1) / d
    s = math.sqrt(mu2)
    rough_raw = const ** 2 * area * _radial_moment(k, d - 1, power=2)
    return MultivariateKernel(k, form, d, const, s, s ** d * rough_raw, k.radius / s)


# ---------------------------------------------------------------------------
# the table users pick a kernel from
# ---------------------------------------------------------------------------

def kernel_table(d: int = 1) -> list[dict]:
    """Constants and efficiencies of every kernel, as rows of a table.

    Efficiencies are relative to Epanechnikov: in one dimension
    ``sqrt((R^2 mu2)_Epa / (R^2 mu2)_K)``; for ``d > 1`` the sample-size ratio
    ``R(K_ref) / R(K)`` of unit-covariance kernels, with the spherical
    Epanechnikov kernel as the reference (the optimal one among non-negative
    radially symmetric kernels; Silverman 1986, Sec. 4.2.3).

    Parameters
    ----------
    d : int
        Dimension of the efficiencies.

    Returns
    -------
    list of dict
        One row per kernel: ``kernel``, ``support``, ``R``, ``mu2``, ``R2mu2``,
        ``efficiency``, ``smoothness``; for ``d > 1`` also
        ``efficiency_product`` and ``efficiency_spherical``.
    """
    epa = get_kernel("epanechnikov")
    ref = get_multivariate_kernel("epanechnikov", "spherical", d).roughness if d > 1 else None
    rows = []
    for name in KERNEL_NAMES:
        k = get_kernel(name)
        row = {
            "kernel": name,
            "support": "[-1, 1]" if k.is_compact else "(-inf, inf)",
            "R": k.roughness,
            "mu2": k.mu2,
            "R2mu2": k.factor,
            "efficiency": math.sqrt(epa.factor / k.factor),
            "smoothness": k.smoothness,
        }
        if d > 1:
            row["efficiency_product"] = ref / get_multivariate_kernel(name, "product", d).roughness
            row["efficiency_spherical"] = ref / get_multivariate_kernel(name, "spherical", d).roughness
        rows.append(row)
    return rows
