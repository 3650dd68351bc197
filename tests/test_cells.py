"""The batch door (mvkde.cells.fit_cells) against the single-estimate door, cell by cell.

Every check compares a cell of a batch with ``mvkde.fit(x, ...).grid(size,
limits=...)`` on the same sample.  Bandwidths must agree to 1e-10.  Grids
agree to 1e-10 of the peak when both sides evaluate on the same binned
lattice (a batch of one cell); in a batch of several cells the binned
engine picks one lattice for the block, and each side is then within the
engine's stated tolerance (1e-3 of the peak, mvkde.engines.binned.DEFAULT_TOL)
of the exact sums, so they differ by at most twice that.
"""

import numpy as np
import pytest

import mvkde
from mvkde.cells import fit_cells
from mvkde.engines.binned import DEFAULT_TOL

SIZE = (40, 36)
LIMITS = [(0.0, 14.0), (-12.0, 12.0)]
AXES = [np.linspace(lo, hi, n) for (lo, hi), n in zip(LIMITS, SIZE)]


def _bounded_sample(rng, n, scale=2.0):
    """A variable bounded at 0 (Weibull-like) and a correlated unbounded one."""
    z = rng.standard_normal(n)
    speed = scale * np.sqrt(-np.log(rng.uniform(size=n))) * np.exp(0.15 * z)
    return np.column_stack([speed, 3.0 * z + rng.standard_normal(n)])


def _rainy_sample(rng, n, wet=0.45):
    """Precipitation with dry days (<= 1 mm) and a temperature lower on wet days."""
    is_wet = rng.uniform(size=n) < wet
    pr = np.where(is_wet, 1.0 + rng.gamma(0.9, 3.0, n), np.where(rng.uniform(size=n) < 0.8, 0.0,
                                                                  rng.uniform(0, 1, n)))
    t = rng.normal(2.0, 3.0, n) - 1.5 * is_wet
    return np.column_stack([pr, t])


def _single(x, **options):
    est = mvkde.fit(x, **options)
    return est, est.grid(list(SIZE), limits=LIMITS).values


def _close_to_peak(a, b, tol):
    peak = max(np.abs(a).max(), np.abs(b).max())
    return float(np.abs(a - b).max() / peak), tol


def _check_batch(samples, options, same_lattice):
    batch = fit_cells(samples, axes=AXES, **options)
    assert batch.density.shape == (len(samples),) + SIZE
    for c, x in enumerate(samples):
        est, grid = _single(x, **options)
        assert batch.errors[c] is None
        np.testing.assert_allclose(batch.H[c], est.H, rtol=1e-10, atol=0)
        err, tol = _close_to_peak(batch.density[c], grid, 1e-10 if same_lattice else 2 * DEFAULT_TOL)
        assert err <= tol, (c, err)
    return batch


@pytest.mark.parametrize("boundary", [None, "linear", "reflect", "renormalize"])
def test_bounded_cells_of_different_sizes_equal_fit(rng, boundary):
    samples = [_bounded_sample(rng, n, s) for n, s in [(400, 2.0), (900, 2.5), (1500, 1.6)]]
    options = dict(bounds=[(0, None), None], boundary=boundary)
    batch = _check_batch(samples, options, same_lattice=False)
    assert batch.path == "batched"


@pytest.mark.parametrize("boundary", [None, "reflect"])
def test_one_bounded_cell_equals_fit_on_the_same_lattice(rng, boundary):
    x = _bounded_sample(rng, 700)
    _check_batch([x], dict(bounds=[(0, None), None], boundary=boundary), same_lattice=True)


def test_two_sided_bounds_reflect_equal_fit(rng):
    x = _bounded_sample(rng, 600)
    x[:, 0] = np.minimum(x[:, 0], 6.0)
    x[:, 1] = np.clip(x[:, 1], -10.0, 10.0)
    _check_batch([x], dict(bounds=[(0, 6.0), (-10.0, 10.0)], boundary="reflect"), same_lattice=True)


def test_point_mass_cells_equal_fit(rng):
    samples = [_rainy_sample(rng, n, wet) for n, wet in [(500, 0.5), (1200, 0.35), (800, 0.6)]]
    options = dict(bounds=[(0, None), None], point_masses=[1.0, None])
    batch = _check_batch(samples, options, same_lattice=False)
    assert batch.path == "batched"
    for c, x in enumerate(samples):
        est = mvkde.fit(x, **options)
        assert batch.point_mass_probability[c] == pytest.approx(est.point_mass_probability, abs=1e-15)
        # the dry part: a (d-1)-dimensional batch of its own
        pm = est.point_mass_grid([SIZE[1]], limits=[LIMITS[1]]).values
        err = np.abs(batch.density_at_point_mass[c] - pm).max() / np.abs(pm).max()
        assert err <= 2 * DEFAULT_TOL


def test_one_point_mass_cell_equals_fit_on_the_same_lattice(rng):
    x = _rainy_sample(rng, 900)
    options = dict(bounds=[(0, None), None], point_masses=[1.0, None])
    batch = _check_batch([x], options, same_lattice=True)
    pm = mvkde.fit(x, **options).point_mass_grid([SIZE[1]], limits=[LIMITS[1]]).values
    np.testing.assert_allclose(batch.density_at_point_mass[0], pm, rtol=0, atol=1e-10 * np.abs(pm).max())


def test_circular_cells_equal_fit_and_say_how(rng):
    axes = [np.linspace(0.0, 360.0, 36), np.linspace(0.0, 14.0, 30)]
    samples = []
    for n, mean in [(300, 90.0), (500, 250.0)]:
        direction = np.mod(rng.vonmises(np.deg2rad(mean), 2.0, n) * 180 / np.pi, 360.0)
        speed = 2.0 * np.sqrt(-np.log(rng.uniform(size=n)))
        samples.append(np.column_stack([direction, speed]))
    options = dict(periods=[360.0, None], bounds=[None, (0, None)], bandwidth="normal", boundary="reflect")
    batch = fit_cells(samples, axes=axes, **options)
    assert batch.path == "batched"    # von Mises x reflected linear kernel: pieces with a periodic axis
    for c, x in enumerate(samples):
        est = mvkde.fit(x, **options)
        grid = est.grid([36, 30], limits=[(0.0, 360.0), (0.0, 14.0)]).values
        np.testing.assert_allclose(batch.H[c], est.H, rtol=1e-10)
        np.testing.assert_allclose(batch.density[c], grid, rtol=0, atol=1e-10 * grid.max())


def test_a_refused_cell_among_good_ones_is_the_only_one_flagged(rng):
    good = [_rainy_sample(rng, n) for n in (600, 900)]
    constant = np.column_stack([np.full(300, 5.0), rng.normal(size=300)])  # pr constant: refused
    samples = [good[0], constant, good[1]]
    options = dict(bounds=[(0, None), None], point_masses=[1.0, None])
    batch = fit_cells(samples, axes=AXES, **options)
    assert batch.errors[0] is None and batch.errors[2] is None
    assert batch.errors[1] is not None and "constant" in batch.errors[1]
    assert np.isnan(batch.density[1]).all() and np.isnan(batch.H[1]).all()
    for c in (0, 2):
        est, grid = _single(samples[c], **options)
        np.testing.assert_allclose(batch.H[c], est.H, rtol=1e-10)
        assert np.abs(batch.density[c] - grid).max() <= 2 * DEFAULT_TOL * grid.max()


def test_unbatchable_boundary_falls_back_and_says_why(rng):
    x = _bounded_sample(rng, 300)
    options = dict(bounds=[(0, None), None], boundary="gamma", parametrization="diagonal", bandwidth="normal")
    batch = fit_cells([x], axes=AXES, **options)
    assert "gamma kernels" in batch.path
    est, grid = _single(x, **options)
    np.testing.assert_allclose(batch.density[0], grid, rtol=0, atol=1e-10 * grid.max())


def test_reflection_read_at_mirrored_nodes_equals_the_reflected_sum(rng):
    """A grid starting on the bound takes the mirrored-node path; checked against the reflected
    sum written out with scipy.stats.multivariate_normal (Silverman 1986, Sec. 2.10: images
    R X_i across the bound x_0 = 0, each with bandwidth R H R)."""
    from scipy.stats import multivariate_normal

    x = _bounded_sample(rng, 150)
    axes = [np.linspace(0.0, 8.0, 17), np.linspace(-9.0, 9.0, 13)]
    options = dict(bounds=[(0, None), None], boundary="reflect", bandwidth="normal")
    est = mvkde.fit(x, **options)
    pieces, _ = est._model.grid_pieces(axes)
    assert len(pieces) == 1 and len(pieces[0]) == 4          # one sum on the extended grid
    H = est.H
    R = np.diag([-1.0, 1.0])
    mesh = np.stack(np.meshgrid(*axes, indexing="ij"), axis=-1)
    want = np.zeros(mesh.shape[:2])
    for xi in x:
        want += multivariate_normal(xi, H).pdf(mesh) + multivariate_normal(R @ xi, R @ H @ R).pdf(mesh)
    want /= len(x)
    for engine, tol in (("exact", 1e-12), ("binned", DEFAULT_TOL)):
        batch = fit_cells([x], axes=axes, engine=engine, **options)
        assert np.abs(batch.density[0] - want).max() <= tol * want.max(), engine


def test_circular_cells_with_the_default_plugin_equal_fit(rng):
    # the mixture plug-in concentrations and the speed bandwidths are answered for the block
    axes = [np.linspace(0.0, 360.0, 36), np.linspace(0.0, 14.0, 30)]
    samples = []
    for n, mean, kappa in [(300, 90.0, 2.0), (900, 250.0, 0.7), (500, 10.0, 6.0)]:
        direction = np.mod(rng.vonmises(np.deg2rad(mean), kappa, n) * 180 / np.pi, 360.0)
        if n == 900:      # a second peak
            direction[::2] = np.mod(direction[::2] + 140.0, 360.0)
        speed = 2.0 * np.sqrt(-np.log(rng.uniform(size=n)))
        samples.append(np.column_stack([direction, speed]))
    options = dict(periods=[360.0, None], bounds=[None, (0, None)], boundary="reflect")
    batch = fit_cells(samples, axes=axes, **options)
    assert batch.path == "batched"
    for c, x in enumerate(samples):
        est = mvkde.fit(x, **options)
        np.testing.assert_allclose(batch.H[c], est.H, rtol=1e-10)
        kappa = est.concentrations["x0"]
        assert 1.0 / batch.H[c][0, 0] * (360.0 / (2 * np.pi)) ** 2 == pytest.approx(kappa, rel=1e-10)
        grid = est.grid([36, 30], limits=[(0.0, 360.0), (0.0, 14.0)]).values
        np.testing.assert_allclose(batch.density[c], grid, rtol=0, atol=1e-10 * grid.max())
    alone = fit_cells(samples[1:2], axes=axes, **options)
    np.testing.assert_allclose(alone.H[0], batch.H[1], rtol=1e-12)


def test_joint_cross_validation_stays_per_cell_and_says_so(rng):
    direction = np.mod(rng.vonmises(1.0, 2.0, 200) * 180 / np.pi, 360.0)
    x = np.column_stack([direction, rng.gamma(2.0, 2.0, 200)])
    options = dict(periods=[360.0, None], bounds=[None, (0, None)], boundary="reflect", bandwidth="mlcv")
    batch = fit_cells([x], axes=[np.linspace(0, 360, 19), np.linspace(0, 20, 21)], **options)
    assert "joint likelihood cross-validation" in batch.path and "cell by cell" in batch.path
    np.testing.assert_allclose(batch.H[0], mvkde.fit(x, **options).H, rtol=1e-10)
