"""mvkde: joint probability densities of environmental variables.

Public names: :func:`fit` (one sample), :func:`fit_cells` (the batch door:
many cells at once), :func:`densities` (the per-cell job from Python: an
xarray Dataset in, a labelled Dataset out, lazily with dask), :func:`compare`
(two estimates: differences, significance, probability ratios),
:class:`DensityEstimate`, the error classes and the kernel table.  Everything
else lives in submodules.

The public names are loaded on first use (module-level ``__getattr__``, PEP 562),
so ``import mvkde`` and the command line's ``--version``/``--help`` do not pay
for numpy, scipy, xarray, pandas or dask.  To export a new name, add one line
to ``_LAZY``: ``"name": ("submodule", "attribute")``.
"""

from __future__ import annotations

from importlib import import_module

# Cheap (standard library only): loaded eagerly.
from .errors import BandwidthError, ConfigError, InputError, MvkdeError, MvkdeWarning

__version__ = "0.1.0"

# public name -> (submodule relative to the package, attribute in it)
_LAZY: dict[str, tuple[str, str]] = {
    "fit": (".estimator", "fit"),
    "DensityEstimate": (".estimator", "DensityEstimate"),
    "CAUTION": (".estimator", "CAUTION"),
    "KERNEL_NAMES": (".kernels", "KERNEL_NAMES"),
    "kernel_table": (".kernels", "kernel_table"),
    "fit_cells": (".cells", "fit_cells"),
    "CellBatch": (".cells", "CellBatch"),
    "densities": (".pipeline.densities", "densities"),
    "compare": (".comparison", "compare"),
}

# Library submodules that ``import mvkde`` used to load eagerly: ``mvkde.engines``
# and the like keep working after a bare ``import mvkde``.
_SUBMODULES = frozenset({"bandwidth", "boundary", "cells", "comparison", "compare_cells", "directional", "engines",
                         "estimator", "kernels", "products", "support", "units"})

__all__ = [
    "fit",
    "fit_cells",
    "CellBatch",
    "densities",
    "compare",
    "DensityEstimate",
    "MvkdeError",
    "InputError",
    "BandwidthError",
    "ConfigError",
    "MvkdeWarning",
    "KERNEL_NAMES",
    "kernel_table",
    "CAUTION",
    "__version__",
]


def __getattr__(name: str):
    if name in _SUBMODULES:
        return import_module(f".{name}", __name__)  # the import binds it in globals()
    try:
        module_name, attribute = _LAZY[name]
    except KeyError:
        raise AttributeError(f"module 'mvkde' has no attribute {name!r}") from None
    value = getattr(import_module(module_name, __name__), attribute)
    globals()[name] = value  # later look-ups skip this function
    return value


def __dir__():
    return sorted(set(globals()) | set(_LAZY))
