"""What :func:`mvkde.estimator.fit_steps` asks of its driver, and how a block of such requests is answered.

``fit_steps`` is a generator: each smoothing it must choose is yielded as a
request and the answer is sent back (or the selector's error thrown in).
:func:`mvkde.fit` answers each request alone; the batch door
(:func:`mvkde.cells.fit_cells`) advances many cells in lock step and answers
a round of like requests with one call: :class:`SelectionRequest` through
:func:`mvkde.bandwidth.select_many`, :class:`ConcentrationRequest` through
:func:`mvkde.directional.selectors.mixture_plugin_concentrations`.  A cell's
answer does not depend on the other cells of its block.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .directional import selectors as _circ
from .errors import MvkdeError

__all__ = ["SelectionRequest", "ConcentrationRequest"]


@dataclass
class SelectionRequest:
    """A bandwidth selection :func:`fit_steps` needs: the arguments of :func:`mvkde.bandwidth.select`."""

    method: str
    data: np.ndarray
    weights: np.ndarray | None
    kernel: str
    form: str
    parametrization: str
    names: list


@dataclass
class ConcentrationRequest:
    """The von Mises mixture plug-in concentration of one circular variable (angles in radians);
    answered with ``(nu, mixture)`` (:func:`mvkde.directional.selectors.mixture_plugin_concentration`)."""

    theta: np.ndarray
    weights: np.ndarray | None

    @staticmethod
    def answer_many(requests) -> list:
        """``(nu, mixture)`` per request (or the error the selector raised), the EM of all run together.

        Parameters
        ----------
        requests : list of ConcentrationRequest

        Returns
        -------
        list
        """
        try:
            return _circ.mixture_plugin_concentrations([r.theta for r in requests], [r.weights for r in requests])
        except MvkdeError:
            if len(requests) == 1:
                raise
        out: list = []
        for r in requests:           # one cell spoils the block: answer each alone
            try:
                out.append(_circ.mixture_plugin_concentrations([r.theta], [r.weights])[0])
            except MvkdeError as exc:
                out.append(exc)
        return out
