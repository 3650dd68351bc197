"""A directional estimate's grid as kernel sums with periodic axes (for the binned engine).

With circular variables and linear variables whose boundary method is
``"none"`` or ``"reflect"``, :class:`~mvkde.directional.model.DirectionalModel`
is a sum of product kernels: a von Mises kernel per circular variable times
the linear block's kernel (each reflection image of the linear block with its
own bandwidth R H R, the directional factor that of its data row).  Each
image group is one piece ``(data, weights, PeriodicBandwidth)`` of the
boundary-method contract (:meth:`mvkde.boundary.methods._Base.grid_pieces`),
and the model's grid is their sum; :func:`mvkde.boundary.methods.evaluate_pieces`
sends them to :mod:`mvkde.engines.periodic` (binned FFT convolution, circular
along the periodic axes, or exact sums).  A spherical location (von
Mises-Fisher kernel on latitude/longitude) or a transformed linear block is not
such a sum on a regular lattice: :func:`grid_pieces` returns None and says why
(:func:`per_cell_reason`).
"""

from __future__ import annotations

from ..engines.periodic import PeriodicBandwidth

__all__ = ["grid_pieces", "per_cell_reason"]


def per_cell_reason(model) -> str | None:
    """Why ``model``'s grid is not kernel sums on a periodic lattice (None when it is)."""
    if model.spec.sphere is not None:
        return ("spherical locations: von Mises-Fisher kernels on latitude/longitude are summed directly, "
                "cell by cell (not a convolution on a regular lattice)")
    if model.name == "transform":
        return ("boundary='transform' of the linear variables of a directional estimate is evaluated in the "
                "transformed space by direct sums, cell by cell")
    if not model.spec.circular:
        return "no circular variable"
    return None


def grid_pieces(model, axes):
    """``(pieces, combine)`` of a directional model's grid, or None (see :func:`per_cell_reason`).

    Parameters
    ----------
    model : mvkde.directional.model.DirectionalModel
    axes : list of ndarray

    Returns
    -------
    pieces : list of (data, weights, PeriodicBandwidth)
        One piece per reflection-image group of the linear block (one piece without reflection).
    combine : callable
        The pieces' grids -> their sum.
    """
    if per_cell_reason(model) is not None:
        return None
    spec = model.spec
    d = len(spec.periods)
    periods = tuple(float(spec.periods[j]) if j in spec.circular else None for j in range(d))
    kappas = tuple(float(model.sm.kappas[j]) if j in spec.circular else None for j in range(d))
    if not model.q:
        return [(model.data, model.w, PeriodicBandwidth(None, kappas, periods))], _summed
    pieces = []
    for bw, x_lin, rows in model.groups:
        data = model.data[rows].copy()
        data[:, spec.linear] = x_lin
        pieces.append((data, model.w[rows], PeriodicBandwidth(bw, kappas, periods)))
    return pieces, _summed


def _summed(values):
    out = values[0].copy()
    for v in values[1:]:
        out += v
    return out
