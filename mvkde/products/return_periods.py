"""Joint return periods of a bivariate (or d-variate) threshold event.

With lambda observations per year (mean inter-arrival time mu = 1/lambda
years) and thresholds t:

    T_AND(t) = 1 / (lambda P(X_1 > t_1 and ... and X_d > t_d))     every variable exceeds
    T_OR(t)  = 1 / (lambda (1 - F(t)))                             at least one exceeds

(Salvadori & De Michele 2004, Water Resources Research 40, W12511 [memory
for the article number]).  T_OR <= T_AND always.

Cautions: both assume a stationary series (the same law every year).  On a
daily sample (lambda ~ 365.25) they are return periods of exceedance *days*,
not of events: consecutive exceedance days of one storm count separately
unless the series is declustered first.  Fitted to annual maxima with
``observations_per_year = 1`` they are return periods of events (years
with an exceedance).  They inherit the cautions of the density estimate:
beyond the observed range they are extrapolation.
"""

from __future__ import annotations

import numpy as np

from ..errors import InputError
from .estimate import cdf, exceedance

__all__ = ["return_period_and", "return_period_or", "return_periods_from_probabilities",
           "RETURN_PERIOD_CAUTION"]

RETURN_PERIOD_CAUTION = (
    "Joint return periods (Salvadori & De Michele 2004) assume a stationary series. On daily samples they "
    "are return periods of exceedance days unless the series is declustered; fitted to annual maxima with "
    "observations_per_year = 1 they are return periods of events. Beyond the observed range they are "
    "extrapolation."
)


def _rate(observations_per_year) -> float:
    lam = float(observations_per_year)
    if not (np.isfinite(lam) and lam > 0):
        raise InputError(f"observations_per_year must be a positive number, got {observations_per_year!r}")
    return lam


def return_periods_from_probabilities(exceedance_probability=None, cdf_value=None, *,
                                      observations_per_year) -> tuple:
    """(T_AND, T_OR) in years from joint exceedance probabilities and joint CDF values.

    Either argument may be None (its period is then None).  A probability of
    0 gives an infinite period; arrays of any shape (cells first, say).

    Parameters
    ----------
    exceedance_probability : array_like of float, optional
        Joint exceedance probabilities P(X > t).
    cdf_value : array_like of float, optional
        Joint CDF values F(t).
    observations_per_year : float
        lambda, the number of observations per year (positive).

    Returns
    -------
    T_AND, T_OR : ndarray or None
        1 / (lambda P(X > t)) and 1 / (lambda (1 - F(t))) in years.

    References
    ----------
    Salvadori, G. & De Michele, C. (2004). Water Resources Research 40, W12511.
    """
    lam = _rate(observations_per_year)
    out = []
    for p, complement in ((exceedance_probability, False), (cdf_value, True)):
        if p is None:
            out.append(None)
            continue
        p = np.asarray(p, dtype=float)
        q = 1.0 - p if complement else p
        with np.errstate(divide="ignore"):
            out.append(1.0 / (lam * np.maximum(q, 0.0)))
    return tuple(out)


def return_period_and(est, thresholds, *, observations_per_year, size=None) -> np.ndarray:
    """T_AND = 1 / (lambda P(X > t componentwise)) in years at each threshold row.

    ``est.exceedance(thresholds)`` is the probability used (point masses
    included); see the module docstring for the cautions.

    Parameters
    ----------
    est : DensityEstimate
        The fitted estimate.
    thresholds : array_like, shape (m, d), or pandas.DataFrame
        One threshold vector t per row.
    observations_per_year : float
        lambda, the number of observations per year (positive).
    size : int or sequence of int, optional
        Grid size for the probability when no closed form applies.

    Returns
    -------
    ndarray, shape (m,)
        Return periods in years (inf where the probability is 0).
    """
    p = exceedance(est, thresholds, size=size)
    return return_periods_from_probabilities(p, None, observations_per_year=observations_per_year)[0]


def return_period_or(est, thresholds, *, observations_per_year, size=None) -> np.ndarray:
    """T_OR = 1 / (lambda (1 - F(t))) in years at each threshold row, F the joint CDF ``est.cdf``.

    Parameters
    ----------
    est : DensityEstimate
        The fitted estimate.
    thresholds : array_like, shape (m, d), or pandas.DataFrame
        One threshold vector t per row.
    observations_per_year : float
        lambda, the number of observations per year (positive).
    size : int or sequence of int, optional
        Grid size for the probability when no closed form applies.

    Returns
    -------
    ndarray, shape (m,)
        Return periods in years (inf where the probability is 0).
    """
    F = cdf(est, thresholds, size=size)
    return return_periods_from_probabilities(None, F, observations_per_year=observations_per_year)[1]
