"""Boundary-correction methods on a box support.

Every method is a small class built once per fit, with the same interface:

* ``density(points, log=False) -> (values, EngineChoice)`` at points inside
  the support (the estimator sets points outside the support to zero);
* ``grid(axes) -> (values, EngineChoice)`` on a tensor grid, through
  ``grid_pieces(axes)``: the kernel sums the grid is made of and how they
  combine, so that the batch door (:mod:`mvkde.cells`) evaluates the pieces of
  a whole block of cells in one engine call (:func:`evaluate_pieces`);
* ``sample(n, rng) -> (n, d)`` draws that respect the bounds;
* ``attrs``: numbers worth recording in the outputs.

The symmetric-kernel methods evaluate only through
:func:`mvkde.engines.evaluate_points` / :func:`~mvkde.engines.evaluate_grid`
(reflection = the engine on reflected copies of the data, renormalisation =
the engine with reweighted data and a closed-form correction, linear boundary
kernel = a few engine calls with moment weights), so any engine serves them.
The asymmetric kernels of Chen (1999, 2000) live in :mod:`mvkde.boundary.asymmetric`.

Long because each symmetric-kernel method keeps its density, grid pieces,
normalising constant and sampling together, and they share the engine-call
helpers (``_Base``, :func:`evaluate_pieces`) and the boundary-zone integrals
(``_Factorised``, ``_zone_table``) defined here.

References
----------
Jones, M. C. (1993). Simple boundary correction for kernel density
estimation. Statistics and Computing 3, 135-146.
Silverman, B. W. (1986). Density Estimation for Statistics and Data
Analysis. Chapman & Hall, Sec. 2.10 (reflection) and 3.10.
Chen, S. X. (1999). Beta kernel estimators for density functions.
Computational Statistics & Data Analysis 31, 131-145.
Chen, S. X. (2000). Probability density function estimation using gamma
kernels. Annals of the Institute of Statistical Mathematics 52, 471-480.
Diggle, P. (1985). A kernel method for smoothing point process data.
Applied Statistics 34, 138-147 (edge correction by the kernel mass inside
the domain).
"""

from __future__ import annotations

import itertools
import math
from functools import lru_cache

import numpy as np
from scipy import interpolate, special
from scipy.special import logsumexp

from .. import engines as _engines
from ..bandwidth.matrix import BandwidthMatrix
from ..errors import InputError
from .moments import cut_moments

_GAUSS_REACH = 8.5      # sd: Gaussian mass beyond this is below 1e-16
_GL_NODES, _GL_WEIGHTS = np.polynomial.legendre.leggauss(8)


# ---------------------------------------------------------------------------
# shared helpers
# ---------------------------------------------------------------------------

def _normalised(w):
    total = float(np.sum(w))
    return (w / total if total > 0 else w), total


def _panels(a: float, b: float, panels: int):
    """Composite 8-point Gauss-Legendre nodes and weights on [a, b]."""
    edges = np.linspace(a, b, panels + 1)
    mid, half = 0.5 * (edges[:-1] + edges[1:]), 0.5 * np.diff(edges)
    x = (mid[:, None] + half[:, None] * _GL_NODES[None, :]).ravel()
    q = (half[:, None] * _GL_WEIGHTS[None, :]).ravel()
    return x, q


def axis_reach(bw: BandwidthMatrix, kernel, j: int) -> float:
    """How far (in data units) the scaled kernel reaches along axis ``j``.

    Parameters
    ----------
    bw : BandwidthMatrix
    kernel : MultivariateKernel
    j : int

    Returns
    -------
    float
    """
    if not kernel.is_compact:
        return _GAUSS_REACH * math.sqrt(bw.matrix[j, j])
    if kernel.is_radial:
        return math.sqrt(bw.matrix[j, j]) * kernel.radius
    return float(np.abs(bw.cholesky[j]).sum()) * kernel.univariate.unit_radius


def inside_box(points, box) -> np.ndarray:
    """Whether each point lies in the closed box.

    Parameters
    ----------
    points : ndarray, shape (m, d)
    box : list of (float, float)
        ``(lo, hi)`` per variable, infinite where unbounded.

    Returns
    -------
    ndarray of bool, shape (m,)
    """
    ok = np.ones(points.shape[0], dtype=bool)
    for j, (lo, hi) in enumerate(box):
        ok &= (points[:, j] >= lo) & (points[:, j] <= hi)
    return ok


def bounded_axes(box) -> list[int]:
    """Indices of the variables with a finite bound.

    Parameters
    ----------
    box : list of (float, float)

    Returns
    -------
    list of int
    """
    return [j for j, (lo, hi) in enumerate(box) if math.isfinite(lo) or math.isfinite(hi)]


def factorised_scales(method: str, bw: BandwidthMatrix, kernel, box, names) -> dict[int, float]:
    """Scale of the kernel's marginal along each bounded axis, when these marginals are
    independent one-dimensional copies of the univariate unit kernel.

    That holds for the Gaussian kernel when H is diagonal on the bounded variables
    (the marginal of N(0, H) on them is N(0, H_BB)), and for a product kernel when
    the Cholesky row of each bounded variable has one non-zero entry (the variable
    is the first one, or H does not couple it with the variables before it).
    Renormalisation and the linear boundary kernel need it; reflection does not.

    Parameters
    ----------
    method : str
        Boundary method name, for the messages.
    bw : BandwidthMatrix
    kernel : MultivariateKernel
    box : list of (float, float)
    names : list of str

    Returns
    -------
    dict of int -> float
        Bounded axis -> scale of the kernel's marginal along it.

    Raises
    ------
    InputError
        If the marginals do not factorise (spherical kernel, or H couples a bounded variable).
    """
    B = bounded_axes(box)
    H, L = bw.matrix, bw.cholesky
    if kernel.is_radial:
        raise InputError(
            f"boundary={method!r} needs a kernel that factorises over the bounded variables, and the "
            f"spherical {kernel.name} kernel does not: use form='product', kernel='gaussian', or "
            "boundary='reflect' (which works with any kernel and H)")
    if kernel.name == "gaussian":
        for a, b in itertools.combinations(B, 2):
            if abs(H[a, b]) > 1e-12 * math.sqrt(H[a, a] * H[b, b]):
                raise InputError(
                    f"boundary={method!r} with several bounded variables needs H[{names[a]}, {names[b]}] = 0 "
                    "(the correction is a product over bounded variables): use parametrization='diagonal', "
                    "or boundary='reflect', which handles a correlated H")
        return {j: math.sqrt(H[j, j]) for j in B}
    out = {}
    for j in B:
        off = np.abs(np.delete(L[j, :j + 1], j))
        if off.size and off.max() > 1e-12 * L[j, j]:
            raise InputError(
                f"boundary={method!r} with the product {kernel.name} kernel needs {names[j]} not to be "
                f"coupled by H with the variables before it (its kernel marginal is then not one "
                f"{kernel.name} kernel): put {names[j]} first, use parametrization='diagonal' or "
                "kernel='gaussian', or boundary='reflect', which handles any H")
        out[j] = float(L[j, j])
    return out


class _Base:
    """The interface every boundary model shares; the uncorrected estimate.

    Parameters
    ----------
    data : ndarray, shape (n, d)
    weights : ndarray, shape (n,), or None
        None gives every datum weight 1/n.
    bw : BandwidthMatrix
    kernel : MultivariateKernel
    box : list of (float, float)
        ``(lo, hi)`` per variable, infinite where unbounded.
    engine : {'auto', 'exact', 'binned', 'tree'}
    names : list of str

    Attributes
    ----------
    attrs : dict
        Numbers worth recording in the outputs (at least ``boundary_sampling``).
    """

    name = "none"
    sample_note = "smoothed bootstrap; draws outside the support are redrawn (rejection)"

    def __init__(self, data, weights, bw: BandwidthMatrix, kernel, box, engine, names):
        self.data = data
        n = data.shape[0]
        self.w = np.full(n, 1.0 / n) if weights is None else np.asarray(weights, dtype=float)
        self.bw = bw
        self.kernel = kernel
        self.box = box
        self.engine = engine
        self.names = names
        self.d = data.shape[1]
        self.attrs: dict = {"boundary_sampling": self.sample_note}

    # engine calls with arbitrary non-negative weights (engines want sum 1)
    def _points(self, pts, data, w, bw, log=False):
        wn, total = _normalised(w)
        if total <= 0:
            return (np.full(pts.shape[0], -np.inf) if log else np.zeros(pts.shape[0])), None
        v, choice = _engines.evaluate_points(pts, data, wn, bw, self.kernel, self.engine, log=log)
        return (v + math.log(total) if log else v * total), choice

    def _grid(self, axes, data, w, bw):
        wn, total = _normalised(w)
        if total <= 0:
            return np.zeros(tuple(len(a) for a in axes)), None
        v, choice = _engines.evaluate_grid(axes, data, wn, bw, self.kernel, self.engine)
        return v * total, choice

    def density(self, pts, log=False):
        """Density (or log density) at points inside the support.

        Parameters
        ----------
        pts : ndarray, shape (m, d)
        log : bool, optional

        Returns
        -------
        values : ndarray, shape (m,)
        choice : EngineChoice or None
            None when no kernel sum carried weight.
        """
        return self._points(pts, self.data, self.w, self.bw, log)

    def grid_pieces(self, axes):
        """The grid as engine evaluations: ``(pieces, combine)``.

        ``pieces`` is a list of ``(data, weights, bandwidth)``, each a plain
        kernel sum on the grid; ``combine(values)`` turns their grids (in that
        order, each scaled by its total weight) into the model's grid.  The
        batch door evaluates the pieces of many cells in one call of
        :func:`mvkde.engines.evaluate_grid_many`; :meth:`grid` does the same
        for one model, so both give the same numbers on the same lattice.
        A piece may carry its own list of axes as a fourth entry.

        Parameters
        ----------
        axes : list of ndarray

        Returns
        -------
        pieces : list of tuple
        combine : callable
            List of the pieces' grids -> ndarray of the model's grid.
        """
        return [(self.data, self.w, self.bw)], _first

    def grid(self, axes):
        """Density on the tensor grid ``axes``, through :meth:`grid_pieces`.

        Parameters
        ----------
        axes : list of ndarray
            d increasing 1-D arrays.

        Returns
        -------
        values : ndarray, shape (len(axes[0]), ..., len(axes[d-1]))
        choice : EngineChoice or None
        """
        pieces, combine = self.grid_pieces(axes)
        (values,), (choice,) = evaluate_pieces(axes, [pieces], self.kernel, self.engine)
        return combine(values), choice

    # draws of the uncorrected estimate (smoothed bootstrap)
    def _bootstrap(self, n, rng, w=None):
        w = self.w if w is None else w
        idx = rng.choice(self.data.shape[0], size=n, p=w / w.sum())
        return self.data[idx] + self.bw.colorize(self.kernel.sample(n, rng))

    def sample(self, n, rng):
        """Draws that respect the bounds (here: the smoothed bootstrap, redrawn outside the support).

        Parameters
        ----------
        n : int
        rng : numpy.random.Generator

        Returns
        -------
        ndarray, shape (n, d)

        Raises
        ------
        InputError
            If too few draws land inside the support.
        """
        return _rejection(lambda m: self._bootstrap(m, rng), lambda y: inside_box(y, self.box), n,
                          "the uncorrected estimate has almost no mass inside the bounds")


def _rejection(propose, accept, n, why, max_rounds=200):
    out, have = [], 0
    for _ in range(max_rounds):
        if have >= n:
            break
        m = max(64, 2 * (n - have))
        y = propose(m)
        keep = y[accept(y)]
        out.append(keep)
        have += keep.shape[0]
    if have < n:
        raise InputError(f"sampling failed: {why}; use boundary='reflect'")
    return np.concatenate(out)[:n] if out else np.empty((0, 0))


def _first(values):
    return values[0]


#: pieces evaluated by one engine call (see evaluate_pieces)
PIECES_PER_CALL = 16


def evaluate_pieces(axes, models, kernel, engine):
    """Grids of the pieces of many models (see ``_Base.grid_pieces``) in one engine call.

    ``models`` is a list (one entry per model) of lists of ``(data, weights,
    bandwidth)``; the bandwidth is a BandwidthMatrix, or a
    :class:`mvkde.engines.periodic.PeriodicBandwidth` for kernel sums with
    periodic axes (von Mises kernels on circular variables).  Returns, per model, the list of its pieces' grids (each
    A piece may carry its own grid as a fourth entry (a list of axes); pieces
    on the same grid share one engine call.  Values are
    multiplied by the piece's total weight, zeros for a piece without
    weight), and per model the engine choice of its first piece evaluated
    (None when no piece carried weight).

    Parameters
    ----------
    axes : list of ndarray
        The grid of pieces without their own axes.
    models : list of list of tuple
    kernel : MultivariateKernel
    engine : {'auto', 'exact', 'binned', 'tree'}

    Returns
    -------
    grids : list of list of ndarray
    choices : list of (EngineChoice or None)
    """
    groups: dict = {}   # pieces on the same grid go through one engine call
    out = []
    for m, pieces in enumerate(models):
        out.append([None] * len(pieces))
        for k, piece in enumerate(pieces):
            data, w, bw = piece[:3]
            piece_axes = piece[3] if len(piece) > 3 else axes
            wn, total = _normalised(w)
            if total <= 0 or data.shape[0] == 0:
                out[m][k] = np.zeros(tuple(len(a) for a in piece_axes))
                continue
            # pieces with periodic axes (engines.periodic.PeriodicBandwidth) go in calls of their own
            key = (tuple((float(a[0]), float(a[-1]), len(a)) for a in piece_axes), getattr(bw, "periods", None))
            group = groups.setdefault(key, (piece_axes, []))
            group[1].append((m, k, data, wn, bw, total))
    model_choices = [None] * len(models)
    for piece_axes, flat in groups.values():
        # The binned engine gives the pieces of one call a common lattice: wide
        # enough for the widest data and fine enough for the most demanding
        # piece.  Pieces sorted by where their data end and evaluated
        # PIECES_PER_CALL at a time share lattices close to their own (measured
        # on 64-cell blocks: lattice work 1.3-1.4 x that of one call per piece,
        # against 1.9-2.6 x for one call for all).
        flat.sort(key=lambda p: tuple(float(p[2][:, j].max()) for j in range(p[2].shape[1])))
        for start in range(0, len(flat), PIECES_PER_CALL):
            chunk = flat[start:start + PIECES_PER_CALL]
            values, choices = _engines.evaluate_grid_many(piece_axes, [p[2] for p in chunk],
                                                          [p[3] for p in chunk], [p[4] for p in chunk], kernel,
                                                          engine)
            for (m, k, _, _, _, total), v, choice in zip(chunk, values, choices):
                out[m][k] = v * total
                if model_choices[m] is None or k == 0:
                    model_choices[m] = choice
    return out, model_choices


class NoCorrection(_Base):
    """The uncorrected estimate cut at the bounds: mass leaks past them."""

    name = "none"


# ---------------------------------------------------------------------------
# reflection
# ---------------------------------------------------------------------------

class Reflection(_Base):
    """Reflection of the data across each bounded face, corners included.

    For one bounded face ``x_j = c`` the image of ``X`` is ``R X + 2c e_j`` with
    ``R`` flipping the sign of coordinate j; its kernel has bandwidth ``R H R``
    (a correlated H changes the sign of its coupling), which makes the images
    carry exactly the mass the original kernel puts beyond the face (Silverman
    1986, Sec. 2.10 for the univariate method).  A two-sided variable has the
    images of the reflection group of [lo, hi] (reflections and translations by
    2(hi - lo)); every combination over the bounded variables is used, and
    images farther than the kernel's reach from the support are dropped, so the
    estimate is exact to 1e-16 of the mass whatever the bandwidth.
    """

    name = "reflect"
    sample_note = "smoothed bootstrap folded back into the support by reflection (exact)"

    def __init__(self, *args):
        super().__init__(*args)
        self.groups = self._images()
        self.attrs["reflected_copies"] = int(sum(g[1].shape[0] for g in self.groups) - self.data.shape[0])

    def _axis_images(self, j):
        lo, hi = self.box[j]
        if not (math.isfinite(lo) or math.isfinite(hi)):
            return [(1.0, 0.0)]
        if not math.isfinite(hi):
            return [(1.0, 0.0), (-1.0, 2.0 * lo)]
        if not math.isfinite(lo):
            return [(1.0, 0.0), (-1.0, 2.0 * hi)]
        width = hi - lo
        k = int(math.ceil(axis_reach(self.bw, self.kernel, j) / (2.0 * width))) + 1
        out = []
        for m in range(-k, k + 1):
            out.append((1.0, 2.0 * m * width))
            out.append((-1.0, 2.0 * lo + 2.0 * m * width))
        return out

    def _images(self):
        d = self.d
        per_axis = []
        for j in range(d):
            reach = axis_reach(self.bw, self.kernel, j)
            lo, hi = self.box[j]
            col = self.data[:, j]
            entries = []
            for sign, offset in self._axis_images(j):
                y = sign * col + offset
                gap = np.maximum(lo - y, y - hi)
                keep = gap < reach
                if keep.any():
                    entries.append((sign, y, keep))
            per_axis.append(entries)
        groups: dict[tuple, list] = {}
        for combo in itertools.product(*per_axis):
            keep = np.logical_and.reduce([c[2] for c in combo])
            if not keep.any():
                continue
            signs = tuple(c[0] for c in combo)
            pts = np.column_stack([c[1][keep] for c in combo])
            groups.setdefault(signs, []).append((pts, self.w[keep]))
        out = []
        H = self.bw.matrix
        for signs, parts in groups.items():
            r = np.asarray(signs)
            bw = self.bw if np.all(r > 0) else BandwidthMatrix.from_matrix(H * np.outer(r, r), self.d)
            out.append((bw, np.concatenate([p[0] for p in parts]), np.concatenate([p[1] for p in parts])))
        return out

    def density(self, pts, log=False):
        """Sum over the image data sets; arguments and returns as ``_Base.density``."""
        vals, choice = [], None
        for bw, data, w in self.groups:
            v, c = self._points(pts, data, w, bw, log)
            vals.append(v)
            choice = c or choice
        if log:
            return logsumexp(np.vstack(vals), axis=0), choice
        return np.sum(vals, axis=0), choice

    def grid_pieces(self, axes):
        """One piece on an extended grid when nodes mirror onto nodes, else one per image set; as ``_Base``."""
        mirrored = self._mirrored_grid(axes)
        if mirrored is not None:
            return mirrored
        return [(data, w, bw) for bw, data, w in self.groups], _summed

    def _mirrored_grid(self, axes):
        """The reflection estimate as the plain one read at mirrored nodes, when they lie on the grid.

        The image of X across the face x_j = c, with bandwidth R H R, contributes
        K_{RHR}(x - R X - 2c e_j) = K_H(R x + 2c e_j - X) at x: the plain estimate at
        the mirror image of x.  So with one-sided bounds whose mirror images of the
        grid nodes fall on the grid extended across the bound (the grid starts or
        ends on the bound, or an integer number of steps from it), the estimate is
        ONE kernel sum of the data on the extended grid (the binned engine's
        lattice covers only the part within the kernel's reach of the data),
        summed over the reflection group at the mirrored nodes.  Otherwise None
        (the image data sets are evaluated instead).
        """
        ext_axes, maps = [], []
        for j, a in enumerate(axes):
            lo, hi = self.box[j]
            if not (math.isfinite(lo) or math.isfinite(hi)):
                ext_axes.append(a)
                maps.append([np.arange(a.size)])
                continue
            if (math.isfinite(lo) and math.isfinite(hi)) or a.size < 2:
                return None
            step = (a[-1] - a[0]) / (a.size - 1)
            c = lo if math.isfinite(lo) else hi
            shift = (2.0 * c - 2.0 * a[0]) / step          # mirror of node k is node shift - k
            s = round(shift)
            if abs(shift - s) > 1e-9 * max(1.0, abs(shift)) or step <= 0:
                return None
            k = np.arange(a.size)
            first, last = min(0, s - (a.size - 1)), max(a.size - 1, s)
            ext_axes.append(a[0] + step * np.arange(first, last + 1))
            maps.append([k - first, s - k - first])
        d = self.d
        combos = list(itertools.product(*maps))

        def combine(values):
            v = values[0]
            return np.sum([v[np.ix_(*idx)] for idx in combos], axis=0) if len(combos) > 1 else v[np.ix_(*combos[0])]

        return [(self.data, self.w, self.bw, ext_axes)], combine

    def sample(self, n, rng):
        """Smoothed bootstrap folded into the box (:func:`fold_into_box`); as ``_Base.sample``."""
        return fold_into_box(self._bootstrap(n, rng), self.box)


def _summed(values):
    return np.sum(values, axis=0)


def fold_into_box(y, box):
    """Fold draws back into the box by reflection at each bound: the reflection
    estimate's own sampling (Silverman 1986, Sec. 2.10).

    Parameters
    ----------
    y : array_like, shape (n, d)
    box : list of (float, float)

    Returns
    -------
    ndarray, shape (n, d)
        A copy; ``y`` is not changed.
    """
    y = np.array(y, dtype=float, copy=True)
    for j, (lo, hi) in enumerate(box):
        col = y[:, j]
        if math.isfinite(lo) and math.isfinite(hi):
            width = hi - lo
            t = np.mod(col - lo, 2.0 * width)
            y[:, j] = lo + np.where(t <= width, t, 2.0 * width - t)
        elif math.isfinite(lo):
            y[:, j] = lo + np.abs(col - lo)
        elif math.isfinite(hi):
            y[:, j] = hi - np.abs(hi - col)
    return y


# ---------------------------------------------------------------------------
# renormalisation
# ---------------------------------------------------------------------------

class _Factorised(_Base):
    """Methods whose correction is a product over bounded axes of 1-D kernel moments."""

    def __init__(self, *args):
        super().__init__(*args)
        self.scales = factorised_scales(self.name, self.bw, self.kernel, self.box, self.names)
        self.k1 = self.kernel.univariate

    def _moments(self, j, x):
        lo, hi = self.box[j]
        h = self.scales[j]
        return cut_moments(self.k1, (x - lo) / h, (x - hi) / h)

    def mass_inside(self, x) -> np.ndarray:
        """``a0(x) = int_support K_H(x - y) dy`` (a product of 1-D cut masses).

        Parameters
        ----------
        x : ndarray, shape (m, d)

        Returns
        -------
        ndarray, shape (m,)
        """
        out = np.ones(x.shape[0])
        for j in self.scales:
            out *= self._moments(j, x[:, j])[0]
        return out

    def _axis_integral(self, j, X, g):
        """``int_{lo}^{hi} k_h(x - X)(1 + g(x, X)) dx`` for every X, where g vanishes
        farther than the kernel's reach from the bounds (so only the boundary zones
        need quadrature)."""
        lo, hi = self.box[j]
        h = self.scales[j]
        reach = axis_reach(self.bw, self.kernel, j) if not self.kernel.is_compact else h * self.k1.unit_radius
        base = self._moments(j, X)[0]
        zones = []
        if math.isfinite(lo) and math.isfinite(hi) and hi - lo <= 2 * reach:
            zones = [(lo, hi)]
        else:
            if math.isfinite(lo):
                zones.append((lo, lo + reach))
            if math.isfinite(hi):
                zones.append((hi - reach, hi))
        out = base.copy()
        kind = getattr(self, "_zone_kind", None)
        if kind is not None and self.kernel.name == "gaussian" and zones and zones[0] != (lo, hi):
            # each zone's integral is one function of the distance to its bound in
            # bandwidths, the same for every sample (tabulated once, _zone_table)
            table = _zone_table(kind)
            for a, b in zones:
                u = (X - lo) / h if a == lo else (hi - X) / h
                near = u < 2.0 * _GAUSS_REACH
                out[near] += table(u[near])
            return out
        for a, b in zones:
            near = (X > a - reach) & (X < b + reach)
            if not near.any():
                continue
            x, q = _panels(a, b, 96)
            k = self.k1.unit((x[:, None] - X[None, near]) / h) / h
            out[near] += q @ (k * g(x, X[near]))
        return out


_ZONE_STEP = 1.0 / 128.0


@lru_cache(maxsize=None)
def _zone_table(kind: str):
    """``G(u) = int_0^R phi(p - u) g(p, u) dp`` for the Gaussian kernel and a lower bound at 0,
    h = 1, as a cubic spline in u on [0, 2R] (R = the Gaussian reach).

    ``g`` is the correction the boundary zone adds to a kernel's mass inside
    the support: ``A(p) + B(p) u - 1`` for the linear boundary kernel (Jones
    1993), ``1 / a0(p) - 1`` for pointwise renormalisation.  Scaled by h and
    mirrored, it serves every bandwidth and either bound, so a model's
    normalising constant costs one spline evaluation per datum instead of a
    quadrature per datum (``_Factorised._axis_integral``).  The integrals are
    the composite Gauss-Legendre rule used for other kernels; the spline's
    interpolation error at this node spacing is below 1e-12.
    """
    from ..kernels import get_kernel

    k1 = get_kernel("gaussian")
    p, q = _panels(0.0, _GAUSS_REACH, 96)
    a0, a1, a2 = cut_moments(k1, p, np.full_like(p, -np.inf))
    u = np.arange(0.0, 2.0 * _GAUSS_REACH + 2 * _ZONE_STEP, _ZONE_STEP)
    phi = np.exp(-0.5 * (p[None, :] - u[:, None]) ** 2) / math.sqrt(2.0 * math.pi)
    if kind == "linear":
        D = a0 * a2 - a1 * a1
        ok = D > 1e-14
        with np.errstate(divide="ignore", invalid="ignore"):
            fixed = np.where(ok, (a2 - a1 * p) / D - 1.0, 0.0)
            slope = np.where(ok, a1 / D, 0.0)
        G = phi @ (q * fixed) + u * (phi @ (q * slope))
    else:
        G = phi @ (q * (1.0 / a0 - 1.0))
    return interpolate.CubicSpline(u, G)


class KernelRenormalization(_Factorised):
    """Each kernel divided by its own mass inside the support:
    ``f(x) = sum_i w_i K_H(x - X_i) / a0(X_i)``, ``a0(X) = int_S K_H(y - X) dy``.

    Integrates to one exactly; the bias at the bound is O(h) like the pointwise
    variant (Jones 1993, Sec. 2, discusses both normalisations).
    """

    name = "renormalize-kernel"
    sample_note = "each kernel truncated to the support: a kernel draw is redrawn until inside (exact)"

    def __init__(self, *args):
        super().__init__(*args)
        self.a0_data = self.mass_inside(self.data)
        self.w_corrected = self.w / self.a0_data

    def density(self, pts, log=False):
        """The engine with weights ``w_i / a0(X_i)``; arguments and returns as ``_Base.density``."""
        return self._points(pts, self.data, self.w_corrected, self.bw, log)

    def grid_pieces(self, axes):
        """One piece with weights ``w_i / a0(X_i)``; as ``_Base.grid_pieces``."""
        return [(self.data, self.w_corrected, self.bw)], _first

    def sample(self, n, rng):
        """Each kernel draw redrawn until inside the support; as ``_Base.sample``."""
        idx = rng.choice(self.data.shape[0], size=n, p=self.w)
        out = np.empty((n, self.d))
        todo = np.arange(n)
        for _ in range(10_000):
            if todo.size == 0:
                break
            y = self.data[idx[todo]] + self.bw.colorize(self.kernel.sample(todo.size, rng))
            ok = inside_box(y, self.box)
            out[todo[ok]] = y[ok]
            todo = todo[~ok]
        if todo.size:
            raise InputError("sampling failed: kernels barely reach inside the support; use boundary='reflect'")
        return out


class PointwiseRenormalization(_Factorised):
    """Pointwise edge correction: ``f(x) = f_hat(x) / a0(x)`` (Diggle 1985; the
    'cut-and-normalise' estimator of Jones 1993), divided by a constant so that
    the total mass is one (the raw correction integrates to 1 + O(h^2))."""

    name = "renormalize"
    _zone_kind = "renormalize"
    sample_note = ("rejection from the uncorrected estimate with acceptance min(a0)/a0(x) "
                   "(exact: a0 >= its minimum over the support)")

    def __init__(self, *args):
        super().__init__(*args)
        mass = np.ones(self.data.shape[0])
        for j in self.scales:
            mass *= self._axis_integral(j, self.data[:, j],
                                        lambda x, X, j=j: np.broadcast_to(
                                            1.0 / self._moments(j, x)[0] - 1.0, (X.size, x.size)).T)
        self.constant = float(self.w @ mass)
        self.attrs["boundary_mass_before_normalisation"] = self.constant

    def density(self, pts, log=False):
        """Plain estimate divided by ``a0(x)`` and the total mass; as ``_Base.density``."""
        v, choice = self._points(pts, self.data, self.w, self.bw)
        v = v / (self.mass_inside(pts) * self.constant)
        if log:
            with np.errstate(divide="ignore"):
                return np.log(np.maximum(v, 0.0)), choice
        return v, choice

    def grid_pieces(self, axes):
        """One plain piece, divided by ``a0`` per axis and the total mass; as ``_Base.grid_pieces``."""
        divisors = []
        for j in self.scales:
            shape = [1] * self.d
            shape[j] = -1
            divisors.append(self._moments(j, axes[j])[0].reshape(shape))

        def combine(values):
            v = values[0]
            for a0 in divisors:
                v = v / a0
            return v / self.constant

        return [(self.data, self.w, self.bw)], combine

    def sample(self, n, rng):
        """Rejection from the uncorrected estimate with acceptance min(a0)/a0(x); as ``_Base.sample``."""
        lowest = 1.0
        for j in self.scales:
            lo, hi = self.box[j]
            ends = np.array([e for e in (lo, hi) if math.isfinite(e)])
            lowest *= float(self._moments(j, ends)[0].min())
        return _rejection(
            lambda m: self._bootstrap(m, rng),
            lambda y: inside_box(y, self.box) & (rng.random(y.shape[0]) * self.mass_inside(np.clip(
                y, [b[0] for b in self.box], [b[1] for b in self.box])) < lowest),
            n, "the uncorrected estimate has almost no mass inside the bounds")


# ---------------------------------------------------------------------------
# linear boundary kernel
# ---------------------------------------------------------------------------

class LinearBoundaryKernel(_Factorised):
    """Jones (1993) linear boundary kernel, a product over bounded axes of

        K_L(u) = (a2(p) - a1(p) u) K(u) / (a0(p) a2(p) - a1(p)^2),

    with ``a_l`` the partial moments of the kernel cut by the support at x.  It
    cancels the O(h) bias at the bound and can go negative there.  Written as
    ``A_j(x) + B_j(x) t_ij`` with ``t_ij = X_ij - lo_j >= 0`` (``hi_j - X_ij``
    for an upper bound alone), the estimate is a sum of 2^k engine calls with
    the non-negative weights ``w_i prod_{j in S} t_ij``.  It is divided by its
    total mass (1 + O(h^3) before normalisation; recorded in the attributes).
    """

    name = "linear"
    _zone_kind = "linear"
    sample_note = ("rejection from the reflection estimate, target max(f, 0); envelope estimated "
                   "from pilot draws (approximate where the envelope is exceeded)")

    def __init__(self, *args):
        super().__init__(*args)
        self.anchor = {}
        for j in self.scales:
            lo, hi = self.box[j]
            self.anchor[j] = (lo, 1.0) if math.isfinite(lo) else (hi, -1.0)
        mass = np.ones(self.data.shape[0])
        for j in self.scales:
            c, sgn = self.anchor[j]

            def g(x, X, j=j, c=c, sgn=sgn):
                A, B = self._coefficients(j, x)
                return A[:, None] + B[:, None] * (sgn * (X[None, :] - c)) - 1.0

            mass *= self._axis_integral(j, self.data[:, j], g)
        self.constant = float(self.w @ mass)
        self.attrs["boundary_mass_before_normalisation"] = self.constant

    def _coefficients(self, j, x):
        a0, a1, a2 = self._moments(j, x)
        c, sgn = self.anchor[j]
        h = self.scales[j]
        D = a0 * a2 - a1 * a1
        with np.errstate(divide="ignore", invalid="ignore"):
            A = (a2 - a1 * (x - c) / h) / D
            B = sgn * a1 / (h * D)
        bad = ~(D > 1e-14)
        A[bad], B[bad] = 1.0, 0.0
        return A, B

    def _terms(self):
        axes = list(self.scales)
        for r in range(len(axes) + 1):
            for subset in itertools.combinations(axes, r):
                w = self.w.copy()
                for j in subset:
                    c, sgn = self.anchor[j]
                    w = w * (sgn * (self.data[:, j] - c))
                yield subset, w

    def density(self, pts, log=False):
        """Sum of the 2^k weighted engine calls (may be negative; log is -inf there); as ``_Base.density``."""
        out, choice = np.zeros(pts.shape[0]), None
        coef = {j: self._coefficients(j, pts[:, j]) for j in self.scales}
        for subset, w in self._terms():
            v, c = self._points(pts, self.data, w, self.bw)
            choice = c or choice
            for j in self.scales:
                v = v * (coef[j][1] if j in subset else coef[j][0])
            out += v
        out /= self.constant
        if log:
            with np.errstate(divide="ignore", invalid="ignore"):
                return np.where(out > 0, np.log(np.where(out > 0, out, 1.0)), -np.inf), choice
        return out, choice

    def grid_pieces(self, axes):
        """One piece per term ``w_i prod_{j in S} t_ij``; as ``_Base.grid_pieces``."""
        coef = {j: self._coefficients(j, axes[j]) for j in self.scales}
        terms = list(self._terms())

        def combine(values):
            out = 0.0
            for (subset, _), v in zip(terms, values):
                for j in self.scales:
                    shape = [1] * self.d
                    shape[j] = -1
                    v = v * (coef[j][1] if j in subset else coef[j][0]).reshape(shape)
                out = out + v
            return out / self.constant

        return [(self.data, w, self.bw) for _, w in terms], combine

    def sample(self, n, rng):
        """Rejection from the reflection estimate (approximate, see ``sample_note``); as ``_Base.sample``."""
        return _envelope_sample(self, n, rng)


def _envelope_sample(model, n, rng):
    """Rejection from the reflection estimate of the same data and H."""
    proposal = Reflection(model.data, model.w, model.bw, model.kernel, model.box, model.engine, model.names)

    def ratio(y):
        f = np.maximum(model.density(y)[0], 0.0)
        q = proposal.density(y)[0]
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(q > 0, f / q, 0.0)

    pilot = proposal.sample(4000, rng)
    M = 1.2 * max(float(ratio(pilot).max()), float(ratio(model.data).max()), 1e-12)
    out, have = [], 0
    while have < n:
        y = proposal.sample(max(256, int(1.5 * M * (n - have))), rng)
        r = ratio(y)
        if r.max() > M:
            M = 1.2 * float(r.max())
        keep = y[rng.random(y.shape[0]) * M < r]
        out.append(keep)
        have += keep.shape[0]
    return np.concatenate(out)[:n]


# ---------------------------------------------------------------------------
# transformation
# ---------------------------------------------------------------------------

class Transformation(_Base):
    """Estimate in a transformed space and map back with the Jacobian:
    ``f_X(x) = f_Y(g(x)) prod_j |g_j'(x_j)|`` with ``g_j = log(x - lo)`` for a
    lower bound, ``log(hi - x)`` for an upper bound and ``logit((x - lo)/(hi - lo))``
    for both (Wand, Marron & Ruppert 1991, JASA 86, 343-353; Silverman 1986,
    Sec. 2.10).  ``data`` and H are in the transformed space.
    """

    name = "transform"
    sample_note = "smoothed bootstrap in the transformed space, mapped back (exact)"

    def __init__(self, data_y, weights, bw, kernel, box, engine, names):
        super().__init__(data_y, weights, bw, kernel, box, engine, names)
        self.attrs["bandwidth_space"] = "transformed: " + ", ".join(
            f"{n}: {kind}" for n, kind in zip(names, transform_kinds(box)))

    @staticmethod
    def forward(x, box):
        """The transform g (:func:`forward_transform`).

        Parameters
        ----------
        x : ndarray, shape (m, d)
        box : list of (float, float)

        Returns
        -------
        ndarray, shape (m, d)
        """
        return forward_transform(x, box)

    def _log_jacobian(self, x):
        out = np.zeros(x.shape[0])
        for j, (lo, hi) in enumerate(self.box):
            col = x[:, j]
            with np.errstate(divide="ignore", invalid="ignore"):
                if math.isfinite(lo) and math.isfinite(hi):
                    z = (col - lo) / (hi - lo)
                    out -= np.log(hi - lo) + np.log(z) + np.log1p(-z)
                elif math.isfinite(lo):
                    out -= np.log(col - lo)
                elif math.isfinite(hi):
                    out -= np.log(hi - col)
        return out

    def density(self, pts, log=False):
        """Transformed-space estimate times the Jacobian (zero at the bounds); as ``_Base.density``."""
        y = forward_transform(pts, self.box)
        finite = np.all(np.isfinite(y), axis=1)
        out = np.full(pts.shape[0], -np.inf)
        choice = None
        if finite.any():
            v, choice = self._points(y[finite], self.data, self.w, self.bw, log=True)
            out[finite] = v + self._log_jacobian(pts[finite])
        # at the bound itself the density is the limit, zero for these kernels
        return (out if log else np.exp(out)), choice

    def grid(self, axes):
        """:meth:`density` at every node (the grid is not regular in the transformed space); as ``_Base.grid``."""
        mesh = np.meshgrid(*axes, indexing="ij")
        pts = np.column_stack([g.ravel() for g in mesh])
        v, choice = self.density(pts)
        return v.reshape(mesh[0].shape), choice

    def grid_pieces(self, axes):
        """None: this model has no grid pieces (see :meth:`grid`).

        Parameters
        ----------
        axes : list of ndarray

        Returns
        -------
        None
        """
        return None

    def sample(self, n, rng):
        """Smoothed bootstrap in the transformed space, mapped back; as ``_Base.sample``."""
        return inverse_transform(self._bootstrap(n, rng), self.box)


def transform_kinds(box):
    """Name of the transform of each variable.

    Parameters
    ----------
    box : list of (float, float)

    Returns
    -------
    list of str
        'logit', 'log(x - lo)', 'log(hi - x)' or 'identity'.
    """
    out = []
    for lo, hi in box:
        if math.isfinite(lo) and math.isfinite(hi):
            out.append("logit")
        elif math.isfinite(lo):
            out.append("log(x - lo)")
        elif math.isfinite(hi):
            out.append("log(hi - x)")
        else:
            out.append("identity")
    return out


def forward_transform(x, box):
    """Map ``x`` to the unbounded space (logit or log per bounded variable; inf or nan at and past the bounds).

    Parameters
    ----------
    x : ndarray, shape (m, d)
    box : list of (float, float)

    Returns
    -------
    ndarray, shape (m, d)
    """
    y = np.array(x, dtype=float, copy=True)
    with np.errstate(divide="ignore", invalid="ignore"):
        for j, (lo, hi) in enumerate(box):
            if math.isfinite(lo) and math.isfinite(hi):
                z = (x[:, j] - lo) / (hi - lo)
                y[:, j] = np.log(z) - np.log1p(-z)
            elif math.isfinite(lo):
                y[:, j] = np.log(x[:, j] - lo)
            elif math.isfinite(hi):
                y[:, j] = np.log(hi - x[:, j])
    return y


def inverse_transform(y, box):
    """Map transformed values back into the box (inverse of :func:`forward_transform`).

    Parameters
    ----------
    y : ndarray, shape (m, d)
    box : list of (float, float)

    Returns
    -------
    ndarray, shape (m, d)
    """
    x = np.array(y, dtype=float, copy=True)
    for j, (lo, hi) in enumerate(box):
        if math.isfinite(lo) and math.isfinite(hi):
            x[:, j] = lo + (hi - lo) * special.expit(y[:, j])
        elif math.isfinite(lo):
            x[:, j] = lo + np.exp(y[:, j])
        elif math.isfinite(hi):
            x[:, j] = hi - np.exp(y[:, j])
    return x
