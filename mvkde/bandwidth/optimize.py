"""A damped Newton minimiser vectorised over many small problems.

Bandwidth selection for a block of cells is many independent minimisations
of 1 to 6 parameters.  One optimiser call per cell would spend its time in
Python; here every row of ``theta`` (one start of one cell) advances
together: the function is called on stacked arrays, gradients and Hessians
come from central differences evaluated in one call, the Hessian is made
positive definite by flipping and flooring its eigenvalues (so saddle
points and concave regions still give descent directions), and several step
lengths are tried at once.  A point outside the search region has value
``+inf`` and is never accepted, so a row that wants to leave the region
stops on its edge -- the caller reports that as ``at_edge``.
"""

from __future__ import annotations

import numpy as np

__all__ = ["batch_minimize"]

_STEPS = np.array([1.0, 0.5, 0.25, 0.1, 0.03, 0.01])


def batch_minimize(fun, theta0, *, rows=None, h=2e-3, max_iter=40, xtol=1e-5, max_step=1.5,
                   groups=None, keep_after=None):
    """Minimise ``fun(rows, theta) -> values`` independently for each row.

    Parameters
    ----------
    fun : callable
        ``fun(rows, theta)`` with ``rows`` (m,) integer labels passed through
        unchanged (they tell the criterion which problem each row is) and
        ``theta`` (m, p); returns (m,) values, ``inf`` outside the region.
    theta0 : (b, p) array
        Starting points.
    rows : (b,) array, optional
        Labels of the problems (default ``arange(b)``).
    groups, keep_after : (b,) array and int, optional
        Rows with the same group label are starts of one problem: after
        ``keep_after`` iterations only the row of each group with the lowest
        value goes on; the others stop where they are (the caller picks the
        best row of each group at the end, so a stopped row is never chosen
        over a better one).

    Returns
    -------
    theta : (b, p), value : (b,), converged : (b,) bool, iterations : int
    """
    theta = np.array(theta0, dtype=float)
    b, p = theta.shape
    rows = np.arange(b) if rows is None else np.asarray(rows)
    eye = np.eye(p)
    # finite-difference stencil: 0, +-h e_i, and +-h e_i +-h e_j (i < j)
    stencil = [np.zeros(p)]
    for i in range(p):
        stencil += [h * eye[i], -h * eye[i]]
    pairs = [(i, j) for i in range(p) for j in range(i + 1, p)]
    for i, j in pairs:
        for si, sj in ((1, 1), (1, -1), (-1, 1), (-1, -1)):
            stencil.append(h * (si * eye[i] + sj * eye[j]))
    stencil = np.array(stencil)
    ns = len(stencil)

    value = fun(rows, theta)
    active = np.isfinite(value)
    converged = np.zeros(b, dtype=bool)
    it = 0
    for it in range(1, max_iter + 1):
        if groups is not None and keep_after is not None and it == keep_after + 1:
            groups = np.asarray(groups)
            score = np.where(np.isfinite(value), value, np.inf)
            order = np.lexsort((score, groups))          # by group, then value
            first = np.ones(b, dtype=bool)
            first[1:] = groups[order][1:] != groups[order][:-1]
            best = np.zeros(b, dtype=bool)
            best[order[first]] = True
            active &= best
        idx = np.flatnonzero(active)
        if idx.size == 0:
            break
        m = idx.size
        pts = (theta[idx][:, None, :] + stencil[None]).reshape(-1, p)
        vals = fun(np.repeat(rows[idx], ns), pts).reshape(m, ns)
        f0 = vals[:, 0]
        grad = (vals[:, 1:2 * p + 1:2] - vals[:, 2:2 * p + 2:2]) / (2 * h)
        hess = np.empty((m, p, p))
        for i in range(p):
            hess[:, i, i] = (vals[:, 1 + 2 * i] - 2 * f0 + vals[:, 2 + 2 * i]) / h ** 2
        for k, (i, j) in enumerate(pairs):
            base = 1 + 2 * p + 4 * k
            v = vals[:, base:base + 4]
            hess[:, i, j] = hess[:, j, i] = (v[:, 0] - v[:, 1] - v[:, 2] + v[:, 3]) / (4 * h * h)
        bad = ~np.all(np.isfinite(vals), axis=1)       # stencil crosses the region's edge
        if np.any(bad):
            # one-sided gradient from what is finite; plain gradient step there
            gplus = (vals[:, 1:2 * p + 1:2] - f0[:, None]) / h
            gminus = (f0[:, None] - vals[:, 2:2 * p + 2:2]) / h
            gb = np.where(np.isfinite(gplus), gplus, gminus)
            gb = np.where(np.isfinite(gb), gb, 0.0)
            grad[bad] = gb[bad]
            hess[bad] = np.eye(p) * np.maximum(np.abs(f0[bad]), 1e-300)[:, None, None]
        lam, vec = np.linalg.eigh(hess)
        floor = 1e-8 * np.maximum(np.abs(lam).max(axis=1, keepdims=True), 1e-300)
        lam = np.maximum(np.abs(lam), floor)
        step = -np.einsum("mij,mj,mkj,mk->mi", vec, 1.0 / lam, vec, grad)
        norm = np.abs(step).max(axis=1)
        step *= np.minimum(1.0, max_step / np.maximum(norm, 1e-300))[:, None]
        trial = theta[idx][:, None, :] + _STEPS[None, :, None] * step[:, None, :]
        tv = fun(np.repeat(rows[idx], len(_STEPS)), trial.reshape(-1, p)).reshape(m, len(_STEPS))
        tv = np.where(np.isfinite(tv), tv, np.inf)
        best = np.argmin(tv, axis=1)
        fbest = tv[np.arange(m), best]
        improved = fbest < f0
        moved = _STEPS[best][:, None] * step
        new_theta = np.where(improved[:, None], theta[idx] + moved, theta[idx])
        theta[idx] = new_theta
        value[idx] = np.where(improved, fbest, f0)
        small = np.abs(moved).max(axis=1) < xtol
        done = (improved & small) | (~improved & (np.abs(step).max(axis=1) < 1e2 * xtol))
        stalled = ~improved & ~done
        converged[idx[done]] = True
        active[idx[done | stalled]] = False
    return theta, value, converged, it
