"""Estimates with circular variables and spherical locations: ``fit(periods=..., sphere=...)``.

The kernel is a product: a von Mises kernel per circular variable (angle
``2 pi x / period``), a von Mises-Fisher kernel for a latitude/longitude pair
declared as one location on the sphere, and the chosen kernel (with its
bandwidth matrix H) on the remaining, linear, variables:

    f(x) = sum_i w_i  prod_c VM_{k_c}(x_c - X_ic) (2 pi / P_c)
                      vMF_{k_s}(u(x) . u(X_i)) / R^2
                      |H|^{-1/2} K(L^{-1}(x_lin - X_i,lin)).

Units: a circular factor is a density per unit of the variable (per degree
for P = 360); the spherical factor is per km^2 of the Earth's surface (R the
mean radius).  Boundary correction acts on the linear block only (the
directional factors have no boundary): reflection, transformation or none.

At points, evaluation is by chunked direct sums: ``(m_chunk, n)`` matrices
of the log directional kernels and of the linear kernel (through
:func:`mvkde.engines.exact.kernel_matrix` on whitened coordinates).  On a grid,
circular variables with a linear block corrected by ``"none"`` or
``"reflect"`` are kernel sums with periodic axes: ``DirectionalModel.grid_pieces``
(:mod:`mvkde.directional.pieces`) hands them to the engines like the boundary
methods do, and :mod:`mvkde.engines.periodic` evaluates them by binned FFT
convolution (circular along the periodic axes, error held below 1e-3 x peak)
or by exact sums (``engine="exact"``, small problems), so ``fit`` and the batch
door (:func:`mvkde.cells.fit_cells`) share the numbers.  A spherical location
or a transformed linear block stays on the direct grid sums
(``DirectionalModel.direct_grid``): the estimate factorises as
``D diag(w) B'``, D the directional kernels at the directional nodes and B the
linear kernels at the linear nodes, one matrix product per pair of chunks.

Long because the choice of the smoothing, the model (evaluation, grids and
sampling over both blocks) and its fit live together, each public function
with its numpydoc parameters.

References
----------
Hall, P., Watson, G. S. & Cabrera, J. (1987). Kernel density estimation with
spherical data. Biometrika 74, 751-762.
Taylor, C. C. (2008). Automatic bandwidth selection for circular density
estimation. Computational Statistics & Data Analysis 52, 3493-3500.
Garcia-Portugues, E. (2013). Exact risk improvement of bandwidth selectors for
kernel density estimation with directional data. Electronic Journal of
Statistics 7, 1655-1685.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass, field

import numpy as np
from scipy import special

from . import cv as _cv
from . import fast_cv as _fast_cv
from . import kernels as _dir
from . import pieces as _pieces
from . import selectors as _sel
from .spec import DirectionalSpec
from ..bandwidth import SELECTORS, BandwidthMatrix, BandwidthResult, kernel_rescaling
from ..boundary import BOUNDARY_METHODS, check_method, has_bounds
from ..boundary.methods import axis_reach, evaluate_pieces, fold_into_box, forward_transform, inverse_transform
from ..engines import EngineChoice, validate_engine
from ..engines.exact import CHUNK_ELEMENTS, kernel_matrix
from ..errors import InputError, check_choice
from ..kernels import get_multivariate_kernel
from ..steps import ConcentrationRequest, SelectionRequest

#: boundary methods available for the linear block of a directional estimate
DIRECTIONAL_BOUNDARY = ("none", "reflect", "transform")
#: default for a bounded linear variable in a directional estimate
DIRECTIONAL_DEFAULT_BOUNDARY = "reflect"


# ---------------------------------------------------------------------------
# bandwidths and concentrations
# ---------------------------------------------------------------------------

@dataclass
class Smoothing:
    """Concentrations of the directional factors and the linear block's bandwidth.

    Parameters
    ----------
    kappas : dict
        Circular column index -> von Mises kappa.
    kappa_sphere : float or None
    lin : BandwidthResult or None
        The linear block's bandwidth (q x q).
    method : str
    notes : dict
        Variable name -> how its smoothing was chosen.
    criterion, converged, at_edge : float, bool, bool
        As in :class:`~mvkde.bandwidth.BandwidthResult`.
    """

    kappas: dict                       # circular index -> kappa
    kappa_sphere: float | None
    lin: BandwidthResult | None        # q x q, for the linear kernel
    method: str
    notes: dict = field(default_factory=dict)
    criterion: float = float("nan")
    converged: bool = True
    at_edge: bool = False


def equivalent_variance_sphere(kappa: float) -> float:
    """(180/pi)^2 / kappa: small-angle variance (degrees^2) of each tangent coordinate of a
    vMF kernel (the kernel is close to N(0, I/kappa) in radians near its mean).

    Parameters
    ----------
    kappa : float

    Returns
    -------
    float
    """
    return (180.0 / math.pi) ** 2 / kappa


def full_matrix(spec: DirectionalSpec, sm: Smoothing, d: int) -> np.ndarray:
    """The d x d matrix reported as ``H``: equivalent variances on the directional diagonal.

    Parameters
    ----------
    spec : DirectionalSpec
    sm : Smoothing
    d : int

    Returns
    -------
    ndarray, shape (d, d)
    """
    H = np.zeros((d, d))
    for j, k in sm.kappas.items():
        H[j, j] = _dir.equivalent_variance(k, spec.periods[j])
    if spec.sphere is not None:
        for j in spec.sphere:
            H[j, j] = equivalent_variance_sphere(sm.kappa_sphere)
    if spec.linear:
        H[np.ix_(spec.linear, spec.linear)] = sm.lin.H
    return H


def _angles(values, spec):
    return np.column_stack([_dir.to_angle(values[:, j], spec.periods[j]) for j in spec.circular]) \
        if spec.circular else np.zeros((values.shape[0], 0))


def _units(values, spec):
    if spec.sphere is None:
        return None
    ilat, ilon = spec.sphere
    return _dir.lonlat_to_unit(values[:, ilat], values[:, ilon])


def from_matrix(H, spec: DirectionalSpec, names, d, parametrization) -> Smoothing:
    """Read a given d x d matrix: directional diagonal entries are equivalent variances.

    Parameters
    ----------
    H : array_like, shape (d, d)
    spec : DirectionalSpec
    names : list of str
    d : int
    parametrization : str

    Returns
    -------
    Smoothing
    """
    try:
        H = np.asarray(H, dtype=float)
    except (TypeError, ValueError):
        raise InputError("bandwidth must be a selector name or a d x d matrix of numbers") from None
    if H.shape != (d, d):
        raise InputError(f"bandwidth matrix has shape {H.shape}, expected ({d}, {d})")
    for j in spec.directional:
        off = np.delete(H[j], j)
        if np.any(off != 0.0) or np.any(np.delete(H[:, j], j) != 0.0):
            raise InputError(f"bandwidth matrix: the row and column of {names[j]} (directional) must be zero "
                             "off the diagonal; its diagonal entry is the kernel's equivalent variance")
        if not (math.isfinite(H[j, j]) and H[j, j] > 0):
            raise InputError(f"bandwidth matrix: the diagonal entry of {names[j]} must be a positive "
                             "equivalent variance (period/2pi)^2 / kappa")
    kappas = {j: _dir.kappa_from_variance(H[j, j], spec.periods[j]) for j in spec.circular}
    ks = None
    if spec.sphere is not None:
        a, b = spec.sphere
        if not math.isclose(H[a, a], H[b, b], rel_tol=1e-9):
            raise InputError(f"bandwidth matrix: {names[a]} and {names[b]} form one spherical location and need "
                             f"the same diagonal entry (180/pi)^2 / kappa, got {H[a, a]:g} and {H[b, b]:g}")
        ks = (180.0 / math.pi) ** 2 / H[a, a]
    lin = None
    if spec.linear:
        q = len(spec.linear)
        lin = BandwidthResult(BandwidthMatrix.from_matrix(H[np.ix_(spec.linear, spec.linear)], q), "given",
                              parametrization)
    notes = {names[j]: "given (equivalent variance)" for j in spec.directional}
    return Smoothing(kappas, ks, lin, "given", notes)


def _joint_cv(method, theta, units, lin_values, weights, spec, parametrization):
    """Joint cross-validation of the concentrations and the linear H, and how it was done.

    One circular and one linear variable (no sphere): the binned 2-D lattice
    criterion (:func:`mvkde.directional.fast_cv.mixed_cv`, every point used);
    any other combination: exact pair sums
    (:func:`mvkde.directional.cv.cross_validate`, subsampled above 2,000).

    Parameters
    ----------
    method : {'mlcv', 'lscv'}
    theta : ndarray, shape (n, c)
        Angles in radians.
    units : ndarray, shape (n, 3), or None
    lin_values : ndarray, shape (n, q)
    weights : ndarray, shape (n,), or None
    spec : DirectionalSpec
    parametrization : str

    Returns
    -------
    r : mvkde.directional.cv.CVResult
    label : str
        The note recorded for the directional variables.
    """
    q = len(spec.linear)
    if len(spec.circular) == 1 and spec.sphere is None and q == 1:
        r = _fast_cv.mixed_cv(method, theta[:, 0], lin_values[:, 0], weights)
        how = " (binned on a 2-D lattice, FFT)"
    else:
        r = _cv.cross_validate(method, theta=theta, units=units, lin=lin_values if q else None, weights=weights,
                                parametrization=parametrization)
        how = "" if r.n_used >= theta.shape[0] else f" on a seeded subsample of {r.n_used}"
    label = "joint likelihood cross-validation" if method == "mlcv" else "joint least-squares cross-validation"
    return r, label + how


def _choose_separately(method, theta, units, weights, spec, names, notes, n_eff):
    """Concentrations of the circular variables and the sphere, each alone (every selector but the
    joint cross-validation); a generator that yields a ConcentrationRequest per circular variable
    for the mixture plug-in.  Returns ``(kappas, kappa_sphere, at_edge)`` and fills ``notes``."""
    kappas, ks, at_edge = {}, None, False
    for col, j in enumerate(spec.circular):
        if method == "normal":
            kappas[j] = _sel.normal_concentration(theta[:, col], weights)
            notes[names[j]] = ("Garcia-Portugues (2013) rule, von Mises reference "
                               "(oversmooths several peaks)")
        else:
            kappas[j], mixture = yield ConcentrationRequest(theta[:, col], weights)
            notes[names[j]] = (f"von Mises mixture plug-in (Oliveira et al. 2012), "
                               f"{mixture.components} component(s) by BIC")
    if spec.sphere is not None:
        if method == "normal":
            k_mle = _dir.vmf_mle_kappa(units, weights)
            ks = 1.0 / _dir.sphere_rule_h_from_kappa(k_mle, n_eff) ** 2
            label = "Garcia-Portugues (2013) rule of thumb"
        else:
            r = _fast_cv.sphere_likelihood_cv(units, weights)
            ks, at_edge = r.kappa, r.at_edge
            label = "likelihood cross-validation (locations alone, KD-tree neighbours)"
        for j in spec.sphere:
            notes[names[j]] = label
    return kappas, ks, at_edge


def choose(method: str, values, weights, spec: DirectionalSpec, *, kernel, form, parametrization, names,
           lin_values):
    """Concentrations and the linear bandwidth for selector ``method`` (a generator, see below).

    Circular variables (von Mises kernel; :mod:`mvkde.directional_selectors`):
    ``"normal"`` -- the Garcia-Portugues (2013) AMISE rule under a von Mises
    reference (quick; oversmooths several peaks); ``"plugin"`` and the other
    plug-in selectors (``"scv"``, ``"sj"``, ``"isj"``) -- the von Mises mixture
    plug-in (Oliveira, Crujeiras and Rodriguez-Casal 2012; components by BIC).
    Sphere (vMF kernel): ``"normal"`` -- Garcia-Portugues (2013) rule;
    ``"plugin"`` and the others -- likelihood cross-validation of the locations
    alone with KD-tree neighbours.  Linear block: that selector on the linear
    variables alone.
    ``"mlcv"`` / ``"lscv"``: one circular variable alone -- binned FFT
    cross-validation on the periodic lattice; one circular and one linear
    variable -- joint binned FFT cross-validation on a 2-D lattice
    (:func:`mvkde.directional.fast_cv.mixed_cv`); locations alone by ``"mlcv"`` --
    the KD-tree likelihood CV; otherwise joint cross-validation of every
    concentration and the linear (Gaussian) H by exact pair sums, transferred to
    another linear kernel by the canonical rescaling.

    Parameters
    ----------
    method, kernel, form, parametrization : str
    values, lin_values : ndarray, (n, d) and (n, q)
        ``lin_values``: the linear columns the selector sees (transformed for ``boundary="transform"``).
    weights : ndarray, shape (n,), or None
    spec, names : DirectionalSpec, list of str

    Yields
    ------
    ConcentrationRequest or SelectionRequest
        The mixture plug-in concentration of each circular variable (``"plugin"`` and the other
        plug-in names), then the linear block's bandwidth (every selector but the joint
        cross-validation): :func:`mvkde.fit` answers each alone, :func:`mvkde.cells.fit_cells`
        a round of cells together.  The rules, the joint cross-validation and the sphere's
        concentration are computed here, per cell.

    Returns
    -------
    Smoothing
    """

    q = len(spec.linear)
    theta = _angles(values, spec)
    units = _units(values, spec)
    n_eff = values.shape[0] if weights is None else 1.0 / float(np.sum(weights ** 2))
    notes = {}
    kappas, ks = {}, None
    crit, converged, at_edge = float("nan"), True, False
    lin_result = None
    alone_circle = method in ("mlcv", "lscv") and len(spec.circular) == 1 and spec.sphere is None and not q
    alone_sphere = method == "mlcv" and not spec.circular and spec.sphere is not None and not q
    if alone_circle:
        r = _fast_cv.circular_cv(method, theta[:, 0], weights)
        j = spec.circular[0]
        kappas[j] = r.kappa
        crit, converged, at_edge = r.criterion, r.converged, r.at_edge
        notes[names[j]] = ("likelihood" if method == "mlcv" else "least-squares") + \
            " cross-validation (binned on a periodic lattice, FFT)"
    elif alone_sphere:
        r = _fast_cv.sphere_likelihood_cv(units, weights)
        ks, crit, converged, at_edge = r.kappa, r.criterion, r.converged, r.at_edge
        for j in spec.sphere:
            notes[names[j]] = "likelihood cross-validation (KD-tree neighbours)"
    elif method in ("mlcv", "lscv"):
        r, label = _joint_cv(method, theta, units, lin_values, weights, spec, parametrization)
        kappas = {j: float(k) for j, k in zip(spec.circular, r.kappas)}
        ks = r.kappa_sphere
        crit, converged, at_edge = r.criterion, r.converged, r.at_edge
        for j in spec.directional:
            notes[names[j]] = label
        if q:
            H = r.H_lin * (kernel_rescaling(kernel, form, q) if kernel != "gaussian" else 1.0)
            lin_result = BandwidthResult(BandwidthMatrix.from_matrix(H, q), method, parametrization,
                                         criterion=r.criterion, converged=r.converged, at_edge=r.at_edge,
                                         details={"selected_jointly_with": "directional concentrations"})
    else:
        kappas, ks, at_edge = yield from _choose_separately(method, theta, units, weights, spec, names, notes,
                                                            n_eff)
        if q:
            lin_result = yield SelectionRequest(method, lin_values, weights, kernel, form, parametrization,
                                                [names[j] for j in spec.linear])
    for j, k in list(kappas.items()):
        if not (math.isfinite(k) and k > 0):
            raise InputError(f"the concentration of {names[j]} could not be chosen (got {k}); the sample may "
                             "be concentrated on a few directions: give the bandwidth matrix explicitly")
    return Smoothing(kappas, ks, lin_result, method, notes, crit, converged, at_edge)


# ---------------------------------------------------------------------------
# the model: evaluation and sampling
# ---------------------------------------------------------------------------

class DirectionalModel:
    """Directional factors x the linear block with its boundary method (a 'boundary model'
    with the interface of :mod:`mvkde.boundary.methods`).

    Parameters
    ----------
    data : ndarray, shape (n, d)
    weights : ndarray, shape (n,), or None
    spec : DirectionalSpec
    sm : Smoothing
    kernel_name, form : str
        The linear block's kernel.
    box : list of (float, float)
    method : {'none', 'reflect', 'transform'}
        Boundary method of the linear block.
    names : list of str
    engine : {'auto', 'exact', 'binned', 'tree'}
        Grid engine of :meth:`grid` (points are always summed directly).
    """

    def __init__(self, data, weights, spec: DirectionalSpec, sm: Smoothing, kernel_name, form, box, method,
                 names, engine="auto"):
        self.data = data
        n = data.shape[0]
        self.n = n
        self.w = np.full(n, 1.0 / n) if weights is None else np.asarray(weights, dtype=float)
        self.logw = np.log(np.maximum(self.w, 1e-300))
        self.spec = spec
        self.sm = sm
        self.box = box
        self.name = method
        self.names = names
        self.engine = validate_engine(engine)
        self.kernel = get_multivariate_kernel(kernel_name, form, len(spec.periods))
        self.theta = _angles(data, spec)
        self.cos_t, self.sin_t = np.cos(self.theta), np.sin(self.theta)
        self.kap = np.array([sm.kappas[j] for j in spec.circular])
        self.periods = np.array([spec.periods[j] for j in spec.circular])
        self.units = _units(data, spec)
        lin = spec.linear
        self.q = len(lin)
        self.box_lin = [box[j] for j in lin]
        self.groups = []
        self.mk = None
        if self.q:
            self.mk = get_multivariate_kernel(kernel_name, form, self.q)
            self.bw = sm.lin.matrix
            x = data[:, lin]
            if method == "transform":
                x = forward_transform(x, self.box_lin)
            self.centre = x.mean(axis=0)
            self.groups = self._images(x) if method == "reflect" else [(self.bw, x, np.arange(n))]
        kinds = []
        if spec.circular:
            kinds.append("von Mises (circular: " + ", ".join(names[j] for j in spec.circular) + ")")
        if spec.sphere is not None:
            kinds.append("von Mises-Fisher (sphere: " + ", ".join(names[j] for j in spec.sphere) + ")")
        if self.q:
            kinds.append(f"{form} {kernel_name} (linear: " + ", ".join(names[j] for j in lin) + ")")
        self.choice = EngineChoice("exact", "direct sums of the product kernel " + " x ".join(kinds))
        self.per_cell_reason = _pieces.per_cell_reason(self)
        self.attrs = {"boundary_sampling": self._sample_note(), "directional_kernel": " x ".join(kinds)}
        if method == "reflect":
            self.attrs["reflected_copies"] = int(sum(g[1].shape[0] for g in self.groups) - n)

    def _sample_note(self):
        return {"none": "smoothed bootstrap; draws outside the bounds redrawn (rejection)",
                "reflect": "smoothed bootstrap folded back into the bounds by reflection (exact)",
                "transform": "smoothed bootstrap in the transformed space, mapped back (exact)"}[self.name]

    # -- reflection images of the linear block, with the row each image comes from
    def _images(self, x):
        per_axis = []
        for a in range(self.q):
            lo, hi = self.box_lin[a]
            reach = axis_reach(self.bw, self.mk, a)
            if not (math.isfinite(lo) or math.isfinite(hi)):
                images = [(1.0, 0.0)]
            elif not math.isfinite(hi):
                images = [(1.0, 0.0), (-1.0, 2.0 * lo)]
            elif not math.isfinite(lo):
                images = [(1.0, 0.0), (-1.0, 2.0 * hi)]
            else:
                width = hi - lo
                k = int(math.ceil(reach / (2.0 * width))) + 1
                images = [im for m in range(-k, k + 1) for im in ((1.0, 2.0 * m * width),
                                                                  (-1.0, 2.0 * lo + 2.0 * m * width))]
            entries = []
            for sign, offset in images:
                y = sign * x[:, a] + offset
                keep = np.maximum(lo - y, y - hi) < reach
                if keep.any():
                    entries.append((sign, y, keep))
            per_axis.append(entries)
        groups = []
        H = self.bw.matrix
        for combo in itertools.product(*per_axis):
            keep = np.logical_and.reduce([c[2] for c in combo])
            if not keep.any():
                continue
            r = np.array([c[0] for c in combo])
            bw = self.bw if np.all(r > 0) else BandwidthMatrix.from_matrix(H * np.outer(r, r), self.q)
            groups.append((bw, np.column_stack([c[1][keep] for c in combo]), np.flatnonzero(keep)))
        return groups

    # -- kernel matrices ------------------------------------------------------
    def _log_directional(self, pts_dir_cols):
        """(m, n) log of the directional kernels (in the variables' units), plus log w."""
        circ, units = pts_dir_cols
        m = (circ if circ is not None else units).shape[0]
        out = np.broadcast_to(self.logw, (m, self.n)).copy()
        for c in range(self.kap.size):
            ang = _dir.to_angle(circ[:, c], self.periods[c])
            cos_d = np.cos(ang)[:, None] * self.cos_t[None, :, c] + np.sin(ang)[:, None] * self.sin_t[None, :, c]
            k = self.kap[c]
            out += k * (cos_d - 1.0) - math.log(special_i0e(k)) - math.log(self.periods[c])
        if units is not None:
            dot = np.clip(units @ self.units.T, -1.0, 1.0)
            out += _dir.log_vmf_kernel(self.sm.kappa_sphere, dot) - 2.0 * math.log(_dir.EARTH_RADIUS_KM)
        return out

    def _linear_points(self, x):
        """Linear coordinates of evaluation points in kernel space, and log |Jacobian|."""
        if self.name != "transform":
            return x, np.zeros(x.shape[0])
        y = forward_transform(x, self.box_lin)
        logj = np.zeros(x.shape[0])
        with np.errstate(divide="ignore", invalid="ignore"):
            for a, (lo, hi) in enumerate(self.box_lin):
                col = x[:, a]
                if math.isfinite(lo) and math.isfinite(hi):
                    logj += np.log(hi - lo) - np.log(col - lo) - np.log(hi - col)
                elif math.isfinite(lo):
                    logj -= np.log(col - lo)
                elif math.isfinite(hi):
                    logj -= np.log(hi - col)
        return y, logj

    def _linear_matrix(self, y, group, log):
        """(m, n_g) linear kernel values (or logs) of points ``y`` against one image group."""
        bw, x, _ = group
        p = bw.whiten(y - self.centre)
        z = bw.whiten(x - self.centre)
        if log and self.mk.name == "gaussian":
            g = p @ z.T
            g -= 0.5 * np.einsum("ij,ij->i", p, p)[:, None]
            g -= 0.5 * np.einsum("ij,ij->i", z, z)[None, :]
            np.minimum(g, 0.0, out=g)
            return g - 0.5 * self.q * math.log(2 * math.pi) - math.log(bw.sqrt_det)
        k = kernel_matrix(self.mk, p, z) / bw.sqrt_det
        if log:
            with np.errstate(divide="ignore"):
                return np.log(k)
        return k

    def _split(self, pts):
        circ = pts[:, self.spec.circular] if self.spec.circular else None
        units = None
        if self.spec.sphere is not None:
            ilat, ilon = self.spec.sphere
            units = _dir.lonlat_to_unit(pts[:, ilat], pts[:, ilon])
        return circ, units

    # -- boundary-model interface --------------------------------------------
    def density(self, pts, log=False):
        """Density (or its log) at points, by chunked direct sums.

        Parameters
        ----------
        pts : array_like, shape (m, d)
        log : bool

        Returns
        -------
        values : ndarray, shape (m,)
        choice : mvkde.engines.EngineChoice
        """
        pts = np.asarray(pts, dtype=float)
        m = pts.shape[0]
        out = np.empty(m)
        step = max(1, CHUNK_ELEMENTS // max(self.n * max(len(self.groups), 1), 1))
        for a in range(0, m, step):
            chunk = pts[a:a + step]
            ld = self._log_directional(self._split(chunk))
            if not self.q:
                out[a:a + step] = _lse_rows(ld) if log else np.exp(ld).sum(axis=1)
                continue
            y, logj = self._linear_points(chunk[:, self.spec.linear])
            if log:
                parts = [ld[:, g[2]] + self._linear_matrix(y, g, True) for g in self.groups]
                out[a:a + step] = _lse_rows(np.hstack(parts)) + logj
            else:
                dens = np.exp(ld)
                total = np.zeros(chunk.shape[0])
                for g in self.groups:
                    total += np.einsum("ij,ij->i", dens[:, g[2]], self._linear_matrix(y, g, False))
                out[a:a + step] = total * np.exp(logj)
        if self.name == "transform" and self.q:
            inside = np.ones(m, dtype=bool)
            for a, (lo, hi) in enumerate(self.box_lin):
                col = pts[:, self.spec.linear[a]]
                inside &= (col > lo) & (col < hi)
            out[~inside] = -np.inf if log else 0.0
        return out, self.choice

    def grid_pieces(self, axes):
        """The grid as kernel sums with periodic axes, or None (see :mod:`mvkde.directional.pieces`).

        Parameters
        ----------
        axes : list of ndarray

        Returns
        -------
        tuple or None
            ``(pieces, combine)`` as ``mvkde.boundary.methods._Base.grid_pieces``; None for a
            spherical location or a transformed linear block (``per_cell_reason`` says so).
        """
        return _pieces.grid_pieces(self, axes)

    def grid(self, axes):
        """Density on the grid ``axes``: through :meth:`grid_pieces` and the engines when it offers
        pieces (as the batch door evaluates it), else :meth:`direct_grid`.

        Parameters
        ----------
        axes : list of ndarray

        Returns
        -------
        values : ndarray
            Shape (len(axes[0]), ..., len(axes[-1])).
        choice : mvkde.engines.EngineChoice
        """
        pieces = self.grid_pieces(axes)
        if pieces is None:
            return self.direct_grid(axes)
        (values,), (choice,) = evaluate_pieces(axes, [pieces[0]], self.kernel, self.engine)
        return pieces[1](values), choice or self.choice

    def direct_grid(self, axes):
        """Density on the grid ``axes`` by exact sums: one matrix product D diag(w) B' per pair of chunks.

        Parameters
        ----------
        axes : list of ndarray

        Returns
        -------
        values : ndarray
            Shape (len(axes[0]), ..., len(axes[-1])).
        choice : mvkde.engines.EngineChoice
        """
        spec = self.spec
        dir_idx = spec.directional
        lin_idx = spec.linear
        dir_mesh = np.meshgrid(*[axes[j] for j in dir_idx], indexing="ij")
        dir_pts = np.zeros((dir_mesh[0].size, len(axes)))
        for j, mesh in zip(dir_idx, dir_mesh):
            dir_pts[:, j] = mesh.ravel()
        circ, units = self._split(dir_pts)
        m_dir = dir_pts.shape[0]
        if lin_idx:
            lin_mesh = np.meshgrid(*[axes[j] for j in lin_idx], indexing="ij")
            lin_pts = np.column_stack([g.ravel() for g in lin_mesh])
            y, logj = self._linear_points(lin_pts)
            jac = np.exp(logj)
            if self.name == "transform":
                inside = np.ones(lin_pts.shape[0], dtype=bool)
                for a, (lo, hi) in enumerate(self.box_lin):
                    inside &= (lin_pts[:, a] > lo) & (lin_pts[:, a] < hi)
                jac[~inside] = 0.0
                y = np.where(inside[:, None], y, 0.0)
            m_lin = lin_pts.shape[0]
        else:
            m_lin = 1
        out = np.empty((m_dir, m_lin))
        step_d = max(1, CHUNK_ELEMENTS // self.n)
        step_l = max(1, CHUNK_ELEMENTS // self.n)
        for a in range(0, m_dir, step_d):
            sl = slice(a, a + step_d)
            D = np.exp(self._log_directional((None if circ is None else circ[sl],
                                              None if units is None else units[sl])))
            if not lin_idx:
                out[sl, 0] = D.sum(axis=1)
                continue
            for b in range(0, m_lin, step_l):
                tl = slice(b, b + step_l)
                B = np.zeros((y[tl].shape[0], self.n))
                for g in self.groups:
                    B[:, g[2]] += self._linear_matrix(y[tl], g, False)
                B *= jac[tl, None]
                out[sl, tl] = D @ B.T
        shape_dir = [axes[j].size for j in dir_idx]
        shape_lin = [axes[j].size for j in lin_idx]
        values = out.reshape(shape_dir + shape_lin)
        order = dir_idx + lin_idx
        return np.transpose(values, np.argsort(order)), self.choice

    def sample(self, n, rng):
        """Smoothed-bootstrap draws; linear parts folded, mapped back or redrawn by the boundary method.

        Parameters
        ----------
        n : int
        rng : numpy.random.Generator

        Returns
        -------
        ndarray, shape (n, d)
        """
        spec = self.spec
        out = np.empty((n, len(spec.periods)))
        todo = np.arange(n)
        for _ in range(1000):
            if todo.size == 0:
                break
            k = todo.size
            idx = rng.choice(self.n, size=k, p=self.w)
            for c, j in enumerate(spec.circular):
                noise = rng.vonmises(0.0, self.kap[c], k) * self.periods[c] / (2 * math.pi)
                out[todo, j] = np.mod(self.data[idx, j] + noise, self.periods[c])
            if spec.sphere is not None:
                u = _dir.sample_vmf(self.units[idx], self.sm.kappa_sphere, rng)
                lat, lon = _dir.unit_to_latlon(u)
                out[todo, spec.sphere[0]], out[todo, spec.sphere[1]] = lat, lon
            if not self.q:
                todo = todo[:0]
                break
            base = self.data[idx][:, spec.linear]
            if self.name == "transform":
                base = forward_transform(base, self.box_lin)
            y = base + self.bw.colorize(self.mk.sample(k, rng))
            if self.name == "transform":
                y = inverse_transform(y, self.box_lin)
            elif self.name == "reflect":
                y = _fold(y, self.box_lin)
            ok = np.ones(k, dtype=bool)
            for a, (lo, hi) in enumerate(self.box_lin):
                ok &= (y[:, a] >= lo) & (y[:, a] <= hi)
            out[np.ix_(todo[ok], spec.linear)] = y[ok]
            todo = todo[~ok]
        if todo.size:
            raise InputError("sampling failed: the uncorrected estimate has almost no mass inside the bounds; "
                             "use boundary='reflect'")
        return out


def special_i0e(k):
    """I0(k) e^{-k} as a float.

    Parameters
    ----------
    k : float

    Returns
    -------
    float
    """
    return float(special.i0e(k))


def _lse_rows(a):
    top = a.max(axis=1)
    top[~np.isfinite(top)] = 0.0
    with np.errstate(divide="ignore", under="ignore"):
        return np.log(np.exp(a - top[:, None]).sum(axis=1)) + top


def _fold(y, box):
    """Fold draws back into the box (the reflection estimate's own sampling)."""
    return fold_into_box(y, box)


# ---------------------------------------------------------------------------
# fit
# ---------------------------------------------------------------------------

def fit_model(values, w, names, spec: DirectionalSpec, mk, bandwidth, parametrization, box, boundary,
              engine="auto"):
    """The directional smoothing and model of :func:`mvkde.fit` (data already wrapped and checked);
    a generator that yields the requests of :func:`choose` (``yield from`` it in ``fit_steps``).

    Parameters
    ----------
    values : ndarray, shape (n, d)
    w : ndarray, shape (n,), or None
    names : list of str
    spec : DirectionalSpec
    mk : mvkde.kernels.MultivariateKernel
        Kernel of the linear block.
    bandwidth : str, array_like (d, d) or BandwidthResult
        Selector name or given matrix.
    parametrization : str
    box : list of (float, float)
    boundary : str or None
    engine : str
        Grid engine of the model.

    Returns
    -------
    tuple
        ``(model, result, method, concentrations, attrs)``: the
        :class:`DirectionalModel`, the :class:`~mvkde.bandwidth.BandwidthResult`
        (H with the circular variables' equivalent variances), the boundary
        method of the linear block, kappa per directional variable and the
        attributes that describe the choice.
    """
    d = values.shape[1]
    lin_box = [box[j] for j in spec.linear]
    lin_names = [names[j] for j in spec.linear]
    method, note = _linear_block_method(boundary, lin_box)
    lin_values = values[:, spec.linear]
    if method == "transform":
        check_method("transform", lin_box, lin_values, lin_names)
        sel_lin = forward_transform(lin_values, lin_box)
    else:
        sel_lin = lin_values
    if isinstance(bandwidth, str):
        method_bw = check_choice("bandwidth", bandwidth, SELECTORS)
        sm = yield from choose(method_bw, values, w, spec, kernel=mk.name, form=mk.form, parametrization=parametrization,
                    names=names, lin_values=sel_lin)
    else:
        matrix = bandwidth.H if isinstance(bandwidth, BandwidthResult) else bandwidth
        sm = from_matrix(matrix, spec, names, d, parametrization)
    H = full_matrix(spec, sm, d)
    details = {"concentration_" + names[j]: float(k) for j, k in sm.kappas.items()}
    if sm.kappa_sphere is not None:
        details["concentration_sphere"] = float(sm.kappa_sphere)
    result = BandwidthResult(BandwidthMatrix.from_matrix(H, d), sm.method, parametrization,
                             criterion=sm.criterion if sm.lin is None or sm.method in ("mlcv", "lscv")
                             else sm.lin.criterion,
                             converged=sm.converged and (sm.lin is None or sm.lin.converged),
                             at_edge=sm.at_edge or (sm.lin is not None and sm.lin.at_edge),
                             warnings=[] if sm.lin is None else list(sm.lin.warnings), details=details)
    model = DirectionalModel(values, w, spec, sm, mk.name, mk.form, box, method, names, engine)
    conc = {names[j]: float(k) for j, k in sm.kappas.items()}
    if spec.sphere is not None:
        for j in spec.sphere:
            conc[names[j]] = float(sm.kappa_sphere)
    return model, result, method, conc, _attrs(spec, sm, mk, names, conc, lin_names, note)


def _linear_block_method(boundary, lin_box) -> tuple[str, str]:
    """Boundary method of the linear block and a note on how it was chosen.

    The default (None) and ``"linear"`` ask for the linear boundary kernel;
    the directional model corrects its linear block by reflection, so both
    resolve to ``"reflect"`` and say so.
    """
    if not has_bounds(lin_box):
        return "none", ""
    if boundary is None or boundary == "linear":
        return DIRECTIONAL_DEFAULT_BOUNDARY, ("linear boundary kernel not available for the linear block of a "
                                              "directional estimate: reflection used")
    method = check_choice("boundary", boundary, BOUNDARY_METHODS)
    if method not in DIRECTIONAL_BOUNDARY:
        raise InputError(f"boundary={method!r} is not available with circular variables or a spherical "
                         f"location (the correction acts on the linear variables only): use one of "
                         f"{', '.join(DIRECTIONAL_BOUNDARY)}")
    return method, ""


def _attrs(spec, sm, mk, names, conc, lin_names, note) -> dict:
    attrs = {"circular_variables": ", ".join(names[j] for j in spec.circular)}
    for j in spec.circular:
        attrs[f"period_{names[j]}"] = float(spec.periods[j])
    if spec.sphere is not None:
        attrs["sphere_variables"] = ", ".join(names[j] for j in spec.sphere)
        attrs["earth_radius_km"] = _dir.EARTH_RADIUS_KM
    for j in spec.directional:
        attrs[f"concentration_{names[j]}"] = conc[names[j]]
        attrs[f"concentration_method_{names[j]}"] = sm.notes.get(names[j], sm.method)
    if spec.linear:
        if sm.method in ("mlcv", "lscv"):
            text = f"linear block chosen jointly with the concentrations ({sm.method}, Gaussian kernel"
            text += ", canonical rescaling to " + mk.name + ")" if mk.name != "gaussian" else ")"
        elif sm.method == "given":
            text = "given"
        else:
            text = f"{sm.method} selector on the linear variables alone"
        attrs["bandwidth_linear_block"] = text
        attrs["boundary_applies_to"] = ", ".join(lin_names)
    if note:
        attrs["boundary_choice"] = note
    attrs["bandwidth_matrix_directional_note"] = (
        "diagonal entries of circular variables are the von Mises kernel's equivalent variance "
        "(period/2pi)^2/kappa; of the spherical pair (180/pi)^2/kappa degrees^2")
    return attrs
