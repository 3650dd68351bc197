"""The estimator against reference libraries, closed forms and the brute-force reference."""

import math

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from scipy import stats

import mvkde
from mvkde.kernels import KERNEL_NAMES

from conftest import grid_integral
from reference import radial_unit, reference_density


def _corr_sample(rng, n, d):
    A = rng.normal(size=(d, d))
    cov = A @ A.T + 0.5 * np.eye(d)
    return rng.multivariate_normal(np.arange(d, dtype=float), cov, size=n)


@pytest.mark.parametrize("d", [1, 2, 3])
@pytest.mark.parametrize("weighted", [False, True])
def test_gaussian_equals_scipy_gaussian_kde(rng, d, weighted):
    # Reference library: scipy.stats.gaussian_kde with the same covariance H.
    x = _corr_sample(rng, 400, d)
    w = rng.random(400) if weighted else None
    ref = stats.gaussian_kde(x.T, bw_method=0.4, weights=w)
    est = mvkde.fit(x, bandwidth=ref.covariance, weights=w)
    pts = x.mean(axis=0) + 2.5 * rng.normal(size=(500, d)) * x.std(axis=0)
    np.testing.assert_allclose(est.pdf(pts), ref(pts.T), rtol=1e-10)
    np.testing.assert_allclose(est.logpdf(pts), ref.logpdf(pts.T), rtol=1e-10, atol=1e-10)


def test_normal_scale_equals_scipy_silverman(rng):
    # Wand & Jones (1995) normal-scale H = (4/(d+2))^{2/(d+4)} n^{-2/(d+4)} S, which is
    # scipy.stats.gaussian_kde's silverman_factor()^2 * covariance (reference library).
    for d in (1, 2, 3):
        x = _corr_sample(rng, 300, d)
        w = rng.random(300)
        for weights in (None, w):
            ref = stats.gaussian_kde(x.T, bw_method="silverman", weights=weights)
            est = mvkde.fit(x, bandwidth="normal", weights=weights)
            np.testing.assert_allclose(est.H, ref.covariance, rtol=1e-12)
            n = 300 if weights is None else w.sum() ** 2 / (w ** 2).sum()
            formula = (4 / (d + 2)) ** (2 / (d + 4)) * n ** (-2 / (d + 4)) * np.atleast_2d(
                np.cov(x.T, aweights=weights))
            np.testing.assert_allclose(est.H, formula, rtol=1e-12)


def test_spherical_epanechnikov_equals_sklearn(rng):
    # Reference library: scikit-learn KernelDensity(kernel="epanechnikov") is the radial kernel
    # (1 - |x|^2/b^2) with support radius b.  Its covariance per coordinate is b^2/(d+4)
    # (mu2 of the radial Epanechnikov kernel, Silverman 1986 eq. 4.4) -- not b^2/(d+2).
    from sklearn.neighbors import KernelDensity

    d, b = 3, 0.9
    x = rng.normal(size=(600, d))
    kd = KernelDensity(kernel="epanechnikov", bandwidth=b, rtol=0, atol=0).fit(x)
    est = mvkde.fit(x, kernel="epanechnikov", form="spherical", bandwidth=np.eye(d) * b ** 2 / (d + 4))
    pts = rng.normal(size=(400, d)) * 0.8
    np.testing.assert_allclose(est.pdf(pts), np.exp(kd.score_samples(pts)), rtol=1e-9)


@pytest.mark.parametrize("kernel", KERNEL_NAMES)
@pytest.mark.parametrize("form", ["product", "spherical"])
def test_every_kernel_equals_reference_sum(rng, kernel, form):
    x = _corr_sample(rng, 150, 2)
    H = np.array([[0.4, 0.15], [0.15, 0.3]])
    w = rng.random(150)
    est = mvkde.fit(x, kernel=kernel, form=form, bandwidth=H, weights=w)
    pts = x[:40] + rng.normal(size=(40, 2)) * 0.3
    fn = radial_unit(kernel, 2) if form == "spherical" else None
    np.testing.assert_allclose(est.pdf(pts), reference_density(pts, x, H, kernel, w, kernel_fn=fn),
                               rtol=1e-8, atol=1e-14)


@pytest.mark.parametrize("kernel", KERNEL_NAMES)
def test_grid_integrates_to_one_and_labels(rng, kernel):
    # simulated, not observations
    x = pd.DataFrame({"pr": rng.gamma(2, 3, 500) + 5, "tasmax": rng.normal(20, 3, 500)})
    x.attrs["units"] = {"pr": "mm d-1", "tasmax": "degC"}
    est = mvkde.fit(x, kernel=kernel)
    g = est.grid([90, 80])
    assert g.dims == ("pr", "tasmax")
    lo, hi = est.default_limits()[0]
    np.testing.assert_array_equal(g["pr"].values, np.linspace(lo, hi, 90))
    assert g.attrs["units"] == "1/(mm d-1 degC)"
    assert g.attrs["kernel"] == kernel
    assert grid_integral(g) == pytest.approx(1.0, abs=3e-3)
    assert float(g.min()) >= 0.0


def test_grid_limits_and_names(rng):
    x = rng.normal(size=(200, 2))
    est = mvkde.fit(x)
    assert est.names == ["x0", "x1"]
    g = est.grid((5, 7), limits=[(-1, 1), (0, 3)])
    np.testing.assert_array_equal(g["x0"].values, np.linspace(-1, 1, 5))
    np.testing.assert_array_equal(g["x1"].values, np.linspace(0, 3, 7))
    np.testing.assert_allclose(g.values.ravel(), est.pdf(np.column_stack(
        [a.ravel() for a in np.meshgrid(g["x0"].values, g["x1"].values, indexing="ij")])))
    g2 = est.grid(6, limits={"x1": (0, 1)})
    np.testing.assert_array_equal(g2["x1"].values, np.linspace(0, 1, 6))


def test_dataset_input_names_and_units(rng):
    # simulated wave height and period, not observations
    ds = xr.Dataset({"hs": ("time", rng.gamma(3, 1, 300), {"units": "m"}),
                     "tp": ("time", rng.normal(8, 1, 300), {"units": "s"})})
    est = mvkde.fit(ds)
    assert est.names == ["hs", "tp"] and est.units == ["m", "s"]
    assert est.grid(16).attrs["units"] == "1/(m s)"
    df = ds.to_dataframe()
    np.testing.assert_allclose(est.pdf(df.iloc[:5]), est.pdf(df.to_numpy()[:5]))


@pytest.mark.parametrize("kernel,form", [("gaussian", "product"), ("epanechnikov", "spherical"),
                                         ("biweight", "product"), ("cosine", "spherical"),
                                         ("triangular", "product")])
def test_sample_moments(rng, kernel, form):
    # E[X*] = sum w_i X_i, Cov[X*] = sum w_i (X_i - m)(X_i - m)' + H for the smoothed bootstrap.
    x = _corr_sample(rng, 300, 2)
    w = rng.random(300)
    H = np.array([[0.5, 0.2], [0.2, 0.4]])
    est = mvkde.fit(x, kernel=kernel, form=form, bandwidth=H, weights=w)
    s = est.sample(200_000, seed=7)
    wn = w / w.sum()
    mean = wn @ x
    cov = (x - mean).T @ ((x - mean) * wn[:, None]) + H
    se = np.sqrt(np.diag(cov) / 200_000)
    assert np.all(np.abs(s.mean(axis=0) - mean) < 5 * se)
    np.testing.assert_allclose(np.cov(s.T), cov, atol=0.03 * np.abs(cov).max())
    np.testing.assert_array_equal(s, est.sample(200_000, seed=7))


def test_logpdf_finite_in_far_tails(rng):
    x = rng.normal(size=(300, 2))
    est = mvkde.fit(x, bandwidth="normal")  # compared with scipy "silverman" below
    far = np.array([[60.0, -60.0], [200.0, 0.0]])
    lp = est.logpdf(far)
    assert np.all(np.isfinite(lp))
    assert np.all(est.pdf(far) == 0.0)  # underflows, while the log does not
    # the far-tail log density is dominated by the nearest point: log f ~ -r^2/2 in whitened units
    ref = stats.gaussian_kde(x.T, bw_method="silverman")
    np.testing.assert_allclose(lp, ref.logpdf(far.T), rtol=1e-10)


def test_fourth_order_reports_negative_mass_and_clips(rng):
    x = rng.exponential(size=(400, 1))
    est = mvkde.fit(x, kernel="gaussian4", bandwidth=np.array([[0.3]]))
    g = est.grid(400)
    assert g.attrs["negative_mass"] > 0
    # closed form: the fourth-order Gaussian kernel (3 - u^2) phi(u) / 2 (Wand & Jones 1995, Sec. 2.8) is
    # negative for |u| > a = sqrt(3), with mass 2 int_a^inf (u^2 - 3) phi(u) / 2 du = a phi(a) - 2 (1 - Phi(a))
    # (from int_a^inf u^2 phi = a phi(a) + 1 - Phi(a)); two far-apart points each carry it.
    a = np.sqrt(3.0)
    closed = a * stats.norm.pdf(a) - 2 * stats.norm.sf(a)
    far = mvkde.fit(np.array([[0.0], [100.0]]), kernel="gaussian4", bandwidth=np.array([[0.25]]))
    assert far.negative_mass(24001, limits=[(-10.0, 110.0)]) == pytest.approx(closed, rel=1e-5)
    assert grid_integral(g) == pytest.approx(1.0, abs=5e-3)
    gc = est.grid(400, clip_negative=True)
    assert float(gc.min()) >= 0.0
    assert grid_integral(gc) == pytest.approx(grid_integral(g), rel=1e-2)
    with pytest.raises(ValueError, match="negative values"):
        est.sample(10)


# -- bad input: clear messages -------------------------------------------------

def test_nan_and_inf_named(rng):
    x = pd.DataFrame({"pr": rng.random(50), "tasmax": rng.random(50)})  # simulated, not observations
    x.loc[3, "pr"] = np.nan
    x.loc[4, "pr"] = np.nan
    x.loc[5, "tasmax"] = np.inf
    with pytest.raises(mvkde.InputError, match=r"2 NaN in pr, 1 infinite in tasmax"):
        mvkde.fit(x)


@pytest.mark.parametrize("H,match", [
    (np.array([[1.0, 2.0], [2.0, 1.0]]), "not positive definite"),
    (np.array([[1.0, 0.1], [0.3, 1.0]]), "not symmetric"),
    (np.eye(3), "3 x 3 but the data have 2 variables"),
    (np.array([[np.nan, 0], [0, 1]]), "non-finite"),
])
def test_bad_bandwidth_matrix(rng, H, match):
    with pytest.raises(mvkde.BandwidthError, match=match):
        mvkde.fit(rng.normal(size=(50, 2)), bandwidth=H)


def test_other_bad_inputs(rng):
    x = rng.normal(size=(50, 2))
    with pytest.raises(mvkde.InputError, match="at least 3 are needed"):
        mvkde.fit(x[:2])
    est = mvkde.fit(x)
    with pytest.raises(mvkde.InputError, match=r"shape \(4, 3\) but the estimate has 2 variables"):
        est.pdf(np.ones((4, 3)))
    with pytest.raises(mvkde.InputError, match="non-negative"):
        mvkde.fit(x, weights=np.r_[-1.0, np.ones(49)])
    with pytest.raises(mvkde.InputError, match="all zero"):
        mvkde.fit(x, weights=np.zeros(50))
    with pytest.raises(mvkde.InputError, match="did you mean 'biweight'"):
        mvkde.fit(x, kernel="biwieght")
    with pytest.raises(mvkde.InputError, match="form given an invalid value"):
        mvkde.fit(x, form="radial")
    with pytest.raises(mvkde.InputError, match="not numeric"):
        mvkde.fit(pd.DataFrame({"a": ["x"] * 5, "b": range(5)}))
    with pytest.raises(mvkde.BandwidthError, match="x1 are constant"):
        mvkde.fit(np.column_stack([x[:, 0], np.ones(50)]))
    with pytest.raises(mvkde.BandwidthError, match="collinear"):
        mvkde.fit(np.column_stack([x[:, 0], 2 * x[:, 0] + 1]))


def test_integer_weights_equal_repeated_rows(rng):
    # common practice (scikit-learn's KDE tests do the same check)
    x = rng.normal(size=(60, 2))
    reps = rng.integers(1, 4, size=60)
    H = np.array([[0.3, 0.05], [0.05, 0.2]])
    a = mvkde.fit(x, bandwidth=H, weights=reps, kernel="biweight")
    b = mvkde.fit(np.repeat(x, reps, axis=0), bandwidth=H, kernel="biweight")
    pts = rng.normal(size=(50, 2))
    np.testing.assert_allclose(a.pdf(pts), b.pdf(pts), rtol=1e-12)
