"""Periodic axes for the binned engine: von Mises kernels on circular variables.

A kernel sum with circular variables (directions, times of day) is, on a
regular grid, a convolution like any other: on a circular axis the
convolution is circular.  The kernel is the product of a von Mises kernel
per periodic axis (concentration kappa, angle ``2 pi x / P`` for a variable
of period P, a density per unit of the variable) and the linear block's kernel
with its bandwidth matrix on the other axes:

    f(x) = sum_i w_i prod_c VM_{k_c}(2 pi (x_c - X_ic) / P_c) (2 pi / P_c)
                     |H|^{-1/2} K(L^{-1}(x_lin - X_i,lin)).

:class:`PeriodicBandwidth` carries the linear block's
:class:`~mvkde.bandwidth.BandwidthMatrix`, the kappas and the periods;
:func:`grid_density_many` is the binned engine for it and
:func:`direct_grid` the exact direct sums (the reference).

Lattice on a periodic axis
    The output axis must step an integer number M of times per period
    (``linspace(0, P, m)`` steps m - 1 times); the lattice refines it by an
    integer r and covers exactly one period: N = r M nodes, node k at
    ``a[0] + k P / N``, output node i read at lattice node ``i r mod N``
    (``a[-1] = a[0] + P`` is read at node 0, the same point of the circle).
    No zero padding, no margins: the FFT of length N along that axis is the
    circular convolution itself.

Binning
    Data are wrapped into ``[a[0], a[0] + P)`` and binned by
    :func:`mvkde.engines.binning._bin` onto a lattice with three extra nodes on
    each side of the period (the tent's upper corner and the difference
    stencils of the error terms reach at most two nodes past the period);
    those margins are then folded back modulo N, so the tent weights and the
    stencils wrap exactly.  The error terms (the second-order correction, the
    third- and fourth-order estimate) are those of :mod:`mvkde.engines.binned`:
    the Taylor expansion of the interpolant along each axis holds for any
    smooth kernel, periodic or not.  The refinement uses the von Mises
    kernel's conditional standard deviation ``P / (2 pi sqrt(kappa))`` (in the
    variable's units; 1/sqrt(kappa) radians) where the binned engine uses
    ``1 / |a_j|``.

Spectrum on a periodic axis (exact)
    The von Mises density on the circle is ``(1/2 pi) sum_l rho_l e^{i l theta}``
    with ``rho_l = I_l(kappa) / I_0(kappa)`` (``scipy.special.ive`` ratios,
    stable for any kappa).  Sampled per unit of the variable at the N lattice
    nodes its DFT is ``(1/D) sum_{l = k mod N} rho_l`` (D = P / N): the aliased
    sum of the Fourier coefficients, which is what is used, with every
    ``rho_l`` above 1e-18 folded in.  It equals the DFT of the sampled kernel
    to rounding (checked to 1e-12 in tests/test_circular_batch.py), so there
    is no closed-form aliasing error on these axes.  The linear axes use the
    binned engine's spectra (:func:`mvkde.engines.binned._spectra`) and the
    product kernel's spectrum is their product.

Only kernels without kinks on the linear block (Gaussian, triweight) are
binned here; the others, an axis whose spacing does not divide its period
and anything the caller asks to be exact go to :func:`direct_grid`.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass

import numpy as np
from scipy import fft as sfft
from scipy import special

from ..bandwidth.matrix import BandwidthMatrix
from ..errors import InputError
from ..kernels import MultivariateKernel, get_multivariate_kernel
from . import binned as _binned
from .binning import ONE, U, U_CROSS, U_SKEW, U_SQUARED, _bin, _cross_taps, _taps, factor
from .exact import CHUNK_ELEMENTS, kernel_matrix
from .refine import accept_round, next_refinement

#: nodes added on each side of a period before folding (tent corner + stencil reach of 2)
FOLD_MARGIN = 3
#: fewest lattice nodes per period
MIN_NODES = 8

__all__ = ["PeriodicBandwidth", "direct_grid", "grid_density_many", "periodic_steps", "von_mises_dft",
           "binnable", "linear_kernel"]


@dataclass(frozen=True)
class PeriodicBandwidth:
    """The smoothing of a product kernel with periodic axes, as the engines read it.

    Parameters
    ----------
    lin : BandwidthMatrix or None
        The linear block's bandwidth matrix (q x q, in the order of the linear axes); None when every
        axis is periodic.
    kappas : tuple of (float or None)
        Per axis: the von Mises concentration of a periodic axis, None for a linear axis.
    periods : tuple of (float or None)
        Per axis: the period, None for a linear axis.
    """

    lin: BandwidthMatrix | None
    kappas: tuple
    periods: tuple

    @property
    def d(self) -> int:
        return len(self.periods)

    @property
    def periodic(self) -> list:
        """Indices of the periodic axes."""
        return [j for j, p in enumerate(self.periods) if p is not None]

    @property
    def linear(self) -> list:
        """Indices of the linear axes."""
        return [j for j, p in enumerate(self.periods) if p is None]

    def inverse_sd(self) -> np.ndarray:
        """1 / (conditional standard deviation) per axis: sqrt(kappa) 2 pi / P on a periodic axis."""
        out = np.empty(self.d)
        for j in self.periodic:
            out[j] = math.sqrt(self.kappas[j]) * 2.0 * math.pi / self.periods[j]
        if self.linear:
            out[self.linear] = _binned._conditional_inverse_sd(self.lin)
        return out

    @classmethod
    def from_matrix(cls, H, periods) -> "PeriodicBandwidth":
        """From a d x d matrix whose periodic diagonal entries are equivalent variances (P / 2 pi)^2 / kappa.

        Parameters
        ----------
        H : array_like or BandwidthMatrix, shape (d, d)
        periods : list of (float or None)

        Returns
        -------
        PeriodicBandwidth
        """
        if isinstance(H, cls):
            return H
        H = np.asarray(H.matrix if isinstance(H, BandwidthMatrix) else H, dtype=float)
        lin = [j for j, p in enumerate(periods) if p is None]
        for j, p in enumerate(periods):
            if p is not None and (np.any(np.delete(H[j], j) != 0) or np.any(np.delete(H[:, j], j) != 0)
                                  or not H[j, j] > 0):
                raise InputError(f"bandwidth of periodic axis {j}: its row and column must be zero off the "
                                 "diagonal and its diagonal entry a positive equivalent variance (P/2pi)^2/kappa")
        kappas = tuple(None if p is None else (p / (2.0 * math.pi)) ** 2 / H[j, j] for j, p in enumerate(periods))
        bw = BandwidthMatrix.from_matrix(H[np.ix_(lin, lin)], len(lin)) if lin else None
        return cls(bw, kappas, tuple(periods))


def linear_kernel(kernel: MultivariateKernel, q: int) -> MultivariateKernel | None:
    """The linear block's kernel (same univariate kernel and form, q variables), None for q = 0."""
    return get_multivariate_kernel(kernel.univariate.name, kernel.form, q) if q else None


def periodic_steps(axis, period) -> int | None:
    """Output steps per period M (an integer), or None when the axis's spacing does not divide the period.

    Parameters
    ----------
    axis : ndarray
        A regular grid axis.
    period : float

    Returns
    -------
    int or None
    """
    a = np.asarray(axis, dtype=float)
    if a.size < 2:
        return None
    step = (a[-1] - a[0]) / (a.size - 1)
    if not step > 0:
        return None
    ratio = period / step
    M = round(ratio)
    if M < 1 or abs(ratio - M) > 1e-9 * max(1.0, ratio):
        return None
    return int(M)


def binnable(axes, pbw: PeriodicBandwidth, kernel: MultivariateKernel) -> str:
    """'' when the binned engine takes this grid and kernel, else why not (a phrase)."""
    if _binned.regular_spacing(axes) is None:
        return "the grid is not evenly spaced"
    if len(axes) > _binned.MAX_DIM:
        return f"d={len(axes)} is beyond the binned engine's {_binned.MAX_DIM}"
    for j in pbw.periodic:
        if periodic_steps(axes[j], pbw.periods[j]) is None:
            return "the spacing of a circular axis does not divide its period"
    if pbw.linear and _binned.nonsmooth_jump(linear_kernel(kernel, len(pbw.linear)))[0] != "smooth":
        return (f"the {kernel.univariate.name} kernel on the linear variables has a kink or jump "
                "(binned with periodic axes only for smooth kernels)")
    return ""


def von_mises_dft(kappa: float, N: int, spacing: float) -> np.ndarray:
    """DFT (length N) of the von Mises kernel per unit of the variable sampled at N nodes of one period.

    ``(1 / spacing) sum_{l = k mod N} I_l(kappa) / I_0(kappa)``: exact (the
    sampled kernel's Fourier series folded onto the N frequencies), every term
    above 1e-18 included.

    Parameters
    ----------
    kappa : float
    N : int
        Nodes per period.
    spacing : float
        Period / N.

    Returns
    -------
    ndarray, shape (N,)
    """
    top = int(math.ceil(10.0 * math.sqrt(kappa) + 40.0))
    while special.ive(top, kappa) / special.ive(0, kappa) > 1e-18:
        top *= 2
    ell = np.arange(-top, top + 1)
    rho = special.ive(np.abs(ell), kappa) / special.ive(0, kappa)
    return np.bincount(np.mod(ell, N), weights=rho, minlength=N) / spacing


# ---------------------------------------------------------------------------
# exact direct sums
# ---------------------------------------------------------------------------

def _log_von_mises_nodes(axis, data_col, kappa, period):
    """(m, n) log of the von Mises kernel per unit of the variable, nodes x data."""
    d = 2.0 * math.pi * (axis[:, None] - data_col[None, :]) / period
    return kappa * (np.cos(d) - 1.0) - math.log(special.i0e(kappa)) - math.log(period)


def direct_grid(axes, data, weights, pbw: PeriodicBandwidth, kernel: MultivariateKernel) -> np.ndarray:
    """Exact kernel sums of the product kernel on the grid ``axes`` (any grid).

    The sum factorises as ``P diag(w) B'``: P the product of the von Mises
    kernels at the periodic nodes, B the linear kernel at the linear nodes;
    one matrix product per pair of chunks.

    Parameters
    ----------
    axes : list of ndarray
    data : ndarray, shape (n, d)
    weights : ndarray, shape (n,), or None
    pbw : PeriodicBandwidth
    kernel : MultivariateKernel
        Names the linear block's kernel (any number of variables).

    Returns
    -------
    ndarray, shape (len(axes[0]), ..., len(axes[d-1]))
    """
    n = data.shape[0]
    w = np.full(n, 1.0 / n) if weights is None else np.asarray(weights, dtype=float)
    per, lin = pbw.periodic, pbw.linear
    shape_p = [len(axes[j]) for j in per]
    shape_l = [len(axes[j]) for j in lin]
    factors = [(axes[j], data[:, j], pbw.kappas[j], pbw.periods[j]) for j in per]
    mk = linear_kernel(kernel, len(lin))
    if lin:
        mesh = np.meshgrid(*[axes[j] for j in lin], indexing="ij")
        lin_pts = np.column_stack([g.ravel() for g in mesh])
        centre = data[:, lin].mean(axis=0)
        z = pbw.lin.whiten(data[:, lin] - centre)
    m_p, m_l = math.prod(shape_p), math.prod(shape_l)
    out = np.empty((m_p, m_l))
    step = max(1, CHUNK_ELEMENTS // max(n, 1))
    idx = np.indices(shape_p).reshape(len(per), -1) if per else np.zeros((0, 1), dtype=np.int64)
    for a in range(0, m_p, step):
        sl = slice(a, a + step)
        logp = np.broadcast_to(np.log(np.maximum(w, 1e-300)), (idx[:, sl].shape[1], n)).copy()
        for f, (ax, col, kap, P) in enumerate(factors):
            logp += _log_von_mises_nodes(ax[idx[f, sl]], col, kap, P)
        Pm = np.exp(logp)
        if not lin:
            out[sl, 0] = Pm.sum(axis=1)
            continue
        for b in range(0, m_l, step):
            tl = slice(b, b + step)
            B = kernel_matrix(mk, pbw.lin.whiten(lin_pts[tl] - centre), z) / pbw.lin.sqrt_det
            out[sl, tl] = Pm @ B.T
    values = out.reshape(shape_p + shape_l)
    return np.transpose(values, np.argsort(per + lin))


# ---------------------------------------------------------------------------
# the binned engine with periodic axes
# ---------------------------------------------------------------------------

@dataclass
class _Geometry:
    """Lattice of one refinement round: per axis spacing, origin, binning size, FFT size."""

    delta: np.ndarray
    origin: np.ndarray
    bin_shape: tuple       # lattice that _bin fills (periodic axes: one period + 2 FOLD_MARGIN + 1)
    arr_shape: tuple       # the binned array (linear axes zero-padded to a fast FFT length)
    fft_shape: tuple       # after folding: N on periodic axes
    inner: tuple           # per axis: slice (linear) or index array (periodic) of the output box
    nodes: int             # lattice nodes (for the size limit)


def _geometry(axes, r, pbw0, lin_bws, mk_lin, max_w, tol, steps):
    d = len(axes)
    lin = pbw0.linear
    delta = np.empty(d)
    origin = np.empty(d)
    bin_shape, arr_shape, fft_shape, inner = [0] * d, [0] * d, [0] * d, [None] * d
    if lin:
        lin_axes = [axes[j] for j in lin]
        dl, margins, shape_l = _binned.lattice_for(lin_axes, r[lin], lin_bws, mk_lin, max_w, tol)
        for k, j in enumerate(lin):
            delta[j] = dl[k]
            origin[j] = axes[j][0] - margins[k] * dl[k]
            bin_shape[j] = int(shape_l[k])
            arr_shape[j] = fft_shape[j] = int(sfft.next_fast_len(int(shape_l[k]), real=True))
            inner[j] = slice(int(margins[k]), int(shape_l[k] - margins[k]))
    for j in pbw0.periodic:
        N = int(r[j] * steps[j])
        delta[j] = pbw0.periods[j] / N
        origin[j] = axes[j][0] - FOLD_MARGIN * delta[j]
        bin_shape[j] = arr_shape[j] = N + 1 + 2 * FOLD_MARGIN
        fft_shape[j] = N
        inner[j] = np.arange((len(axes[j]) - 1) * int(r[j]) + 1) % N
    nodes = math.prod(fft_shape[j] for j in pbw0.periodic) * math.prod(bin_shape[j] for j in lin)
    return _Geometry(delta, origin, tuple(bin_shape), tuple(arr_shape), tuple(fft_shape), tuple(inner), nodes)


def _fold(arr, axis, N):
    """Fold a binned axis of length N + 1 + 2 FOLD_MARGIN onto one period of N nodes."""
    L = arr.shape[axis]
    shape = list(arr.shape)
    shape[axis] = N
    out = np.zeros(shape)
    target = (np.arange(L) - FOLD_MARGIN) % N
    start = 0
    while start < L:
        stop = min(L, start + N - int(target[start]))
        src = [slice(None)] * arr.ndim
        dst = [slice(None)] * arr.ndim
        src[axis] = slice(start, stop)
        dst[axis] = slice(int(target[start]), int(target[start]) + stop - start)
        out[tuple(dst)] += arr[tuple(src)]
        start = stop
    return out


def _spectrum(pbws, mk_lin, geo: _Geometry, halved: int, closed: bool):
    """Product spectrum per cell over the (folded) lattice, the ``halved`` axis cut by the real FFT."""
    d = len(geo.fft_shape)
    pbw0 = pbws[0]
    cells = len(pbws)
    spec = np.ones((cells,) + (1,) * d)
    for j in pbw0.periodic:
        N = geo.fft_shape[j]
        v = np.stack([von_mises_dft(p.kappas[j], N, geo.delta[j]) for p in pbws])
        if j == halved:
            v = v[:, : N // 2 + 1]
        shape = [cells] + [1] * d
        shape[j + 1] = v.shape[1]
        spec = spec * v.reshape(shape)
    lin = pbw0.linear
    if lin:
        margins = [geo.inner[j].start for j in lin]
        s_lin = _binned._spectra([p.lin for p in pbws], mk_lin, [geo.fft_shape[j] for j in lin],
                                 geo.delta[lin], margins, closed_form=closed)
        s_lin = np.expand_dims(s_lin, [j + 1 for j in pbw0.periodic])
        spec = spec * s_lin
    return spec


def _terms(d):
    """The binned engine's terms for a smooth kernel: counts minus E2 (array 0), E3 + E4 (array 1)."""
    terms = [(factor(ONE), None, 0)]
    for j in range(d):
        terms.append((factor(U, 0.5, j), _taps(j + 1, 2, -1.0), 0))
    for j in range(d):
        terms.append((factor(U_SKEW, 1.0 / 6.0, j), _taps(j + 1, 3), 1, "nearest"))
    for j in range(d):
        terms.append((factor(U_SQUARED, -0.375, j), _taps(j + 1, 4), 1, "nearest"))
    for j, k in itertools.combinations(range(d), 2):
        terms.append((factor(U_CROSS, -0.25, j, k), _cross_taps(j + 1, k + 1, 1.0), 1, "nearest"))
    return terms


def _convolve(xs, ws, pbws, mk_lin, geo: _Geometry, r):
    """Values at the output nodes, error estimates relative to the peak, dropped weight (one round)."""
    d = len(geo.fft_shape)
    cells = len(xs)
    pbw0 = pbws[0]
    pieces = []
    for k, (x, w) in enumerate(zip(xs, ws)):
        x = np.array(x, dtype=float, copy=True)
        for j in pbw0.periodic:
            a0 = geo.origin[j] + FOLD_MARGIN * geo.delta[j]
            x[:, j] = a0 + np.mod(x[:, j] - a0, pbw0.periods[j])
        pieces.append((k, x, np.full(x.shape[0], 1.0 / x.shape[0]) if w is None else w))
    outs, dropped = _bin(pieces, geo.origin, geo.delta, geo.bin_shape, geo.arr_shape, cells, _terms(d))
    for j in pbw0.periodic:
        outs = [_fold(o, j + 1, geo.fft_shape[j]) for o in outs]
    lin = pbw0.linear
    order = [j + 1 for j in pbw0.periodic] + [j + 1 for j in lin]   # the real FFT on the last linear axis
    halved = order[-1] - 1
    closed = mk_lin is None or (mk_lin.name == "gaussian" and all(
        np.all(geo.delta[lin] * _binned._conditional_inverse_sd(p.lin) <= _binned.ALIAS_FREE) for p in pbws))
    spec = _spectrum(pbws, mk_lin, geo, halved, closed)
    s = [geo.fft_shape[a - 1] for a in order]

    def conv(a):
        out = sfft.irfftn(sfft.rfftn(a, axes=order) * spec, s=s, axes=order)
        for j in range(d):
            sel = geo.inner[j]
            out = out[(slice(None),) * (j + 1) + (sel,)] if isinstance(sel, slice) else np.take(out, sel, axis=j + 1)
        return out

    fine = conv(outs[0])
    bound = _binned.SAFETY * np.abs(conv(outs[1]))
    if mk_lin is None or mk_lin.univariate.is_nonnegative:
        np.maximum(fine, 0.0, out=fine)
    return (*_binned.output_nodes(fine, bound, r), dropped)


def _starting_refinement(axes, pbws, steps):
    delta_out = _binned.regular_spacing(axes)
    r = np.ones(len(axes), dtype=np.int64)
    for p in pbws:
        r = np.maximum(r, np.ceil(delta_out * p.inverse_sd() / _binned.RESOLVE - 1e-9).astype(np.int64))
    for j, M in steps.items():
        r[j] = max(r[j], -(-MIN_NODES // M))
    return r


def grid_density_many(axes, samples, weights, pbws, kernel: MultivariateKernel, tol=_binned.DEFAULT_TOL,
                      max_lattice=_binned.MAX_LATTICE):
    """Binned densities of several cells with periodic axes on one regular grid.

    The refinement loop of :func:`mvkde.engines.binned.grid_density_many`
    on a lattice that is periodic along the circular axes (see the module
    notes); the linear axes are windowed, extended and zero-padded as there.

    Parameters
    ----------
    axes : list of d regular 1-D arrays (>= 2 nodes each)
    samples : list of (n_c, d) arrays
    weights : list of (n_c,) arrays summing to one, or None entries
    pbws : list of PeriodicBandwidth, one per cell (the same periods)
    kernel : MultivariateKernel
        Names the linear block's kernel, which must be smooth (:func:`binnable`).
    tol : float
        Target max |binning error| relative to the cell's peak density.
    max_lattice : int
        Largest number of lattice nodes.

    Returns
    -------
    values : (cells, *grid) array
    infos : list of mvkde.engines.binned.BinnedInfo
    """
    cells = len(samples)
    full_axes = [np.asarray(a, dtype=float) for a in axes]
    pbw0 = pbws[0]
    lin = pbw0.linear
    mk_lin = linear_kernel(kernel, len(lin))
    steps = {j: periodic_steps(full_axes[j], pbw0.periods[j]) for j in pbw0.periodic}
    values = np.zeros((cells,) + tuple(len(a) for a in full_axes))
    infos: list = [None] * cells
    todo = np.arange(cells)
    r = _starting_refinement(full_axes, pbws, steps)
    for round_ in range(_binned.MAX_ROUNDS):
        sub = [pbws[c] for c in todo]
        max_w = max(_binned._max_weight(samples[c].shape[0], weights[c]) for c in todo)
        window = [slice(None)] * len(full_axes)
        if lin:
            lw = _binned.data_window([full_axes[j] for j in lin], [samples[c][:, lin] for c in todo],
                                     [p.lin for p in sub], mk_lin, max_w, tol)
            for k, j in enumerate(lin):
                window[j] = lw[k]
        ax = [a[w] for a, w in zip(full_axes, window)]
        geo = _geometry(ax, r, pbw0, [p.lin for p in sub], mk_lin, max_w, tol, steps)
        capped = False
        while geo.nodes > max_lattice and np.any(r > 1):
            j = int(np.argmax(r))
            r = r.copy()
            r[j] = max(1, (r[j] * 3) // 4)
            capped = True
            geo = _geometry(ax, r, pbw0, [p.lin for p in sub], mk_lin, max_w, tol, steps)
        vals, err, dropped = _convolve([samples[c] for c in todo], [weights[c] for c in todo], sub, mk_lin,
                                       geo, r)
        last = capped or round_ == _binned.MAX_ROUNDS - 1
        failing = accept_round(todo, vals, err, dropped, r, geo.fft_shape, tol, last, values, window, infos)
        if not failing:
            break
        # the corrected error falls like D^3 (smooth kernels)
        a = np.max([sub[k].inverse_sd() for k in failing], axis=0)
        r = next_refinement(r, err[failing], tol, geo.delta * a, 3.0)
        todo = todo[failing]
    return values, infos
