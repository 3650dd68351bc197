"""Bounded supports: boundary methods against closed forms, masses, ISE, point masses, masks."""

import math
import sys
from pathlib import Path

import numpy as np
import pytest
import xarray as xr
from scipy import integrate, special, stats

import mvkde
from mvkde.boundary import modified_gamma_shape
from mvkde.boundary.moments import partial_moment, raw_partial_moment
from mvkde.kernels import get_kernel

from reference import reference_density

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "benchmarks"))
import boundary_ise  # noqa: E402  (the ISE study: the tests run a reduced version of it)

GL_X, GL_W = np.polynomial.legendre.leggauss(8)


def panels(a, b, k):
    e = np.linspace(a, b, k + 1)
    mid, half = 0.5 * (e[:-1] + e[1:]), 0.5 * np.diff(e)
    return (mid[:, None] + half[:, None] * GL_X).ravel(), (half[:, None] * GL_W).ravel()


def support_nodes(lo, hi, top=None, k=300):
    """Quadrature nodes over [lo, hi] (hi may be None) that resolve spikes at the bounds:
    x = lo + e^y for a one-sided support, the logistic map for a two-sided one."""
    if hi is None:
        y, w = panels(-25.0, math.log(top - lo), k)
        return lo + np.exp(y), w * np.exp(y)
    y, w = panels(-18.0, 18.0, k // 3)
    z = special.expit(y)
    return lo + (hi - lo) * z, w * (hi - lo) * z * (1 - z)


# -- partial moments (Jones 1993) ---------------------------------------------

def test_partial_moments_closed_forms():
    # Jones (1993, Stat. Comput. 3) partial moments a_l(p) = int_{-1}^p u^l K(u) du, checked by quadrature;
    # Epanechnikov values at p = 0: 1/2, -3/16, 1/10 (integrating 3/4 (1 - u^2) u^l over [-1, 0]).
    epa, gau, biw = get_kernel("epanechnikov"), get_kernel("gaussian"), get_kernel("biweight")
    np.testing.assert_allclose([raw_partial_moment(epa, l, 0.0) for l in range(3)], [0.5, -0.1875, 0.1], rtol=1e-14)
    for p in (-0.7, -0.2, 0.0, 0.35, 0.9):
        for l in range(3):
            for k, lo in ((epa, -1.0), (biw, -1.0), (gau, -40.0)):
                ref = integrate.quad(lambda u: u ** l * k(u), lo, p, epsabs=1e-14)[0]
                assert raw_partial_moment(k, l, p) == pytest.approx(ref, abs=1e-10), (k.name, l, p)
    # Gaussian closed forms: Phi(p), -phi(p), Phi(p) - p phi(p)
    p = np.linspace(-3, 3, 13)
    np.testing.assert_allclose(raw_partial_moment(gau, 2, p), stats.norm.cdf(p) - p * stats.norm.pdf(p))


@pytest.mark.parametrize("name", ["gaussian", "epanechnikov", "biweight", "triangular", "cosine"])
def test_linear_boundary_kernel_moments(name):
    # Jones (1993): K_L = (a2 - a1 u) K / (a0 a2 - a1^2) integrates to 1 with zero first moment on u <= p.
    k = get_kernel(name)
    lo = -1 / k.scale if k.is_compact else -40.0
    for p in (0.0, 0.3, 1.0):
        a0, a1, a2 = (partial_moment(k, l, p) for l in range(3))
        KL = lambda u: (a2 - a1 * u) * k.unit(u) / (a0 * a2 - a1 ** 2)  # noqa: E731
        assert integrate.quad(KL, lo, p, points=[0.0] if p > 0 else None)[0] == pytest.approx(1.0, abs=1e-8)
        assert integrate.quad(lambda u: u * KL(u), lo, p, points=[0.0] if p > 0 else None)[0] == pytest.approx(
            0.0, abs=1e-8)


def test_modified_gamma_shape_is_continuous():
    # Chen (2000): rho_b(x) = x/b for x >= 2b, (x/(2b))^2 + 1 below; both sides equal 2 at x = 2b.
    b = 0.37
    below = modified_gamma_shape(2 * b * (1 - 1e-12), b)
    at = modified_gamma_shape(2 * b, b)
    assert below == pytest.approx(2.0, abs=1e-10) and at == pytest.approx(2.0)
    x = np.array([0.0, 0.2, 0.5])
    np.testing.assert_allclose(modified_gamma_shape(x, b), (x / b) ** 2 / 4 + 1)


# -- each method against its formula written out -----------------------------------

def test_reflection_equals_reflected_sums(rng):
    # Silverman (1986, Sec. 2.10): f(x) = (1/n) sum [K_h(x - X_i) + K_h(x + X_i)] on [0, inf).
    x = rng.exponential(size=(300, 1))
    H = np.array([[0.09]])
    est = mvkde.fit(x, bounds=[(0, None)], boundary="reflect", bandwidth=H, kernel="biweight")
    pts = np.linspace(0, 2, 41)[:, None]
    ref = reference_density(pts, x, H, "biweight") + reference_density(pts, -x, H, "biweight")
    np.testing.assert_allclose(est.pdf(pts), ref, rtol=1e-10)
    # correlated H with a bounded margin: the image kernel has bandwidth R H R
    y = np.column_stack([rng.exponential(size=200), rng.normal(size=200)])
    H2 = np.array([[0.1, 0.05], [0.05, 0.2]])
    est2 = mvkde.fit(y, bounds=[(0, None), None], boundary="reflect", bandwidth=H2)
    R = np.diag([-1.0, 1.0])
    pts2 = np.column_stack([rng.random(30) * 2, rng.normal(size=30)])
    ref2 = reference_density(pts2, y, H2) + reference_density(pts2, y @ R, R @ H2 @ R)
    np.testing.assert_allclose(est2.pdf(pts2), ref2, rtol=1e-10)


def test_renormalize_and_linear_equal_formulas(rng):
    x = rng.exponential(size=(400, 1))
    h = 0.25
    pts = np.linspace(0, 1.5, 31)[:, None]
    fhat = reference_density(pts, x, np.array([[h * h]]))
    # pointwise renormalisation: f_hat(x) / Phi(x/h), divided by the total mass
    est = mvkde.fit(x, bounds=[(0, None)], boundary="renormalize", bandwidth=[[h * h]])
    c = est.attrs["boundary_mass_before_normalisation"]
    np.testing.assert_allclose(est.pdf(pts), fhat / stats.norm.cdf(pts[:, 0] / h) / c, rtol=1e-9)
    # per-kernel renormalisation: sum_i K_h(x - X_i) / Phi(X_i / h) / n
    est = mvkde.fit(x, bounds=[(0, None)], boundary="renormalize-kernel", bandwidth=[[h * h]])
    ref = (stats.norm.pdf((pts - x[:, 0]) / h) / stats.norm.cdf(x[:, 0] / h)).mean(axis=1) / h
    np.testing.assert_allclose(est.pdf(pts), ref, rtol=1e-9)
    # Jones (1993) linear boundary kernel, Epanechnikov (unit variance: raw support scaled by sqrt 5)
    est = mvkde.fit(x, bounds=[(0, None)], boundary="linear", bandwidth=[[h * h]], kernel="epanechnikov")
    c = est.attrs["boundary_mass_before_normalisation"]
    s = math.sqrt(5.0) * h          # raw half-width of the unit-variance kernel with sd h
    p = pts[:, 0] / s
    q = np.clip(p, -1, 1)
    a0, a1, a2 = (2 + 3 * q - q ** 3) / 4, -(3 / 16) * (1 - q * q) ** 2, (2 + 5 * q ** 3 - 3 * q ** 5) / 20
    u = (pts - x[:, 0]) / s
    K = np.where(np.abs(u) <= 1, 0.75 * (1 - u * u), 0.0)
    KL = (a2[:, None] - a1[:, None] * u) * K / (a0 * a2 - a1 * a1)[:, None]
    np.testing.assert_allclose(est.pdf(pts), KL.mean(axis=1) / s / c, rtol=1e-8, atol=1e-12)
    assert abs(c - 1) < 0.02


def test_asymmetric_kernels_equal_scipy_sums(rng):
    # Chen (1999): Beta(x/b + 1, (1 - x)/b + 1) density at the data; Chen (2000) modified gamma kernel.
    # Reference library: scipy.stats.beta / scipy.stats.gamma densities.
    z = rng.beta(2, 5, size=(300, 1))
    est = mvkde.fit(z, bounds=[(0, 1)], boundary="beta", bandwidth="normal")
    b, c = est.attrs["beta_b_x0"], est.attrs["boundary_mass_before_normalisation"]
    pts = np.linspace(0, 1, 21)
    ref = np.array([stats.beta(t / b + 1, (1 - t) / b + 1).pdf(z[:, 0]).mean() for t in pts]) / c
    np.testing.assert_allclose(est.pdf(pts[:, None]), ref, rtol=1e-8)
    assert abs(c - 1) < 0.05
    x = rng.exponential(size=(300, 1))
    est = mvkde.fit(x, bounds=[(0, None)], boundary="gamma", bandwidth="normal")
    b, c = est.attrs["gamma_b_x0"], est.attrs["boundary_mass_before_normalisation"]
    pts = np.linspace(0, 3, 31)
    ref = np.array([stats.gamma(modified_gamma_shape(t, b), scale=b).pdf(x[:, 0]).mean() for t in pts]) / c
    np.testing.assert_allclose(est.pdf(pts[:, None]), ref, rtol=1e-8)


# -- mass: zero outside, one inside ------------------------------------------------

ONE_SIDED = ["none", "reflect", "renormalize", "renormalize-kernel", "linear", "transform", "gamma"]
TWO_SIDED = ["reflect", "renormalize", "renormalize-kernel", "linear", "transform", "beta"]


@pytest.mark.parametrize("method", ONE_SIDED)
def test_mass_one_sided(rng, method):
    x = rng.exponential(size=(500, 1)) + 2.0
    est = mvkde.fit(x, bounds=[(2.0, None)], boundary=method, bandwidth="normal")
    nodes, w = support_nodes(2.0, None, top=2.0 + 50 * (x.max() - 2.0))
    mass = float(w @ est.pdf(nodes[:, None]))
    assert np.all(est.pdf(np.array([[1.999], [0.0], [-5.0]])) == 0.0)
    assert np.all(est.logpdf(np.array([[1.5]])) == -np.inf)
    if method == "none":
        assert mass < 0.97  # the uncorrected estimate leaks mass past the bound
    else:
        assert mass == pytest.approx(1.0, abs=1e-3)
    if method == "linear":
        # the reported negative mass equals that of Jones's (1993) formula written out (zero for this
        # sample, whose density is highest at the bound): see test_linear_negative_mass_by_quadrature
        assert est.kernel.name == "gaussian"
        g = est.grid(2000, limits=[(2.0, x.max() + 3)])
        xs = g["x0"].values
        f = jones_linear_gaussian(xs, x[:, 0], math.sqrt(est.H[0, 0]), 2.0)
        f /= integrate.trapezoid(jones_linear_gaussian(
            np.linspace(2.0, x.max() + 12, 40001), x[:, 0], math.sqrt(est.H[0, 0]), 2.0),
            np.linspace(2.0, x.max() + 12, 40001))
        independent = float(-f[f < 0].sum() * (xs[1] - xs[0]))
        assert g.attrs["negative_mass"] == pytest.approx(independent, abs=1e-9)


def jones_linear_gaussian(t, X, h, lo):
    """Jones (1993, Stat. Comput. 3, 135-146) linear boundary kernel estimate on [lo, inf), Gaussian
    kernel, not normalised: (1/n) sum (a2 - a1 u) phi(u) / ((a0 a2 - a1^2) h), u = (t - X_i)/h, with the
    Gaussian partial moments a0 = Phi(p), a1 = -phi(p), a2 = Phi(p) - p phi(p), p = (t - lo)/h."""
    t = np.atleast_1d(np.asarray(t, dtype=float))
    p = (t - lo) / h
    a0, a1, a2 = stats.norm.cdf(p), -stats.norm.pdf(p), stats.norm.cdf(p) - p * stats.norm.pdf(p)
    u = (t[:, None] - X[None, :]) / h
    K = (a2[:, None] - a1[:, None] * u) * stats.norm.pdf(u) / (a0 * a2 - a1 ** 2)[:, None]
    return K.mean(axis=1) / h


def test_linear_negative_mass_by_quadrature():
    # Data whose density is zero at the bound and rises (Gamma(4)): the linear boundary kernel goes
    # negative near 0.  The reported negative_mass is held to the integral of the negative part of
    # Jones's (1993) formula written out (jones_linear_gaussian), normalised by its own integral,
    # both by scipy.integrate.quad.  The attribute is a Riemann sum over the grid nodes (node spacing
    # dx per node), so it may differ from the integral by at most dx x the largest |f| there.
    X = np.random.default_rng(31).gamma(4.0, 1.0, size=400)
    h = 1.0
    est = mvkde.fit(X[:, None], bounds=[(0.0, None)], boundary="linear", bandwidth=[[h * h]])
    top = X.max() + 10 * h
    f = lambda t: float(jones_linear_gaussian(t, X, h, 0.0)[0])  # noqa: E731
    total = integrate.quad(f, 0.0, top, limit=400, points=[2 * h, 4 * h])[0]
    assert est.attrs["boundary_mass_before_normalisation"] == pytest.approx(total, rel=1e-7)
    negative = integrate.quad(lambda t: max(-f(t), 0.0), 0.0, 4 * h, limit=400)[0] / total
    assert negative > 1e-4          # a case that really goes negative
    g = est.grid(4000, limits=[(0.0, top)])
    dx = float(g["x0"][1] - g["x0"][0])
    worst = float(-g.values.min())
    assert g.attrs["negative_mass"] == pytest.approx(negative, abs=dx * worst + 1e-9)
    assert est.negative_mass(4000, limits=[(0.0, top)]) == g.attrs["negative_mass"]


@pytest.mark.parametrize("method", TWO_SIDED)
def test_mass_two_sided(rng, method):
    x = 10 + 5 * rng.beta(1.0, 3.0, size=(500, 1))  # density positive and steep at 10, zero at 15
    est = mvkde.fit(x, bounds=[(10, 15)], boundary=method, bandwidth="normal")
    nodes, w = support_nodes(10, 15)
    assert float(w @ est.pdf(nodes[:, None])) == pytest.approx(1.0, abs=1e-3)
    assert np.all(est.pdf(np.array([[9.99], [15.01]])) == 0.0)


@pytest.mark.parametrize("method", ["reflect", "renormalize", "renormalize-kernel", "linear", "transform",
                                    "gamma"])
def test_mass_bivariate_correlated(rng, method):
    x1 = rng.exponential(size=400)
    x = np.column_stack([x1, x1 - 1 + rng.normal(size=400)])
    opts = {"parametrization": "diagonal"} if method == "gamma" else {}
    est = mvkde.fit(x, bounds=[(0, None), None], boundary=method, **opts, bandwidth="normal")
    n1, w1 = support_nodes(0.0, None, top=30 * x1.max(), k=60)
    n2, w2 = panels(x[:, 1].min() - 4, x[:, 1].max() + 4, 16)
    A, B = np.meshgrid(n1, n2, indexing="ij")
    f = est.pdf(np.column_stack([A.ravel(), B.ravel()])).reshape(A.shape)
    assert float(w1 @ f @ w2) == pytest.approx(1.0, abs=1e-3)
    assert np.all(est.pdf(np.array([[-0.01, 0.0], [-1.0, 2.0]])) == 0.0)


@pytest.mark.parametrize("method", ["reflect", "renormalize", "linear", "beta"])
def test_mass_box_with_corners(rng, method):
    x = rng.random((400, 2)) ** 1.5
    est = mvkde.fit(x, bounds=[(0, 1), (0, 1)], boundary=method, parametrization="diagonal", bandwidth="normal")
    nodes, w = support_nodes(0.0, 1.0, k=60)
    A, B = np.meshgrid(nodes, nodes, indexing="ij")
    f = est.pdf(np.column_stack([A.ravel(), B.ravel()])).reshape(A.shape)
    assert float(w @ f @ w) == pytest.approx(1.0, abs=1e-3)


# -- ISE near the bound (reduced version of benchmarks/boundary_ise.py) -------------------

@pytest.fixture(scope="module")
def ise():
    # 6 samples of n = 1000 per target (the full study, 50 samples, is benchmarks/boundary_ise.md)
    wanted = ["exponential(1)", "gamma(2, 1)", "truncated normal N(0.3, 0.25^2) on [0, 1]",
              "bivariate: X1 ~ exp(1), X2 = X1 - 1 + N(0, 1) (corr 0.71)"]
    results, _ = boundary_ise.run(reps=6, n=1000, methods=("none", "reflect", "renormalize", "linear"),
                                  which=wanted)
    return {t: {m: v.mean() for m, v in r.items()} for t, r in results.items()}


def test_ise_corrections_beat_uncorrected_where_density_positive(ise):
    for target in ("exponential(1)", "bivariate: X1 ~ exp(1), X2 = X1 - 1 + N(0, 1) (corr 0.71)"):
        r = ise[target]
        for method in ("reflect", "renormalize", "linear"):
            assert r["none"] / r[method] >= 3.0, (target, method, r)
    # a steep truncated normal (f'(0) = 4.3 f(0)): the O(h) methods gain less than 3x, the linear
    # boundary kernel (O(h^2) at the bound, Jones 1993) still does; see benchmarks/boundary_ise.md
    r = ise["truncated normal N(0.3, 0.25^2) on [0, 1]"]
    assert r["none"] / r["linear"] >= 3.0, r
    assert r["reflect"] < r["none"] and r["renormalize"] < r["none"], r


def test_ise_density_vanishing_at_bound(ise):
    # gamma(2, 1), f(0) = 0, f'(0) = 1: the linear boundary kernel still improves on the uncorrected
    # estimate, while reflection doubles its bias (E f_R - f = 2 (E f_none - f) for f linear through 0,
    # derived from the partial moments) -- measured here, not assumed.
    r = ise["gamma(2, 1)"]
    assert r["linear"] < r["none"], r
    assert r["reflect"] > r["none"], r


def test_ise_uniform_box():
    results, _ = boundary_ise.run(reps=3, n=1000, methods=("none", "reflect", "renormalize", "linear"),
                                  which=["uniform on [0, 1]^2"])
    r = {m: v.mean() for m, v in results["uniform on [0, 1]^2"].items()}
    for method in ("reflect", "renormalize", "linear"):
        assert r["none"] / r[method] >= 3.0, (method, r)


# -- point mass ---------------------------------------------------------------------

def _zero_inflated(rng, n, p_dry):
    """Simulated daily rain and temperature (not observations): a zero-inflated gamma and a normal."""
    dry = rng.random(n) < p_dry
    pr = np.where(dry, rng.random(n) * 0.9, 1.0 + rng.gamma(0.8, 8.0, n))  # dry days: trace amounts < 1 mm
    tas = np.where(dry, rng.normal(24, 3, n), rng.normal(18, 3, n) - 0.1 * pr)
    return pr, tas


def test_point_mass_zero_inflated_gamma(rng):
    n, p_dry = 3000, 0.35
    pr, tas = _zero_inflated(rng, n, p_dry)
    est = mvkde.fit(pr, bounds=[(0, None)], point_masses=[1.0], bandwidth="normal")
    # Monte Carlo error of a binomial proportion (common practice: 3 standard errors)
    assert abs(est.point_mass_probability - p_dry) < 3 * math.sqrt(p_dry * (1 - p_dry) / n)
    nodes, w = support_nodes(1.0, None, top=pr.max() + 40)
    cont = float(w @ est.pdf(nodes[:, None]))
    assert cont == pytest.approx(1 - est.point_mass_probability, abs=1e-3)
    assert cont + float(est.point_mass_grid()) == pytest.approx(1.0, abs=1e-3)
    assert est.point_mass_grid().attrs["part"] == "point mass"
    assert est.grid(64).attrs["part"] == "continuous"
    s = est.sample(8000, seed=3)
    at_bound = s[:, 0] == 0.0
    assert abs(at_bound.mean() - est.point_mass_probability) < 4 * math.sqrt(p_dry * (1 - p_dry) / 8000)
    assert np.all(s[~at_bound, 0] >= 1.0)


def test_point_mass_bivariate_integrates_to_one(rng):
    n, p_dry = 2000, 0.3
    pr, tas = _zero_inflated(rng, n, p_dry)
    est = mvkde.fit(np.column_stack([pr, tas]), bounds=[(0, None), None], point_masses=[1.0, None],
                    names=["pr", "tas"], units=["mm", "degC"], bandwidth="normal")
    n1, w1 = support_nodes(1.0, None, top=pr.max() + 40, k=60)
    n2, w2 = panels(tas.min() - 8, tas.max() + 8, 16)
    A, B = np.meshgrid(n1, n2, indexing="ij")
    cont = float(w1 @ est.pdf(np.column_stack([A.ravel(), B.ravel()])).reshape(A.shape) @ w2)
    dry = est.point_mass_grid(200)
    assert dry.dims == ("tas",) and dry.attrs["point_mass_variable"] == "pr"
    dry_mass = float(np.trapezoid(dry.values, dry["tas"].values))
    assert dry_mass == pytest.approx(est.point_mass_probability, abs=1e-3)
    assert cont + dry_mass == pytest.approx(1.0, abs=2e-3)
    # temperature on dry days is centred near 24 (the law above), on wet days lower
    assert float((dry * dry["tas"]).integrate("tas")) / dry_mass == pytest.approx(24, abs=0.5)


def test_point_mass_bad_input(rng):
    x = rng.exponential(size=(100, 2))
    with pytest.raises(mvkde.InputError, match="at most one variable"):
        mvkde.fit(x, bounds=[(0, None), (0, None)], point_masses=[0.1, 0.1], bandwidth="normal")
    with pytest.raises(mvkde.InputError, match="needs a finite lower bound"):
        mvkde.fit(x, point_masses=[0.1, None], bandwidth="normal")
    with pytest.raises(mvkde.InputError, match="point_masses has 1 entries"):
        mvkde.fit(x, bounds=[(0, None), None], point_masses=[0.1], bandwidth="normal")


# -- disc mask ------------------------------------------------------------------------

def test_disc_mask_uniform_is_flat_to_the_edge(rng):
    n = 10000
    ax = np.linspace(-1.2, 1.2, 81)
    step = ax[1] - ax[0]
    X, Y = np.meshgrid(ax, ax, indexing="ij")
    inside = X ** 2 + Y ** 2 <= 1.0
    mask = xr.DataArray(inside, coords={"x0": ax, "x1": ax}, dims=["x0", "x1"])
    # uniform on the support the mask defines: the union of its cells (a disc up to the cell size)
    cells = np.column_stack([X[inside], Y[inside]])
    x = cells[rng.integers(0, cells.shape[0], n)] + step * (rng.random((n, 2)) - 0.5)
    est = mvkde.fit(x, mask=mask, parametrization="diagonal", bandwidth="normal")
    g = est.grid()
    plain = mvkde.fit(x, parametrization="diagonal", bandwidth="normal").grid(limits=[(-1.2, 1.2)] * 2, size=81)
    cell = (ax[1] - ax[0]) ** 2
    level = 1.0 / (mask.values.sum() * cell)  # uniform density on the mask's cells (~ 1/pi)
    assert float(g.sum()) * cell == pytest.approx(1.0, rel=1e-9)
    rad = np.sqrt(X ** 2 + Y ** 2)
    for a, b in [(0.8, 0.85), (0.85, 0.9), (0.9, 0.95), (0.95, 1.0)]:
        ring = (rad >= a) & (rad <= b)
        assert abs(float(g.values[ring].mean()) / level - 1) < 0.05, (a, b)
    edge = (rad >= 0.95) & (rad <= 1.0)
    assert float(plain.values[edge].mean()) / level < 0.8  # uncorrected: well below at the edge
    assert np.all(g.values[rad > 1.02] == 0.0)
    assert np.all(est.pdf(np.array([[0.9, 0.9], [2.0, 0.0]])) == 0.0)
    s = est.sample(2000, seed=1)
    assert np.all(np.hypot(s[:, 0], s[:, 1]) <= 1.0 + 0.03)


def test_mask_bad_input(rng):
    x = rng.random((50, 2))
    with pytest.raises(mvkde.InputError, match="xarray.DataArray"):
        mvkde.fit(x, mask=np.ones((5, 5), bool), bandwidth="normal")
    ax = np.linspace(0, 1, 5)
    m = xr.DataArray(np.ones((5, 5), bool), coords={"a": ax, "x1": ax}, dims=["a", "x1"])
    with pytest.raises(mvkde.InputError, match="one dimension per variable"):
        mvkde.fit(x, mask=m, bandwidth="normal")


# -- data outside the bounds, refusals, defaults, sampling -------------------------------------

def test_outside_bounds_error_and_drop(rng):
    x = np.column_stack([rng.exponential(size=100), rng.normal(size=100)])
    x[[3, 7], 0] = [-0.5, -2.25]
    with pytest.raises(mvkde.InputError, match=r"2 value\(s\) of x0 .*worst -2.25.*outside='drop'"):
        mvkde.fit(x, bounds=[(0, None), None], bandwidth="normal")
    est = mvkde.fit(x, bounds=[(0, None), None], outside="drop", bandwidth="normal")
    assert est.attrs["n_dropped_outside_support"] == 2 and est.n == 98
    with pytest.raises(mvkde.InputError, match="outside given an invalid value"):
        mvkde.fit(x, bounds=[(0, None), None], outside="clip", bandwidth="normal")


def test_refusals_name_a_method_that_works(rng):
    z = rng.beta(2, 3, size=(200, 2))
    z[:, 1] = 0.5 * z[:, 0] + 0.5 * z[:, 1]
    with pytest.raises(mvkde.InputError, match="correlated.*boundary='reflect'"):
        mvkde.fit(z, bounds=[(0, 1), (0, 1)], boundary="beta", bandwidth="normal")
    with pytest.raises(mvkde.InputError, match="boundary='gamma'"):
        mvkde.fit(z, bounds=[(0, None), (0, 1)], boundary="beta", parametrization="diagonal", bandwidth="normal")
    with pytest.raises(mvkde.InputError, match="boundary='beta'"):
        mvkde.fit(z, bounds=[(0, 1), None], boundary="gamma", bandwidth="normal")
    # the linear boundary kernel falls back to reflection (and says why) where it cannot apply
    spherical = mvkde.fit(z, bounds=[(0, 1), None], boundary="linear", kernel="epanechnikov", form="spherical",
                          bandwidth="normal")
    assert spherical.boundary == "reflect"
    assert "spherical" in spherical.attrs["boundary_choice"] and "'reflect'" in spherical.attrs["boundary_choice"]
    with pytest.raises(mvkde.InputError, match="product epanechnikov.*boundary='reflect'"):
        mvkde.fit(z, bounds=[None, (0, 1)], boundary="renormalize", kernel="epanechnikov", bandwidth="normal")
    zero = np.r_[0.0, rng.exponential(size=50)]
    with pytest.raises(mvkde.InputError, match="point_masses=.*boundary='reflect'"):
        mvkde.fit(zero, bounds=[(0, None)], boundary="transform", bandwidth="normal")
    with pytest.raises(mvkde.InputError, match="did you mean 'reflect'"):
        mvkde.fit(zero, bounds=[(0, None)], boundary="reflekt", bandwidth="normal")


def test_default_method_and_fallback(rng):
    x = np.column_stack([rng.exponential(size=200), rng.normal(size=200)])
    est = mvkde.fit(x, bounds=[(0, None), None], bandwidth="normal")
    assert est.boundary == "linear" and est.grid(16).attrs["boundary"] == "linear"
    est = mvkde.fit(x, bounds=[(0, None), None], kernel="epanechnikov", form="spherical", bandwidth="normal")
    assert est.boundary == "reflect" and "not applicable" in est.attrs["boundary_choice"]
    assert mvkde.fit(x, bandwidth="normal").boundary == "none"


@pytest.mark.parametrize("method", ["none", "reflect", "renormalize", "renormalize-kernel", "linear",
                                    "transform", "gamma"])
def test_sample_respects_bounds_and_law(rng, method):
    x = rng.exponential(size=(400, 1))
    est = mvkde.fit(x, bounds=[(0, None)], boundary=method, bandwidth="normal")
    s = est.sample(3000, seed=11)[:, 0]
    assert np.all(s >= 0.0)
    # the draws follow the estimate: compare the mean with the estimate's own mean (quadrature)
    nodes, w = support_nodes(0.0, None, top=x.max() + 4)
    f = np.maximum(est.pdf(nodes[:, None]), 0.0)
    mean = float(w @ (nodes * f)) / float(w @ f)
    sd = math.sqrt(float(w @ (nodes ** 2 * f)) / float(w @ f) - mean ** 2)
    assert abs(s.mean() - mean) < 4 * sd / math.sqrt(3000)


def test_sample_box_reflection_folds_into_box(rng):
    x = rng.random((300, 2))
    est = mvkde.fit(x, bounds=[(0, 1), (0, 1)], boundary="reflect", bandwidth="normal")
    s = est.sample(5000, seed=2)
    assert s.min() >= 0.0 and s.max() <= 1.0
