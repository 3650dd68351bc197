"""Comparing two samples (mvkde.compare, mvkde.comparison) and joint return periods (mvkde.products.return_periods).

The simulation checks run on blocks of cells through the batch functions
(the path the pipeline uses) on small grids, so the whole file stays cheap.
Rates measured with these seeds are written beside each check.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

import mvkde
from mvkde import comparison as cmp
from mvkde.products import return_period_and, return_period_or, return_periods_from_probabilities

COV = np.array([[1.0, 0.5], [0.5, 1.0]])
CELLS = 200
ALPHA = 0.05
# thresholds near the marginal 80th-90th percentiles of N(0, 1) (0.84 and 1.28): not deep tails
THRESHOLDS = np.array([[0.9, 1.1], [1.2, 0.85]])
GAUSSIAN_ROUGHNESS_2D = 1.0 / (4.0 * np.pi)   # R(phi) in two dimensions, (4 pi)^{-d/2} (Wand & Jones 1995)


def _normal_tail(mean, t):
    """P(X > t componentwise) for X ~ N(mean, COV): inclusion-exclusion with scipy's CDFs."""
    t = np.asarray(t, dtype=float)
    return (1.0 - stats.norm.cdf(t[0] - mean[0]) - stats.norm.cdf(t[1] - mean[1])
            + stats.multivariate_normal(mean, COV).cdf(t))


def _block(seed, n_reference, n_other, shift):
    """A block of cells through the batch functions: common H, densities, local test, ratio intervals."""
    rng = np.random.default_rng(seed)
    shift = np.asarray(shift, dtype=float)
    ref = [rng.multivariate_normal([0.0, 0.0], COV, size=n_reference) for _ in range(CELLS)]
    oth = [rng.multivariate_normal(shift, COV, size=n_other) for _ in range(CELLS)]
    axes = [np.linspace(-4.5, 4.5 + shift[0], 33), np.linspace(-4.5, 4.5 + shift[1], 33)]
    H = cmp.common_bandwidth_cells(ref, oth, axes=axes)
    dens = cmp.densities_with_bandwidth_cells(ref + oth, np.concatenate([H, H]), axes=axes, engine="binned")
    f = dens["density"]
    test = cmp.difference_test_cells(f[:CELLS], f[CELLS:], np.full(CELLS, n_reference), np.full(CELLS, n_other),
                                     sqrt_det_H=np.sqrt(np.linalg.det(H)), roughness=GAUSSIAN_ROUGHNESS_2D,
                                     alpha=ALPHA)
    ex = cmp.exceedance_from_grids(f, axes, THRESHOLDS)
    boot_r = cmp.bootstrap_exceedance_cells(ref, H, THRESHOLDS, axes=axes, replicates=200, seed=seed,
                                            keys=[(c, 0) for c in range(CELLS)])
    boot_o = cmp.bootstrap_exceedance_cells(oth, H, THRESHOLDS, axes=axes, replicates=200, seed=seed,
                                            keys=[(c, 1) for c in range(CELLS)])
    ratio = cmp.probability_ratio_cells(ex[:CELLS], ex[CELLS:], boot_r, boot_o, band_level=0.9)
    return dict(axes=axes, H=H, test=test, ratio=ratio)


def _monte_carlo_limit(p, m, k=2.0):
    """p plus k binomial standard errors over m cells."""
    return p + k * np.sqrt(p * (1 - p) / m)


@pytest.mark.parametrize("seed, n_other", [(3, 1000), (1, 400)], ids=["equal sizes", "unequal sizes"])
def test_null_case_flags_and_ratio_coverage(seed, n_other):
    out = _block(seed, 1000, n_other, [0.0, 0.0])
    # Benjamini & Hochberg (1995): under a complete null the false discovery rate is the probability of
    # any rejection, so the share of cells with a flagged node is at most alpha (+ Monte Carlo error).
    # Measured with these seeds: 0.010 (1000 vs 1000), 0.050 (1000 vs 400).
    share = out["test"]["significant"].reshape(CELLS, -1).any(axis=1).mean()
    assert share <= _monte_carlo_limit(ALPHA, CELLS)
    # the test looks at the body of the density, not a handful of nodes
    assert out["test"]["tested"].reshape(CELLS, -1).sum(axis=1).min() > 100
    # bootstrap percentile interval at level 0.9 covers the null ratio 1 in at least 85 % of cells
    # (the requirement). Measured: 0.89 / 0.91 (equal), 0.905 / 0.905 (unequal).
    r = out["ratio"]
    cover = (r["lower"] <= 1.0) & (1.0 <= r["upper"])
    assert np.all(cover.mean(axis=0) >= 0.85)


def test_shifted_case_ratio_coverage_and_flag_locations():
    shift = np.array([0.3, 0.2])
    out = _block(2, 1000, 1000, shift)
    r = out["ratio"]
    # exact ratio of normal tail probabilities (scipy.stats.multivariate_normal / norm)
    exact = np.array([_normal_tail(shift, t) / _normal_tail([0.0, 0.0], t) for t in THRESHOLDS])
    cover = (r["lower"] <= exact) & (exact <= r["upper"])
    # at least 75 % of cells (the requirement); measured 0.87 / 0.86 with this seed
    assert np.all(cover.mean(axis=0) >= 0.75)
    # the shift is found: most cells flag some node (measured 0.755)
    sig, tested = out["test"]["significant"], out["test"]["tested"]
    assert sig.reshape(CELLS, -1).any(axis=1).mean() > 0.5
    # flagged nodes lie where the exact difference of the smoothed laws, N(shift, COV + H) - N(0, COV + H)
    # (E f_hat for a Gaussian kernel: Wand & Jones 1995), is above its median magnitude over the tested
    # nodes. Measured 0.823 (0.998 with the median over every grid node).
    X, Y = np.meshgrid(*out["axes"], indexing="ij")
    pts = np.column_stack([X.ravel(), Y.ravel()])
    above = flagged = 0
    for c, H in enumerate(out["H"]):
        smooth = np.abs(stats.multivariate_normal(shift, COV + H).pdf(pts)
                        - stats.multivariate_normal([0.0, 0.0], COV + H).pdf(pts)).reshape(X.shape)
        median = np.median(smooth[tested[c]])
        above += int((smooth[sig[c]] > median).sum())
        flagged += int(sig[c].sum())
    assert flagged > 0
    assert above / flagged >= 0.8


def test_fast_bootstrap_equals_refitting_each_replicate():
    # the counts-times-kernel-mass path must give the numbers of refitting every replicate with H fixed
    # and integrating its grid (the same linear functional): checked against that direct computation.
    rng = np.random.default_rng(5)
    x = rng.multivariate_normal([0.0, 0.0], COV, size=300)
    axes = [np.linspace(-4.0, 4.0, 25), np.linspace(-4.0, 4.0, 27)]
    H = np.array([[0.1, 0.03], [0.03, 0.12]])
    fast = cmp.bootstrap_exceedance_cells([x], H[None], THRESHOLDS, axes=axes, replicates=4, seed=9, keys=[(0,)])
    draws = np.random.default_rng([9, 0, 7]).integers(0, 300, size=(4, 300))
    grids = cmp.densities_with_bandwidth_cells([x[i] for i in draws], np.stack([H] * 4), axes=axes,
                                               engine="exact")["density"]
    direct = cmp.exceedance_from_grids(grids, axes, THRESHOLDS)
    np.testing.assert_allclose(fast[0], direct, rtol=1e-9, atol=1e-12)


def test_exceedance_from_grids_against_the_estimate():
    # the grid integration against the estimate's own exact exceedance (diagonal H, Gaussian kernel:
    # a sum of products of normal tails, mvkde.products.estimate)
    rng = np.random.default_rng(6)
    x = rng.normal(size=(500, 2))
    est = mvkde.fit(x, bandwidth=np.diag([0.1, 0.15]))
    axes = [np.linspace(-5, 5, 129)] * 2
    g = est.grid(129, limits=[(-5, 5), (-5, 5)]).values
    # trapezoid sums: error O(spacing^2); spacing 0.078 against bandwidths 0.3-0.4 gives a few 1e-3
    np.testing.assert_allclose(cmp.exceedance_from_grids(g[None], axes, THRESHOLDS)[0], est.exceedance(THRESHOLDS),
                               rtol=5e-3)


def test_compare_dataset_labels_and_point_mass():
    rng = np.random.default_rng(8)
    n = 400

    def sample(wet_share, shift):
        pr = np.where(rng.random(n) < wet_share, rng.gamma(2.0, 3.0, n) + 1.0, 0.0)
        tas = rng.normal(15.0 + shift, 3.0, n)
        return np.column_stack([pr, tas])

    kw = dict(names=["pr", "tas"], units=["mm/day", "degC"], bounds=[(0, np.inf), None],
              point_masses=[1.0, None])
    base = mvkde.fit(sample(0.6, 0.0), **kw)
    recent = mvkde.fit(sample(0.5, 1.0), **kw)
    out = cmp.compare(base, recent, size=(20, 22), thresholds=[[5.0, 16.0], [0.5, 14.0]], bootstrap=10, seed=1)
    assert out["density_difference"].dims == ("pr", "tas")
    assert out["density_change_significant"].dtype == bool
    assert out["density_difference"].attrs["units"] != ""
    assert "caution" in out.attrs
    np.testing.assert_array_equal(out["threshold_pr"].values, [5.0, 0.5])
    np.testing.assert_array_equal(out["threshold_tas"].values, [16.0, 14.0])
    # point-mass change: the difference of the two shares of rows at the point mass (empirical)
    expected = (recent.point_mass_probability - base.point_mass_probability)
    assert float(out["point_mass_probability_change"]) == pytest.approx(expected)
    lo, hi = out["probability_ratio_lower"].values, out["probability_ratio_upper"].values
    assert np.all(lo <= hi)
    # p-values only where tested: z is finite exactly where the density is above the floor
    z = out["density_difference_z"].values
    assert np.isfinite(z).sum() == out["density_change_significant"].attrs["tested_nodes"]
    assert not out["density_change_significant"].values[~np.isfinite(z)].any()


def test_compare_refuses_different_variables():
    rng = np.random.default_rng(0)
    a = mvkde.fit(rng.normal(size=(100, 2)), names=["a", "b"])
    b = mvkde.fit(rng.normal(size=(100, 2)), names=["a", "c"])
    with pytest.raises(mvkde.InputError, match="different variables"):
        cmp.compare(a, b)


# ---------------------------------------------------------------------------
# joint return periods
# ---------------------------------------------------------------------------

def test_return_periods_are_the_estimate_own_probabilities():
    rng = np.random.default_rng(11)
    est = mvkde.fit(rng.multivariate_normal([0, 0], COV, size=800))
    t = np.array([[0.5, 0.7], [1.0, 1.2]])
    lam = 365.25
    # definitions of Salvadori & De Michele (2004), WRR 40, W12511 [memory for the article number]
    np.testing.assert_array_equal(return_period_and(est, t, observations_per_year=lam),
                                  1.0 / (lam * est.exceedance(t)))
    np.testing.assert_array_equal(return_period_or(est, t, observations_per_year=lam),
                                  1.0 / (lam * (1.0 - est.cdf(t))))
    t_and, t_or = return_periods_from_probabilities(est.exceedance(t), est.cdf(t), observations_per_year=lam)
    assert np.all(t_or <= t_and)


def test_return_periods_of_independent_normals_match_the_closed_form():
    rng = np.random.default_rng(12)
    x = rng.normal(size=(50_000, 2))
    est = mvkde.fit(x)
    # moderate thresholds: joint exceedance 0.19 and 0.18, so the sampling error of the estimate
    # (about sqrt((1 - p) / (n p)) = 1 %) and its smoothing bias stay well inside 5 %
    t = np.array([[0.0, 0.3], [0.5, -0.2]])
    lam = 1.0   # annual maxima: event return periods
    # independent margins: P(X > x, Y > y) = (1 - F1(x))(1 - F2(y)); 1 - F(x, y) = 1 - F1(x) F2(y) [calc]
    p_and = stats.norm.sf(t[:, 0]) * stats.norm.sf(t[:, 1])
    p_or = 1.0 - stats.norm.cdf(t[:, 0]) * stats.norm.cdf(t[:, 1])
    np.testing.assert_allclose(return_period_and(est, t, observations_per_year=lam), 1.0 / p_and, rtol=0.05)
    np.testing.assert_allclose(return_period_or(est, t, observations_per_year=lam), 1.0 / p_or, rtol=0.05)


def test_return_periods_refuse_a_bad_rate():
    rng = np.random.default_rng(0)
    est = mvkde.fit(rng.normal(size=(100, 2)))
    with pytest.raises(mvkde.InputError, match="observations_per_year"):
        return_period_and(est, [[0.0, 0.0]], observations_per_year=0)
