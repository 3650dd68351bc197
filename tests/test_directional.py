"""Circular variables (von Mises kernel) and locations on the sphere (von Mises-Fisher kernel)."""

import math

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from scipy import optimize, special, stats

import mvkde
from mvkde import directional as D
from mvkde.errors import InputError
from mvkde.products import sector_table

R = D.EARTH_RADIUS_KM


def circle_integral(values, x, axis=0):
    """Trapezoid over nodes spanning exactly one period with both ends: the periodic rule."""
    return np.trapezoid(values, x, axis=axis)


def wind_sample(rng, n):
    """Simulated wind (not observations): von Mises directions about 225 deg, gamma speeds."""
    direction = np.mod(np.rad2deg(rng.vonmises(math.radians(225.0), 2.0, n)), 360.0)
    speed = rng.gamma(2.0, 2.5, n) * (1.0 + 0.4 * np.cos(np.deg2rad(direction - 225.0)))
    return pd.DataFrame({"speed": speed, "direction": direction})


def vmf_cloud(rng, lat, lon, kappa, n):
    u = D.sample_vmf(np.tile(D.lonlat_to_unit(lat, lon), (n, 1)), kappa, rng)
    la, lo = D.unit_to_latlon(u)
    return np.column_stack([la, lo])


# ---------------------------------------------------------------------------
# kernels against the reference library
# ---------------------------------------------------------------------------

def test_von_mises_kernel_equals_scipy():
    theta = np.linspace(-math.pi, math.pi, 41)
    for kappa in (0.3, 2.0, 50.0, 700.0):
        # reference: scipy.stats.vonmises
        np.testing.assert_allclose(D.von_mises(theta, kappa), stats.vonmises.pdf(theta, kappa), rtol=1e-10)


def test_vmf_kernel_equals_scipy():
    rng = np.random.default_rng(0)
    mu = D.lonlat_to_unit(35.0, -120.0)
    x = D.sample_vmf(np.tile(mu, (50, 1)), 3.0, rng)
    for kappa in (0.5, 7.0, 300.0):
        # reference: scipy.stats.vonmises_fisher on S^2
        ref = stats.vonmises_fisher(mu, kappa).pdf(x)
        np.testing.assert_allclose(np.exp(D.log_vmf_kernel(kappa, x @ mu)), ref, rtol=1e-10)
        np.testing.assert_allclose(D.vmf(x @ mu, kappa), ref, rtol=1e-10)


def test_estimate_of_one_direction_is_the_scaled_von_mises_density():
    # one datum at 30 degrees, kappa from a given equivalent variance (period/2pi)^2 / kappa
    kappa = 4.0
    var = (360.0 / (2 * math.pi)) ** 2 / kappa
    data = np.array([[30.0], [30.0]])
    est = mvkde.fit(data, periods=[360.0], bandwidth=[[var]])
    assert est.concentrations["x0"] == pytest.approx(kappa)
    x = np.linspace(-200, 500, 29)
    # reference: scipy.stats.vonmises, converted from per radian to per degree
    ref = stats.vonmises.pdf(np.deg2rad(x - 30.0), kappa) * 2 * math.pi / 360.0
    np.testing.assert_allclose(est.pdf(x[:, None]), ref, rtol=1e-10)
    np.testing.assert_allclose(np.exp(est.logpdf(x[:, None])), ref, rtol=1e-10)


def test_estimate_of_one_location_is_the_vmf_density_per_km2():
    data = np.array([[48.0, 10.0], [48.0, 10.0], [48.0, 10.0]])
    kappa = 200.0
    var = (180 / math.pi) ** 2 / kappa
    est = mvkde.fit(data, sphere=("lat", "lon"), names=["lat", "lon"], bandwidth=np.diag([var, var]))
    pts = np.array([[48.0, 10.0], [50.0, 12.0], [40.0, -3.0]])
    # reference: scipy.stats.vonmises_fisher (per steradian) over the Earth's radius squared
    ref = stats.vonmises_fisher(D.lonlat_to_unit(48.0, 10.0), kappa).pdf(D.lonlat_to_unit(pts[:, 0], pts[:, 1]))
    np.testing.assert_allclose(est.pdf(pts), ref / R ** 2, rtol=1e-10)


def test_rules_of_thumb_match_published_formulas():
    # Taylor (2008, CSDA 52) eq. for nu; Garcia-Portugues (2013, EJS 7) circle and sphere h,
    # evaluated here from the formulas with plain Bessel functions (no exponential scaling)
    for k in (1.0, 2.0, 5.0):
        n = 100
        taylor = (3 * n * k ** 2 * special.iv(2, 2 * k) / (4 * math.sqrt(math.pi) * special.iv(0, k) ** 2)) ** 0.4
        assert D.taylor_rule_from_kappa(k, n) == pytest.approx(taylor, rel=1e-12)
        h_circle = (4 * math.sqrt(math.pi) * special.iv(0, k) ** 2
                    / (k * n * (2 * special.iv(1, 2 * k) + 3 * k * special.iv(2, 2 * k)))) ** 0.2
        assert D.circle_rule_h_from_kappa(k, n) == pytest.approx(h_circle, rel=1e-12)
        h_sphere = (8 * math.sinh(k) ** 2 / (k * n * ((1 + 4 * k ** 2) * math.sinh(2 * k)
                                                     - 2 * k * math.cosh(2 * k)))) ** (1 / 6)
        assert D.sphere_rule_h_from_kappa(k, n) == pytest.approx(h_sphere, rel=1e-12)


# ---------------------------------------------------------------------------
# unit mass
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("bandwidth", ["normal", "mlcv"])
def test_circle_integrates_to_one(rng, bandwidth):
    x = np.mod(np.rad2deg(rng.vonmises(0.5, 1.5, 300)), 360.0)
    est = mvkde.fit(x[:, None], periods=[360.0], bandwidth=bandwidth, names=["dir"], units=["degree"])
    g = est.grid(361)
    assert g["dir"].values[0] == 0.0 and g["dir"].values[-1] == 360.0
    assert g["dir"].attrs["period"] == 360.0
    assert circle_integral(g.values, g["dir"].values) == pytest.approx(1.0, abs=1e-9)


@pytest.mark.parametrize("boundary", ["reflect", "transform", "none"])
def test_circle_times_half_line_integrates_to_one(rng, boundary):
    df = wind_sample(rng, 300)
    est = mvkde.fit(df, periods=[None, 360.0], bounds=[(0, None), None], boundary=boundary,
                    units=["m s-1", "degree"])
    assert est.boundary == boundary
    g = est.grid([400, 145], limits={"speed": (0.0, 80.0)})
    mass = circle_integral(np.trapezoid(g.values, g["speed"].values, axis=0), g["direction"].values)
    if boundary == "none":
        assert mass < 0.995                      # mass leaks below zero speed
    else:
        # the transformation's 1/speed Jacobian is steep near 0: a looser grid quadrature
        assert mass == pytest.approx(1.0, abs=2e-3 if boundary == "reflect" else 5e-3)
    assert g.attrs["units"] == "1/(m s-1 degree)"


def test_sphere_integrates_to_one_with_cell_areas(rng):
    data = np.vstack([vmf_cloud(rng, 20.0, 100.0, 40.0, 150), vmf_cloud(rng, -60.0, -30.0, 15.0, 150)])
    est = mvkde.fit(data, sphere=("lat", "lon"), names=["lat", "lon"])
    g = est.grid([181, 361])
    assert g.attrs["units"] == "km-2"
    # trapezoid node areas cover the globe: 4 pi R^2
    assert float(g["cell_area"].sum()) == pytest.approx(4 * math.pi * R ** 2, rel=1e-12)
    assert float((g * g["cell_area"]).sum()) == pytest.approx(1.0, abs=1e-3)


def test_sphere_times_linear_integrates_to_one(rng):
    loc = vmf_cloud(rng, 45.0, 0.0, 30.0, 200)
    depth = rng.gamma(3.0, 2.0, 200)
    est = mvkde.fit(np.column_stack([loc, depth]), sphere=("lat", "lon"), names=["lat", "lon", "depth"],
                    units=["", "", "km"], bounds=[None, None, (0, None)])
    g = est.grid([91, 181, 120], limits={"depth": (0.0, 60.0)})
    assert g.attrs["units"] == "km-2 km-1"
    mass = float((g.integrate("depth") * g["cell_area"]).sum())
    assert mass == pytest.approx(1.0, abs=5e-3)


# ---------------------------------------------------------------------------
# continuity across the wrap, the date line and the poles
# ---------------------------------------------------------------------------

def test_direction_continuous_across_north(rng):
    x = np.mod(rng.normal(0.0, 15.0, 200), 360.0)        # clustered around north
    est = mvkde.fit(x[:, None], periods=[360.0])
    left, right = est.pdf([[359.999]]), est.pdf([[0.001]])
    assert left == pytest.approx(right, rel=1e-4)
    assert est.pdf([[0.0]]) == pytest.approx(est.pdf([[360.0]]), rel=1e-12)
    g = est.grid(73)
    assert g.values[0] == pytest.approx(g.values[-1], rel=1e-12)
    assert g.values[0] == g.values.max() or g.values[0] > 0.8 * g.values.max()


def test_location_continuous_across_date_line(rng):
    data = vmf_cloud(rng, -15.0, 179.0, 80.0, 300)          # Fiji-like cloud straddling 180
    assert (data[:, 1] > 170).any() and (data[:, 1] < -170).any()
    est = mvkde.fit(data, sphere=("lat", "lon"), names=["lat", "lon"])
    for lat in (-20.0, -15.0, -10.0):
        east, west = est.pdf([[lat, 179.999]]), est.pdf([[lat, -179.999]])
        assert east == pytest.approx(west, rel=1e-3)
        assert est.pdf([[lat, 180.0]]) == pytest.approx(est.pdf([[lat, -180.0]]), rel=1e-12)
    g = est.grid([91, 181])
    np.testing.assert_allclose(g.isel(lon=0).values, g.isel(lon=-1).values, rtol=1e-10)
    assert float(g.isel(lon=-1).max()) > 0.5 * float(g.max())   # the mass sits on the line, not split


def test_location_continuous_across_the_pole(rng):
    data = vmf_cloud(rng, 88.0, 40.0, 200.0, 300)
    est = mvkde.fit(data, sphere=("lat", "lon"), names=["lat", "lon"])
    pole = est.pdf([[90.0, lon] for lon in (-180.0, -90.0, 0.0, 77.0, 180.0)])
    np.testing.assert_allclose(pole, pole[0], rtol=1e-10)     # one value at the pole, whatever the longitude
    # across the pole along the 40 / -140 meridian: symmetric steps of 0.01 degree differ little
    a = est.pdf([[89.99, 40.0]])
    b = est.pdf([[89.99, -140.0]])
    assert abs(a - b) / pole[0] < 1e-2
    g = est.grid([181, 73])
    np.testing.assert_allclose(g.sel(lat=90.0).values, g.sel(lat=90.0).values[0], rtol=1e-10)


# ---------------------------------------------------------------------------
# accuracy: ISE falls with n; selectors near the MISE-optimal concentration
# ---------------------------------------------------------------------------

MIX = [(0.5, 0.0, 4.0), (0.3, 2.5, 2.0), (0.2, -2.0, 8.0)]   # weight, mean (rad), kappa


def mix_pdf(theta):
    return sum(w * stats.vonmises.pdf(theta, k, loc=m) for w, m, k in MIX)


def mix_sample(rng, n):
    comp = rng.choice(len(MIX), size=n, p=[c[0] for c in MIX])
    return np.array([rng.vonmises(MIX[c][1], MIX[c][2]) for c in comp])


def test_ise_falls_as_n_grows():
    """Mean ISE over 3 samples of a three-component von Mises mixture, n = 250, 1000, 4000.

    Likelihood CV adapts to the mixture: the ISE falls by well over a factor 1.5
    per fourfold n.  Taylor's (2008) rule assumes a single von Mises target and
    oversmooths a multimodal one (kappa ~ 2 against ~ 40 by CV): its ISE still
    falls, slowly (it is dominated by the bias of the oversmoothed estimate)."""
    rng = np.random.default_rng(2024)
    grid = np.linspace(0.0, 2 * math.pi, 721)
    truth = mix_pdf(grid)
    means = {"mlcv": [], "normal": []}
    for n in (250, 1000, 4000):
        ises = {m: [] for m in means}
        for _ in range(3):
            x = mix_sample(rng, n)
            for method in means:
                est = mvkde.fit(x[:, None], periods=[2 * math.pi], bandwidth=method)
                ises[method].append(circle_integral((est.pdf(grid[:, None]) - truth) ** 2, grid))
        for method in means:
            means[method].append(np.mean(ises[method]))
    cv = means["mlcv"]
    assert cv[0] > 1.5 * cv[1] and cv[1] > 1.5 * cv[2], cv
    rule = means["normal"]
    assert rule[0] > rule[1] > rule[2], rule
    assert cv[2] < rule[2]


def exact_mise_von_mises(nu, kappa, n, m=2048):
    """MISE of the von Mises-kernel estimate for a von Mises target, from its exact expression
    MISE = n^{-1}[int K^2 - int (K*f)^2] + int (K*f - f)^2 (Wand & Jones 1995, eq. 2.11 on the
    circle), with the circular convolutions done numerically by FFT on m nodes."""
    t = np.arange(m) * 2 * math.pi / m
    f = stats.vonmises.pdf(t, kappa)
    K = stats.vonmises.pdf(t, nu)
    dt = 2 * math.pi / m
    conv = np.real(np.fft.ifft(np.fft.fft(K) * np.fft.fft(f))) * dt
    return (np.sum(K ** 2) * dt - np.sum(conv ** 2) * dt) / n + np.sum((conv - f) ** 2) * dt


def test_selectors_near_mise_optimal_concentration():
    kappa, n = 2.0, 400
    res = optimize.minimize_scalar(lambda v: exact_mise_von_mises(math.exp(v), kappa, n), bounds=(0, 6),
                                   method="bounded")
    nu_opt = math.exp(res.x)
    rng = np.random.default_rng(7)
    chosen = {"normal": [], "mlcv": [], "lscv": []}
    for _ in range(3):
        x = np.rad2deg(rng.vonmises(0.0, kappa, n))
        for method in chosen:
            est = mvkde.fit(x[:, None], periods=[360.0], bandwidth=method, names=["d"])
            chosen[method].append(est.concentrations["d"])
    # "normal" is the Garcia-Portugues (2013) AMISE rule for exactly this target: close to the optimum
    assert abs(math.log(np.median(chosen["normal"]) / nu_opt)) < math.log(1.5)
    # cross-validation is noisy: within a factor of 2 of the optimum (median of 3 samples)
    for method in ("mlcv", "lscv"):
        assert abs(math.log(np.median(chosen[method]) / nu_opt)) < math.log(2.0), (method, chosen, nu_opt)


def test_joint_cv_linear_block_is_sensible(rng):
    df = wind_sample(rng, 400)
    ref = mvkde.fit(df[["speed"]], bandwidth="normal").H[0, 0]
    for method in ("mlcv", "lscv"):
        est = mvkde.fit(df, periods=[None, 360.0], bounds=[(0, None), None], bandwidth=method)
        assert 0.1 * ref < est.H[0, 0] < 3.0 * ref
        assert est.H[0, 1] == 0.0 and est.H[1, 0] == 0.0
        k = est.concentrations["direction"]
        assert est.H[1, 1] == pytest.approx((360 / (2 * math.pi)) ** 2 / k)
        assert 0.5 < k < 200
        assert "jointly" in est.attrs["bandwidth_linear_block"]
    epa = mvkde.fit(df, periods=[None, 360.0], bandwidth="mlcv", kernel="epanechnikov")
    gau = mvkde.fit(df, periods=[None, 360.0], bandwidth="mlcv")
    # canonical rescaling of the linear block (R(K)/R(phi))^{2/(d+4)}, d = 1
    assert epa.H[0, 0] / gau.H[0, 0] == pytest.approx(mvkde.bandwidth.kernel_rescaling("epanechnikov",
                                                                                       "product", 1))


def test_sphere_selectors(rng):
    data = vmf_cloud(rng, 10.0, 60.0, 50.0, 300)
    k_lcv = mvkde.fit(data, sphere=("lat", "lon"), names=["lat", "lon"], bandwidth="mlcv").concentrations["lat"]
    k_rule = mvkde.fit(data, sphere=("lat", "lon"), names=["lat", "lon"]).concentrations["lat"]
    # both smooth more than the data's own spread (kappa 50) and agree within a factor of 3
    assert k_lcv > 50 and k_rule > 50
    assert 1 / 3 < k_lcv / k_rule < 3


# ---------------------------------------------------------------------------
# sampling, weights, products
# ---------------------------------------------------------------------------

def test_sample_wraps_and_follows_the_estimate(rng):
    df = wind_sample(rng, 300)
    est = mvkde.fit(df, periods=[None, 360.0], bounds=[(0, None), None])
    s = est.sample(4000, seed=3)
    assert s[:, 1].min() >= 0 and s[:, 1].max() < 360 and s[:, 0].min() >= 0
    mean_dir = math.degrees(math.atan2(np.sin(np.deg2rad(s[:, 1])).mean(), np.cos(np.deg2rad(s[:, 1])).mean()))
    assert abs(((mean_dir - 225.0) + 180) % 360 - 180) < 10
    loc = mvkde.fit(vmf_cloud(rng, 85.0, 179.0, 100.0, 200), sphere=("lat", "lon"), names=["lat", "lon"])
    t = loc.sample(2000, seed=1)
    assert np.all(np.abs(t[:, 0]) <= 90) and np.all((t[:, 1] >= -180) & (t[:, 1] < 180))


def test_integer_weights_equal_repeated_rows(rng):
    df = wind_sample(rng, 60)
    reps = rng.integers(1, 4, 60)
    H = mvkde.fit(df, periods=[None, 360.0]).H
    a = mvkde.fit(df, periods=[None, 360.0], bandwidth=H, weights=reps, bounds=[(0, None), None])
    b = mvkde.fit(df.loc[df.index.repeat(reps)], periods=[None, 360.0], bandwidth=H, bounds=[(0, None), None])
    pts = np.column_stack([rng.uniform(0, 15, 20), rng.uniform(-30, 390, 20)])
    np.testing.assert_allclose(a.pdf(pts), b.pdf(pts), rtol=1e-10)


def test_data_taken_modulo_the_period(rng):
    x = rng.uniform(0, 360, 100)
    a = mvkde.fit(x[:, None], periods=[360.0], bandwidth=[[100.0]])
    b = mvkde.fit((x - 720.0)[:, None], periods=[360.0], bandwidth=[[100.0]])
    pts = np.linspace(0, 360, 13)[:, None]
    np.testing.assert_allclose(a.pdf(pts), b.pdf(pts), rtol=1e-9)


def test_sector_table_and_grid_products(rng):
    df = wind_sample(rng, 400)
    est = mvkde.fit(df, periods=[None, 360.0], bounds=[(0, None), None], bandwidth="normal")
    table = sector_table(est, "direction", "speed", sectors=8, speed_edges=[0, 3, 6, 10, 80])
    assert table.shape == (8, 4)
    assert float(table.sum()) == pytest.approx(1.0, abs=2e-3)
    # the sector facing 225 degrees holds the most probability (sample mean direction)
    assert float(table.sum("speed_class").idxmax()) == 225.0
    # one sector from the grid: north sector straddles the wrap [-22.5, 22.5)
    g = est.grid([300, 721], limits={"speed": (0.0, 80.0)})
    marg = np.trapezoid(g.values, g["speed"].values, axis=0)
    d = g["direction"].values
    north = np.trapezoid(np.where(d <= 22.5, marg, 0), d) + np.trapezoid(np.where(d >= 337.5, marg, 0), d)
    assert float(table.isel(sector=0).sum()) == pytest.approx(north, abs=2e-3)
    m = est.marginal_grid(["direction"], size=[200, 181])
    assert circle_integral(m.values, m["direction"].values) == pytest.approx(1.0, abs=5e-3)
    exact = est.marginal(["direction"])
    assert exact.concentrations["direction"] == est.concentrations["direction"]
    levels = est.hdr_levels([0.5, 0.9], size=[120, 121])
    assert levels[0] > levels[1] > 0
    cond = est.conditional({"direction": 225.0}, size=200)
    assert float(cond.integrate("speed")) == pytest.approx(1.0, abs=1e-6)


# ---------------------------------------------------------------------------
# bad input
# ---------------------------------------------------------------------------

def test_bad_input_gives_clear_errors(rng):
    x = rng.uniform(0, 360, (50, 2))
    with pytest.raises(InputError, match="period of x1 must be a positive number"):
        mvkde.fit(x, periods=[None, 0.0])
    with pytest.raises(InputError, match="period of x0 must be a positive number"):
        mvkde.fit(x, periods=[-360.0, None])
    with pytest.raises(InputError, match="periods has 1 entries"):
        mvkde.fit(x, periods=[360.0])
    with pytest.raises(InputError, match="'latitude'.*not among the variables"):
        mvkde.fit(x, sphere=("latitude", "x1"))
    with pytest.raises(InputError, match=r"latitude x0 must lie in \[-90, 90\]"):
        mvkde.fit(x, sphere=("x0", "x1"))
    with pytest.raises(InputError, match="circular and cannot have bounds"):
        mvkde.fit(x, periods=[None, 360.0], bounds=[None, (0, 360)])
    with pytest.raises(InputError, match="boundary='renormalize' is not available with circular"):
        mvkde.fit(x, periods=[None, 360.0], bounds=[(0, None), None], boundary="renormalize")
    # the linear boundary kernel (the default) falls back to reflection on the linear block, and says so
    est = mvkde.fit(x, periods=[None, 360.0], bounds=[(0, None), None], boundary="linear", bandwidth="normal")
    assert est.boundary == "reflect" and "reflection used" in est.attrs["boundary_choice"]
    with pytest.raises(InputError, match="must be zero off the diagonal"):
        mvkde.fit(x, periods=[None, 360.0], bandwidth=[[1.0, 0.1], [0.1, 50.0]])
    with pytest.raises(InputError, match="part of the spherical location and has a period"):
        mvkde.fit(x - [180, 180], sphere=("x0", "x1"), periods=[None, 360.0])


def test_grid_attributes_name_circular_variables_and_concentrations(rng):
    df = wind_sample(rng, 100)
    g = mvkde.fit(df, periods=[None, 360.0], bandwidth="normal").grid(16)
    assert g.attrs["circular_variables"] == "direction"
    assert g.attrs["period_direction"] == 360.0
    # Garcia-Portugues (2013, EJS 7) circle rule: h = [4 pi^{1/2} I0(k)^2 / (k n (2 I1(2k) + 3k I2(2k)))]^{1/5},
    # nu = 1/h^2, with k the von Mises maximum-likelihood concentration, here from scipy.stats.vonmises.fit
    # (reference library)
    k = stats.vonmises.fit(np.deg2rad(df["direction"].to_numpy()), fscale=1)[0]
    h = (4 * math.sqrt(math.pi) * special.iv(0, k) ** 2
         / (k * 100 * (2 * special.iv(1, 2 * k) + 3 * k * special.iv(2, 2 * k)))) ** 0.2
    assert g.attrs["concentration_direction"] == pytest.approx(1 / h ** 2, rel=1e-6)
    assert "Garcia-Portugues (2013)" in g.attrs["concentration_method_direction"]
    assert "von Mises" in g.attrs["engine_reason"]
    assert g["direction"].attrs["period"] == 360.0 and "period" not in g["speed"].attrs
