"""Pairwise Gaussian sums behind every data-driven selector, binned or exact.

Every criterion in this package (LSCV, SCV, the plug-in functionals, the
likelihood cross-validation sums) is built from *off-diagonal* double sums

    OD[g] = sum_{i != j} w_i w_j g(Z_i - Z_j)

of Gaussian densities ``g = phi_S`` or of their fourth- and sixth-order
derivatives, taken over the **sphered** sample ``Z = A^{-1}(X - mean)``
(``A A'`` the sample covariance).  The diagonal terms ``i = j`` are known
in closed form and added by the callers.  Two providers compute the
off-diagonal sums with the same interface:

* :class:`BinnedSums` -- linear binning on a regular grid and the FFT.  By
  Parseval, ``sum_a sum_b c_a c_b g(u_a - u_b) = V^{-1} sum_k |C_k|^2 G(w_k)``
  with ``C`` the discrete Fourier transform of the bin counts, ``V`` the
  volume of the (zero padded, periodic) grid and ``G(w) = int g e^{-i w'x}``
  the Fourier transform of g, which for ``g = D^r phi_S`` is
  ``(i w)^r exp(-w'Sw/2)`` in closed form (Wand & Jones 1995, App. D on
  binning; the Parseval form avoids one inverse transform per functional).
  A new matrix S therefore costs one pass over the frequencies and no
  transform.  The binned self pairs (each point smeared over its ``2^d``
  neighbouring nodes) are removed exactly through the spectrum of their
  autocorrelation, so binned and exact sums approximate the same quantity.
  Cost: O(n 2^d) binning, one FFT per cell, O(grid) per criterion value.
  All cells of a block are binned into one ``(cells, *grid)`` array
  (``_bin_cells``) and transformed by one ``rfftn``.
* :class:`ExactSums` -- direct chunked sums over the ``n (n - 1) / 2``
  pairs, O(n^2); the truth the binned path is tested against.

References
----------
Wand, M. P. (1994). Fast computation of multivariate kernel estimators.
J. Comput. Graph. Statist. 3, 433-445.
Wand, M. P. & Jones, M. C. (1995). Kernel Smoothing. Chapman & Hall.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
from scipy import fft as _fft
from scipy import linalg

from .normal import normal_scale_factor

__all__ = ["Prepared", "prepare", "BinnedSums", "ExactSums", "multi_indices", "diag_derivative"]

#: bins per normal-scale kernel standard deviation, and grid caps, by dimension:
#: the binning error of a functional falls like (bin width / bandwidth)^2.
_RESOLUTION = {1: 20.0, 2: 5.0, 3: 3.0}
_MAX_BINS = {1: 8192, 2: 256, 3: 64}
#: cap on quadratic forms before exp(-q/2): keeps every product of kernel
#: values out of the subnormal range (see BinnedSums.half_exp)
_Q_CAP = 300.0


class Prepared:
    """A block of cells, centred and sphered (``x = mean + A z``).

    Attributes (C = number of cells)
    ----------
    z : list of (n_c, d) arrays; w : list of (n_c,) weights summing to one;
    A : (C, d, d) lower Cholesky factors of the covariances; mean : (C, d);
    cov : (C, d, d); n_eff, sw2 : (C,) effective size and sum of squared weights;
    c_ns : (C,) normal-scale factor, so that the Gaussian normal-scale matrix is
    ``c_ns * I`` in sphered coordinates.
    """

    def __init__(self, z, w, A, mean, cov):
        self.z = z
        self.w = w
        self.A = A
        self.mean = mean
        self.cov = cov
        self.d = A.shape[1]
        self.sw2 = np.array([float(np.sum(wc * wc)) for wc in w])
        self.n_eff = 1.0 / self.sw2
        self.c_ns = np.array([normal_scale_factor(ne, self.d) for ne in self.n_eff])

    @property
    def cells(self) -> int:
        return len(self.z)

    def to_data_coordinates(self, Hz: np.ndarray, cells) -> np.ndarray:
        """H = A H_z A' for the rows of ``Hz`` (b, d, d) belonging to ``cells`` (b,).

        Parameters
        ----------
        Hz, cells : ndarray

        Returns
        -------
        ndarray, shape (b, d, d)
        """
        A = self.A[cells]
        return A @ Hz @ np.swapaxes(A, 1, 2)


def prepare(samples, weights=None) -> Prepared:
    """Centre and sphere each sample by its weighted mean and covariance.

    Parameters
    ----------
    samples, weights : list of array_like
        (n_c, d) samples and (n_c,) weights (normalised here); ``weights`` or an entry may be None.

    Returns
    -------
    Prepared
    """
    zs, ws, As, means, covs = [], [], [], [], []
    for c, x in enumerate(samples):
        x = np.asarray(x, dtype=float)
        n = x.shape[0]
        wc = None if weights is None or weights[c] is None else np.asarray(weights[c], dtype=float)
        w = np.full(n, 1.0 / n) if wc is None else wc / wc.sum()
        mean = np.einsum("i,ij->j", w, x)
        cov = np.atleast_2d(np.cov(x, rowvar=False, aweights=None if wc is None else wc))
        A = linalg.cholesky(cov, lower=True)
        # d x d inverse and einsum: LAPACK/BLAS calls on tiny problems stall on busy nodes
        z = np.einsum("ij,nj->ni", np.linalg.inv(A), x - mean)
        zs.append(z)
        ws.append(w)
        As.append(A)
        means.append(mean)
        covs.append(cov)
    return Prepared(zs, ws, np.array(As), np.array(means), np.array(covs))


# ---------------------------------------------------------------------------
# multi-indices and closed-form diagonal terms
# ---------------------------------------------------------------------------

def multi_indices(d: int, order: int) -> list[tuple[int, ...]]:
    """All r in N^d with |r| = order.

    Parameters
    ----------
    d, order : int

    Returns
    -------
    list of tuple of int
    """
    out = []
    for combo in itertools.combinations_with_replacement(range(d), order):
        r = [0] * d
        for j in combo:
            r[j] += 1
        out.append(tuple(r))
    return out


def _double_factorial(m: int) -> int:
    return 1 if m <= 0 else m * _double_factorial(m - 2)


def diag_derivative(r, d: int) -> float:
    """``D^r phi_I(0)`` for the standard d-variate normal density.

    ``D^r phi(0) = (2 pi)^{-d/2} prod_j (-1)^{r_j/2} (r_j - 1)!!`` for even r_j
    (zero if any r_j is odd), from ``phi^{(m)}(u) = (-1)^m He_m(u) phi(u)``.

    Parameters
    ----------
    r : sequence of d int
    d : int

    Returns
    -------
    float
    """
    val = (2.0 * math.pi) ** (-0.5 * d)
    for m in r:
        if m % 2:
            return 0.0
        val *= (-1) ** (m // 2) * _double_factorial(m - 1)
    return val


def _hermite_derivative(u: np.ndarray, m: int) -> np.ndarray:
    """``phi^{(m)}(u) = (-1)^m He_m(u) phi(u)`` (probabilists' Hermite polynomials)."""
    he_prev, he = np.ones_like(u), u.copy()
    if m == 0:
        he = he_prev
    else:
        for k in range(1, m):
            he_prev, he = he, u * he - k * he_prev
    return (-1) ** m * he * np.exp(-0.5 * np.minimum(u * u, _Q_CAP)) / math.sqrt(2.0 * math.pi)


def tensor_from_values(values: dict, d: int, order: int, batch: int) -> np.ndarray:
    """Fill a symmetric (batch, d, ..., d) tensor from values per multi-index.

    Parameters
    ----------
    values : dict of tuple of int -> ndarray, shape (batch,)
    d, order, batch : int

    Returns
    -------
    ndarray
    """
    out = np.empty((batch,) + (d,) * order)
    for idx in itertools.product(range(d), repeat=order):
        r = [0] * d
        for j in idx:
            r[j] += 1
        out[(slice(None),) + idx] = values[tuple(r)]
    return out


class _FrequencyTable:
    """The half spectrum of a (size,)^d grid sorted by |kappa| (stable): indices into the
    flattened rfftn output, kappa (radians per bin), |kappa|^2, the conjugate-half
    multiplicity, 2 cos kappa_j and the tent deconvolution prod_j sinc^4(kappa_j / 2)."""

    def __init__(self, size: int, d: int):
        axes = [2.0 * np.pi * _fft.fftfreq(size)] * (d - 1) + [2.0 * np.pi * _fft.rfftfreq(size)]
        mesh = np.meshgrid(*axes, indexing="ij")
        kappa = np.stack([m.ravel() for m in mesh], axis=1)           # (nf, d)
        mult = np.ones(mesh[-1].shape)
        last = np.arange(mesh[-1].shape[-1])
        mult[..., (last > 0) & (last < size / 2.0)] = 2.0              # conjugate halves
        k2 = np.einsum("fd,fd->f", kappa, kappa)
        self.order = np.argsort(k2, kind="stable")
        self.kappa = kappa[self.order]
        self.k2 = k2[self.order]
        self.mult = mult.ravel()[self.order]
        self.two_cos = 2.0 * np.cos(self.kappa)
        half = 0.5 * self.kappa
        self.tent = np.prod(np.where(half == 0, 1.0, np.sin(half) / np.where(half == 0, 1.0, half)), axis=1) ** 4
        for a in (self.order, self.kappa, self.k2, self.mult, self.two_cos, self.tent):
            a.flags.writeable = False


_FREQUENCY_TABLES: dict = {}


def _frequency_table(size: int, d: int) -> _FrequencyTable:
    """Cached for d <= 2 (at most 4 tables of a few MB: a selector builds the same
    grid for every block); built afresh in 3-D, where a table is tens of MB."""
    if d > 2:
        return _FrequencyTable(size, d)
    key = (size, d)
    table = _FREQUENCY_TABLES.get(key)
    if table is None:
        if len(_FREQUENCY_TABLES) >= 4:
            _FREQUENCY_TABLES.pop(next(iter(_FREQUENCY_TABLES)))
        table = _FREQUENCY_TABLES[key] = _FrequencyTable(size, d)
    return table


def _bin_cells(zs, ws, lo, delta, bins, size):
    """Linear binning of every cell onto its own ``size^d`` grid (``bins`` nodes used
    per axis), and the sums behind the binned self pairs.

    Returns ``grid`` (C, size^d): ``sum_i w_i prod_j (1 - f_ij or f_ij)`` at the
    2^d corners of each point's bin, and ``self_sums`` (C, 2^d): for each pattern
    ``s`` of axes (bit ``d - 1 - j`` for axis j) ``sum_i w_i^2 prod_j a_j`` with
    ``a_j = f_ij (1 - f_ij)`` on the axes in ``s`` and ``(1 - f_ij)^2 + f_ij^2``
    on the others: the autocorrelation of each point's tent weights at an offset
    whose non-zero components are the axes in ``s``.

    One compiled loop over every cell's rows (:mod:`mvkde.engines.compiled`),
    run without the GIL.
    """
    from ..engines.compiled import bin_cells_tent

    C = len(zs)
    d = lo.shape[1]
    grid = np.zeros((C, size ** d))
    self_sums = np.zeros((C, 1 << d))
    cell_bins = np.ascontiguousarray(np.broadcast_to(np.asarray(bins, dtype=np.int64), (C,)))
    starts = np.concatenate([[0], np.cumsum([z.shape[0] for z in zs])]).astype(np.int64)
    if starts[-1]:
        z = np.ascontiguousarray(np.concatenate(zs), dtype=float).reshape(-1, d)
        w = np.ascontiguousarray(np.concatenate(ws), dtype=float)
        bin_cells_tent(z, w, starts, np.ascontiguousarray(lo, dtype=float),
                       np.ascontiguousarray(delta, dtype=float), cell_bins, int(size), grid, self_sums)
    return grid, self_sums


# ---------------------------------------------------------------------------
# binned provider
# ---------------------------------------------------------------------------

class BinnedSums:
    """Off-diagonal Gaussian sums from linearly binned counts and the FFT.

    Parameters
    ----------
    prep : Prepared
    max_sd : (C,) array
        Largest kernel standard deviation (sphered units) any criterion will
        use: the grid is zero padded by 8 of them so that the periodic
        convolution never wraps around.
    min_sd : (C,) array
        Smallest kernel standard deviation: frequencies where even that
        kernel's spectrum is below 1e-17 are dropped.
    delta : (C,) array, optional
        Target bin width (sphered units); default the normal-scale standard
        deviation over a per-dimension resolution (5 bins for d = 2).
    """

    def __init__(self, prep: Prepared, max_sd, min_sd, delta=None):
        d = prep.d
        self.prep = prep
        self.d = d
        C = prep.cells
        # column by column: z.min(axis=0) on a C-ordered (n, 2) array is 30 x slower
        lo = np.array([[z[:, j].min() for j in range(d)] for z in prep.z])
        hi = np.array([[z[:, j].max() for j in range(d)] for z in prep.z])
        span = np.maximum(hi - lo, 1e-12)
        if delta is None:
            delta = np.sqrt(prep.c_ns) / _RESOLUTION.get(d, 2.0)
        need = span / np.asarray(delta, dtype=float)[:, None]
        # bins and padding per cell, so that a cell's sums do not depend on the
        # other cells of its block (the batch door equals the single fit); only
        # the array size is shared, and extra zero padding changes no sum
        bins = np.minimum(np.maximum(np.ceil(need.max(axis=1)) + 1, 16), _MAX_BINS.get(d, 32)).astype(np.int64)
        delta = span / (bins - 1)[:, None]                           # (C, d)
        pad = np.ceil(np.max(8.0 * np.asarray(max_sd, dtype=float).reshape(-1, 1) / delta, axis=1))
        size = _fft.next_fast_len(int(np.max(bins + pad)), real=True)
        self.bins, self.size, self.delta, self.origin = bins, size, delta, lo
        shape = (size,) * d
        ntot = size ** d

        # -- linear binning of every cell at once, into one (C, size^d) array
        flat_bins, self_sums = _bin_cells(prep.z, prep.w, lo, delta, bins, size)
        grid = flat_bins.reshape((C,) + shape)
        spec = _fft.rfftn(grid, axes=tuple(range(1, d + 1)), workers=1)
        self._spec_complex = spec

        # -- frequencies (radians per bin) of the half spectrum, in order of |kappa|
        # (a criterion value for a given H then reads a prefix, see _cutoff); drop
        # those where even the narrowest kernel has no mass (exp(-40))
        table = _frequency_table(size, d)
        smin = np.asarray(min_sd, dtype=float)
        kmax2 = 80.0 / np.min(smin[:, None] / delta, axis=1) ** 2      # per cell, |kappa|^2 bound
        nkeep = int(np.searchsorted(table.k2, kmax2.max(), side="left"))
        keep = table.order[:nkeep]
        kappa, mult, tent = table.kappa[:nkeep], table.mult[:nkeep], table.tent[:nkeep]
        self._k2 = table.k2[:nkeep]

        # -- spectrum of the binned self pairs: sum_i w_i^2 autocorrelation of
        # each point's tent weights, supported on offsets {-1, 0, 1}^d.  Its value
        # at an offset depends only on the set s of axes where the offset is not 0,
        # and the cosines of the offsets with that set sum to prod_{j in s} 2 cos kappa_j
        self_basis = np.ones((1 << d, nkeep))
        for pattern, bits in enumerate(itertools.product((0, 1), repeat=d)):
            for j in range(d):
                if bits[j]:
                    self_basis[pattern] *= table.two_cos[:nkeep, j]
        self.kappa = kappa
        self.mult = mult
        # off-diagonal spectrum, with the 1/(grid volume) of Parseval folded in
        # Linear binning spreads each point over a tent of one bin width; for
        # points placed at random within their bins the expected binned
        # cross-spectrum of a pair is the true one times prod_j sinc^2(k_j/2)
        # for each of the two points.  Dividing it out removes the O(delta^2)
        # binning bias of every off-diagonal sum (the self pairs were already
        # removed exactly).
        from ..engines.compiled import off_diagonal_power

        self.pt = np.empty((C, nkeep))
        off_diagonal_power(spec.reshape(C, -1), keep.astype(np.int64), self_sums, self_basis, mult / ntot / tent,
                           1.0 / np.prod(delta, axis=1), self.pt)
        self.nfreq = nkeep
        self._pairs = [(j, k) for j in range(d) for k in range(j, d)]
        self._mono2 = np.stack([kappa[:, j] * kappa[:, k] for j, k in self._pairs], axis=1)
        self._mono2T = np.ascontiguousarray(self._mono2.T)
        self._mono = {}

    # -- helpers -----------------------------------------------------------
    def _cutoff(self, cells, S) -> int:
        """Number of leading (lowest |kappa|) frequencies where exp(-w'Sw/2) >= e^-40
        for some row: beyond them w'Sw >= lambda_min(S_u) |kappa|^2 > 80 for every
        row, so every term of the sums there is below e^-40 times the largest
        (below double rounding), and they are skipped."""
        Su = S / (self.delta[cells][:, :, None] * self.delta[cells][:, None, :])
        lam = float(np.min(np.linalg.eigvalsh(Su)[:, 0]))
        if not lam > 0:
            return self.nfreq
        return int(np.searchsorted(self._k2, 80.0 / lam, side="right"))

    def _quadratic(self, cells, S, nf=None, scale=1.0) -> np.ndarray:
        """``scale`` w'Sw at the first ``nf`` kept frequencies (all by default),
        w = kappa / delta of the row's cell: (b, nf)."""
        Su = S / (self.delta[cells][:, :, None] * self.delta[cells][:, None, :])
        coef = np.stack([Su[:, j, k] * (scale if j == k else 2.0 * scale) for j, k in self._pairs], axis=1)
        # one matrix product (b, p) x (p, nf): the output has b x nf entries, far
        # from the tiny products whose thread wake-up dominates; einsum's loop over
        # the short axis p took 20 x longer (5.7 vs 0.28 ms at b = 27, nf = 36,720)
        return coef @ (self._mono2T if nf is None else self._mono2T[:, :nf])

    def half_exp(self, cells, S, nf=None) -> np.ndarray:
        """exp(-w'Sw/2), (b, nf), for sphered ``S`` (b, d, d) at the first ``nf`` kept frequencies (default all).

        Parameters
        ----------
        cells, S : ndarray
        nf : int, optional

        Returns
        -------
        ndarray
        """
        # -1/2 folded into the coefficients (exact: a power of two), so the
        # quadratic form costs one pass less
        q = self._quadratic(cells, S, nf, scale=-0.5)
        # exp(-150) floor: products of exponentials below it would be subnormal
        # numbers, which the CPU handles a hundred times slower, for no accuracy
        np.maximum(q, -0.5 * _Q_CAP, out=q)
        return np.exp(q, out=q)

    # -- the interface shared with ExactSums -------------------------------
    def gauss_sums(self, cells, H, terms, G=None):
        """Off-diagonal sums of ``phi_{aH + bG}`` for each (a, b) in ``terms``.

        ``a`` and ``b`` are non-negative integers; the spectrum of
        ``phi_{aH+bG}`` is ``E_H^a E_G^b`` with ``E_S = exp(-w'Sw/2)``, so one
        exponential per row serves every term.  Rows are processed in chunks
        so the working arrays stay near 16 MB.

        Parameters
        ----------
        cells : array_like of int, shape (b,)
        H, G : ndarray, shape (b, d, d)
        terms : list of (int, int)

        Returns
        -------
        ndarray, shape (len(terms), b)
        """
        cells = np.asarray(cells)
        out = np.empty((len(terms), len(cells)))
        step = max(1, (1 << 21) // max(self.nfreq, 1))
        for a0 in range(0, len(cells), step):
            sl = slice(a0, a0 + step)
            out[:, sl] = self._gauss_chunk(cells[sl], H[sl], terms, None if G is None else G[sl])
        return out

    def _gauss_chunk(self, cells, H, terms, G):
        # term (a, b) is the spectrum of phi_{aH + bG}: beyond the cutoff of that
        # matrix it is below e^-40 (see _cutoff), so each term reads its own prefix
        # of the frequencies (LSCV's phi_{2H} term half as many as its phi_H term)
        cuts = [max(1, self._cutoff(cells, a * H + (b * G if b else 0.0))) for a, b in terms]
        nf_h = max([c for c, (a, _) in zip(cuts, terms) if a > 0], default=0)
        nf_g = max([c for c, (_, b) in zip(cuts, terms) if b > 0], default=0)
        nf = max(cuts)
        EH = self.half_exp(cells, H, nf_h) if nf_h else None
        EG = self.half_exp(cells, G, nf_g) if nf_g else None
        single = bool(np.all(cells == cells[0]))
        out = np.empty((len(terms), len(cells)))
        for t, ((a, b), k) in enumerate(zip(terms, cuts)):
            E = None
            if a:
                E = EH[:, :k] if a == 1 else EH[:, :k] ** a
            if b:
                F = EG[:, :k] if b == 1 else EG[:, :k] ** b
                E = F if E is None else E * F
            if single:
                out[t] = E @ self.pt[cells[0], :k]   # one matrix-vector product (rows of one cell)
            else:
                out[t] = np.einsum("bf,bf->b", self.pt[cells, :k], E)
        return out

    def _monomial(self, r):
        """prod_j kappa_j^{r_j} at the kept frequencies (cached; no pow calls)."""
        if r not in self._mono:
            if "powers" not in self._mono:
                pw = [np.ones_like(self.kappa)]
                for _ in range(8):
                    pw.append(pw[-1] * self.kappa)
                self._mono["powers"] = pw
            pw = self._mono["powers"]
            out = pw[r[0]][:, 0].copy()
            for j in range(1, self.d):
                out *= pw[r[j]][:, j]
            self._mono[r] = out
        return self._mono[r]

    def derivative_sums(self, cells, g, order):
        """Off-diagonal sums of ``D^r phi_{g^2 I}`` for every |r| = order (even).

        Parameters
        ----------
        cells, g : array_like, shape (b,)
        order : int

        Returns
        -------
        dict of tuple of int -> ndarray, shape (b,)
        """
        cells = np.asarray(cells)
        d = self.d
        g = np.asarray(g, dtype=float)
        S = g[:, None, None] ** 2 * np.eye(d)[None]
        E = self.half_exp(cells, S)
        E *= self.pt[cells]
        inv = 1.0 / self.delta[cells]                                  # (b, d)
        sign = (-1) ** (order // 2)                                    # i^order
        vals = {}
        for r in multi_indices(d, order):
            mono = self._monomial(r)
            vals[r] = sign * np.einsum("bf,f->b", E, mono) * np.prod(inv ** np.array(r), axis=1)
        return vals

    def loo_sums(self, cell: int, H):
        """``sum_{j != i} w_j phi_H(Z_i - Z_j)`` at every data point of ``cell``.

        Parameters
        ----------
        cell : int
        H : ndarray, shape (b, d, d)

        Returns
        -------
        ndarray, shape (b, n)
        """
        d = self.d
        size = self.size
        b = H.shape[0]
        cells = np.full(b, cell)
        # full (not pruned) spectrum of the kernel on the padded grid
        axes = [2.0 * np.pi * _fft.fftfreq(size)] * (d - 1) + [2.0 * np.pi * _fft.rfftfreq(size)]
        mesh = np.meshgrid(*axes, indexing="ij")
        kappa = np.stack([m.ravel() for m in mesh], axis=1)
        Su = H / (self.delta[cells][:, :, None] * self.delta[cells][:, None, :])
        q = np.einsum("fj,bjk,fk->bf", kappa, Su, kappa)
        # the same tent deconvolution as for the pair sums (binning of X_j and
        # linear interpolation at X_i each smear by one tent)
        half = 0.5 * kappa
        tent = np.prod(np.where(half == 0, 1.0, np.sin(half) / np.where(half == 0, 1.0, half)), axis=1) ** 4
        kern = np.exp(-0.5 * np.minimum(q, _Q_CAP)) / tent
        spec = self._spec_complex[cell].reshape(-1)[None, :] * kern
        grid = _fft.irfftn(spec.reshape((b,) + mesh[0].shape), s=(size,) * d,
                           axes=tuple(range(1, d + 1)), workers=1)
        vol = np.prod(self.delta[cell])
        grid /= vol
        z = self.prep.z[cell]
        w = self.prep.w[cell]
        u = (z - self.origin[cell]) / self.delta[cell]
        i0 = np.clip(np.floor(u).astype(np.int64), 0, int(self.bins[cell]) - 2)
        frac = np.clip(u - i0, 0.0, 1.0)
        flat = grid.reshape(b, -1)
        strides = np.array([size ** (d - 1 - j) for j in range(d)])
        total = np.zeros((b, z.shape[0]))
        for corner in itertools.product((0, 1), repeat=d):
            corner = np.array(corner)
            wt = np.prod(np.where(corner == 1, frac, 1.0 - frac), axis=1)
            total += flat[:, np.einsum("ij,j->i", i0 + corner, strides)] * wt[None, :]
        # remove each point's own contribution, seen through the same
        # (deconvolved) kernel at the node offsets {-1, 0, 1}^d
        offsets = np.array(list(itertools.product((-1, 0, 1), repeat=d)))
        auto = np.empty((z.shape[0], len(offsets)))
        for k, o in enumerate(offsets):
            a = np.where(o == 0, (1.0 - frac) ** 2 + frac ** 2, frac * (1.0 - frac))
            auto[:, k] = np.prod(a, axis=1)
        mult = np.ones(mesh[-1].shape)
        last = np.arange(mesh[-1].shape[-1])
        mult[..., (last > 0) & (last < size / 2.0)] = 2.0
        cosines = np.cos(np.einsum("od,fd->fo", offsets, kappa)) * mult.reshape(-1, 1)
        kern_at = np.einsum("bf,fo->bo", kern, cosines) / (size ** d) / vol
        total -= w[None, :] * np.einsum("bo,no->bn", kern_at, auto)
        return total


# ---------------------------------------------------------------------------
# exact provider
# ---------------------------------------------------------------------------

class ExactSums:
    """Off-diagonal sums by direct summation over pairs i < j (O(n^2) per value).

    Pairs are held in chunks of at most ``chunk_pairs`` to bound memory.
    """

    def __init__(self, prep: Prepared, chunk_pairs: int = 1 << 21):
        self.prep = prep
        self.d = prep.d
        self.chunk_pairs = chunk_pairs
        self._pairs = {}

    def _cell_pairs(self, cell):
        if cell not in self._pairs:
            z, w = self.prep.z[cell], self.prep.w[cell]
            n = z.shape[0]
            iu, ju = np.triu_indices(n, k=1)
            chunks = []
            for a in range(0, iu.size, self.chunk_pairs):
                i, j = iu[a:a + self.chunk_pairs], ju[a:a + self.chunk_pairs]
                chunks.append((z[i] - z[j], 2.0 * w[i] * w[j]))
            self._pairs[cell] = chunks
        return self._pairs[cell]

    def gauss_sums(self, cells, H, terms, G=None):
        """All rows and terms of one cell per matrix product; arguments as :meth:`BinnedSums.gauss_sums`."""
        d = self.d
        cells = np.asarray(cells)
        out = np.empty((len(terms), len(cells)))
        iu = [(j, k) for j in range(d) for k in range(j, d)]
        for cell in np.unique(cells):
            sel = np.flatnonzero(cells == cell)
            mats = []
            for a, bb in terms:
                for b in sel:
                    mats.append(a * H[b] + (bb * G[b] if bb else 0.0))
            mats = np.array(mats)
            # terms without H (the pilot's phi_{2G}) repeat across rows: sum each matrix once
            mats, back = np.unique(mats.reshape(len(mats), -1), axis=0, return_inverse=True)
            mats = mats.reshape(-1, d, d)
            inv = np.linalg.inv(mats)
            coef = np.stack([inv[:, j, k] * (1.0 if j == k else 2.0) for j, k in iu], axis=0)
            const = (2 * np.pi) ** (-0.5 * d) * np.exp(-0.5 * np.linalg.slogdet(mats)[1])
            acc = np.zeros(len(mats))
            for diff, ww in self._cell_pairs(int(cell)):
                prods = np.stack([diff[:, j] * diff[:, k] for j, k in iu], axis=1)
                step = max(1, (1 << 22) // max(len(mats), 1))
                for a0 in range(0, len(ww), step):
                    q = prods[a0:a0 + step] @ coef
                    np.minimum(q, _Q_CAP, out=q)
                    q *= -0.5
                    np.exp(q, out=q)
                    acc += ww[a0:a0 + step] @ q
            out[:, sel] = (acc * const)[np.ravel(back)].reshape(len(terms), len(sel))
        return out

    def derivative_sums(self, cells, g, order):
        """Sums over pairs of Hermite products; arguments and result as :meth:`BinnedSums.derivative_sums`."""
        d = self.d
        vals = {r: np.empty(len(cells)) for r in multi_indices(d, order)}
        for b, cell in enumerate(cells):
            gb = float(g[b])
            acc = {r: 0.0 for r in vals}
            for diff, ww in self._cell_pairs(int(cell)):
                u = diff / gb
                cache = {}
                for r in vals:
                    prod = ww.copy()
                    for j, m in enumerate(r):
                        if (j, m) not in cache:
                            cache[(j, m)] = _hermite_derivative(u[:, j], m)
                        prod *= cache[(j, m)]
                    acc[r] += prod.sum()
            for r in vals:
                vals[r][b] = acc[r] * gb ** (-d - order)
        return vals

    def loo_sums(self, cell: int, H):
        """Leave-one-out sums, one Cholesky per matrix; arguments and result as :meth:`BinnedSums.loo_sums`."""
        z, w = self.prep.z[cell], self.prep.w[cell]
        n = z.shape[0]
        out = np.zeros((H.shape[0], n))
        step = max(1, self.chunk_pairs // max(n, 1))
        for b in range(H.shape[0]):
            L = linalg.cholesky(H[b], lower=True)
            y = linalg.solve_triangular(L, z.T, lower=True).T
            y2 = np.einsum("ij,ij->i", y, y)
            const = (2 * np.pi) ** (-0.5 * self.d) / np.prod(np.diag(L))
            for a in range(0, n, step):
                q = y2[a:a + step, None] + y2[None, :] - 2.0 * y[a:a + step] @ y.T
                k = np.exp(-0.5 * np.clip(q, 0.0, _Q_CAP))
                k[np.arange(k.shape[0]), np.arange(a, a + k.shape[0])] = 0.0
                out[b, a:a + step] = const * (k @ w)
        return out
