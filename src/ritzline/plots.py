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


def calibration_residuals(solution, path, *, title: str | None = None):
    """Residual plot of a wavelength solution: residuals (nm) of the matched lamp lines with
    their 1-sigma error bars against pixel, the solution's 1-sigma band about zero, and the
    rejected lines marked with their reasons.  Returns the path."""
    import numpy as np

    m = solution.matches
    fig, ax = new_figure(figsize=(10, 4.5))
    grid = np.linspace(0, solution.n_pixels - 1, 400)
    band = solution.wavelength_err(grid) * 1e3
    ax.fill_between(grid, -band, band, color="tab:blue", alpha=0.2, lw=0,
                    label="solution 1σ band")
    ax.axhline(0.0, color="0.3", lw=0.8)
    if len(m):
        used = np.asarray(m["used"], bool)
        pix = np.asarray(m["pixel"], float)
        res = np.asarray(m["residual_nm"], float) * 1e3
        disp = np.abs(solution.dispersion(pix))
        err = np.hypot(np.asarray(m["pixel_err"], float) * disp,
                       np.asarray(m["wavelength_ref_err"], float)) * 1e3
        ax.errorbar(pix[used], res[used], yerr=err[used], fmt="o", ms=4, color="tab:blue",
                    capsize=2, label=f"used ({int(used.sum())})")
        if (~used).any():
            ax.errorbar(pix[~used], res[~used], yerr=err[~used], fmt="x", ms=6,
                        color="tab:red", capsize=2, label=f"rejected ({int((~used).sum())})")
            for x, y, why in zip(pix[~used], res[~used], np.asarray(m["reason"])[~used],
                                 strict=True):
                ax.annotate(str(why), (x, y), textcoords="offset points", xytext=(4, 4),
                            fontsize=7, color="tab:red")
        lim = np.nanmax(np.abs(np.r_[res[used], band.max()])) if used.any() else band.max()
        ax.set_ylim(-2.5 * lim, 2.5 * lim)
    ax.set_xlim(-0.5, solution.n_pixels - 0.5)
    ax.set_xlabel("pixel")
    ax.set_ylabel(f"fit − reference ({solution.medium}), pm")
    lamps = "+".join(solution.lamps)
    ax.set_title(title or (
        f"{lamps}: degree {solution.degree}, RMS {solution.rms_nm * 1e3:.2f} pm "
        f"({solution.rms_pixel:.3f} px), {solution.verdict}"
    ))
    ax.legend(loc="upper right", fontsize=8)
    return save_figure(fig, path)


# ---- identify --------------------------------------------------------------------------

# ---- check -----------------------------------------------------------------------------

CHECK_STATUS_COLOURS = {"pass": "#2e7d32", "warn": "#f9a825", "fail": "#c62828", "error": "#6a1b9a"}


def _check_axis(summary):
    """x values and label for batch figures: time stamps when every checked row has one,
    else the exposure order."""
    import numpy as np

    n = len(summary)
    order = np.asarray(summary["index"], float) if "index" in summary.colnames else np.arange(n)
    stamps = [str(s) for s in summary["timestamp"]] if "timestamp" in summary.colnames else []
    ok = [s for s, st in zip(stamps, summary["status"], strict=False) if st != "error"]
    if ok and all(ok):
        try:
            times = np.array(
                [np.datetime64(s.replace("Z", "")) if s else np.datetime64("NaT") for s in stamps],
                dtype="datetime64[ms]",
            )
        except ValueError:
            return order, "exposure (input order)", False
        return times, "time stamp (UTC as written in the files)", True
    return order, "exposure (input order)", False


def _check_status_points(ax, x, y, yerr, status):
    import numpy as np

    status = np.asarray(status, str)
    for name, colour in CHECK_STATUS_COLOURS.items():
        sel = (status == name) & np.isfinite(y)
        if sel.any():
            ax.errorbar(
                x[sel], y[sel], yerr=None if yerr is None else yerr[sel], fmt="o", ms=3,
                color=colour, ecolor=colour, elinewidth=0.8, capsize=0, label=name,
            )  # fmt: skip
    if ax.get_legend_handles_labels()[0]:
        ax.legend(loc="best", fontsize="small", frameon=False)


def plot_check_drift(summary, path, *, max_shift_px: float | None = None) -> Path:
    """Shift (px) with 1-sigma error bars over exposure order or time, coloured by status."""
    import numpy as np

    x, xlabel, _ = _check_axis(summary)
    fig, ax = new_figure(figsize=(10, 3.6))
    y = np.asarray(summary["shift_px"], float)
    err = np.asarray(summary["shift_err_px"], float)
    _check_status_points(ax, x, y, err, summary["status"])
    ax.axhline(0.0, color="0.5", lw=0.8)
    if max_shift_px:
        for s in (-max_shift_px, max_shift_px):
            ax.axhline(s, color=CHECK_STATUS_COLOURS["fail"], lw=0.8, ls="--")
    ax.set_xlabel(xlabel)
    ax.set_ylabel("shift (px, + = toward higher pixel)")
    ax.set_title("Drift against the reference solution")
    return save_figure(fig, path)


def plot_check_fwhm(summary, path, *, reference_fwhm_px: float | None = None) -> Path:
    """Median line FWHM (px) with its uncertainty over exposure order or time."""
    import numpy as np

    x, xlabel, _ = _check_axis(summary)
    fig, ax = new_figure(figsize=(10, 3.6))
    y = np.asarray(summary["fwhm_px"], float)
    err = np.asarray(summary["fwhm_err_px"], float)
    _check_status_points(ax, x, y, np.nan_to_num(err, nan=0.0), summary["status"])
    if reference_fwhm_px and np.isfinite(reference_fwhm_px):
        ax.axhline(reference_fwhm_px, color="0.4", lw=0.8, ls=":", label="reference")
    ax.set_xlabel(xlabel)
    ax.set_ylabel("FWHM (px)")
    ax.set_title("Line width")
    return save_figure(fig, path)


def plot_check_status(summary, path) -> Path:
    """Bar chart of how many exposures passed, warned, failed or could not be read."""
    import numpy as np

    status = np.asarray(summary["status"], str)
    names = list(CHECK_STATUS_COLOURS)
    counts = [int(np.count_nonzero(status == s)) for s in names]
    fig, ax = new_figure(figsize=(5, 3.2))
    bars = ax.bar(names, counts, color=[CHECK_STATUS_COLOURS[s] for s in names])
    for bar, c in zip(bars, counts, strict=True):
        ax.annotate(str(c), (bar.get_x() + bar.get_width() / 2, bar.get_height()),
                    ha="center", va="bottom", fontsize="small")  # fmt: skip
    ax.set_ylabel("exposures")
    ax.set_title("Status")
    ax.margins(y=0.15)
    return save_figure(fig, path)
