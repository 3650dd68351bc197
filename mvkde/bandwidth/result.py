"""The object every bandwidth selector returns."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .matrix import BandwidthMatrix


@dataclass
class BandwidthResult:
    """A chosen bandwidth matrix and how it was chosen.

    Attributes
    ----------
    matrix : BandwidthMatrix
    method : str            selector name ("normal", "lscv", ...; "given" for a user matrix)
    parametrization : str   "full", "diagonal" or "scalar"
    criterion : float       value of the selector's criterion at the optimum (NaN for rules)
    converged : bool        whether the optimiser reported convergence (True for rules)
    at_edge : bool          the optimum lies on the edge of the search region
    warnings : list[str]    human-readable notes (also issued as MvkdeWarning)
    details : dict          selector-specific numbers (pilot bandwidths, iterations, ...)
    """

    matrix: BandwidthMatrix
    method: str
    parametrization: str
    criterion: float = float("nan")
    converged: bool = True
    at_edge: bool = False
    warnings: list[str] = field(default_factory=list)
    details: dict = field(default_factory=dict)

    @property
    def H(self) -> np.ndarray:
        return self.matrix.matrix

    def as_attrs(self) -> dict:
        """Flat, netCDF-friendly summary.

        Returns
        -------
        dict
            ``bandwidth_method``, ``_parametrization``, ``_criterion``, ``_converged`` and ``_at_edge``
            (booleans as 0 or 1).
        """
        return {
            "bandwidth_method": self.method,
            "bandwidth_parametrization": self.parametrization,
            "bandwidth_criterion": float(self.criterion),
            "bandwidth_converged": int(bool(self.converged)),
            "bandwidth_at_edge": int(bool(self.at_edge)),
        }
