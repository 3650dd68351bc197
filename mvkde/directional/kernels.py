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

Cross-validation lives in :mod:`mvkde.directional.cv`, the plug-in rules for
several peaks in :mod:`mvkde.directional.selectors`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import optimize, special

from ..errors import InputError

EARTH_RADIUS_KM = 6371.0088  # IUGG mean radius


# ---------------------------------------------------------------------------
# kernels
# ---------------------------------------------------------------------------

def log_i0(kappa):
    """log I0(kappa), stable for large kappa (i0e = I0 e^{-kappa}).

    Parameters
    ----------
    kappa : float or array_like of float
        Concentration (>= 0).

    Returns
    -------
    ndarray
    """
    kappa = np.asarray(kappa, dtype=float)
    return np.log(special.i0e(kappa)) + kappa


def von_mises(theta, kappa):
    """von Mises density in angle units (matches scipy.stats.vonmises.pdf).

    exp(kappa cos theta) / (2 pi I0(kappa)), the mean direction at 0.

    Parameters
    ----------
    theta : array_like of float
        Angles in radians from the mean direction.
    kappa : float or array_like of float
        Concentration (>= 0).

    Returns
    -------
    ndarray
        Density per radian, shape of ``theta``.
    """
    theta = np.asarray(theta, dtype=float)
    return np.exp(kappa * (np.cos(theta) - 1.0)) / (2.0 * math.pi * special.i0e(kappa))


def log_vmf_const(kappa):
    """log of kappa / (4 pi sinh kappa), stable for large kappa.

    Parameters
    ----------
    kappa : float or array_like of float
        Concentration (>= 0).
        Below 1e-8 the uniform limit -log(4 pi) is returned.

    Returns
    -------
    ndarray
    """
    kappa = np.asarray(kappa, dtype=float)
    small = kappa < 1e-8
    k = np.where(small, 1.0, kappa)
    log_sinh = k + np.log1p(-np.exp(-2.0 * k)) - math.log(2.0)
    out = np.log(k) - math.log(4.0 * math.pi) - log_sinh
    return np.where(small, -math.log(4.0 * math.pi), out)


def vmf(cos_angle, kappa):
    """von Mises-Fisher density on S^2 (per steradian) at cosine of the angle to the mean.

    Parameters
    ----------
    cos_angle : array_like of float
        mu'x, the cosine of the angle between the point and the mean.
    kappa : float or array_like of float
        Concentration (>= 0).

    Returns
    -------
    ndarray
        kappa / (4 pi sinh kappa) exp(kappa cos_angle).
    """
    c = np.asarray(cos_angle, dtype=float)
    return np.exp(log_vmf_const(kappa) + kappa * c)


def to_angle(x, period):
    """Angles 2 pi x / period (radians) of a circular variable.

    Parameters
    ----------
    x : array_like of float
        Values in the variable's units.
    period : float

    Returns
    -------
    ndarray
    """
    return 2.0 * math.pi * np.asarray(x, dtype=float) / period


def lonlat_to_unit(lat_deg, lon_deg) -> np.ndarray:
    """Unit vectors (..., 3) from latitude and longitude in degrees.

    Parameters
    ----------
    lat_deg, lon_deg : array_like of float
        Latitudes and longitudes in degrees (broadcast together).

    Returns
    -------
    ndarray, shape (..., 3)
        (cos lat cos lon, cos lat sin lon, sin lat).
    """
    lat = np.deg2rad(np.asarray(lat_deg, dtype=float))
    lon = np.deg2rad(np.asarray(lon_deg, dtype=float))
    c = np.cos(lat)
    return np.stack([c * np.cos(lon), c * np.sin(lon), np.sin(lat)], axis=-1)


def equivalent_variance(kappa, period):
    """(period / 2 pi)^2 / kappa: the small-angle variance of the von Mises kernel.

    Parameters
    ----------
    kappa : float or ndarray
        Concentration.
    period : float
        Period of the variable.

    Returns
    -------
    float or ndarray
        Variance in the variable's units squared.
    """
    return (period / (2.0 * math.pi)) ** 2 / kappa


def kappa_from_variance(variance, period):
    """Concentration whose equivalent variance is ``variance``: (period / 2 pi)^2 / variance.

    The inverse of :func:`equivalent_variance`.

    Parameters
    ----------
    variance : float or ndarray
        Equivalent variance in the variable's units squared.
    period : float

    Returns
    -------
    float or ndarray
    """
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
    """(mean direction, concentration) maximum-likelihood estimates.

    The concentration solves I1(k)/I0(k) = R-bar, the mean resultant length
    (Fisher 1993, Sec. 4.5.5 approximation refined by Newton steps).

    Parameters
    ----------
    theta : array_like of float, shape (n,)
        Angles in radians.
    weights : ndarray, shape (n,), optional
        Weights summing to 1; equal weights when None.

    Returns
    -------
    mean : float
        Mean direction in radians, in (-pi, pi].
    kappa : float
    """
    w = np.full(len(theta), 1.0 / len(theta)) if weights is None else weights
    c = np.sum(w * np.cos(theta))
    s = np.sum(w * np.sin(theta))
    return math.atan2(s, c), _a1_inverse(math.hypot(c, s))


def vmf_mle_kappa(units: np.ndarray, weights=None) -> float:
    """Concentration MLE on S^2: solve coth k - 1/k = R-bar.

    Parameters
    ----------
    units : ndarray, shape (n, 3)
        Unit vectors.
    weights : ndarray, shape (n,), optional
        Weights summing to 1; equal weights when None.

    Returns
    -------
    float
    """
    w = np.full(len(units), 1.0 / len(units)) if weights is None else weights
    rbar = float(np.linalg.norm(w @ units))
    rbar = min(max(rbar, 1e-9), 1 - 1e-12)
    f = lambda k: 1.0 / math.tanh(k) - 1.0 / k - rbar  # noqa: E731
    return optimize.brentq(f, 1e-8, 1e8)


# ---------------------------------------------------------------------------
# rules of thumb
# ---------------------------------------------------------------------------

def taylor_rule(theta, weights=None) -> float:
    """Taylor (2008) plug-in concentration nu for the von Mises kernel.

    nu = [3 n k^2 I2(2k) / (4 pi^{1/2} I0(k)^2)]^{2/5}, k the von Mises MLE
    and n the effective sample size (see the module docstring).

    Parameters
    ----------
    theta : array_like of float, shape (n,)
        Angles in radians.
    weights : ndarray, shape (n,), optional
        Weights summing to 1; equal weights when None.

    Returns
    -------
    float

    References
    ----------
    Taylor (2008). Comput. Statist. Data Anal. 52, 3493-3500.
    """
    n = len(theta) if weights is None else 1.0 / np.sum(weights ** 2)
    _, k = von_mises_mle(theta, weights)
    # I2(2k)/I0(k)^2 with exponential scaling: e^{2k} cancels
    ratio = special.ive(2, 2 * k) / special.i0e(k) ** 2
    return float((3 * n * k * k * ratio / (4 * math.sqrt(math.pi))) ** 0.4)


def circle_rule_h(theta, weights=None) -> float:
    """Garcia-Portugues (2013) circle rule h; concentration 1/h^2.

    h = [4 pi^{1/2} I0(k)^2 / (k n (2 I1(2k) + 3k I2(2k)))]^{1/5}, k the von
    Mises MLE and n the effective sample size.

    Parameters
    ----------
    theta : array_like of float, shape (n,)
        Angles in radians.
    weights : ndarray, shape (n,), optional
        Weights summing to 1; equal weights when None.

    Returns
    -------
    float

    References
    ----------
    Garcia-Portugues (2013). Electron. J. Statist. 7, 1655-1685.
    """
    n = len(theta) if weights is None else 1.0 / np.sum(weights ** 2)
    _, k = von_mises_mle(theta, weights)
    num = 4 * math.sqrt(math.pi) * special.i0e(k) ** 2
    den = k * n * (2 * special.ive(1, 2 * k) + 3 * k * special.ive(2, 2 * k))
    return float((num / den) ** 0.2)


def sphere_rule_h(units, weights=None) -> float:
    """Garcia-Portugues (2013) rule on S^2; concentration 1/h^2.

    Parameters
    ----------
    units : ndarray, shape (n, 3)
        Unit vectors.
    weights : ndarray, shape (n,), optional
        Weights summing to 1; equal weights when None.

    Returns
    -------
    float
        h of :func:`sphere_rule_h_from_kappa` at the vMF MLE and the effective size.
    """
    n = len(units) if weights is None else 1.0 / np.sum(weights ** 2)
    k = vmf_mle_kappa(units, weights)
    return sphere_rule_h_from_kappa(k, n)


def sphere_rule_h_from_kappa(k: float, n: float) -> float:
    """Garcia-Portugues (2013) rule on S^2 from a concentration: h, with kappa = 1/h^2.

    h = [8 sinh^2 k / (k n ((1 + 4k^2) sinh 2k - 2k cosh 2k))]^{1/6}.

    Parameters
    ----------
    k : float
        von Mises(-Fisher) maximum-likelihood concentration of the sample.
    n : float
        (Effective) sample size.

    Returns
    -------
    float
    """
    # 8 sinh^2 k / (k n ((1 + 4k^2) sinh 2k - 2k cosh 2k)); divide through by e^{2k}
    e = math.exp(-2 * k)
    sinh2 = ((1 - e) / 2) ** 2               # sinh^2 k e^{-2k}
    s2k = (1 - e * e) / 2                    # sinh 2k e^{-2k}
    c2k = (1 + e * e) / 2                    # cosh 2k e^{-2k}
    return float((8 * sinh2 / (k * n * ((1 + 4 * k * k) * s2k - 2 * k * c2k))) ** (1 / 6))


def circle_rule_h_from_kappa(k: float, n: float) -> float:
    """Garcia-Portugues (2013) circle rule h from a concentration (see :func:`circle_rule_h`).

    Parameters
    ----------
    k : float
        von Mises(-Fisher) maximum-likelihood concentration of the sample.
    n : float
        (Effective) sample size.

    Returns
    -------
    float
    """
    num = 4 * math.sqrt(math.pi) * special.i0e(k) ** 2
    den = k * n * (2 * special.ive(1, 2 * k) + 3 * k * special.ive(2, 2 * k))
    return float((num / den) ** 0.2)


def taylor_rule_from_kappa(k: float, n: float) -> float:
    """Taylor (2008) concentration nu from a concentration (see :func:`taylor_rule`).

    Parameters
    ----------
    k : float
        von Mises(-Fisher) maximum-likelihood concentration of the sample.
    n : float
        (Effective) sample size.

    Returns
    -------
    float
    """
    ratio = special.ive(2, 2 * k) / special.i0e(k) ** 2
    return float((3 * n * k * k * ratio / (4 * math.sqrt(math.pi))) ** 0.4)


def log_vmf_kernel(k, dot):
    """log vMF_k on S^2 at points whose unit vectors have inner product ``dot`` (per steradian):
    k e^{k (dot - 1)} / (2 pi (1 - e^{-2k})), stable for any k > 0.

    Parameters
    ----------
    k : float
        Concentration (> 0).
    dot : float or ndarray
        Inner products of unit vectors.

    Returns
    -------
    float or ndarray
        Shape of ``dot``.
    """
    return k * (dot - 1.0) + math.log(k) - math.log(2.0 * math.pi) - math.log(-math.expm1(-2.0 * k))


def check_period(period, name) -> float:
    """The period of variable ``name`` as a float, refused unless finite and positive.

    Parameters
    ----------
    period : object
        The declared period.
    name : str
        The variable, for the message.

    Returns
    -------
    float

    Raises
    ------
    InputError
        If ``period`` is not a finite positive number.
    """
    try:
        p = float(period)
    except (TypeError, ValueError):
        raise InputError(f"period of {name} must be a positive number (for example 360 for degrees)") from None
    if not (math.isfinite(p) and p > 0):
        raise InputError(f"period of {name} must be a positive number (for example 360 for degrees), got {period!r}")
    return p


def cell_areas_km2(lat_edges_deg, lon_edges_deg, radius_km=EARTH_RADIUS_KM) -> np.ndarray:
    """Areas (km^2) of lat/lon cells given their edges: R^2 dlon (sin lat2 - sin lat1).

    Parameters
    ----------
    lat_edges_deg, lon_edges_deg : array_like of float
        Cell edges in degrees.
    radius_km : float
        Radius of the sphere (the Earth's mean radius by default).

    Returns
    -------
    ndarray, shape (len(lat_edges_deg) - 1, len(lon_edges_deg) - 1)
    """
    lat = np.deg2rad(np.asarray(lat_edges_deg, dtype=float))
    lon = np.deg2rad(np.asarray(lon_edges_deg, dtype=float))
    band = np.abs(np.diff(np.sin(lat)))
    width = np.abs(np.diff(lon))
    return radius_km ** 2 * np.outer(band, width)


def node_areas_km2(lat_deg, lon_deg, radius_km=EARTH_RADIUS_KM) -> np.ndarray:
    """Surface area (km^2) each node of a lat/lon grid stands for, shape (lat, lon).

    The trapezoid rule on the sphere: node (i, j) owns the band between the
    midpoints of its latitude neighbours (cut at the grid's first and last
    latitude) and the same in longitude, so ``R^2 (sin lat_hi - sin lat_lo)
    (lon_hi - lon_lo)`` in radians.  Summed over a grid spanning the globe
    (latitudes -90..90, longitudes -180..180) they give 4 pi R^2 exactly; the
    density per km^2 times these areas sums to the probability of the grid.

    Parameters
    ----------
    lat_deg, lon_deg : array_like of float
        Increasing grid nodes in degrees.
    radius_km : float
        Radius of the sphere (the Earth's mean radius by default).

    Returns
    -------
    ndarray, shape (len(lat_deg), len(lon_deg))
    """
    lat = np.asarray(lat_deg, dtype=float)
    lon = np.asarray(lon_deg, dtype=float)
    lat_edges = np.concatenate([[lat[0]], 0.5 * (lat[1:] + lat[:-1]), [lat[-1]]])
    lon_edges = np.concatenate([[lon[0]], 0.5 * (lon[1:] + lon[:-1]), [lon[-1]]])
    return cell_areas_km2(lat_edges, lon_edges, radius_km)


def unit_to_latlon(u: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Latitude and longitude (degrees, longitude in [-180, 180)) of unit vectors (..., 3).

    Parameters
    ----------
    u : ndarray, shape (..., 3)

    Returns
    -------
    lat, lon : ndarray, shape (...)
    """
    lat = np.rad2deg(np.arcsin(np.clip(u[..., 2], -1.0, 1.0)))
    lon = np.rad2deg(np.arctan2(u[..., 1], u[..., 0]))
    lon = np.where(lon >= 180.0, lon - 360.0, lon)
    return lat, lon


def sample_vmf(means: np.ndarray, kappa: float, rng) -> np.ndarray:
    """One draw from vMF(mean_i, kappa) on S^2 per row of ``means`` (m, 3).

    On S^2 the cosine w of the angle to the mean has density proportional to
    e^{kappa w} on [-1, 1], inverted in closed form: w = 1 + log(u + (1 - u) e^{-2 kappa}) / kappa
    (Wood 1994, Commun. Statist. Simul. Comput. 23, 157-164, the p = 3 case); the
    tangent direction is uniform.

    Parameters
    ----------
    means : ndarray, shape (m, 3)
        Unit mean vectors.
    kappa : float
        Concentration (> 0).
    rng : numpy.random.Generator

    Returns
    -------
    ndarray, shape (m, 3)
        Unit vectors.
    """
    m = means.shape[0]
    u = rng.random(m)
    wv = 1.0 + np.log(u + (1.0 - u) * math.exp(-2.0 * kappa)) / kappa
    wv = np.clip(wv, -1.0, 1.0)
    phi = rng.uniform(0.0, 2.0 * math.pi, m)
    # an orthonormal tangent basis at each mean
    helper = np.where(np.abs(means[:, [2]]) < 0.9, [[0.0, 0.0, 1.0]], [[1.0, 0.0, 0.0]])
    e1 = np.cross(means, helper)
    e1 /= np.linalg.norm(e1, axis=1, keepdims=True)
    e2 = np.cross(means, e1)
    s = np.sqrt(np.maximum(1.0 - wv * wv, 0.0))
    out = wv[:, None] * means + s[:, None] * (np.cos(phi)[:, None] * e1 + np.sin(phi)[:, None] * e2)
    return out / np.linalg.norm(out, axis=1, keepdims=True)
