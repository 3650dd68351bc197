"""mvkde: joint probability densities of environmental variables.

Public names: :func:`fit`, :class:`DensityEstimate`, the error classes and
the kernel table.  Everything else lives in submodules.
"""

from .errors import BandwidthError, ConfigError, InputError, MvkdeError, MvkdeWarning
from .estimator import CAUTION, DensityEstimate, fit
from .kernels import KERNEL_NAMES, kernel_table

__version__ = "0.1.0"

__all__ = [
    "fit",
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
