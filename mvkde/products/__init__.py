"""Products for downstream risk models: on a fitted estimate, and on gridded densities.

:mod:`mvkde.products.grid` integrates densities on a regular grid (node
weights, marginals, CDF/exceedance, HDR levels, quantiles) for one cell or
many; :mod:`mvkde.products.estimate` holds the products of one estimate
(exact marginals and CDFs where a closed form exists, conditionals, HDR
levels, quantiles), computed through the grid functions where they integrate
a grid; :mod:`~mvkde.products.uncertainty` the standard error and bootstrap
bands; :mod:`~mvkde.products.wind_rose` the sector tables;
:mod:`~mvkde.products.return_periods` joint return periods.
"""

from .estimate import (DEFAULT_GRID, DEFAULT_HDR_MASSES, cdf, conditional, exceedance, hdr_levels, marginal,
                       marginal_grid, marginal_is_exact, mass_above, node_weights, probability_grid, quantiles)
from .return_periods import (RETURN_PERIOD_CAUTION, return_period_and, return_period_or,
                             return_periods_from_probabilities)
from .uncertainty import bootstrap, bootstrap_bands, standard_error
from .wind_rose import direction_and_speed, sector_table, speed_class_edges

__all__ = ["DEFAULT_GRID", "DEFAULT_HDR_MASSES", "bootstrap", "bootstrap_bands", "cdf", "conditional",
           "direction_and_speed", "exceedance", "hdr_levels", "marginal", "marginal_grid", "marginal_is_exact",
           "mass_above", "node_weights", "probability_grid", "quantiles", "sector_table", "speed_class_edges",
           "standard_error", "RETURN_PERIOD_CAUTION", "return_period_and", "return_period_or",
           "return_periods_from_probabilities"]
