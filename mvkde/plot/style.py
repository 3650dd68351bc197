"""The look of the pictures: colours, line styles, sizes, and the matplotlib requirement."""

from __future__ import annotations

from ..errors import MvkdeError


HDR_MASSES = (0.5, 0.9, 0.99)
#: cividis reversed: pale where there is little, dark where there is much ("ink" for probability)
COLOUR_MAP = "cividis_r"
#: changes (differences centred on 0, ratios centred on 1 on a log scale): red = more, blue = less
DIVERGING = "RdBu_r"
LINE = "#202020"          # marginals, contour lines and points: near-black, plain
HALO = "white"            # stroked under each contour line and label so it reads on dark and light fills
NO_DATA = "#c8c8c8"       # map background where a cell has no value
FRAME = "#8a8a8a"         # axis frame and ticks: quiet grey
GRID = "#ebebeb"          # faint grid behind lines and points
FIT_MASS = 0.999          # axis ranges hold at least this share of the grid mass ...
CONSTANT_DIGITS = 6       # a field equal to this many significant digits everywhere is called constant
FIT_MARGIN = 0.05         # ... plus this share of their span (and one grid step) on each side
DEFAULT_SIZE = (900, 700)
MIN_PIXELS, MAX_PIXELS = 200, 8000
DPI = 100
LATITUDE_NAMES = {"lat", "latitude", "rlat", "y", "nav_lat", "grid_latitude"}

INSTALL_HINT = "install the plot extra: pip install 'mvkde[plot]'"


def require_matplotlib():
    """Import matplotlib or raise an MvkdeError saying how to install it."""
    try:
        import matplotlib  # noqa: F401
        from matplotlib.backends.backend_agg import FigureCanvasAgg  # noqa: F401
        from matplotlib.figure import Figure  # noqa: F401
    except ImportError:
        raise MvkdeError(f"plotting needs matplotlib, which is not installed: {INSTALL_HINT}") from None
    return matplotlib


