"""Directional variables: circles (von Mises) and locations on the Earth (von Mises-Fisher).

``kernels``: the kernels, maximum-likelihood concentrations, the reference
rules and the sphere's geometry (node areas); ``selectors``: the plug-in for
several peaks (von Mises mixtures) and binned cross-validation on a circle;
``cv``: joint cross-validation of directional and linear smoothing;
``model``: the directional part of :func:`mvkde.fit` (declaration checks,
smoothing choice, the product-kernel model used for evaluation, grids and
sampling).
"""

from .cv import cross_validate, likelihood_cv, likelihood_cv_sphere, lscv_circular, lscv_mixed
from .kernels import (EARTH_RADIUS_KM, cell_areas_km2, check_period, circle_rule_h, circle_rule_h_from_kappa,
                      equivalent_variance, kappa_from_variance, log_i0, log_vmf_kernel, lonlat_to_unit, node_areas_km2,
                      sample_vmf, sphere_rule_h, sphere_rule_h_from_kappa, taylor_rule, taylor_rule_from_kappa,
                      to_angle, unit_to_latlon, vmf, vmf_mle_kappa, von_mises, von_mises_mle)

__all__ = ["cross_validate", "likelihood_cv", "likelihood_cv_sphere", "lscv_circular", "lscv_mixed",
           "EARTH_RADIUS_KM", "cell_areas_km2", "check_period", "circle_rule_h", "circle_rule_h_from_kappa",
           "equivalent_variance", "kappa_from_variance", "log_i0", "log_vmf_kernel", "lonlat_to_unit",
           "node_areas_km2", "sample_vmf", "sphere_rule_h", "sphere_rule_h_from_kappa", "taylor_rule",
           "taylor_rule_from_kappa", "to_angle", "unit_to_latlon", "vmf", "vmf_mle_kappa", "von_mises",
           "von_mises_mle"]
