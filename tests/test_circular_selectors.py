"""Concentration selectors on the circle and the sphere against the exact MISE and exact sums.

The oracle is the exact MISE of the von Mises-kernel estimate for a von Mises mixture,
by Parseval (tests/circular_mise.py; REFERENCES.md section 7, re-derived there).  All
samples are simulated from stated von Mises mixtures with seeded generators.
Tolerances come from measurement (30 seeded samples per case, recorded beside each check).
"""

import math

import numpy as np
import pytest
from scipy import integrate, special

import mvkde
from mvkde import directional as D
from mvkde.directional import fast_cv as F
from mvkde.directional import selectors as S

from circular_mise import exact_mise, optimal_concentration, sample

ONE_PEAK = {"kappa 0.5": [(1.0, 0.0, 0.5)], "kappa 1": [(1.0, 0.0, 1.0)], "kappa 2": [(1.0, 0.0, 2.0)]}
SEVERAL = {"two peaks": [(0.5, 0.0, 8.0), (0.5, 2.5, 8.0)],
           "three peaks": [(0.5, 0.0, 4.0), (0.3, 2.5, 2.0), (0.2, -2.0, 8.0)]}
SAMPLES = 30


# ---------------------------------------------------------------------------
# closed forms behind the rules
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("kappa", [0.5, 1.0, 2.0, 5.0, 40.0])
def test_curvature_of_one_von_mises_closed_form_and_fourier_sum(kappa):
    # R(f'') = int f''^2 by quadrature of f'' = (kappa^2 sin^2 t - kappa cos t) f  [calc]
    f = lambda t: np.exp(kappa * (np.cos(t) - 1)) / (2 * math.pi * special.i0e(kappa))  # noqa: E731
    quad = integrate.quad(lambda t: ((kappa ** 2 * np.sin(t) ** 2 - kappa * np.cos(t)) * f(t)) ** 2,
                          -math.pi, math.pi, limit=200)[0]
    # closed form kappa [2 I1(2k) + 3k I2(2k)] / (8 pi I0(k)^2), Garcia-Portugues (2013, EJS 7), circle case
    assert S.von_mises_curvature(kappa) == pytest.approx(quad, rel=1e-9)
    # the exact Fourier sum of a one-component mixture, (1/pi) sum_k k^4 |phi_f(k)|^2
    one = S.VonMisesMixture(np.array([1.0]), np.array([0.3]), np.array([kappa]), 0.0, 0.0)
    assert one.curvature() == pytest.approx(quad, rel=1e-9)
    # Taylor (2008, CSDA 52) uses 3 k^2 I2(2k) / (8 pi I0(k)^2): it misses 2k I1(2k), so is smaller
    taylor = 3 * kappa ** 2 * special.iv(2, 2 * kappa) / (8 * math.pi * special.iv(0, kappa) ** 2) \
        if kappa < 50 else None
    if taylor is not None:
        assert taylor < 0.9 * quad if kappa <= 2 else taylor < quad


def test_curvature_of_a_mixture_equals_quadrature():
    mix = SEVERAL["three peaks"]
    m = S.VonMisesMixture(np.array([c[0] for c in mix]), np.array([c[1] for c in mix]),
                          np.array([c[2] for c in mix]), 0.0, 0.0)

    def second(t):
        return sum(p * (k ** 2 * np.sin(t - mu) ** 2 - k * np.cos(t - mu))
                   * np.exp(k * (np.cos(t - mu) - 1)) / (2 * math.pi * special.i0e(k)) for p, mu, k in mix)

    quad = integrate.quad(lambda t: second(t) ** 2, -math.pi, math.pi, limit=400)[0]     # [calc]
    assert m.curvature() == pytest.approx(quad, rel=1e-9)
    t = np.linspace(0, 2 * math.pi, 7)
    ref = sum(p * np.exp(k * (np.cos(t - mu) - 1)) / (2 * math.pi * special.i0e(k)) for p, mu, k in mix)
    np.testing.assert_allclose(m.pdf(t), ref, rtol=1e-12)


@pytest.mark.parametrize("kappa", [0.5, 1.0, 2.0, 5.0])
def test_amise_minimiser_with_von_mises_curvature_is_the_circle_rule(kappa):
    # (2 pi^{1/2} n R(f''))^{2/5} with the von Mises R(f'') is Garcia-Portugues' (2013) h^{-2}
    n = 100
    nu = S.amise_concentration(S.von_mises_curvature(kappa), n)
    assert nu == pytest.approx(1.0 / D.circle_rule_h_from_kappa(kappa, n) ** 2, rel=1e-12)


def test_exact_mise_helper_against_numerical_convolution():
    # the Parseval series against MISE = n^{-1}[int K^2 - int (K*f)^2] + int (K*f - f)^2 with the
    # circular convolution done by FFT on a fine lattice (Wand & Jones 1995, eq. 2.11, on the circle)
    mix, n, nu = SEVERAL["two peaks"], 300, 25.0
    m = 4096
    t = np.arange(m) * 2 * math.pi / m
    dt = 2 * math.pi / m
    f = sum(p * np.exp(k * (np.cos(t - mu) - 1)) / (2 * math.pi * special.i0e(k)) for p, mu, k in mix)
    K = np.exp(nu * (np.cos(t) - 1)) / (2 * math.pi * special.i0e(nu))
    conv = np.real(np.fft.ifft(np.fft.fft(K) * np.fft.fft(f))) * dt
    direct = (np.sum(K ** 2) * dt - np.sum(conv ** 2) * dt) / n + np.sum((conv - f) ** 2) * dt
    assert exact_mise(nu, mix, n) == pytest.approx(direct, rel=1e-9)


def test_taylor_rule_still_matches_its_published_formula_and_sits_below_the_optimum():
    # Taylor (2008, CSDA 52, 3493-3500): nu = [3 n k^2 I2(2k) / (4 pi^{1/2} I0(k)^2)]^{2/5};
    # check values n = 100 from REFERENCES.md section 7 [calc]
    for k, ref in ((1.0, 3.190834), (2.0, 8.476315), (5.0, 25.403650)):
        assert D.taylor_rule_from_kappa(k, 100) == pytest.approx(ref, rel=1e-6)
    # at n = 1e7 against the exact-MISE optimum (REFERENCES.md section 7: 319 vs 463 at kappa 1,
    # 848 vs 998 at kappa 2); the Garcia-Portugues rule is within 1 %
    for k, lo, hi in ((1.0, 0.66, 0.74), (2.0, 0.82, 0.88)):
        nu_opt, _ = optimal_concentration([(1.0, 0.0, k)], 1e7)
        assert lo < D.taylor_rule_from_kappa(k, 1e7) / nu_opt < hi
        assert (1.0 / D.circle_rule_h_from_kappa(k, 1e7) ** 2) / nu_opt == pytest.approx(1.0, abs=0.01)


# ---------------------------------------------------------------------------
# selectors against the exact-MISE optimum
# ---------------------------------------------------------------------------

def _selections(mix, n, seed, method):
    rng = np.random.default_rng(seed)
    out = []
    for _ in range(SAMPLES):
        x = sample(mix, n, rng)
        out.append(S.normal_concentration(x) if method == "normal" else S.mixture_plugin_concentration(x))
    return np.array(out)


@pytest.mark.parametrize("n", [500, 2000])
@pytest.mark.parametrize("case", list(ONE_PEAK))
def test_normal_rule_on_one_von_mises_is_near_the_exact_mise_optimum(case, n):
    mix = ONE_PEAK[case]
    nu_opt, mise_opt = optimal_concentration(mix, n)
    # the rule at the true concentration: measured MISE 1.0001-1.0014 x the optimum
    rule = 1.0 / D.circle_rule_h_from_kappa(mix[0][2], n) ** 2
    assert exact_mise(rule, mix, n) < 1.005 * mise_opt
    # the mean selection over 30 samples (kappa by maximum likelihood): measured 0.98-1.08 x the
    # optimum, MISE within 1.004 x
    mean = _selections(mix, n, 11, "normal").mean()
    assert 0.9 < mean / nu_opt < 1.15
    assert exact_mise(mean, mix, n) < 1.01 * mise_opt


@pytest.mark.parametrize("n", [500, 2000])
@pytest.mark.parametrize("case", list(ONE_PEAK) + list(SEVERAL))
def test_mixture_plugin_mean_is_near_the_exact_mise_optimum(case, n):
    mix = {**ONE_PEAK, **SEVERAL}[case]
    nu_opt, mise_opt = optimal_concentration(mix, n)
    chosen = _selections(mix, n, 11, "plugin")
    # measured over 30 samples: mean 0.98-1.20 x the optimum, its MISE within 1.015 x;
    # single selections spread by 3-12 % (coefficient of variation)
    assert 0.9 < chosen.mean() / nu_opt < 1.3, (chosen.mean(), nu_opt)
    assert exact_mise(chosen.mean(), mix, n) < 1.05 * mise_opt
    assert np.std(chosen) / chosen.mean() < 0.2
    # and every single selection within a factor 1.6 of the optimum (no runaway components)
    assert np.all(np.abs(np.log(chosen / nu_opt)) < math.log(1.6)), chosen / nu_opt


def test_normal_rule_oversmooths_several_peaks_and_the_plugin_does_not():
    # two von Mises peaks (kappa 8, 143 degrees apart), n = 2000: the one-peak rules choose
    # about 0.1 x (Garcia-Portugues) and 0.05 x (Taylor) the exact-MISE optimum (measured: MISE
    # 15 x and 33 x the optimum); the mixture plug-in and likelihood CV land near it
    mix, n = SEVERAL["two peaks"], 2000
    nu_opt, mise_opt = optimal_concentration(mix, n)
    x = sample(mix, n, np.random.default_rng(5))
    taylor = D.taylor_rule(x)
    normal = S.normal_concentration(x)
    plugin, mixture = S.mixture_plugin_concentration(x, return_mixture=True)
    cv = F.circular_cv("mlcv", x).kappa
    assert taylor < 10 and normal < 15                      # the "kappa about 5"
    assert exact_mise(normal, mix, n) > 5 * mise_opt
    assert mixture.components == 2
    assert 0.75 < plugin / nu_opt < 1.35
    assert exact_mise(plugin, mix, n) < 1.05 * mise_opt
    assert 0.5 < plugin / cv < 2.0
    # through fit: "plugin" and "normal" by name
    deg = np.rad2deg(x)[:, None]
    est = mvkde.fit(deg, periods=[360.0], bandwidth="plugin", names=["dir"])
    assert est.concentrations["dir"] == pytest.approx(plugin, rel=1e-12)
    assert "mixture plug-in" in est.attrs["concentration_method_dir"]
    est = mvkde.fit(deg, periods=[360.0], bandwidth="normal", names=["dir"])
    assert est.concentrations["dir"] == pytest.approx(normal, rel=1e-12)


def test_mixture_fit_recovers_components_and_weights_act_like_proportions():
    mix = SEVERAL["three peaks"]
    x = sample(mix, 4000, np.random.default_rng(3))
    best = min(S.fit_von_mises_mixtures(x), key=lambda f: f.bic)
    assert best.components == 3
    order = np.argsort(best.proportions)[::-1]
    np.testing.assert_allclose(best.proportions[order], [0.5, 0.3, 0.2], atol=0.04)
    means = np.angle(np.exp(1j * best.means[order]))
    np.testing.assert_allclose(means, [0.0, 2.5, -2.0], atol=0.1)
    np.testing.assert_allclose(best.kappas[order], [4.0, 2.0, 8.0], rtol=0.3)
    # weights: a weighted sample where half the rows carry weight 3 fits the same mixture as
    # those rows repeated three times (the EM sees only the normalised weights)
    y = x[:1000]
    w = np.where(np.arange(1000) < 500, 3.0, 1.0)
    tight = dict(max_components=3, tol=1e-9, iterations=5000)      # EM run to convergence
    a = S.fit_von_mises_mixtures(y, w, **tight)[2]
    b = S.fit_von_mises_mixtures(np.concatenate([y[:500]] * 3 + [y[500:]]), None, **tight)[2]
    # EM converges slowly along flat directions: measured 2e-5 apart after tol 1e-9
    np.testing.assert_allclose(np.sort(a.kappas), np.sort(b.kappas), rtol=1e-4)
    np.testing.assert_allclose(np.sort(a.proportions), np.sort(b.proportions), rtol=1e-4)


# ---------------------------------------------------------------------------
# binned cross-validation against the exact O(n^2) sums
# ---------------------------------------------------------------------------

def exact_criteria(nu, x, w):
    """LSCV and minus the likelihood CV by direct pair sums (Hall, Watson and Cabrera 1987)."""
    d = x[:, None] - x[None, :]
    K = np.exp(nu * (np.cos(d) - 1)) / (2 * math.pi * special.i0e(nu))
    # int K(t - a) K(t - b) dt = I0(nu sqrt(2 + 2 cos(a - b))) / (2 pi I0(nu)^2)
    r = nu * np.sqrt(np.maximum(2 + 2 * np.cos(d), 0))
    C = special.i0e(r) * np.exp(r - 2 * nu) / (2 * math.pi * special.i0e(nu) ** 2)
    np.fill_diagonal(K, 0.0)
    loo = (K @ w) / (1 - w)
    return float(w @ C @ w) - 2 * float(w @ loo), -float(w @ np.log(loo))


@pytest.mark.parametrize("weighted", [False, True])
def test_binned_cv_criteria_and_choice_match_exact_sums(weighted):
    mix = SEVERAL["two peaks"]
    rng = np.random.default_rng(8)
    x = sample(mix, 700, rng)
    w = rng.uniform(0.5, 2.0, x.size) if weighted else np.ones(x.size)
    w = w / w.sum()
    lat = F._PeriodicLattice(x, w, 16.0)
    for nu in (2.0, 30.0, 100.0, 400.0):
        ls, ml = exact_criteria(nu, x, w)
        # measured agreement better than 2e-4 relative (binning error ~ (step)^2)
        assert lat.lscv(nu) == pytest.approx(ls, rel=1e-3, abs=1e-5)
        assert lat.mlcv(nu) == pytest.approx(ml, rel=1e-3, abs=1e-4)
    for criterion in ("lscv", "mlcv"):
        fast = F.circular_cv(criterion, x, None if not weighted else w)
        exact = D.cross_validate(criterion, theta=x[:, None], weights=None if not weighted else w)
        assert fast.kappa == pytest.approx(float(exact.kappas[0]), rel=0.02)
        assert fast.criterion == pytest.approx(exact.criterion, rel=1e-3, abs=1e-5)


def test_fit_uses_the_binned_cv_for_one_circular_variable():
    x = np.rad2deg(sample(SEVERAL["three peaks"], 2500, np.random.default_rng(1)))[:, None]
    for method in ("lscv", "mlcv"):
        est = mvkde.fit(x, periods=[360.0], bandwidth=method, names=["dir"])
        assert "periodic lattice" in est.attrs["concentration_method_dir"]
        # no subsample: the binned criterion uses all 2500 points
        assert est.concentrations["dir"] == pytest.approx(
            F.circular_cv(method, np.deg2rad(x[:, 0])).kappa, rel=1e-6)     # degrees -> radians round-off


# ---------------------------------------------------------------------------
# sphere: likelihood CV with KD-tree neighbours against the dense sums
# ---------------------------------------------------------------------------

def test_sphere_likelihood_cv_matches_dense_cross_validation():
    rng = np.random.default_rng(4)
    clouds = [(20.0, 100.0, 300.0, 500), (-30.0, -60.0, 60.0, 400), (60.0, 10.0, 1500.0, 100)]
    units = np.vstack([D.sample_vmf(np.tile(D.lonlat_to_unit(la, lo), (m, 1)), k, rng)
                       for la, lo, k, m in clouds])
    w = np.full(units.shape[0], 1.0 / units.shape[0])
    nb = F._SphereNeighbours(units, w)
    for kappa in (5.0, 200.0, 3000.0):
        # dense reference: sum_i w_i log f_{-i}(u_i), vMF kernel per steradian
        lk = D.log_vmf_kernel(kappa, np.clip(units @ units.T, -1, 1))
        np.fill_diagonal(lk, -np.inf)
        ref = float(w @ np.log(np.exp(lk) @ w / (1 - w)))
        # terms below 1e-12 of the peak are dropped: measured 5e-8 relative at kappa 3000, where one
        # isolated point's neighbours sit at the cut-off
        assert nb.loglik(kappa) == pytest.approx(ref, rel=1e-6)
    fast = F.sphere_likelihood_cv(units)
    exact = D.cross_validate("mlcv", units=units)
    assert fast.kappa == pytest.approx(exact.kappa_sphere, rel=0.01)
    assert fast.criterion == pytest.approx(exact.criterion, rel=1e-6)
    est = mvkde.fit(np.column_stack(D.unit_to_latlon(units)), sphere=("lat", "lon"), names=["lat", "lon"],
                    bandwidth="plugin")
    assert est.concentrations["lat"] == pytest.approx(fast.kappa, rel=1e-9)
    assert "KD-tree" in est.attrs["concentration_method_lat"]


# ---------------------------------------------------------------------------
# one circular x one linear variable: the binned joint criteria on a 2-D lattice
# ---------------------------------------------------------------------------

def _wind(n, rng):
    """Direction (radians) from two von Mises peaks, speed from a Weibull law depending on the peak."""
    first = rng.random(n) < 0.6
    t = np.where(first, rng.vonmises(0.5, 4.0, n), rng.vonmises(3.5, 1.5, n))
    y = np.where(first, 8.0 * rng.weibull(2.0, n), 4.0 * rng.weibull(1.6, n))
    return np.mod(t, 2 * math.pi), y


def exact_mixed_criteria(nu, h, t, y, w):
    """LSCV and minus the likelihood CV of VM_nu x phi_h by direct pair sums (as cross_validate)."""
    d, dy = t[:, None] - t[None, :], y[:, None] - y[None, :]
    K = (np.exp(nu * (np.cos(d) - 1)) / (2 * math.pi * special.i0e(nu))
         * np.exp(-0.5 * (dy / h) ** 2) / (math.sqrt(2 * math.pi) * h))
    # the kernel convolved with itself: I0(nu sqrt(2 + 2 cos d)) / (2 pi I0(nu)^2) x phi_{sqrt(2) h}
    r = nu * np.sqrt(np.maximum(2 + 2 * np.cos(d), 0))
    C = (special.i0e(r) * np.exp(r - 2 * nu) / (2 * math.pi * special.i0e(nu) ** 2)
         * np.exp(-0.25 * (dy / h) ** 2) / (math.sqrt(4 * math.pi) * h))
    np.fill_diagonal(K, 0.0)
    loo = (K @ w) / (1 - w)
    return float(w @ C @ w) - 2 * float(w @ loo), -float(w @ np.log(loo))


@pytest.mark.parametrize("weighted", [False, True])
def test_binned_mixed_cv_criteria_and_choice_match_exact_sums(weighted):
    rng = np.random.default_rng(3)
    t, y = _wind(600, rng)
    w = rng.uniform(0.5, 2.0, t.size) if weighted else np.ones(t.size)
    w = w / w.sum()
    lat = F._MixedLattice(t, y, w, 12.0, 12.0)
    for nu in (1.0, 10.0, 80.0):
        for h in (0.2, 1.0, 4.0):
            ls, ml = exact_mixed_criteria(nu, h, t, y, w)
            # measured: LSCV within 6e-4, MLCV within 1e-4 relative (12 nodes per kernel sd)
            assert lat.lscv(nu, h) == pytest.approx(ls, rel=1e-3)
            assert lat.mlcv(nu, h) == pytest.approx(ml, rel=1e-3)
    t, y = _wind(400, np.random.default_rng(5))
    w = np.random.default_rng(6).uniform(0.5, 2.0, t.size) if weighted else None
    for criterion in ("lscv", "mlcv"):
        fast = F.mixed_cv(criterion, t, y, w)
        exact = D.cross_validate(criterion, theta=t[:, None], lin=y[:, None], weights=w)
        # measured: kappa and h within 0.3 %, criterion within 1e-4 relative
        assert fast.kappas[0] == pytest.approx(float(exact.kappas[0]), rel=0.02)
        assert fast.H_lin[0, 0] == pytest.approx(float(exact.H_lin[0, 0]), rel=0.02)
        assert fast.criterion == pytest.approx(exact.criterion, rel=1e-3)
        assert fast.converged and not fast.at_edge


def test_fit_uses_the_binned_mixed_cv_for_one_circular_and_one_linear_variable():
    t, y = _wind(1500, np.random.default_rng(2))
    x = np.column_stack([y, np.rad2deg(t)])
    for method in ("lscv", "mlcv"):
        est = mvkde.fit(x, periods=[None, 360.0], bandwidth=method, names=["speed", "dir"])
        assert "2-D lattice" in est.attrs["concentration_method_dir"]
        # no subsample: the binned criterion uses all 1500 points
        fast = F.mixed_cv(method, np.deg2rad(x[:, 1]), x[:, 0])
        assert est.concentrations["dir"] == pytest.approx(fast.kappas[0], rel=1e-6)


def test_sphere_cv_of_many_locations_subsamples_and_rescales():
    """Above max_n locations: a seeded subsample, kappa carried over by the S^2 AMISE rate n^(1/3)
    (Hall, Watson and Cabrera 1987); measured within 10 % of the full criterion's choice at n = 6,000."""
    rng = np.random.default_rng(1)
    u = D.sample_vmf(np.tile(D.lonlat_to_unit(50.0, 10.0), (1600, 1)), 60.0, rng)
    full = F.sphere_likelihood_cv(u, max_n=10 ** 9).kappa
    sub = F.sphere_likelihood_cv(u, max_n=800).kappa
    assert sub == pytest.approx(full, rel=0.25)
    assert F.sphere_likelihood_cv(u, max_n=800).kappa == sub  # seeded: the same subsample every time


# ---------------------------------------------------------------------------
# the mixture EM for a block of samples (cells)
# ---------------------------------------------------------------------------

def test_mixture_plugin_of_a_block_equals_each_sample_alone():
    rng = np.random.default_rng(21)
    mixes = [ONE_PEAK["kappa 1"], SEVERAL["two peaks"], SEVERAL["three peaks"], ONE_PEAK["kappa 0.5"]]
    xs = [sample(mix, n, rng) for mix, n in zip(mixes, (500, 2000, 800, 40))]
    weights = [None, rng.uniform(0.5, 2.0, 2000), None, None]
    block = S.mixture_plugin_concentrations(xs, weights)
    for x, w, (nu, mixture) in zip(xs, weights, block):
        alone, alone_mixture = S.mixture_plugin_concentration(x, w, return_mixture=True)
        assert nu == pytest.approx(alone, rel=1e-12)
        assert mixture.components == alone_mixture.components
    # the same cells in another order and grouping
    again = S.mixture_plugin_concentrations(xs[::-1][:2], weights[::-1][:2])
    assert again[0][0] == pytest.approx(block[3][0], rel=1e-12)
    assert again[1][0] == pytest.approx(block[2][0], rel=1e-12)


def test_one_component_fit_is_the_von_mises_maximum_likelihood():
    # scipy.stats.vonmises.fit (maximum likelihood, scale fixed at 1) on the raw sample; the EM
    # runs on 256 lattice nodes, so agreement is to the binning: measured 2e-5 (kappa), 1e-5 rad
    from scipy import stats
    x = sample(ONE_PEAK["kappa 2"], 3000, np.random.default_rng(4))
    one = S.fit_von_mises_mixtures(x)[0]
    kappa, loc, _ = stats.vonmises.fit(x, fscale=1)
    assert one.kappas[0] == pytest.approx(kappa, rel=1e-3)
    assert abs(np.angle(np.exp(1j * (one.means[0] - loc)))) < 1e-3
