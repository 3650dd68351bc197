"""Exact engine against scipy.stats.gaussian_kde (same data, same H)."""

from __future__ import annotations

import numpy as np
from scipy import stats

import mvkde
from harness import Row, best_of, case


@case("exact evaluation")
def exact_gaussian_grid(smoke: bool):
    n, size = (2_000, 32) if smoke else (10_000, 128)
    rng = np.random.default_rng(1)
    x = rng.multivariate_normal([0, 0], [[1, 0.6], [0.6, 2]], size=n)
    ref = stats.gaussian_kde(x.T, bw_method="silverman")
    est = mvkde.fit(x, bandwidth=ref.covariance, engine="exact")
    t_m, g = best_of(lambda: est.grid(size))
    mesh = np.meshgrid(*[g[d].values for d in g.dims], indexing="ij")
    pts = np.vstack([m.ravel() for m in mesh])
    t_r, r = best_of(lambda: ref(pts), repeat=1 if not smoke else 2)
    err = np.abs(g.values.ravel() - r).max() / r.max()
    return [Row(f"gaussian exact, n={n}, d=2, {size}x{size} grid", t_m, "scipy gaussian_kde", t_r, err,
                target="ratio >= 1", met=t_r / t_m >= 1)]
