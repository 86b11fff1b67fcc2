"""Every figure ritzline draws.  Matplotlib is imported lazily with the Agg backend; the
library never calls ``plt.show``.  Each function takes results and a path, writes a PNG
(atomically) and returns the path.
"""

from pathlib import Path

from ._io import atomic_write

__all__ = ["new_figure", "save_figure"]


def new_figure(*args, **kwargs):
    """A (fig, axes) pair from a non-interactive backend; same arguments as ``plt.subplots``."""
    import matplotlib

    matplotlib.use("Agg", force=False)
    from matplotlib.figure import Figure

    fig = Figure(figsize=kwargs.pop("figsize", (10, 4)), layout=kwargs.pop("layout", "constrained"))
    axes = fig.subplots(*args, **kwargs)
    return fig, axes


def save_figure(fig, path, *, dpi: int = 110) -> Path:
    """Write ``fig`` as PNG atomically and return the path."""
    path = Path(path)
    with atomic_write(path, "wb") as fh:
        fig.savefig(fh, format="png", dpi=dpi)
    return path


# Figures are defined below, one block per stage.

# ---- peaks -----------------------------------------------------------------------------

# ---- calibrate -------------------------------------------------------------------------

# ---- identify --------------------------------------------------------------------------

# ---- check -----------------------------------------------------------------------------
