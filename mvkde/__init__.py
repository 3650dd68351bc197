"""mvkde: joint probability densities of environmental variables.

Public names: :func:`fit`, :class:`DensityEstimate`, :func:`densities` (the
per-cell job from Python, imported on first use), the error classes and the
kernel table.  Everything else lives in submodules.
"""

from .errors import BandwidthError, ConfigError, InputError, MvkdeError, MvkdeWarning
from .estimator import CAUTION, DensityEstimate, fit
from .kernels import KERNEL_NAMES, kernel_table

__version__ = "0.1.0"

__all__ = [
    "fit",
    "densities",
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


def __getattr__(name):
    # the pipeline layer (xarray/dask machinery) is imported only when densities is used
    if name == "densities":
        from .pipeline.densities import densities

        return densities
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
