"""Binned engine: linear binning of the data and FFT convolution on a regular grid.

The density on a regular grid is the binned (weighted) data convolved with
the scaled kernel sampled on the grid offsets (Silverman 1982; Wand 1994;
Wand & Jones 1995, Appendix D):

    f~(g) = sum_b c_b K_H(g - y_b),     c_b = sum_i w_i prod_j (1 - |X_ij - y_bj| / D_j)_+

where the y_b are the nodes of an internal lattice of spacing D_j that
contains the output nodes (D_j = output spacing / r_j, r_j a positive
integer: the *refinement*).  Forward FFTs of the binned arrays, a product
with the kernel's spectrum and inverse FFTs give values on the whole
lattice; the output is read at every r_j-th node.

Kernel spectrum
    Any kernel, product or spherical, any full H: the unit-covariance kernel
    is evaluated (``MultivariateKernel.evaluate``) at the whitened offsets
    ``BandwidthMatrix.whiten(m * D)``, divided by |H|^{1/2}, and
    transformed.  For the Gaussian kernel on a lattice whose bins are at
    most 0.4 conditional standard deviations wide the closed form
    exp(-w'Hw/2) / prod D_j is used (no transform per H); its aliasing error
    is below exp(-pi^2 / (2 * 0.4^2)) ~ 4e-14 relative.

No wrap-around
    The lattice extends beyond the output grid by the kernel's reach on
    every side (plus one bin), and the FFT length is at least the lattice
    length, so a periodic image of the kernel never reaches an output node:
    the circular convolution equals the linear one at every output node.

Data outside the grid
    Data within the kernel's reach of the output grid lie on the extended
    lattice and are binned normally.  Data farther out are dropped: for a
    compact kernel their contribution to every output node is exactly zero;
    for the Gaussian kernel the reach is R standard deviations along each
    axis with R = sqrt(2 log(1 / (max_i w_i eps_t))), eps_t = tol / 100.  A
    dropped datum is at whitened distance > R from every output node, so it
    contributes at most exp(-R^2/2) K_H(0) <= eps_t w_i K_H(0) / max_i w_i, and
    K_H(0) <= peak / max_i w_i because the estimate at X_i is at least
    w_i K_H(0): the dropped part is below eps_t x peak.

Binning error, its correction and the refinement
    Linear binning replaces, for every datum, y -> phi(y) = K_H(g - y) by its
    multilinear interpolant between the corners of the datum's bin.  With
    t_ij the datum's position inside its bin as a fraction of D_j, a Taylor
    expansion of the interpolant gives (Hall & Wand 1996 for the order)

        f~(g) - f(g) = sum_i w_i sum_j [ D_j^2 t(1-t)/2 d_jj phi
                                       + D_j^3 t(1-t)(1-2t)/6 d_jjj phi ](X_i) + O(D^4),

    bin width squared times the kernel's second derivative, then a third
    order term.  Both terms are computed from the data like f~ itself: the
    weights w_i t(1-t)/2 and w_i t(1-t)(1-2t)/6 are linearly binned and the
    second (third, central) difference along axis j is applied to those
    arrays (a stencil commutes with the convolution), one FFT each; the
    third- and fourth-order weights, which only serve the error estimate,
    go to the nearest node instead of being spread linearly.  For
    kernels without kinks or jumps the second-order term E2 is subtracted
    (a second-order correction of the binning), so what is returned carries
    only the third- and fourth-order terms.  Carrying the expansion one
    order further, the fourth-order remainder after that correction is
    -sum_j (3/8) u_j^2 D_j^4 d_jjjj phi - sum_{j<k} (1/4) u_j u_k D_j^2 D_k^2 d_jjkk phi
    with u_j = t_j (1 - t_j) [calc: the correction's own interpolation error
    included]; it is computed the same way (fourth differences), and the
    estimate of what is returned is SAFETY |E3 + E4| (SAFETY = 2).  It is an
    estimate, not a bound: against the exact sums (tests/test_engines.py) it
    was above the actual error in every case but the coarsest 1-D lattices
    of the triweight kernel, where the error was 1.3 x the estimate (and
    still well inside the tolerance).  Here
    |a_j|^2 = (H^{-1})_jj: 1/|a_j| is the kernel's conditional standard
    deviation along axis j.
    Kernels with a kink at the edge of their support (Epanechnikov,
    triangular, cosine) are corrected too.  A datum whose bin meets the
    kink set of y -> K_H(g - y) (found by labelling lattice offsets by the
    smooth piece of the kernel they fall in) has, with J the slope jump and
    W = sum_j D_j |a_j| the bin's whitened width, an interpolation error of
    mean J W / 12 and standard deviation J W sqrt(1/240) when the kink and
    the datum sit uniformly at random in the bin [calc: exact double
    integrals]; the estimate adds the full mean over those data,
    J W / 12 sum_i w_i [...], and three standard deviations of their sum,
    3 J W sqrt(1/240) sqrt(sum_i w_i^2 [...]).  The discontinuous uniform
    kernel is not corrected; its estimate is
    SAFETY |E2| + 3 J sqrt(1/6) sqrt(sum_i w_i^2 [...]) (value jump J, same
    integrals).  The biweight's second derivative jumps (by J2) at the edge of
    its support; data whose bins meet the edge add J2 W^2 / 8 each.

    The refinement starts at the smallest r_j with D_j |a_j| <= RESOLVE (RESOLVE_LARGE
    for sums of many data per kernel volume, see SMOOTH_SUM) and
    grows while the estimate exceeds tol x peak (the peak: the largest
    value on the lattice nodes inside the output box); the error is taken
    to scale as D^3 for smooth kernels (whose second-order term is corrected),
    D^2 for the biweight, D for kinks and D^(1/2) for jumps and the growth is split
    between axes in proportion to (D_j |a_j|)^2.  If the lattice would
    exceed MAX_LATTICE nodes the engine stops and says so (BinnedInfo.met).

References
----------
Silverman, B. W. (1982). Algorithm AS 176: kernel density estimation using
the fast Fourier transform. Appl. Statist. 31, 93-99.
Wand, M. P. (1994). Fast computation of multivariate kernel estimators.
J. Comput. Graph. Statist. 3, 433-445.
Hall, P. & Wand, M. P. (1996). On the accuracy of binned kernel density
estimators. J. Multivariate Anal. 56, 165-184.
Wand, M. P. & Jones, M. C. (1995). Kernel Smoothing. Chapman & Hall.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
from scipy import fft as sfft

from ..bandwidth.matrix import BandwidthMatrix
from ..kernels import MultivariateKernel
from .binning import ONE, U, U_CROSS, U_SKEW, U_SQUARED, WEIGHT, _bin, _cross_taps, _taps, factor
from .refine import BinnedInfo, accept_round, next_refinement

MAX_DIM = 4
DEFAULT_TOL = 1e-3
# first bins at most RESOLVE conditional sds wide; RESOLVE_LARGE when every cell has SMOOTH_SUM
# data per kernel volume (n sqrt(det H) / prod sd_j): pipeline cells (36-150) and 3-D n = 1e5
# (290-510) failed at 1 sd, 2-D n = 1e5 (1,260-1,950) and 1e6 (9,100) normal data met 1e-3 there
RESOLVE = 0.5
RESOLVE_LARGE = 1.0
SMOOTH_SUM = 1_000
ALIAS_FREE = 0.6         # closed-form spectrum up to this bin width: aliases < 4.5e-6 x peak (2-D)
SAFETY = 2.0             # margin on the estimated higher-order error terms
MAX_LATTICE = 6_000_000  # nodes per cell of the internal lattice (48 MB per array)
MAX_ROUNDS = 4           # refinement rounds before giving up (and saying so)

__all__ = ["BinnedInfo", "DEFAULT_TOL", "MAX_DIM", "grid_density", "grid_density_many",
           "regular_spacing", "resolve_for", "starting_refinement", "lattice_for"]


def regular_spacing(axes) -> np.ndarray | None:
    """Spacing of each axis if every axis is regular with >= 2 nodes, else None.

    Parameters
    ----------
    axes : list of array_like
        The 1-D grid axes; an axis is regular when its steps differ from the mean step by at most
        1e-9 x its span.

    Returns
    -------
    ndarray, shape (d,), or None
    """
    out = []
    for a in axes:
        a = np.asarray(a, dtype=float)
        if a.ndim != 1 or a.size < 2:
            return None
        step = np.diff(a)
        span = a[-1] - a[0]
        delta = span / (a.size - 1)
        if not delta > 0 or np.max(np.abs(step - delta)) > 1e-9 * max(abs(span), 1e-300):
            return None
        out.append(delta)
    return np.array(out)


# ---------------------------------------------------------------------------
# per-cell geometry
# ---------------------------------------------------------------------------

def _conditional_inverse_sd(bw: BandwidthMatrix) -> np.ndarray:
    """|a_j| = sqrt((H^{-1})_jj), a_j = L^{-1} e_j, without forming H^{-1}."""
    key = bw.matrix.tobytes()
    if key not in _INV_SD_CACHE:
        if len(_INV_SD_CACHE) > 256:
            _INV_SD_CACHE.clear()
        a = bw.whiten(np.eye(bw.d))  # row j is L^{-1} e_j
        _INV_SD_CACHE[key] = np.sqrt(np.einsum("ij,ij->i", a, a))
    return _INV_SD_CACHE[key]


_INV_SD_CACHE: dict = {}


def gaussian_reach_radius(max_weight: float, tol: float) -> float:
    """Whitened radius R beyond which dropped Gaussian terms cost <= tol/100 x peak.

    Parameters
    ----------
    max_weight : float
        Largest weight of a datum (weights summing to one).
    tol : float
        Tolerance relative to the peak density.

    Returns
    -------
    float
        R = sqrt(2 log(1 / (max_weight tol / 100))), at least sqrt(2).
    """
    eps = tol / 100.0
    return math.sqrt(2.0 * math.log(max(1.0 / (max_weight * eps), math.e)))


def kernel_reach(bw: BandwidthMatrix, mk: MultivariateKernel, radius_gauss: float) -> np.ndarray:
    """Half-width along each axis of the region where K_H(x) can be non-zero.

    Parameters
    ----------
    bw : BandwidthMatrix
    mk : MultivariateKernel
    radius_gauss : float
        Whitened truncation radius used for the Gaussian kernel (:func:`gaussian_reach_radius`).

    Returns
    -------
    ndarray, shape (d,)
    """
    L = bw.cholesky
    if not mk.is_compact:
        return radius_gauss * np.sqrt(np.diag(bw.matrix))
    if mk.is_radial:
        return mk.radius * np.sqrt(np.diag(bw.matrix))
    # product form: support is L times the cube |z_k| <= a
    return mk.univariate.unit_radius * np.abs(L).sum(axis=1)


def _max_weight(n: int, weights) -> float:
    return 1.0 / n if weights is None else float(np.max(weights))


# ---------------------------------------------------------------------------
# kernel spectra
# ---------------------------------------------------------------------------

def _frequencies(nfft, delta):
    """Angular frequencies of an rfftn of shape nfft with spacings delta (broadcastable)."""
    d = len(nfft)
    out = []
    for j in range(d):
        if j == d - 1:
            f = sfft.rfftfreq(nfft[j], d=delta[j])
        else:
            f = sfft.fftfreq(nfft[j], d=delta[j])
        shape = [1] * d
        shape[j] = f.size
        out.append((2.0 * math.pi * f).reshape(shape))
    return out


def _spectra(bws, mk, nfft, delta, margins, closed_form=False):
    """Kernel spectrum per cell, shape (cells, *rfft shape).

    ``closed_form``: Gaussian spectrum exp(-w'Hw/2)/prod(D) instead of the
    transform of the sampled kernel (allowed when every bin is at most
    ALIAS_FREE conditional standard deviations wide; see there).
    """
    d = len(nfft)
    axes = tuple(range(1, d + 1))
    if mk.name == "gaussian" and closed_form:
        omega = _frequencies(nfft, delta)
        vol = float(np.prod(delta))
        out = []
        for bw in bws:
            H = bw.matrix
            q = 0.0
            for i in range(d):
                for j in range(d):
                    q = q + H[i, j] * omega[i] * omega[j]
            out.append(np.exp(-0.5 * q) / vol)
        return np.stack(out)
    # sampled kernel on offsets |m_j| <= margin_j, wrapped into the FFT box
    offs = [np.arange(-m, m + 1) for m in margins]
    mesh = np.meshgrid(*offs, indexing="ij")
    steps = np.stack([g.ravel() * delta[j] for j, g in enumerate(mesh)], axis=1)
    where = np.ix_(*[o % n for o, n in zip(offs, nfft)])
    boxes = np.zeros((len(bws),) + tuple(nfft))
    for c, bw in enumerate(bws):
        vals = mk.evaluate(bw.whiten(steps)) / bw.sqrt_det
        boxes[c][where] = vals.reshape(mesh[0].shape)
    return sfft.rfftn(boxes, axes=axes)


def nonsmooth_jump(mk: MultivariateKernel) -> tuple[str, float]:
    """('smooth' | 'curvature' | 'kink' | 'jump', size) of the unit kernel's worst non-smooth point.

    'curvature': jump of the second derivative at the support edge (biweight).

    'kink': largest jump of the first derivative (per unit whitened
    distance) across the support edge (and across 0 for the triangular
    kernel); 'jump': largest jump of the value.  Product forms multiply by
    k(0)^(d-1), the largest value the other factors can take.

    Parameters
    ----------
    mk : MultivariateKernel

    Returns
    -------
    kind : {'smooth', 'curvature', 'kink', 'jump'}
    size : float
        The jump (0 for 'smooth').
    """
    k = mk.univariate
    if k.smoothness == "once differentiable":
        # biweight: the second derivative jumps at the support edge
        a = mk.radius if mk.is_radial else k.unit_radius
        h = 1e-4 * a
        if mk.is_radial:
            v = mk.evaluate_radial((a - np.array([3 * h, 2 * h, h])) ** 2)
            return "curvature", float(abs(v[0] - 2 * v[1] + v[2]) / h ** 2)
        v = k.unit(a - np.array([3 * h, 2 * h, h]))
        top = float(k.unit(np.array([0.0]))[0]) ** (mk.d - 1)
        return "curvature", float(abs(v[0] - 2 * v[1] + v[2]) / h ** 2) * top
    if k.smoothness not in ("continuous", "discontinuous"):
        return "smooth", 0.0
    if mk.is_radial:
        a = mk.radius
        if k.smoothness == "discontinuous":
            return "jump", float(mk.evaluate_radial(np.array([0.0]))[0])
        h = 1e-6 * a
        r = np.array([a - 2 * h, a - h]) ** 2
        v = mk.evaluate_radial(r)
        return "kink", float(abs(v[1] - v[0]) / h)
    a = k.unit_radius
    top = float(k.unit(np.array([0.0]))[0]) ** (mk.d - 1)
    if k.smoothness == "discontinuous":
        return "jump", float(k.unit(np.array([0.0]))[0]) * top
    h = 1e-6 * a
    edge = abs(float(np.diff(k.unit(np.array([a - 2 * h, a - h])))[0]) / h)
    left = k.unit(np.array([-h, 0.0, h]))
    centre = abs((left[2] - left[1]) / h - (left[1] - left[0]) / h)
    return "kink", max(edge, centre) * top


def _region_labels(z: np.ndarray, mk: MultivariateKernel) -> np.ndarray:
    """Integer label of the smooth piece of the kernel each whitened offset lies in."""
    if mk.is_radial:
        return (np.einsum("...j,...j->...", z, z) < mk.radius ** 2).astype(np.int64)
    a = mk.univariate.unit_radius
    lab = np.zeros(z.shape[:-1], dtype=np.int64)
    centre_kink = mk.univariate.name == "triangular"
    for j in range(z.shape[-1]):
        piece = (np.abs(z[..., j]) < a).astype(np.int64)
        if centre_kink:
            piece += 2 * (z[..., j] > 0)
        lab += piece * 4 ** j
    return lab


def _shell_spectra(bws, mk, nfft, delta, margins):
    """Spectrum of the indicator of lattice offsets whose neighbouring bins meet a kink or jump."""
    d = len(nfft)
    offs = [np.arange(-m - 1, m + 2) for m in margins]
    mesh = np.meshgrid(*offs, indexing="ij")
    steps = np.stack([g.ravel() * delta[j] for j, g in enumerate(mesh)], axis=1)
    core = tuple(slice(1, -1) for _ in range(d))
    where = np.ix_(*[o[1:-1] % n for o, n in zip(offs, nfft)])
    boxes = np.zeros((len(bws),) + tuple(nfft))
    for c, bw in enumerate(bws):
        lab = _region_labels(bw.whiten(steps), mk).reshape(mesh[0].shape)
        centre = lab[core]
        mixed = np.zeros(centre.shape, dtype=bool)
        for shift in itertools.product((0, 1, 2), repeat=d):
            view = lab[tuple(slice(s, s + n) for s, n in zip(shift, centre.shape))]
            mixed |= view != centre
        boxes[c][where] = mixed
    return sfft.rfftn(boxes, axes=tuple(range(1, d + 1)))


# ---------------------------------------------------------------------------
# the engine
# ---------------------------------------------------------------------------

def resolve_for(samples, bws) -> float:
    """Widest starting bin, in conditional kernel sds, for these cells (see SMOOTH_SUM)."""
    for x, bw in zip(samples, bws):
        sd = np.array([x[:, j].std() for j in range(x.shape[1])]) if len(x) >= SMOOTH_SUM else 0.0
        if not np.all(sd > 0) or len(x) * bw.sqrt_det / float(np.prod(sd)) < SMOOTH_SUM:
            return RESOLVE
    return RESOLVE_LARGE


def starting_refinement(axes, bws, resolve: float = RESOLVE) -> np.ndarray:
    """Smallest r_j with bins at most ``resolve`` conditional standard deviations wide.

    Parameters
    ----------
    axes : list of ndarray
        Regular grid axes.
    bws : list of BandwidthMatrix
        The refinement suits all of them.
    resolve : float, optional
        See :func:`resolve_for`.

    Returns
    -------
    ndarray of int, shape (d,)
    """
    delta_out = regular_spacing(axes)
    r = np.ones(len(axes), dtype=np.int64)
    for bw in bws:
        a = _conditional_inverse_sd(bw)
        r = np.maximum(r, np.ceil(delta_out * a / resolve - 1e-9).astype(np.int64))
    return r


def lattice_for(axes, r, bws, mk, max_w, tol):
    """Bin widths, margins (bins) and lattice shape for refinement ``r``.

    Parameters
    ----------
    axes : list of ndarray
        Regular grid axes.
    r : ndarray of int, shape (d,)
        Refinement per axis.
    bws : list of BandwidthMatrix
    mk : MultivariateKernel
    max_w : float
        Largest weight of a datum.
    tol : float
        Tolerance relative to the peak (sets the Gaussian kernel's reach).

    Returns
    -------
    delta : ndarray, shape (d,)
        Bin widths.
    margins : ndarray of int, shape (d,)
        Bins added beyond the output grid on each side.
    shape : tuple of int
        Lattice shape.
    """
    delta_out = regular_spacing(axes)
    m = np.array([len(a) for a in axes])
    delta = delta_out / r
    radius = gaussian_reach_radius(max_w, tol)
    reach = np.max([kernel_reach(bw, mk, radius) for bw in bws], axis=0)
    # + 3: one bin for linear binning, two for the differences' reach
    margins = np.ceil(reach / delta - 1e-9).astype(np.int64) + 3
    shape = tuple(int(s) for s in (m - 1) * r + 1 + 2 * margins)
    return delta, margins, shape


def data_window(axes, samples, bws, mk, max_w, tol) -> list:
    """Slices of the output nodes within the kernel's reach of some datum of ``samples``.

    A node farther than the reach (``kernel_reach``: the support of a compact
    kernel; R standard deviations of the Gaussian, with R from
    :func:`gaussian_reach_radius`) from every datum along some axis is farther
    than the whitened radius R from every datum, so its value is exactly 0
    (compact kernels) or below ``tol / 100`` x peak (Gaussian; the argument of
    the module notes on dropped data, applied to every datum): it is returned
    as 0 and the lattice covers only the window, which for a cell on a wide
    shared grid is often a fraction of the grid.  Every datum within reach of
    the grid is within reach of the window, so no extra datum is dropped.

    Parameters
    ----------
    axes : list of ndarray
        Regular grid axes.
    samples : list of ndarray, shape (n_c, d)
    bws : list of BandwidthMatrix
    mk : MultivariateKernel
    max_w : float
        Largest weight of a datum.
    tol : float

    Returns
    -------
    list of slice
        One per axis, at least two nodes long.
    """
    radius = gaussian_reach_radius(max_w, tol)
    reach = np.max([kernel_reach(bw, mk, radius) for bw in bws], axis=0)
    # column by column: x.min(axis=0) on a C-ordered (n, 2) array is 30 x slower
    xlo = np.array([min(x[:, j].min() for x in samples if x.shape[0]) for j in range(len(axes))])
    xhi = np.array([max(x[:, j].max() for x in samples if x.shape[0]) for j in range(len(axes))])
    out = []
    for j, a in enumerate(axes):
        m = a.size
        step = (a[-1] - a[0]) / (m - 1)
        i0 = int(np.clip(np.floor((xlo[j] - reach[j] - a[0]) / step), 0, m - 2))
        i1 = int(np.clip(np.ceil((xhi[j] + reach[j] - a[0]) / step), i0 + 1, m - 1))
        out.append(slice(i0, i1 + 1))
    return out


def grid_density_many(axes, samples, weights, bws, mk: MultivariateKernel, tol=DEFAULT_TOL,
                      max_lattice=MAX_LATTICE):
    """Binned densities of several cells on one regular grid.

    Parameters
    ----------
    axes : list of d regular 1-D arrays (>= 2 nodes each)
    samples : list of (n_c, d) arrays
    weights : list of (n_c,) arrays summing to one, or None entries
    bws : list of BandwidthMatrix, one per cell
    mk : MultivariateKernel
    tol : float
        Target max |binning error| relative to the cell's peak density.

    Returns
    -------
    values : (cells, *grid) array
    infos : list of BinnedInfo
    """
    cells = len(samples)
    d = len(axes)
    # nodes outside the window of data_window() are set to 0 (see there)
    values = np.zeros((cells,) + tuple(len(a) for a in axes))
    infos: list = [None] * cells
    full_axes = [np.asarray(a, dtype=float) for a in axes]
    kind = nonsmooth_jump(mk)[0]
    # smooth kernels carry only the third- and fourth-order terms after the
    # second-order correction: the estimate falls like D^3 (measured: x 7.4 from
    # r = 2 to 4 on correlated Gaussian cells); assuming D^2 overshot the refinement
    order = {"smooth": 3.0, "curvature": 2.0, "kink": 1.0, "jump": 0.5}[kind]
    todo = np.arange(cells)
    r = starting_refinement(axes, bws, resolve_for(samples, bws))
    for round_ in range(MAX_ROUNDS):
        sub_bws = [bws[c] for c in todo]
        max_w = max(_max_weight(samples[c].shape[0], weights[c]) for c in todo)
        window = data_window(full_axes, [samples[c] for c in todo], sub_bws, mk, max_w, tol)
        axes = [a[w] for a, w in zip(full_axes, window)]
        lo = np.array([a[0] for a in axes], dtype=float)
        delta, margins, shape = lattice_for(axes, r, sub_bws, mk, max_w, tol)
        capped = False
        while math.prod(shape) > max_lattice and np.any(r > 1):
            j = int(np.argmax(r))
            r = r.copy()
            r[j] = max(1, (r[j] * 3) // 4)
            capped = True
            delta, margins, shape = lattice_for(axes, r, sub_bws, mk, max_w, tol)
        vals, err, dropped = _convolve(todo, samples, weights, sub_bws, mk, lo, delta, margins,
                                       shape, r)
        last = capped or round_ == MAX_ROUNDS - 1
        failing = accept_round(todo, vals, err, dropped, r, shape, tol, last, values, window, infos)
        if not failing:
            break
        a = np.max([_conditional_inverse_sd(sub_bws[k]) for k in failing], axis=0)
        r = next_refinement(r, err[failing], tol, delta * a, order)
        todo = todo[failing]
    return values, infos


def _convolve(todo, samples, weights, bws, mk, lo, delta, margins, shape, r):
    """Values at the output nodes, error estimates relative to the peak, dropped weight."""
    d = len(shape)
    cells = len(todo)
    origin = lo - margins * delta
    pieces = []
    for k, c in enumerate(todo):
        x = samples[c]
        w = weights[c]
        if w is None:
            w = np.full(x.shape[0], 1.0 / x.shape[0])
        pieces.append((k, x, w))
    kind, jump = nonsmooth_jump(mk)
    nfft = tuple(sfft.next_fast_len(int(s), real=True) for s in shape)
    axes = tuple(range(1, d + 1))
    closed = mk.name == "gaussian" and all(
        np.all(delta * _conditional_inverse_sd(bw) <= ALIAS_FREE) for bw in bws)
    spec = _spectra(bws, mk, nfft, delta, margins, closed_form=closed)

    def conv(a):
        return sfft.irfftn(sfft.rfftn(a, axes=axes) * spec, s=nfft, axes=axes)


    # One pass over the data.  Array 0: the counts minus the second-order
    # binning-error term (for the uniform kernel: the counts, and that term
    # in array 1); array 1 (2 for the uniform kernel): the third- and
    # fourth-order terms; the last: squared weights.  A difference of the
    # binned weights convolved with K equals the weights convolved with the
    # difference of K, so each sum needs one transform.
    correct = kind != "jump"
    terms = [(factor(ONE), None, 0)]
    e2_target = 0 if correct else 1
    rest = 1 if correct else 2
    for j in range(d):
        terms.append((factor(U, 0.5, j), _taps(j + 1, 2, -1.0 if correct else 1.0), e2_target))
    if correct:
        for j in range(d):
            terms.append((factor(U_SKEW, 1.0 / 6.0, j), _taps(j + 1, 3), rest, "nearest"))
        # fourth order after the correction: -(3/8) u_j^2 D^4_j - (1/4) u_j u_k D^2_j D^2_k
        for j in range(d):
            terms.append((factor(U_SQUARED, -0.375, j), _taps(j + 1, 4), rest, "nearest"))
        for j, k in itertools.combinations(range(d), 2):
            terms.append((factor(U_CROSS, -0.25, j, k), _cross_taps(j + 1, k + 1, 1.0), rest, "nearest"))
    weighted = any(weights[c] is not None for c in todo)
    if kind in ("kink", "jump") and weighted:
        terms.append((factor(WEIGHT), None, rest if not correct else rest + 1))
    outs, dropped = _bin(pieces, origin, delta, shape, nfft, cells, terms)
    counts = outs[0]
    sq = outs[-1] if (kind in ("kink", "jump") and weighted) else None
    inner = (slice(None),) + tuple(slice(int(mg), int(mg + (s - 2 * mg))) for mg, s in zip(margins, shape))
    fine = conv(counts)[inner]
    # corrected kernels: the third- plus fourth-order remainder; uniform: the
    # second-order term itself
    bound = SAFETY * np.abs(conv(outs[1])[inner])
    del outs
    if kind in ("kink", "jump"):
        if sq is None:
            n = np.array([samples[c].shape[0] for c in todo], dtype=float)
            sq = counts / n.reshape((cells,) + (1,) * d)
        shell_spec = _shell_spectra(bws, mk, nfft, delta, margins)
        shell_sq = sfft.irfftn(sfft.rfftn(sq, axes=axes) * shell_spec, s=nfft, axes=axes)[inner]
        shell = None
        if kind == "kink":
            shell = sfft.irfftn(sfft.rfftn(counts, axes=axes) * shell_spec, s=nfft, axes=axes)[inner]
        for k, bw in enumerate(bws):
            if kind == "jump":
                spread, mean = math.sqrt(1.0 / 6.0), 0.0
            else:
                width = float(np.sum(delta * _conditional_inverse_sd(bw)))
                spread, mean = math.sqrt(1.0 / 240.0) * width, width / 12.0
            bound[k] += 3.0 * np.sqrt(np.maximum(shell_sq[k], 0.0)) * jump * spread / bw.sqrt_det
            if shell is not None:
                bound[k] += np.maximum(shell[k], 0.0) * jump * mean / bw.sqrt_det
    if kind == "curvature":
        # a jump J2 of the second derivative inside a datum's bin spoils the
        # expansion there by at most J2 W^2 / 8 (W the bin's whitened width)
        shell = sfft.irfftn(sfft.rfftn(counts, axes=axes) * _shell_spectra(bws, mk, nfft, delta, margins),
                            s=nfft, axes=axes)[inner]
        for k, bw in enumerate(bws):
            width = float(np.sum(delta * _conditional_inverse_sd(bw)))
            bound[k] += np.maximum(shell[k], 0.0) * jump * width ** 2 / 8.0 / bw.sqrt_det
    if mk.univariate.is_nonnegative:
        # the true sum is >= 0; rounding of the FFT and the correction can dip below
        # it by less than the error bound, and setting those nodes to 0 only
        # brings them closer to the truth
        np.maximum(fine, 0.0, out=fine)
    return (*output_nodes(fine, bound, r), dropped)


def output_nodes(fine, bound, r):
    """Values at the output nodes (every r_j-th lattice node) and each cell's error estimate / peak."""
    peak = np.max(fine.reshape(fine.shape[0], -1), axis=1)
    emax = np.max(bound.reshape(fine.shape[0], -1), axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        err = np.where(peak > 0, emax / peak, 0.0)
    return fine[(slice(None),) + tuple(slice(0, None, int(rj)) for rj in r)], err


def grid_density(axes, data, weights, bw: BandwidthMatrix, mk: MultivariateKernel, tol=DEFAULT_TOL,
                 max_lattice=MAX_LATTICE):
    """Binned density of one sample on a regular grid: :func:`grid_density_many` for one cell.

    Parameters are those of :func:`grid_density_many` for one cell: ``data``
    (n, d), ``weights`` (n,) summing to one or None, and its ``bw``.

    Returns
    -------
    values : ndarray, shape (len(axes[0]), ..., len(axes[d-1]))
    info : BinnedInfo
    """
    values, infos = grid_density_many(axes, [data], [weights], [bw], mk, tol, max_lattice)
    return values[0], infos[0]
