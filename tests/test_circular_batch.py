"""Circular variables through the batch door: the binned engine with periodic axes.

Estimates with circular variables (von Mises kernels) and a linear block
corrected by "none" or "reflect" are kernel sums with periodic axes
(mvkde.directional.pieces); the binned engine evaluates them with a
circular FFT convolution (mvkde.engines.periodic).  Checked here: the
periodic spectrum against the DFT of the sampled scipy.stats.vonmises.pdf,
the direct sums against scipy.stats densities summed over the data and
against the estimate's own direct grid (DirectionalModel.direct_grid, the
D diag(w) B' sums), every binned grid against those direct sums within the
engine's tolerance (1e-3 x peak, mvkde.engines.binned.DEFAULT_TOL), the batch
door against mvkde.fit on one cell, and what CellBatch.path says.
"""

import math

import numpy as np
import pytest
from scipy import stats

import mvkde
from mvkde.bandwidth.matrix import BandwidthMatrix
from mvkde.cells import fit_cells
from mvkde.engines import evaluate_grid_many, periodic
from mvkde.engines.binned import DEFAULT_TOL
from mvkde.kernels import get_multivariate_kernel

GAUSS2 = get_multivariate_kernel("gaussian", "product", 2)


def _wind(rng, n, mean=90.0, kappa=2.0, scale=3.0):
    direction = np.mod(np.rad2deg(rng.vonmises(np.deg2rad(mean), kappa, n)), 360.0)
    speed = rng.gamma(2.0, scale, n)
    return np.column_stack([direction, speed])


def _direct(est, axes):
    """The estimate's grid by direct sums (DirectionalModel.direct_grid), as est.grid scales it."""
    values, _ = est._model.direct_grid(axes)
    return est._finish_grid(axes, values, None)


def _rel(a, b):
    return float(np.abs(a - b).max() / np.abs(b).max())


@pytest.mark.parametrize("kappa", [0.05, 1.0, 30.0, 2000.0])
@pytest.mark.parametrize("N", [7, 64, 98])
def test_periodic_spectrum_is_the_dft_of_the_sampled_kernel(kappa, N):
    # reference: numpy.fft.fft of scipy.stats.vonmises.pdf sampled at N nodes of one period (per degree)
    step = 360.0 / N
    sampled = stats.vonmises.pdf(2 * np.pi * np.arange(N) * step / 360.0, kappa) * 2 * np.pi / 360.0
    dft = np.fft.fft(sampled)
    got = periodic.von_mises_dft(kappa, N, step)
    assert np.abs(dft.imag).max() < 1e-12 / step
    assert np.abs(dft.real - got).max() <= 1e-12 / step


def test_direct_sums_equal_scipy_densities_and_the_models_own_sums(rng):
    x = _wind(rng, 400)
    est = mvkde.fit(x, periods=[360.0, None], bounds=[None, (0, None)], boundary="reflect", engine="exact")
    axes = [np.linspace(0, 360, 25), np.linspace(0, 30, 21)]
    grid = est.grid([25, 21], limits=[(0, 360), (0, 30)]).values
    assert est.attrs["engine"] == "exact"
    # direct sum: scipy.stats.vonmises.pdf x (scipy.stats.norm.pdf of the datum + of its reflection at 0)
    kappa = est.concentrations["x0"]
    h = math.sqrt(est.H[1, 1])
    A, S = np.meshgrid(np.deg2rad(axes[0]), axes[1], indexing="ij")
    vm = stats.vonmises.pdf(A.ravel()[:, None] - np.deg2rad(x[None, :, 0]), kappa) * 2 * np.pi / 360
    lin = stats.norm.pdf(S.ravel()[:, None], x[None, :, 1], h) + stats.norm.pdf(S.ravel()[:, None], -x[None, :, 1], h)
    reference = (vm * lin).mean(axis=1).reshape(grid.shape)
    assert _rel(grid, reference) < 1e-6   # reflection images beyond the reach are dropped (tol/100)
    assert _rel(grid, _direct(est, axes)) < 1e-12


def _binned_against_direct(x, size, limits, weights=None, **options):
    """Batch of one cell with engine='binned' against mvkde.fit and the direct sums.

    With weights (which the batch door does not take) only mvkde.fit's grid, which goes through the same
    pieces and engine call, is checked.  Returns (actual error, error estimate, batch, estimate).
    """
    axes = [np.linspace(lo, hi, n) for (lo, hi), n in zip(limits, size)]
    est = mvkde.fit(x, engine="binned", weights=weights, **options)
    grid = est.grid(list(size), limits=limits)
    assert grid.attrs["engine"] == "binned"
    batch = None
    if weights is None:
        batch = fit_cells([x], axes=axes, engine="binned", **options)
        assert batch.path == "batched", batch.path
        assert batch.engine[0] == "binned"
        np.testing.assert_allclose(batch.density[0], grid.values, rtol=0, atol=1e-10 * grid.values.max())
    exact = _direct(est, axes)
    err = _rel(grid.values, exact)
    assert err <= DEFAULT_TOL, err          # against the direct sums (DirectionalModel.direct_grid)
    return err, grid.attrs["engine_error_estimate"], batch, est


def test_direction_alone(rng):
    x = _wind(rng, 3000)[:, :1]
    _binned_against_direct(x, [73], [(0, 360)], periods=[360.0])


def test_direction_and_speed_bounded_at_zero_with_reflection(rng):
    _binned_against_direct(_wind(rng, 3650), [64, 64], [(0, 360), (0, 40)], periods=[360.0, None],
                           bounds=[None, (0, None)], boundary="reflect")


def test_direction_and_temperature(rng):
    x = _wind(rng, 2000)
    x[:, 1] = 12.0 + 4.0 * np.cos(np.deg2rad(x[:, 0])) + rng.normal(0, 2.0, x.shape[0])
    _binned_against_direct(x, [48, 40], [(0, 360), (0, 25)], periods=[360.0, None])


def test_temperature_first_and_weighted_data(rng):
    x = _wind(rng, 2500)[:, ::-1].copy()          # (speed, direction): the periodic axis last
    w = rng.uniform(0.2, 3.0, x.shape[0])
    _binned_against_direct(x, [40, 61], [(0, 40), (0, 360)], periods=[None, 360.0], bounds=[(0, None), None],
                           boundary="reflect", weights=w)


@pytest.mark.parametrize("variance, expect_refined", [(4.0, True), (2.0e4, False)])
def test_concentrated_and_flat_kernels(rng, variance, expect_refined):
    # given matrix: the direction's diagonal entry is the equivalent variance (360/2pi)^2/kappa
    x = _wind(rng, 3000, kappa=20.0)
    H = np.diag([variance, 1.0])
    err, estimate, batch, est = _binned_against_direct(x, [64, 40], [(0, 360), (0, 40)], periods=[360.0, None],
                                                       bandwidth=H, bounds=[None, (0, None)], boundary="reflect")
    kappa = est.concentrations["x0"]
    assert kappa == pytest.approx((360 / (2 * math.pi)) ** 2 / variance)
    refinement = est.attrs["engine_refinement"].split("x")
    assert (int(refinement[0]) > 1) == expect_refined


@pytest.mark.parametrize("m", [50, 37])
def test_circular_grid_whose_size_does_not_divide_evenly(rng, m):
    # 49 and 36 intervals per period: the lattice refines them (N = r (m - 1) nodes per period)
    _binned_against_direct(_wind(rng, 3000), [m, 30], [(0, 360), (0, 40)], periods=[360.0, None],
                           bounds=[None, (0, None)], boundary="reflect")


def test_a_grid_centred_on_north_and_shorter_than_a_period(rng):
    x = _wind(rng, 3000, mean=350.0)
    x[:, 0] = np.where(x[:, 0] > 180, x[:, 0] - 360, x[:, 0])     # directions in [-180, 180)
    axes = [np.linspace(-90, 90, 61), np.linspace(0, 40, 30)]
    pbw = periodic.PeriodicBandwidth(BandwidthMatrix.from_matrix(np.array([[1.0]]), 1), (8.0, None), (360.0, None))
    values, choices = evaluate_grid_many(axes, [x], None, [pbw], GAUSS2, "binned")
    exact = periodic.direct_grid(axes, x, None, pbw, GAUSS2)          # direct sum
    assert choices[0].engine == "binned" and _rel(values[0], exact) <= DEFAULT_TOL


def test_evaluate_grid_many_takes_periods_with_a_matrix(rng):
    x = _wind(rng, 2000)
    axes = [np.linspace(0, 360, 40), np.linspace(0, 40, 30)]
    kappa = 6.0
    H = np.diag([(360 / (2 * np.pi)) ** 2 / kappa, 2.0])
    a, _ = evaluate_grid_many(axes, [x], None, [H], GAUSS2, "binned", periods=[360.0, None])
    pbw = periodic.PeriodicBandwidth(BandwidthMatrix.from_matrix(np.array([[2.0]]), 1), (kappa, None), (360.0, None))
    b, _ = evaluate_grid_many(axes, [x], None, [pbw], GAUSS2, "binned")
    np.testing.assert_allclose(a, b, rtol=0, atol=1e-14)


def test_error_estimate_against_the_direct_sums(rng):
    # the estimate drives the refinement; it is an estimate, not a bound (as in binned.py), so only the
    # tolerance is asserted and the ratio is held loosely
    x = _wind(rng, 3000)[:, :1]
    for m, kappa in [(37, 300.0), (50, 10.0), (101, 300.0), (64, 50.0)]:
        pbw = periodic.PeriodicBandwidth(None, (kappa,), (360.0,))
        axes = [np.linspace(0, 360, m)]
        values, choices = evaluate_grid_many(axes, [x], None, [pbw], get_multivariate_kernel("gaussian", "product", 1),
                                             "binned")
        actual = _rel(values[0], periodic.direct_grid(axes, x, None, pbw, GAUSS2))   # direct sum
        estimate = choices[0].details["error_estimate"]
        assert actual <= DEFAULT_TOL
        assert actual <= 2.0 * estimate, (m, kappa, actual, estimate)


def test_a_block_of_cells_is_batched_and_each_cell_within_tolerance(rng):
    samples = [_wind(rng, n, mean=mu, kappa=k) for n, mu, k in [(3650, 40, 1.0), (3000, 200, 4.0), (2500, 300, 0.3)]]
    axes = [np.linspace(0, 360, 64), np.linspace(0, 40, 64)]
    options = dict(periods=[360.0, None], bounds=[None, (0, None)], boundary="reflect")
    batch = fit_cells(samples, axes=axes, **options)
    assert batch.path == "batched"
    for c, x in enumerate(samples):
        est = mvkde.fit(x, **options)
        assert batch.engine[c] == "binned"
        assert _rel(batch.density[c], _direct(est, axes)) <= DEFAULT_TOL      # direct sum


def test_rain_with_dry_days_and_wind_direction(rng):
    n = 3650
    x = _wind(rng, n)
    dry = rng.uniform(size=n) < 0.55
    rain = np.where(dry, 0.0, 1.0 + rng.gamma(0.8, 4.0, n))
    sample = np.column_stack([rain, x[:, 0]])
    options = dict(periods=[None, 360.0], bounds=[(0, None), None], point_masses=[1.0, None], boundary="reflect")
    axes = [np.linspace(0, 60, 48), np.linspace(0, 360, 64)]
    batch = fit_cells([sample], axes=axes, engine="binned", **options)
    assert batch.path == "batched" and batch.errors[0] is None
    est = mvkde.fit(sample, engine="binned", **options)
    grid = est.grid([48, 64], limits=[(0, 60), (0, 360)]).values
    np.testing.assert_allclose(batch.density[0], grid, rtol=0, atol=1e-10 * grid.max())
    assert _rel(batch.density[0], _direct(est, axes)) <= DEFAULT_TOL              # direct sum
    # the direction on dry days: a von Mises density alone, times the point-mass probability
    assert batch.point_mass_probability[0] == pytest.approx(est.point_mass_probability)
    on_mass = est.point_mass_grid([64], limits=[(0, 360)]).values
    np.testing.assert_allclose(batch.density_at_point_mass[0], on_mass, rtol=0, atol=1e-10 * on_mass.max())
    part = est._point.estimate
    exact = _direct(part, [axes[1]]) * est._point.probability                     # direct sum
    assert _rel(batch.density_at_point_mass[0], exact) <= DEFAULT_TOL


def test_sphere_and_transform_stay_per_cell_and_say_why(rng):
    lat = rng.uniform(-30, 30, 300)
    lon = rng.uniform(-60, 60, 300)
    axes = [np.linspace(-45, 45, 19), np.linspace(-90, 90, 37)]
    batch = fit_cells([np.column_stack([lat, lon])], axes=axes, sphere=("lat", "lon"), names=["lat", "lon"])
    assert batch.path.startswith("batched; per cell: spherical locations")
    x = _wind(rng, 400)
    axes = [np.linspace(0, 360, 19), np.linspace(0.5, 30, 21)]
    options = dict(periods=[360.0, None], bounds=[None, (0, None)], boundary="transform")
    batch = fit_cells([x], axes=axes, **options)
    assert "boundary='transform'" in batch.path and "cell by cell" in batch.path
    est = mvkde.fit(x, **options)
    grid = est.grid([19, 21], limits=[(0, 360), (0.5, 30)]).values
    np.testing.assert_allclose(batch.density[0], grid, rtol=0, atol=1e-12 * grid.max())


def test_engine_exact_gives_the_direct_sums(rng):
    x = _wind(rng, 3000)
    options = dict(periods=[360.0, None], bounds=[None, (0, None)], boundary="reflect", engine="exact")
    axes = [np.linspace(0, 360, 64), np.linspace(0, 40, 64)]
    batch = fit_cells([x], axes=axes, **options)
    est = mvkde.fit(x, **options)
    assert batch.engine == ["exact"] and batch.path == "batched"
    assert _rel(batch.density[0], _direct(est, axes)) < 1e-12


def test_a_periodic_axis_coupled_with_a_linear_one_is_refused():
    with pytest.raises(mvkde.errors.InputError, match="periodic axis 0"):
        periodic.PeriodicBandwidth.from_matrix(np.array([[4.0, 0.5], [0.5, 1.0]]), [360.0, None])
