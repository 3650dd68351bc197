"""Products for risk models: marginals, conditionals, CDF/exceedance, quantiles, HDR, uncertainty."""

import numpy as np
import pytest
from scipy import stats

import mvkde
from conftest import grid_integral

S = np.array([[1.0, 0.6], [0.6, 2.0]])


@pytest.fixture(scope="module")
def big_normal():
    x = np.random.default_rng(2024).multivariate_normal([0, 0], S, size=20_000)
    return x, mvkde.fit(x)


@pytest.mark.parametrize("a,b", [(0.0, 0.0), (1.0, 1.0), (-1.0, 0.5), (1.5, 2.0)])
def test_exceedance_against_true_bivariate_normal(big_normal, a, b):
    # Reference: scipy.stats.multivariate_normal.cdf of the true law;
    # P(X1 > a, X2 > b) = 1 - F1(a) - F2(b) + F(a, b).
    x, est = big_normal
    mvn = stats.multivariate_normal([0, 0], S)
    truth = 1 - stats.norm.cdf(a) - stats.norm.cdf(b, scale=np.sqrt(2)) + mvn.cdf([a, b])
    mc_sd = np.sqrt(truth * (1 - truth) / len(x))
    # Monte Carlo error of the sample plus the O(H) smoothing of a normal-scale estimate
    assert abs(est.exceedance([a, b])[0] - truth) < 4 * mc_sd
    assert abs(est.cdf([a, b])[0] - mvn.cdf([a, b])) < 4 * np.sqrt(truth * (1 - truth) / len(x)) + 0.004


def test_exact_and_grid_cdf_agree(rng):
    x = rng.multivariate_normal([0, 0], S, size=400)
    diag = mvkde.fit(x, kernel="biweight", parametrization="diagonal")
    pts = rng.multivariate_normal([0, 0], S, size=30)
    from mvkde import products
    exact = products.cdf(diag, pts)              # closed form: sum of products of kernel CDFs
    axes, vals, _ = products.estimate._grid_cumulative(diag, 512, None, upper=False)
    assert np.allclose(exact, products.estimate._interp(axes, vals, pts, upper=False), atol=2e-3)
    up = products.exceedance(diag, pts)
    axes, vals, _ = products.estimate._grid_cumulative(diag, 512, None, upper=True)
    assert np.allclose(up, products.estimate._interp(axes, vals, pts, upper=True), atol=2e-3)


def test_marginal_equals_one_dimensional_estimate(rng):
    # The marginal of a Gaussian-kernel estimate is the 1-D estimate with the corresponding H entry
    # (Wand & Jones 1995, Sec. 4.2: marginals of normal kernels are normal).
    x = rng.multivariate_normal([0, 0], S, size=500)
    est = mvkde.fit(x)
    m = est.marginal(["x1"])
    one = mvkde.fit(x[:, 1], bandwidth=[[est.H[1, 1]]], names=["x1"])
    pts = np.linspace(-4, 4, 41)[:, None]
    np.testing.assert_allclose(m.pdf(pts), one.pdf(pts), rtol=1e-12)
    np.testing.assert_allclose(m.pdf(pts), stats.gaussian_kde(x[:, 1], bw_method=np.sqrt(
        est.H[1, 1] / np.var(x[:, 1], ddof=1)))(pts[:, 0]), rtol=1e-10)
    # numerical marginal from the joint grid agrees
    mg = est.marginal_grid(["x1"], size=200)
    np.testing.assert_allclose(mg.values, m.pdf(mg["x1"].values[:, None]), atol=2e-4)


def test_product_kernel_marginal_of_leading_variable_is_exact(rng):
    x = rng.multivariate_normal([0, 0], S, size=300)
    est = mvkde.fit(x, kernel="epanechnikov")
    m = est.marginal(["x0"])
    mg = est.marginal_grid(["x0"], size=400)
    np.testing.assert_allclose(mg.values, m.pdf(mg["x0"].values[:, None]), atol=3e-3 * mg.values.max())
    with pytest.raises(mvkde.InputError, match="marginal_grid"):
        est.marginal(["x1"])


def test_conditional_of_bivariate_normal(big_normal):
    # X2 | X1 = a ~ N(rho s2/s1 a, s2^2 (1 - rho^2)) for the normal law (closed form);
    # the estimate adds its smoothing, so compare the mean and check normalisation.
    x, est = big_normal
    c = est.conditional({"x0": 1.0}, size=400)
    assert grid_integral(c) == pytest.approx(1.0, abs=1e-6)
    grid = c["x1"].values
    mean = np.trapezoid(grid * c.values, grid)
    assert mean == pytest.approx(0.6, abs=0.06)
    cb = est.conditional({"x0": (0.5, 1.5)}, size=200)
    assert grid_integral(cb) == pytest.approx(1.0, abs=1e-6)


def test_hdr_level_and_coverage():
    # Closed form: for N(0, Sigma) in 2-D the squared Mahalanobis radius is chi-square with 2 degrees of
    # freedom, i.e. exponential with mean 2, so the HDR of mass m is the ellipse r^2 <= -2 log(1 - m) and
    # its level is (1 - m) / (2 pi |Sigma|^{1/2}).  A Gaussian-kernel estimate of a standard normal
    # sample has expectation N(0, I + H) (phi_A * phi_B = phi_{A+B}; Wand & Jones 1995, Sec. 4.2), so its
    # 95 % level is held to 0.05 / (2 pi |I + H|^{1/2}) within 2 % at n = 20,000 (the unsmoothed law's
    # level, 0.05 / (2 pi), is 3.6 % higher here and would fail).  Coverage of the estimated region
    # under the true law within 1 %.
    x = np.random.default_rng(7).standard_normal((20_000, 2))
    est = mvkde.fit(x)
    assert est.kernel.name == "gaussian"
    level = est.hdr_levels([0.95], size=256)[0]
    closed = 0.05 / (2 * np.pi * np.sqrt(np.linalg.det(np.eye(2) + est.H)))
    assert level == pytest.approx(closed, rel=0.02)
    g = est.grid(256)
    X, Y = np.meshgrid(g["x0"].values, g["x1"].values, indexing="ij")
    true = np.exp(-(X ** 2 + Y ** 2) / 2) / (2 * np.pi)
    cell = (g["x0"].values[1] - g["x0"].values[0]) * (g["x1"].values[1] - g["x1"].values[0])
    for mass, lv in zip((0.5, 0.9, 0.95, 0.99), est.hdr_levels([0.5, 0.9, 0.95, 0.99], size=256)):
        coverage = true[g.values >= lv].sum() * cell
        assert coverage == pytest.approx(mass, abs=0.01)
    assert est.mass_above(level, size=256)[0] == pytest.approx(0.95, abs=2e-3)


def test_quantiles_invert_the_cdf(rng):
    x = rng.gamma(3.0, 2.0, size=(800, 1))
    est = mvkde.fit(x)
    probs = [0.05, 0.5, 0.95]
    q = est.quantiles("x0", probs)
    np.testing.assert_allclose(est.cdf(q[:, None]), probs, atol=5e-4)
    y = rng.multivariate_normal([0, 0], S, size=800)
    e2 = mvkde.fit(y)
    q2 = e2.quantiles("x1", probs)
    np.testing.assert_allclose(e2.marginal(["x1"]).cdf(q2[:, None]), probs, atol=5e-4)


def test_standard_error_against_exact_variance():
    # Exact variance for a Gaussian kernel and normal target [calc, from phi_A * phi_B = phi_{A+B}]:
    # Var f_hat(x) = n^{-1} [ (4 pi)^{-d/2} |H|^{-1/2} phi_{S + H/2}(x) - (phi_{S + H}(x))^2 ].
    # The asymptotic formula f R(K) / (n |H|^{1/2}) (Wand & Jones 1995, Sec. 4.3) is close at moderate n.
    rng = np.random.default_rng(11)
    n, H = 400, np.array([[0.15, 0.0], [0.0, 0.15]])
    est = mvkde.fit(rng.standard_normal((n, 2)), bandwidth=H)
    x0 = np.zeros((1, 2))
    exact = (stats.multivariate_normal(cov=np.eye(2) + H / 2).pdf([0, 0]) / (4 * np.pi * np.sqrt(np.linalg.det(H)))
             - stats.multivariate_normal(cov=np.eye(2) + H).pdf([0, 0]) ** 2) / n
    se = est.standard_error(x0)[0]
    assert se == pytest.approx(np.sqrt(exact), rel=0.25)
    # and simulated spread of f_hat(0) over replications agrees with the exact variance
    vals = [mvkde.fit(rng.standard_normal((n, 2)), bandwidth=H).pdf(x0)[0] for _ in range(300)]
    assert np.std(vals) == pytest.approx(np.sqrt(exact), rel=0.15)


def test_standard_error_with_a_point_mass_against_exact_variance():
    # Zero-inflated law: with probability p the first variable sits at 0 (point mass, threshold 1),
    # else (X1, X2) ~ N((50, 0), I), far above the threshold.  The continuous part of the estimate is
    # f_c(x) = n^{-1} sum_i 1{wet_i} K_H(x - X_i) over ALL n rows, so its exact variance is
    # n^{-1} [ (1 - p) (4 pi)^{-d/2} |H|^{-1/2} phi_{I + H/2}(x - mu) - ((1 - p) phi_{I + H}(x - mu))^2 ]
    # (phi_A * phi_B = phi_{A+B}, as in test_standard_error_against_exact_variance), and the asymptotic
    # f_c R(K) / (n |H|^{1/2}) (Wand & Jones 1995, Sec. 4.3) is within a few % of it at the mode.
    rng = np.random.default_rng(11)
    n, p, H = 2000, 0.5, np.array([[0.15, 0.0], [0.0, 0.15]])
    mu = np.array([50.0, 0.0])
    x = mu + rng.standard_normal((n, 2))
    x[rng.random(n) < p, 0] = 0.0
    est = mvkde.fit(x, bandwidth=H, bounds=[(0, None), None], boundary="reflect", point_masses=[1.0, None])
    assert est.point_mass_probability == pytest.approx(p, abs=0.05)
    q = 1 - p
    exact = (q * stats.multivariate_normal(cov=np.eye(2) + H / 2).pdf([0, 0]) / (4 * np.pi * np.sqrt(np.linalg.det(H)))
             - (q * stats.multivariate_normal(cov=np.eye(2) + H).pdf([0, 0])) ** 2) / n
    assert est.standard_error(mu[None, :])[0] == pytest.approx(np.sqrt(exact), rel=0.15)


def test_bootstrap_band_coverage_at_the_mode():
    # Percentile bootstrap with H held fixed covers E f_hat(x) = phi_{1 + h^2}(x) for a
    # standard normal sample (closed form).  Simulation: coverage within 5 points of 90 %.
    rng = np.random.default_rng(5)
    n, h2, level = 300, 0.2, 0.9
    target = stats.norm.pdf(0, scale=np.sqrt(1 + h2))
    hits = 0
    trials = 200
    for t in range(trials):
        est = mvkde.fit(rng.standard_normal(n), bandwidth=[[h2]])
        lo, hi = est.bootstrap_bands(np.zeros((1, 1)), level=level, replicates=150, seed=t)
        hits += bool(lo[0] <= target <= hi[0])
    assert abs(hits / trials - level) <= 0.05 + 1e-12


def test_samples_follow_the_estimate(rng):
    # Kolmogorov-Smirnov (scipy.stats.kstest) of smoothed-bootstrap draws against the
    # estimate's own marginal CDFs: should not reject at the 1 % level.
    x = rng.multivariate_normal([0, 0], S, size=500)
    est = mvkde.fit(x, kernel="epanechnikov", parametrization="diagonal")
    s = est.sample(4000, seed=3)
    for j, name in enumerate(est.names):
        m = est.marginal([name])
        assert stats.kstest(s[:, j], lambda v: m.cdf(np.asarray(v)[:, None])).pvalue > 0.01


def test_probability_grid_and_bad_arguments(rng):
    # Exact sum: a Gaussian-kernel estimate with diagonal H = diag(h0^2, h1^2) has
    # P(X > a, Y > b) = (1/n) sum_i Phi_bar((a - X_i0)/h0) Phi_bar((b - X_i1)/h1) and the CDF likewise
    # with Phi (scipy.stats.norm over the sample).  The grid products integrate the density grid by
    # the trapezoid rule: error O(dx^2), about 7e-4 at 64 nodes here, 4x less at 128.
    x = rng.normal(size=(300, 2))
    est = mvkde.fit(x, parametrization="diagonal")
    assert est.kernel.name == "gaussian" and est.H[0, 1] == 0.0
    h = np.sqrt(np.diag(est.H))
    errors = []
    for size, tol in ((64, 2e-3), (128, 5e-4)):
        for kind, law in (("exceedance", stats.norm.sf), ("cdf", stats.norm.cdf)):
            pg = est.probability_grid(kind, size=size)
            assert pg.dims == ("x0", "x1")
            a, b = pg["x0"].values, pg["x1"].values
            exact = law((a[:, None] - x[:, 0]) / h[0]) @ law((b[:, None] - x[:, 1]) / h[1]).T / len(x)
            err = float(np.abs(pg.values - exact).max())
            assert err < tol, (kind, size, err)
            errors.append(err)
    assert errors[2] < errors[0] / 3 and errors[3] < errors[1] / 3   # second-order convergence
    with pytest.raises(mvkde.InputError, match="unknown variable"):
        est.marginal(["nope"])
    with pytest.raises(mvkde.InputError, match="between 0 and 1"):
        est.hdr_levels([1.2])
    with pytest.raises(mvkde.InputError, match="between 0 and 1"):
        est.quantiles("x0", [0.0])


def test_cdf_and_exceedance_include_the_point_mass(rng):
    # Simulated (not observations) zero-inflated precipitation (dry probability 0.4) with temperature independent of it:
    # P(pr <= 0.5, T <= big) is the dry probability, P(pr > -1, T > t) is P(T > t) (closed form
    # of the simulation law: T ~ N(15, 4^2)).
    n = 3000
    dry = rng.random(n) < 0.4
    pr = np.where(dry, 0.0, 1.0 + rng.gamma(0.8, 5.0, n))
    t = rng.normal(15, 4, n)
    est = mvkde.fit(np.column_stack([pr, t]), bounds=[(0, None), (None, None)], point_masses=[1.0, None])
    p = est.point_mass_probability
    assert p == pytest.approx(dry.mean(), abs=1e-12)
    assert est.cdf([[0.5, 60.0]])[0] == pytest.approx(p, abs=2e-3)
    # P(T > 15): the sample's own proportion (the smoothing bias at the median is far below 0.01), and the
    # law's 0.5 within four binomial standard errors
    assert est.exceedance([[-1.0, 15.0]])[0] == pytest.approx((t > 15).mean(), abs=0.01)
    assert est.exceedance([[-1.0, 15.0]])[0] == pytest.approx(0.5, abs=4 * 0.5 / np.sqrt(n) + 0.01)
    wet_hot = ((pr > 5) & (t > 18)).mean()
    assert est.exceedance([[5.0, 18.0]])[0] == pytest.approx(wet_hot, abs=0.02)
    assert est.cdf([[1e4, 1e3]])[0] == pytest.approx(1.0, abs=5e-3)
