"""Linear binning for the binned engine, streamed in chunks, with the difference stencils of its error terms.

Each datum's weight is shared between the 2^d corners of its lattice cell
in proportion to the opposite volumes (tent weights); the same pass bins the
weights times t(1 - t)/2 along each axis and their products, from which
:mod:`mvkde.engines.binned` estimates and subtracts the leading binning error
(the derivation is in that module's docstring).  Binning is memory-bound:
rows are read in chunks small enough that temporaries are recycled by the
allocator rather than freshly mapped, and each corner is one unbuffered
``np.add.at`` into a preallocated box around the cell's data.
"""

from __future__ import annotations

import itertools
import math

import numpy as np

CHUNK = 1 << 15          # data rows per binning step (256 KB temporaries: recycled, not page-faulted)
BOX_BUDGET = 64 << 20    # bytes of per-term bins held at once for one cell's box


class _Fractions:
    """In-bin fractions of one chunk of data: ``t[j]`` (rows,) per axis, and
    ``u[j] = t_j (1 - t_j)`` computed once for every factor that needs it."""

    __slots__ = ("t", "_u")

    def __init__(self, t):
        self.t = t
        self._u = [None] * len(t)

    def u(self, j):
        if self._u[j] is None:
            self._u[j] = self.t[j] * (1.0 - self.t[j])
        return self._u[j]


def _bin(pieces, origin, delta, lattice, nfft, cells, terms, chunk=CHUNK):
    """Linearly bin (cell, x, w) pieces into zero-padded (cells, *nfft) arrays.

    ``terms`` is a list of ``(factor, taps, target[, "nearest"])``: each datum's weight is
    multiplied by ``factor(f, w)`` (None: 1; ``f`` the chunk's :class:`_Fractions`,
    ``w`` its weights), the binned array b is passed through the stencil ``taps``
    (None: as is; else a list of ``(shifts, coef)`` meaning
    ``out[p] += coef * b[p + shifts]``, shifts a dict axis -> offset) and
    added to output array number ``target``.  "nearest" terms put each datum on
    its nearest node instead of spreading it linearly (used for error estimates
    only).  Data outside the lattice are dropped and their weight returned per cell.

    Long because its docstring records why each step is written as it is (each
    was measured); the code is about 60 lines.

    Binning is memory-bound; what keeps it near the memory speed (1.3 ms for
    the counts of 10^5 2-D points, was 7-12 ms; see DEVELOPERS.md):

    * rows are read ``chunk`` at a time, small enough (256 KB per temporary)
      that the allocator recycles temporaries instead of mapping fresh pages
      (page faults cost more than the arithmetic at 10^5 rows);
    * the flat index of each datum's lower corner is computed once per chunk and
      each of the 2^d corners of a linear term is one unbuffered ``np.add.at``
      over that index with the corner's tent weights, at the corner's flat
      offset: no 2^d-fold index or weight arrays, and no output array per call
      (``bincount`` allocates one of the box's size every time);
    * the terms of a piece are accumulated side by side in one (box nodes,
      terms) table, so the terms of one datum share cache lines;
    * every term is accumulated over all chunks of a piece in a flat box around
      the piece's bins (2 empty nodes on every side: the stencils' reach), and its
      stencil is applied once per piece as shifted slices of that flat array (a
      tap that crosses a row only reads the empty nodes at the box's other edge,
      as a tap leaving the box would).  A cell pays for its data's extent, not
      the lattice, and a block of C cells costs C times one cell (not C^2).

    Memory: the term table of one piece (in groups of terms whose boxes fit
    BOX_BUDGET bytes; each further group re-reads the rows), one box per target
    and O(chunk) temporaries.  Sums are float64 in data order, as before.
    """
    d = len(lattice)
    upper = [int(v) - 1 for v in lattice]
    outs = [np.zeros((cells,) + tuple(nfft)) for _ in range(1 + max(t[2] for t in terms))]
    dropped = np.zeros(cells)
    corners = list(itertools.product((0, 1), repeat=d))
    for cell, x, w in pieces:
        if x.shape[0] == 0:
            continue
        # the piece's box: lowest bin - 2 to highest corner + 2 on every axis
        # ((x - origin) / delta is monotone in x, so its extremes give the bins')
        blo, bshape = [], []
        inside = True  # every datum strictly below the last node of every axis, none below the first
        for j in range(d):
            ends = [(v - origin[j]) / delta[j] for v in (x[:, j].min(), x[:, j].max())]
            inside = inside and all(map(math.isfinite, ends)) and ends[0] >= 0 and math.floor(ends[1]) < upper[j]
            k0, k1 = (min(max(math.floor(e), 0), upper[j] - 1) if math.isfinite(e) else b
                      for e, b in zip(ends, (0, upper[j] - 1)))
            blo.append(k0 - 2)
            bshape.append(k1 - k0 + 6)
        bsize = math.prod(bshape)
        lstrides = [math.prod(bshape[j + 1:]) for j in range(d)]
        offsets = [sum(lstrides[j] for j, bit in enumerate(bits) if bit) for bits in corners]
        per_group = max(1, int(BOX_BUDGET // (8 * bsize)))
        for g0 in range(0, len(terms), per_group):
            group = terms[g0:g0 + per_group]
            # one row per node, one column per term: a datum's terms share cache lines
            table = np.zeros((bsize, len(group)))
            acc = [table[:, i] for i in range(len(group))]
            for a in range(0, x.shape[0], chunk):
                ws = w[a:a + chunk]
                ks, ts, ok = _chunk_bins(x[a:a + chunk], origin, delta, upper, check=not inside)
                if ok is not None:
                    if g0 == 0:
                        dropped[cell] += float(ws[~ok].sum())
                    ks = [kj[ok] for kj in ks]
                    ts = [tj[ok] for tj in ts]
                    ws = ws[ok]
                if ws.size == 0:
                    continue
                base = ks[0] - blo[0]
                if d > 1:
                    base *= lstrides[0]
                for j in range(1, d):
                    base += (ks[j] - blo[j]) * lstrides[j]
                frac = _Fractions(ts)
                near = None
                for out, (factor, taps, target, *how) in zip(acc, group):
                    wt = ws if factor is None else ws * factor(frac, ws)
                    if how and how[0] == "nearest":
                        # error-estimate terms: the nearest node is enough (2^d times cheaper)
                        if near is None:
                            near = base.copy()
                            for j in range(d):
                                near += (ts[j] >= 0.5) * lstrides[j]
                        np.add.at(out, near, wt)
                    else:
                        _tent_scatter(out, base, wt, ts, offsets)
            boxes: dict[int, np.ndarray] = {}
            for binned, (factor, taps, target, *how) in zip(acc, group):
                binned = np.ascontiguousarray(binned)  # the stencil's shifted slices run faster
                box = boxes.get(target)
                if box is None:
                    box = boxes[target] = np.zeros(bsize)
                _add_flat_stencil(box, binned, taps, lstrides)
            del acc, table
            _add_box(outs, boxes, cell, blo, bshape, nfft)
    return outs, dropped


def _chunk_bins(x, origin, delta, upper, check=True):
    """Lower-corner bin ``k_j`` and in-bin fraction ``t_j`` per axis of a chunk of rows,
    and the mask of rows inside the lattice (None when all are).

    ``check=False``: the caller knows from the data's extremes that every row lies
    inside the lattice and strictly below its last node (the tests would change nothing).
    """
    ks, ts = [], []
    ok = None
    for j in range(x.shape[1]):
        uj = (x[:, j] - origin[j]) / delta[j]
        kf = np.floor(uj)
        tj = uj - kf
        kj = kf.astype(np.int64)
        if not check:
            ks.append(kj)
            ts.append(tj)
            continue
        last = kj == upper[j]          # a datum exactly on the last node
        if last.any():
            kj[last] -= 1
            tj[last] = 1.0
        okj = (kj >= 0) & (kj < upper[j])
        if not okj.all():
            ok = okj if ok is None else ok & okj
        ks.append(kj)
        ts.append(tj)
    return ks, ts, ok


def _tent_scatter(out, base, wt, ts, offsets):
    """Add the linear binning of weights ``wt`` to the flat box ``out``.

    Corner weights prod_j (1 - t_j or t_j) are built axis by axis, corner order as
    ``itertools.product((0, 1), repeat=d)``; each corner is scattered onto the
    lower corners ``base`` shifted ``offsets[c]`` flat nodes higher (``np.add.at``,
    unbuffered and allocation-free since numpy 1.25).
    """
    weights = [wt]
    for tj in ts:
        nxt = []
        for cur in weights:
            hi = cur * tj
            nxt += [cur - hi, hi]
        weights = nxt
    for off, wc in zip(offsets, weights):
        # the box has room above every corner: base + off stays inside it
        np.add.at(out[off:], base, wc)


def _add_flat_stencil(acc, b, taps, lstrides):
    """acc[p] += sum coef * b[p + shift] on flat boxes (taps beyond the box dropped).

    Within the box a tap that crosses a row boundary reads one of the 2 empty
    nodes at the other edge of the box, i.e. zero, as a tap leaving the box does.
    """
    if taps is None:
        acc += b
        return
    n = b.size
    for shifts, coef in taps:
        s = sum(lstrides[axis - 1] * sh for axis, sh in shifts.items())
        lo, hi = max(0, -s), n - max(0, s)
        if coef == 1.0:
            acc[lo:hi] += b[lo + s:hi + s]
        else:
            acc[lo:hi] += coef * b[lo + s:hi + s]


def _add_box(outs, boxes, cell, blo, bshape, nfft):
    """Add each target's flat box into its (cells, *nfft) array (clipped to the array)."""
    src, dst = [], []
    for lo, n, size in zip(blo, bshape, nfft):
        a0, a1 = max(lo, 0), min(lo + n, size)
        src.append(slice(a0 - lo, a1 - lo))
        dst.append(slice(a0, a1))
    for target, acc in boxes.items():
        outs[target][(cell,) + tuple(dst)] += acc.reshape(bshape)[tuple(src)]


# difference stencils along one axis: (offset, coefficient), D a(p) = sum c a(p + s)
_DIFF = {2: [(-1, 1.0), (0, -2.0), (1, 1.0)],
         3: [(-2, -0.5), (-1, 1.0), (1, -1.0), (2, 0.5)],
         4: [(-2, 1.0), (-1, -4.0), (0, 6.0), (1, -4.0), (2, 1.0)]}


def _taps(axis, order, scale=1.0):
    return [({axis: sh}, scale * c) for sh, c in _DIFF[order]]


def _cross_taps(j, k, scale):
    return [({j: sj, k: sk}, scale * cj * ck) for sj, cj in _DIFF[2] for sk, ck in _DIFF[2]]
