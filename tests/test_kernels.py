"""Kernel constants, normalisation and unit covariance."""

import itertools
import math

import numpy as np
import pytest
from scipy import integrate

from mvkde.kernels import (FORMS, KERNEL_NAMES, get_kernel, get_multivariate_kernel, kernel_table,
                           unit_ball_volume)

# Wand & Jones (1995), Table 2.1 / Silverman (1986), Table 3.1: R(K) and mu2(K)
# on the standard support (values also in statsmodels' kernel classes).
PUBLISHED = {
    "uniform": (1 / 2, 1 / 3),
    "triangular": (2 / 3, 1 / 6),
    "epanechnikov": (3 / 5, 1 / 5),
    "biweight": (5 / 7, 1 / 7),
    "triweight": (350 / 429, 1 / 9),
    "cosine": (math.pi ** 2 / 16, 1 - 8 / math.pi ** 2),
    "gaussian": (1 / (2 * math.sqrt(math.pi)), 1.0),
}


@pytest.mark.parametrize("name", KERNEL_NAMES)
def test_constants_match_published_and_quadrature(name):
    k = get_kernel(name)
    R, mu2 = PUBLISHED[name]  # Wand & Jones 1995, Table 2.1
    assert k.roughness == pytest.approx(R, rel=1e-12)
    assert k.mu2 == pytest.approx(mu2, rel=1e-12)
    # and the function we evaluate has those constants (adaptive quadrature)
    lim = 1.0 if k.is_compact else 40.0
    one = integrate.quad(k, -lim, lim, points=[0.0], limit=200)[0]
    r = integrate.quad(lambda u: k(u) ** 2, -lim, lim, points=[0.0], limit=200)[0]
    m2 = integrate.quad(lambda u: u * u * k(u), -lim, lim, points=[0.0], limit=200)[0]
    assert one == pytest.approx(1.0, abs=1e-10)
    assert r == pytest.approx(R, rel=1e-9)
    assert m2 == pytest.approx(mu2, rel=1e-9)


def test_efficiencies_silverman_table_3_1():
    # Silverman (1986) Table 3.1 efficiencies (to 4 decimals): exact forms
    # (3087/3125)^1/2, (243/250)^1/2, (36 pi/125)^1/2, (108/125)^1/2.
    table = {r["kernel"]: r["efficiency"] for r in kernel_table(1)}
    assert table["epanechnikov"] == pytest.approx(1.0, abs=1e-12)
    assert table["biweight"] == pytest.approx(0.9939, abs=5e-5)
    assert table["triangular"] == pytest.approx(0.9859, abs=5e-5)
    assert table["gaussian"] == pytest.approx(0.9512, abs=5e-5)
    assert table["uniform"] == pytest.approx(0.9295, abs=5e-5)
    assert table["biweight"] == pytest.approx(math.sqrt(3087 / 3125), rel=1e-12)
    assert table["gaussian"] == pytest.approx(math.sqrt(36 * math.pi / 125), rel=1e-12)


def test_triangular_factor_and_epanechnikov_optimal():
    # Common practice (no published source cited): R(K)^2 mu2(K) of the
    # triangular kernel is 2/27 ~ 0.074, and Epanechnikov has the smallest
    # value among non-negative kernels (Epanechnikov 1969).
    assert get_kernel("triangular").factor == pytest.approx(2 / 27, rel=1e-12)
    factors = {n: get_kernel(n).factor for n in KERNEL_NAMES}
    assert min(factors, key=factors.get) == "epanechnikov"
    assert factors["epanechnikov"] == pytest.approx(9 / 125, rel=1e-12)


def test_multivariate_efficiencies():
    # Sample-size efficiencies relative to the spherical Epanechnikov kernel,
    # R_E mu_E^{d/2} / (R mu^{d/2}) [calc from Silverman 1986 eq. 4.4 constants]
    expected = {  # d: (product Epanechnikov, Gaussian, spherical biweight, product biweight)
        2: (0.9824, 0.8889, 0.9877, 0.9705),
        3: (0.9532, 0.8203, 0.9818, 0.9358),
        4: (0.9162, 0.7500, 0.9766, 0.8940),
        6: (0.8295, 0.6144, 0.9677, 0.7996),
    }
    for d, (pe, g, sb, pb) in expected.items():
        rows = {r["kernel"]: r for r in kernel_table(d)}
        assert rows["epanechnikov"]["efficiency_product"] == pytest.approx(pe, abs=1e-4)
        assert rows["gaussian"]["efficiency_spherical"] == pytest.approx(g, abs=1e-4)
        assert rows["biweight"]["efficiency_spherical"] == pytest.approx(sb, abs=1e-4)
        assert rows["biweight"]["efficiency_product"] == pytest.approx(pb, abs=1e-4)


@pytest.mark.parametrize("d", [2, 3, 4])
def test_radial_constants_silverman_eq_4_4(d):
    # Spherical Epanechnikov K = (d+2)/(2 c_d)(1 - x'x) (Silverman 1986 eq. 4.4):
    # R = 2(d+2)/(c_d (d+4)), mu2 = 1/(d+4).  Unit-covariance roughness = R mu2^{d/2}.
    cd = unit_ball_volume(d)
    mk = get_multivariate_kernel("epanechnikov", "spherical", d)
    assert mk.const == pytest.approx((d + 2) / (2 * cd), rel=1e-12)
    assert mk.scale == pytest.approx(math.sqrt(1 / (d + 4)), rel=1e-12)
    assert mk.roughness == pytest.approx(2 * (d + 2) / (cd * (d + 4)) * (1 / (d + 4)) ** (d / 2), rel=1e-12)


def _grid(radius, d, m):
    # midpoint grid whose cells tile [-radius, radius]^d exactly
    edges = np.linspace(-radius, radius, m + 1)
    mid = 0.5 * (edges[1:] + edges[:-1])
    mesh = np.meshgrid(*([mid] * d), indexing="ij")
    z = np.stack([g.ravel() for g in mesh], axis=-1)
    return z, (edges[1] - edges[0]) ** d


@pytest.mark.parametrize("name,form,d", list(itertools.product(KERNEL_NAMES, FORMS, [1, 2, 3])))
def test_integrates_to_one_with_unit_covariance(name, form, d):
    mk = get_multivariate_kernel(name, form, d)
    radius = (mk.radius if mk.is_radial else mk.univariate.unit_radius) if mk.univariate.is_compact else 9.0
    m = {1: 20001, 2: 801, 3: 161}[d]
    z, vol = _grid(radius, d, m)
    k = mk.evaluate(z)
    assert np.all(k >= 0)
    mass = k.sum() * vol
    cov = (z * k[:, None]).T @ z * vol
    # midpoint rule: discontinuous radial kernels converge slowest
    tol = 2e-3 if (name == "uniform" and form == "spherical" and d > 1) else 2e-4
    assert mass == pytest.approx(1.0, abs=tol)
    assert np.allclose(cov, np.eye(d), atol=5 * tol)


def test_fourth_order_kernels_integrate_to_one_and_have_zero_second_moment():
    # Wand & Jones (1995, Sec. 2.8): higher-order kernels have mu2 = 0 and go negative.
    for name in ("gaussian4", "epanechnikov4"):
        k = get_kernel(name)
        lim = 1.0 if k.is_compact else 40.0
        assert integrate.quad(k, -lim, lim)[0] == pytest.approx(1.0, abs=1e-10)
        assert integrate.quad(lambda u: u * u * k(u), -lim, lim)[0] == pytest.approx(0.0, abs=1e-10)
        assert integrate.quad(lambda u: k(u) ** 2, -lim, lim)[0] == pytest.approx(k.roughness, rel=1e-9)
        assert k(np.array([0.95 if k.is_compact else 2.5]))[0] < 0


def test_unknown_kernel_suggests_closest():
    with pytest.raises(ValueError, match="did you mean 'epanechnikov'"):
        get_kernel("epanechnikow")
    with pytest.raises(ValueError, match="valid kernels are uniform, triangular"):
        get_kernel("boxcar")


@pytest.mark.parametrize("name,form", list(itertools.product(KERNEL_NAMES, FORMS)))
def test_kernel_samples_have_unit_covariance(name, form):
    mk = get_multivariate_kernel(name, form, 3)
    x = mk.sample(200_000, np.random.default_rng(3))
    # Monte Carlo: sd of a sample variance ~ sqrt(2/n) * (kurtosis factor) < 0.01
    assert np.allclose(np.cov(x.T), np.eye(3), atol=0.02)
    if mk.is_compact:
        assert np.all(np.sqrt((x ** 2).sum(axis=1)) <= mk.radius + 1e-12)
