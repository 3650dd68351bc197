"""Linear binning for the binned engine, with the difference stencils of its error terms.

Each datum's weight is shared between the 2^d corners of its lattice cell
in proportion to the opposite volumes (tent weights); the same pass bins the
weights times t(1 - t)/2 along each axis and their products, from which
:mod:`mvkde.engines.binned` estimates and subtracts the leading binning error
(the derivation is in that module's docstring).  The loop over the data is
compiled (:mod:`mvkde.engines.compiled`): one pass does every term of every
piece of a block and runs without the GIL.
"""

from __future__ import annotations

import math

import numpy as np

# factor kinds and modes of a term, as the compiled loop (mvkde.engines.compiled) reads them
ONE, U, U_SKEW, U_SQUARED, U_CROSS, WEIGHT = range(6)
TENT, NEAREST = 0, 1


def factor(kind: int, coef: float = 1.0, j: int = 0, k: int = 0) -> tuple:
    """A term's factor: ``coef`` times the factor ``kind`` (ONE, U, U_SKEW, U_SQUARED,
    U_CROSS or WEIGHT; see :mod:`mvkde.engines.compiled`) on axes ``j`` (and ``k``)."""
    return (int(kind), float(coef), int(j), int(k))


def _bin(pieces, origin, delta, lattice, nfft, cells, terms):
    """Linearly bin (cell, x, w) pieces into zero-padded (cells, *nfft) arrays.

    ``terms`` is a list of ``(factor, taps, target[, "nearest"])``: each datum's
    weight is multiplied by the :func:`factor` ``factor``, the binned array b is
    passed through the stencil ``taps`` (None: as is; else a list of
    ``(shifts, coef)`` meaning ``out[p] += coef * b[p + shifts]``, shifts a dict
    axis -> offset, axes counted from 1) and added to output array number
    ``target``.  "nearest" terms put each datum on its nearest node instead of
    spreading it linearly (used for error estimates only).  Data outside the
    lattice (or not finite) are dropped and their weight returned per cell;
    taps that leave the ``nfft`` array are dropped.

    Returns
    -------
    outs : list of (cells, *nfft) arrays, one per target
    dropped : (cells,) array
    """
    from .compiled import bin_piece_box, bin_terms

    d = len(lattice)
    nfft = np.asarray(nfft, dtype=np.int64)
    ngroups = 1 + max(t[2] for t in terms)
    out = np.zeros((ngroups, cells, int(np.prod(nfft))))
    dropped = np.zeros(cells)
    pieces = [(int(c), x, w) for c, x, w in pieces if x.shape[0]]
    upper = np.array([int(v) - 1 for v in lattice], dtype=np.int64)
    args = _term_arrays(terms, d)
    direct = []
    for c, x, w in pieces:
        box = _box(x, origin, delta, upper, args[-1])
        if box is None:
            direct.append((c, x, w))
            continue
        blo, bshape = box
        bin_piece_box(np.ascontiguousarray(x, dtype=float), np.ascontiguousarray(w, dtype=float), c,
                      np.asarray(origin, dtype=float), np.asarray(delta, dtype=float), upper, blo, bshape,
                      *args[:-1], out, nfft, dropped)
    pieces = direct
    if pieces:
        x = np.ascontiguousarray(np.concatenate([p[1] for p in pieces]), dtype=float).reshape(-1, d)
        w = np.ascontiguousarray(np.concatenate([p[2] for p in pieces]), dtype=float)
        starts = np.concatenate([[0], np.cumsum([p[1].shape[0] for p in pieces])]).astype(np.int64)
        cell_of = np.array([p[0] for p in pieces], dtype=np.int64)
        bin_terms(x, w, starts, cell_of, np.asarray(origin, dtype=float), np.asarray(delta, dtype=float),
                  upper, *args[:-1], out, nfft, dropped)
    shape = (cells,) + tuple(int(v) for v in nfft)
    return [out[g].reshape(shape) for g in range(ngroups)], dropped


def _term_arrays(terms, d):
    """The terms as the compiled loops read them, and the cost of a datum deposited
    straight through every stencil against the cost of its plain deposits (per term:
    2^d corners or one node) and of the stencils per box node."""
    kind = np.array([t[0][0] for t in terms], dtype=np.int64)
    coef = np.array([t[0][1] for t in terms], dtype=float)
    fj = np.array([t[0][2] for t in terms], dtype=np.int64)
    fk = np.array([t[0][3] for t in terms], dtype=np.int64)
    nearest = [len(t) > 3 and t[3] == "nearest" for t in terms]
    mode = np.array([NEAREST if n else TENT for n in nearest], dtype=np.int64)
    target = np.array([t[2] for t in terms], dtype=np.int64)
    ptr, shifts, coefs = [0], [], []
    for t in terms:
        taps = t[1] if t[1] is not None else [({}, 1.0)]
        for sh, cf in taps:
            shifts.append([sh.get(j + 1, 0) for j in range(d)])
            coefs.append(cf)
        ptr.append(len(coefs))
    spots = [1 if n else 2 ** d for n in nearest]
    ntaps = np.diff(ptr)
    cost = (float(np.dot(spots, ntaps)), float(sum(spots)), float(ntaps.sum()),
            int(np.abs(np.array(shifts)).max(initial=0)), len(terms) + 1 + max(t[2] for t in terms))
    return (kind, coef, fj, fk, mode, target, np.array(ptr, dtype=np.int64),
            np.array(shifts, dtype=np.int64).reshape(-1, d), np.array(coefs, dtype=float), cost)


def _box(x, origin, delta, upper, cost):
    """(lower corner, shape) of a box around a piece's bins (the taps' reach on every
    side) when binning through it is the cheaper way (see ``bin_piece_box``), else None.

    Measured (one piece, all error terms): in 2-D, 2 x 10^5 rows in a 60 x 50
    box took 10 ms through the box against 30 ms directly; in 3-D the box's
    table (terms x nodes) outgrows the cache and 5 x 10^4 rows took 25 ms
    against 16 ms.  So the box serves 1-D and 2-D pieces with at least as many
    rows as box nodes (the pipeline's cells of a few thousand rows go direct).
    """
    n, d = x.shape
    direct, plain, taps, reach, columns = cost
    lo, shape = [], []
    for j in range(d):
        a, b = float(x[:, j].min()), float(x[:, j].max())
        if not (math.isfinite(a) and math.isfinite(b)):
            return None
        k0 = min(max(math.floor((a - origin[j]) / delta[j]), 0), int(upper[j]) - 1)
        k1 = min(max(math.floor((b - origin[j]) / delta[j]), 0), int(upper[j]) - 1)
        lo.append(k0 - reach)
        shape.append(k1 - k0 + 2 + 2 * reach)
    nodes = math.prod(shape)
    if d > 2 or n < nodes or n * (direct - plain) <= nodes * taps / 3.0 or nodes * 8 * columns > (256 << 20):
        return None
    return np.array(lo, dtype=np.int64), np.array(shape, dtype=np.int64)


# difference stencils along one axis: (offset, coefficient), D a(p) = sum c a(p + s)
_DIFF = {2: [(-1, 1.0), (0, -2.0), (1, 1.0)],
         3: [(-2, -0.5), (-1, 1.0), (1, -1.0), (2, 0.5)],
         4: [(-2, 1.0), (-1, -4.0), (0, 6.0), (1, -4.0), (2, 1.0)]}


def _taps(axis, order, scale=1.0):
    return [({axis: sh}, scale * c) for sh, c in _DIFF[order]]


def _cross_taps(j, k, scale):
    return [({j: sj, k: sk}, scale * cj * ck) for sj, cj in _DIFF[2] for sk, ck in _DIFF[2]]
