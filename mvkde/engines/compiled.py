"""Compiled loops of linear binning (numba, run without the GIL).

Binning is a scatter: every datum adds its weight to the 2^d corners of its
lattice cell.  In numpy that is one ``np.add.at`` per corner and term, each a
pass over memory under the GIL, with Python work between them; measured on
the pipeline benchmark's bounded cells (3,650 2-D points a cell, 8 terms)
binning took about 2.7 ms a cell and kept a second worker thread idle.  Here
one loop over the data does every term of every piece, and releases the GIL
so that worker threads bin in parallel.

The kernels are compiled on first use and cached next to this file
(``cache=True``); importing this module imports numba, so callers import it
where they bin, not at package import.
"""

from __future__ import annotations

import numba
import numpy as np

# factor kinds of a binning term, numbered as in mvkde.engines.binning (the
# datum's weight is multiplied by coef times):
ONE, U, U_SKEW, U_SQUARED, U_CROSS, WEIGHT = range(6)
#   ONE        1
#   U          u_j = t_j (1 - t_j)          (t_j the datum's fraction of its bin along axis j)
#   U_SKEW     u_j (1 - 2 t_j)
#   U_SQUARED  u_j^2
#   U_CROSS    u_j u_k
#   WEIGHT     the datum's weight (so the term bins squared weights)
TENT, NEAREST = 0, 1


@numba.njit(nogil=True, cache=True)
def _deposit(row, node, shifts, coefs, lo, hi, nfft, value):
    """row[node - shift] += coef * value for each tap (flat C-ordered ``nfft`` lattice;
    taps leaving the array dropped)."""
    d = node.shape[0]
    for q in range(lo, hi):
        flat = 0
        inside = True
        for j in range(d):
            p = node[j] - shifts[q, j]
            if p < 0 or p >= nfft[j]:
                inside = False
                break
            flat = flat * nfft[j] + p
        if inside:
            row[flat] += coefs[q] * value


@numba.njit(nogil=True, cache=True)
def bin_terms(x, w, starts, cells, origin, delta, upper, kind, coef, fj, fk, mode, target,
              tap_ptr, tap_shift, tap_coef, out, nfft, dropped):
    """Linearly bin pieces of data into zero-padded flat lattices, several terms at once.

    Parameters
    ----------
    x : (N, d) float64
        The rows of every piece, one after another.
    w : (N,) float64
        Their weights.
    starts : (P + 1,) int64
        Piece p is rows ``starts[p]:starts[p + 1]``.
    cells : (P,) int64
        Output cell of each piece.
    origin, delta : (d,) float64
        Lattice origin and spacing; ``upper`` (d,) int64 the last node's index.
    kind, coef, fj, fk : (T,)
        Factor of each term: ``coef`` times the factor ``kind`` (see the module
        constants) on axes ``fj`` (and ``fk``).
    mode : (T,) int64
        TENT: spread over the 2^d corners; NEAREST: put on the nearest node.
    target : (T,) int64
        Output array of each term.
    tap_ptr, tap_shift, tap_coef :
        Stencil of term t: taps ``tap_ptr[t]:tap_ptr[t + 1]``, each meaning
        ``out[p] += coef * b[p + shift]`` for the term's binned weights b.
    out : (G, C, prod(nfft)) float64
        Accumulated in place (C-ordered flattening of the ``nfft`` lattice).
    nfft : (d,) int64
    dropped : (C,) float64
        Weight of rows outside the lattice (or not finite), added per cell.
    """
    d = x.shape[1]
    ncorner = 1 << d
    k = np.empty(d, np.int64)
    t = np.empty(d)
    u = np.empty(d)
    node = np.empty(d, np.int64)
    cwt = np.empty(ncorner)
    stride, tap_flat, reach, corner_flat = _layout(tap_shift, nfft)
    for p in range(starts.shape[0] - 1):
        c = cells[p]
        for i in range(starts[p], starts[p + 1]):
            ok, safe, base, near = _locate(x[i], origin, delta, upper, nfft, reach, stride, k, t, u)
            if not ok:
                dropped[c] += w[i]
                continue
            _tent_weights(t, cwt)
            for term in range(kind.shape[0]):
                value = w[i] * coef[term] * _factor(kind[term], fj[term], fk[term], t, u, w[i])
                if value == 0.0:
                    continue
                row = out[target[term], c]
                lo, hi = tap_ptr[term], tap_ptr[term + 1]
                if safe:
                    if mode[term] == NEAREST:
                        for q in range(lo, hi):
                            row[near - tap_flat[q]] += tap_coef[q] * value
                    else:
                        for corner in range(ncorner):
                            cv = value * cwt[corner]
                            fl = base + corner_flat[corner]
                            for q in range(lo, hi):
                                row[fl - tap_flat[q]] += tap_coef[q] * cv
                elif mode[term] == NEAREST:
                    for j in range(d):
                        node[j] = k[j] + (1 if t[j] >= 0.5 else 0)
                    _deposit(row, node, tap_shift, tap_coef, lo, hi, nfft, value)
                else:
                    for corner in range(ncorner):
                        for j in range(d):
                            node[j] = k[j] + ((corner >> (d - 1 - j)) & 1)
                        _deposit(row, node, tap_shift, tap_coef, lo, hi, nfft, value * cwt[corner])


@numba.njit(nogil=True, cache=True)
def _layout(tap_shift, nfft):
    """Strides of the flat lattice, flat offsets of the taps and of the 2^d corners
    (corner bit d - 1 - j: the upper node on axis j), and the taps' reach."""
    d = nfft.shape[0]
    stride = np.empty(d, np.int64)
    s = 1
    for j in range(d - 1, -1, -1):
        stride[j] = s
        s *= nfft[j]
    tap_flat = np.zeros(tap_shift.shape[0], np.int64)
    reach = 0
    for q in range(tap_shift.shape[0]):
        for j in range(d):
            tap_flat[q] += tap_shift[q, j] * stride[j]
            reach = max(reach, abs(tap_shift[q, j]))
    corner_flat = np.zeros(1 << d, np.int64)
    for corner in range(1 << d):
        for j in range(d):
            if (corner >> (d - 1 - j)) & 1:
                corner_flat[corner] += stride[j]
    return stride, tap_flat, reach, corner_flat


@numba.njit(nogil=True, cache=True)
def _locate(xi, origin, delta, upper, nfft, reach, stride, k, t, u):
    """Bin ``k``, fractions ``t`` and ``u = t (1 - t)`` of one row (filled in place).

    Returns (inside the lattice, its corners and taps all inside the array,
    flat index of the lower corner, flat index of the nearest node).
    """
    safe = True
    base = 0
    near = 0
    for j in range(xi.shape[0]):
        v = (xi[j] - origin[j]) / delta[j]
        if not (v >= 0.0 and v < upper[j] + 1.0):   # outside, or NaN
            return False, False, 0, 0
        kf = np.floor(v)
        kj = np.int64(kf)
        tj = v - kf
        if kj == upper[j]:
            # on the last node (up to the rounding of (x - origin) / delta)
            kj -= 1
            tj = 1.0
        k[j] = kj
        t[j] = tj
        u[j] = tj * (1.0 - tj)
        if kj - reach < 0 or kj + 1 + reach >= nfft[j]:
            safe = False
        base += kj * stride[j]
        near += (kj + (1 if tj >= 0.5 else 0)) * stride[j]
    return True, safe, base, near


@numba.njit(nogil=True, cache=True)
def _tent_weights(t, cwt):
    """Tent weights of the 2^d corners, corner bit d - 1 - j: the upper node on axis j."""
    cwt[0] = 1.0
    m = 1
    for j in range(t.shape[0]):
        tj = t[j]
        for a in range(m - 1, -1, -1):
            hi = cwt[a] * tj
            cwt[2 * a + 1] = hi
            cwt[2 * a] = cwt[a] - hi
        m *= 2


@numba.njit(nogil=True, cache=True)
def _factor(kd, a, b, t, u, wi):
    if kd == ONE:
        return 1.0
    if kd == U:
        return u[a]
    if kd == U_SKEW:
        return u[a] * (1.0 - 2.0 * t[a])
    if kd == U_SQUARED:
        return u[a] * u[a]
    if kd == U_CROSS:
        return u[a] * u[b]
    return wi


@numba.njit(nogil=True, cache=True)
def bin_cells_tent(z, w, starts, lo, delta, bins, size, grid, self_sums):
    """Linear binning of cell c's rows ``starts[c]:starts[c + 1]`` onto row c of ``grid``.

    The bin index is clipped to ``[0, bins[c] - 2]`` and the fraction to
    [0, 1] (rows lie inside by construction).  ``grid`` is (C, size^d), C-ordered;
    ``self_sums`` (C, 2^d) receives, for each pattern s of axes (bit d - 1 - j
    for axis j), sum_i w_i^2 prod_j a_j with a_j = f_j (1 - f_j) on the axes in
    s and (1 - f_j)^2 + f_j^2 on the others.
    """
    d = z.shape[1]
    ncorner = 1 << d
    base_f = np.empty(d)
    i0 = np.empty(d, np.int64)
    for c in range(starts.shape[0] - 1):
        top = bins[c] - 2
        for i in range(starts[c], starts[c + 1]):
            wi = w[i]
            for j in range(d):
                v = (z[i, j] - lo[c, j]) / delta[c, j]
                kj = np.int64(np.floor(v))
                if kj < 0:
                    kj = 0
                elif kj > top:
                    kj = top
                f = v - kj
                if f < 0.0:
                    f = 0.0
                elif f > 1.0:
                    f = 1.0
                i0[j] = kj
                base_f[j] = f
            for corner in range(ncorner):
                cw = wi
                cross = wi * wi
                flat = 0
                for j in range(d):
                    f = base_f[j]
                    if (corner >> (d - 1 - j)) & 1:
                        cw *= f
                        flat = flat * size + i0[j] + 1
                        cross *= f * (1.0 - f)
                    else:
                        cw *= 1.0 - f
                        flat = flat * size + i0[j]
                        cross *= (1.0 - f) * (1.0 - f) + f * f
                grid[c, flat] += cw
                self_sums[c, corner] += cross


@numba.njit(nogil=True, cache=True)
def off_diagonal_power(spec, keep, self_sums, self_basis, scale, inv_volume, out):
    """out[c, k] = (|spec[c, keep[k]]|^2 - sum_p self_sums[c, p] self_basis[p, k]) scale[k] inv_volume[c].

    The binned power spectrum of each cell at the kept frequencies, less the
    spectrum of the self pairs, scaled (see
    :class:`mvkde.bandwidth.functionals.BinnedSums`): one pass, no (cells x
    frequencies) temporaries.
    """
    npat = self_sums.shape[1]
    for c in range(spec.shape[0]):
        for k in range(keep.shape[0]):
            z = spec[c, keep[k]]
            own = 0.0
            for p in range(npat):
                own += self_sums[c, p] * self_basis[p, k]
            out[c, k] = (z.real * z.real + z.imag * z.imag - own) * scale[k] * inv_volume[c]


def warm() -> None:
    """Load (or compile) every loop here for the argument types the library passes."""
    f8, i8 = np.float64, np.int64
    x = np.zeros((1, 2))
    one, two = np.zeros(1, i8), np.array([0, 1], i8)
    bin_terms(x, np.zeros(1), two, one, np.zeros(2), np.ones(2), np.ones(2, i8), one, np.ones(1), one, one, one,
              one, two, np.zeros((1, 2), i8), np.ones(1), np.zeros((1, 1, 16)), np.full(2, 4, i8), np.zeros(1))
    bin_cells_tent(x, np.zeros(1), two, np.zeros((1, 2)), np.ones((1, 2)), np.full(1, 4, i8), 4,
                   np.zeros((1, 16)), np.zeros((1, 4)))
    off_diagonal_power(np.zeros((1, 4), np.complex128), one, np.zeros((1, 4)), np.zeros((4, 1)), np.ones(1),
                       np.ones(1), np.zeros((1, 1)))


@numba.njit(nogil=True, cache=True)
def bin_piece_box(x, w, c, origin, delta, upper, blo, bshape, kind, coef, fj, fk, mode, target, tap_ptr,
                  tap_shift, tap_coef, out, nfft, dropped):
    """One piece (cell ``c``) binned through a box, for pieces with many rows.

    Every term is first binned plainly (tent corners or nearest node) into a
    (terms, box nodes) table over the box ``blo``, ``bshape`` (the piece's bins
    plus the taps' reach on every side); each term's stencil is then applied
    to its column as shifted flat slices (a tap that crosses a row reads the
    empty margin, i.e. zero) and the targets are added into ``out`` (clipped to
    the array).  A datum then costs 2^d + 1 deposits whatever the stencils, and
    the stencils cost box nodes x taps: cheaper than :func:`bin_terms` when the
    piece has more rows than its box has nodes.  Same arguments as
    :func:`bin_terms`, for one piece; equal results up to the order of the sums.
    """
    d = x.shape[1]
    nterm = kind.shape[0]
    ncorner = 1 << d
    bstride = np.empty(d, np.int64)
    s = 1
    for j in range(d - 1, -1, -1):
        bstride[j] = s
        s *= bshape[j]
    bsize = s
    table = np.zeros((nterm, bsize))
    k = np.empty(d, np.int64)
    t = np.empty(d)
    u = np.empty(d)
    cwt = np.empty(ncorner)
    corner_flat = np.zeros(ncorner, np.int64)
    for corner in range(ncorner):
        for j in range(d):
            if (corner >> (d - 1 - j)) & 1:
                corner_flat[corner] += bstride[j]
    big = np.full(d, 1 << 40, np.int64)
    for i in range(x.shape[0]):
        # the box holds every bin of the piece: only the lattice's own limits can drop a row
        ok, _safe, _base, _near = _locate(x[i], origin, delta, upper, big, 0, bstride, k, t, u)
        if not ok:
            dropped[c] += w[i]
            continue
        base = 0
        near = 0
        for j in range(d):
            base += (k[j] - blo[j]) * bstride[j]
            near += (k[j] - blo[j] + (1 if t[j] >= 0.5 else 0)) * bstride[j]
        _tent_weights(t, cwt)
        for term in range(nterm):
            value = w[i] * coef[term] * _factor(kind[term], fj[term], fk[term], t, u, w[i])
            if mode[term] == NEAREST:
                table[term, near] += value
            else:
                for corner in range(ncorner):
                    table[term, base + corner_flat[corner]] += value * cwt[corner]
    ngroups = out.shape[0]
    acc = np.zeros((ngroups, bsize))
    for term in range(nterm):
        g = target[term]
        for q in range(tap_ptr[term], tap_ptr[term + 1]):
            sh = 0
            for j in range(d):
                sh += tap_shift[q, j] * bstride[j]
            lo = max(0, -sh)
            hi = bsize - max(0, sh)
            cf = tap_coef[q]
            src = table[term]
            dst = acc[g]
            for p in range(lo, hi):
                dst[p] += cf * src[p + sh]
    # the boxes into the lattice, clipped to it
    idx = np.zeros(d, np.int64)
    for p in range(bsize):
        rem = p
        flat = 0
        inside = True
        for j in range(d):
            idx[j] = rem // bstride[j]
            rem -= idx[j] * bstride[j]
            node = blo[j] + idx[j]
            if node < 0 or node >= nfft[j]:
                inside = False
                break
            flat = flat * nfft[j] + node
        if inside:
            for g in range(ngroups):
                out[g, c, flat] += acc[g, p]
