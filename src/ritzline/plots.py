"""Every figure ritzline draws.  Matplotlib is imported lazily with the Agg backend; the
library never calls ``plt.show``.  Each function takes results and a path, writes the
figure atomically in the format the path's suffix names (.png, .pdf or .svg) and returns
the path.
"""

from pathlib import Path

from ._io import atomic_write

__all__ = ["FIGURE_FORMATS", "figure_format", "new_figure", "save_figure"]

FIGURE_FORMATS = {".png": "png", ".pdf": "pdf", ".svg": "svg"}


def new_figure(*args, **kwargs):
    """A (fig, axes) pair from a non-interactive backend; same arguments as ``plt.subplots``."""
    import matplotlib

    matplotlib.use("Agg", force=False)
    from matplotlib.figure import Figure

    fig = Figure(figsize=kwargs.pop("figsize", (10, 4)), layout=kwargs.pop("layout", "constrained"))
    axes = fig.subplots(*args, **kwargs)
    return fig, axes


def figure_format(path) -> str:
    """The format a figure is written in, from the suffix of ``path``: png, pdf or svg.

    Any other suffix is refused (RitzlineError) instead of writing a PNG under a name that
    says otherwise.
    """
    from .errors import RitzlineError

    suffix = Path(path).suffix.lower()
    if suffix not in FIGURE_FORMATS:
        raise RitzlineError(
            f"{path}: figures are written as .png, .pdf or .svg; "
            f"{suffix or 'no suffix'} is not one of them"
        )
    return FIGURE_FORMATS[suffix]


def save_figure(fig, path, *, dpi: int = 110) -> Path:
    """Write ``fig`` atomically in the format of the path's suffix and return the path."""
    path = Path(path)
    fmt = figure_format(path)
    with atomic_write(path, "wb") as fh:
        fig.savefig(fh, format=fmt, dpi=dpi)
    return path


# Figures are defined below, one block per stage.

# ---- peaks -----------------------------------------------------------------------------

_PEAK_FLAG_COLOURS = (  # first matching flag wins
    ("saturated", "tab:red", "saturated"),
    ("blend_suspect", "tab:purple", "blend suspect"),
    ("blended", "tab:orange", "blended"),
    ("edge", "0.5", "edge"),
    ("", "tab:green", "clean"),
)


def plot_peaks(counts, lines, path, *, background=None, title: str | None = None) -> Path:
    """The spectrum with every found line marked, and the estimated background.

    Each line gets a centroid tick (from the background up to its peak) and a horizontal bar
    one FWHM wide at half its height, coloured by its flags (saturated, blend suspect,
    blended, edge, clean).  The counts axis is logarithmic (symlog) when the spectrum spans
    more than two decades.  Returns the path.
    """
    import numpy as np

    y = np.asarray(counts, float)
    x = np.arange(y.size)
    fig, ax = new_figure(figsize=(12, 4.5))
    ax.plot(x, y, drawstyle="steps-mid", lw=0.7, color="0.2", label="counts")
    if background is not None:
        ax.plot(x, background, lw=1.0, ls="--", color="tab:blue", label="background")
    if len(lines):
        p = np.asarray(lines["pixel"], float)
        fw = np.asarray(lines["fwhm_pixel"], float)
        bg = np.asarray(lines["background"], float)
        amp = np.asarray(lines["amplitude"], float)
        top = np.interp(p, x, y)
        peak = np.where(np.isfinite(amp), bg + amp, top)
        flags = np.asarray(lines["flags"], str)
        used = np.zeros(p.size, bool)
        for word, colour, label in _PEAK_FLAG_COLOURS:
            sel = ~used & (np.char.find(flags, word) >= 0 if word else ~used)
            used |= sel
            if not sel.any():
                continue
            ax.vlines(p[sel], bg[sel], peak[sel], colors=colour, lw=1.2,
                      label=f"{label} ({int(sel.sum())})")
            half = 0.5 * (bg[sel] + peak[sel])
            ax.hlines(half, p[sel] - fw[sel] / 2, p[sel] + fw[sel] / 2, colors=colour, lw=2.5)
    finite = y[np.isfinite(y)]
    if finite.size and np.nanmax(finite) > 100 * max(np.nanmedian(np.abs(finite)), 1.0):
        ax.set_yscale("symlog", linthresh=max(np.nanmedian(np.abs(finite)), 1.0))
    ax.set_xlim(-0.5, y.size - 0.5)
    ax.set_xlabel("pixel")
    ax.set_ylabel("counts (ADU)")
    meta = getattr(lines, "meta", {}) or {}
    fwhm = meta.get("lsf_fwhm_pixel")
    ax.set_title(title or (
        f"{len(lines)} lines" + (f", LSF FWHM {fwhm:.2f} px" if fwhm else "")
        + (f", min SNR {meta['min_snr']:g}" if "min_snr" in meta else "")
    ))
    ax.legend(loc="upper right", fontsize=8, ncols=2)
    return save_figure(fig, path)


# ---- calibrate -------------------------------------------------------------------------


_REJECTION_LABELS = {
    "reference": "reference line not reliable",
    "blend_suspect": "blend suspect",
    "outlier": "outlier",
    "edge": "at the detector edge",
}


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
        lim = np.nanmax(np.abs(np.r_[res[used], band.max()])) if used.any() else band.max()
        top = 2.5 * lim
        ax.set_ylim(-top, top)
        # Rejected lines, one marker per kind of reason (legend counts, no per-point text);
        # those off the scale sit on its edge as triangles pointing the way they went.
        reasons = np.array([str(r).split(":")[0].split(" ")[0] or "rejected"
                            for r in np.asarray(m["reason"])])
        markers = iter("xsDv^P*")
        for kind in sorted(set(reasons[~used])):
            sel = ~used & (reasons == kind)
            inside = sel & (np.abs(res) <= top)
            marker = next(markers, "x")
            colour = "tab:red" if kind.startswith("outlier") else "tab:orange"
            ax.plot(pix[inside], res[inside], marker, ms=6, color=colour, ls="none",
                    label=f"not used: {_REJECTION_LABELS.get(kind, kind)} ({int(sel.sum())})")
            for side, arrow in ((1.0, "^"), (-1.0, "v")):
                off = sel & ~inside & (np.sign(res) == side)
                ax.plot(pix[off], np.full(off.sum(), side * 0.97 * top), arrow, ms=6,
                        color=colour, ls="none")
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


def _identify_wavelength_colours(wavelengths, lo, hi):
    """A colour per wavelength: a spectral colour map over the range shown."""
    import numpy as np
    from matplotlib import colormaps

    cmap = colormaps["turbo"]
    span = max(hi - lo, 1e-9)
    return cmap(np.clip((np.asarray(wavelengths, float) - lo) / span, 0, 1))


def _stack_labels(values, min_gap):
    """Heights near ``values`` (any order) at least ``min_gap`` apart, moved up only."""
    import numpy as np

    values = np.asarray(values, float)
    order = np.argsort(values)
    out = values[order].copy()
    for i in range(1, out.size):
        out[i] = max(out[i], out[i - 1] + min_gap)
    result = np.empty_like(out)
    result[order] = out
    return result


_LEVEL_COLUMN = 2.0  # x units per term column: a bar of 1, then room for its label


def plot_identify_levels(identification, path, *, max_species: int = 3) -> Path:
    """Energy-level diagram of the observed transitions, one panel per species.

    Levels are horizontal bars at their energies (eV above the ground state), one column
    per term; each identified first-order line is an arrow from the middle of its upper
    level to the middle of its lower level, coloured by wavelength, its width growing with
    the logarithm of the flux.  Level labels (configuration over term and J) stand at the
    right end of their bars on a white ground above the arrows, and are stacked so that
    none overlaps another.  A dashed line marks the electron-energy limit when one was given.
    """
    import numpy as np

    t = identification.lines
    limit = identification.meta.get("max_electron_energy_ev")
    ok = (np.asarray(t["species"]) != "") & (np.asarray(t["order"]) == 1)
    ok &= np.isfinite(np.asarray(t["upper_energy_ev"], float))
    ok &= np.isfinite(np.asarray(t["lower_energy_ev"], float))
    species = [s for s in dict.fromkeys(np.asarray(t["species"])[ok])][:max_species]
    wl_all = np.asarray(t["wavelength"], float)[ok]
    lo, hi = (wl_all.min(), wl_all.max()) if wl_all.size else (0.0, 1.0)
    flux_all = np.asarray(t["flux"], float)[ok]
    fmin = np.nanmin(flux_all) if flux_all.size else 1.0
    fmax = np.nanmax(flux_all) if flux_all.size else 1.0

    def term_of(name):
        return name.rsplit(" J=", 1)[0].split()[-1]

    panels = []
    for sp in species or [""]:
        sel = ok & (np.asarray(t["species"]) == sp)
        up_n = np.asarray(t["upper"], str)[sel]
        lo_n = np.asarray(t["lower"], str)[sel]
        n_cols = len({term_of(n) for n in [*up_n, *lo_n]}) if sel.any() else 1
        panels.append((sp, sel, max(n_cols, 1)))
    widths = [max(2.6, 0.8 * n_cols + 0.9) for _, _, n_cols in panels]
    fig, axes = new_figure(1, len(panels), figsize=(sum(widths) + 1.2, 5.6), squeeze=False,
                           width_ratios=widths)
    axes = axes[0]
    for ax, (sp, sel, _) in zip(axes, panels, strict=True):
        up_e = np.asarray(t["upper_energy_ev"], float)[sel]
        lo_e = np.asarray(t["lower_energy_ev"], float)[sel]
        up_n = np.asarray(t["upper"], str)[sel]
        lo_n = np.asarray(t["lower"], str)[sel]
        wl = np.asarray(t["wavelength"], float)[sel]
        fl = np.asarray(t["flux"], float)[sel]
        levels = dict(zip(lo_n, lo_e, strict=True)) | dict(zip(up_n, up_e, strict=True))
        names = sorted(levels, key=levels.get)
        # Grotrian layout: one column per term (the designation without J)
        term = {name: term_of(name) for name in names}
        columns = list(dict.fromkeys(term[name] for name in names))
        xpos = {name: _LEVEL_COLUMN * columns.index(term[name]) for name in names}
        e_all = np.array(list(levels.values())) if levels else np.zeros(1)
        e_span = max(np.ptp(e_all), 0.5)
        pad = 0.05 * e_span
        top = max(e_all.max(), limit if limit is not None else -np.inf) + pad
        bottom = e_all.min() - pad
        ax.set_ylim(bottom, top + 0.08 * e_span)
        fig.canvas.draw()
        height_px = max(ax.get_window_extent().height, 1.0)
        min_gap = 18.0 / height_px * (top + 0.08 * e_span - bottom)  # two 6-pt lines
        for col in columns:
            members = [name for name in names if term[name] == col]
            for name in members:
                ax.hlines(levels[name], xpos[name], xpos[name] + 1.0, color="0.2", lw=1.5,
                          zorder=3)
            # one label per cluster of nearly degenerate levels (fine structure)
            clusters, cluster = [], [members[0]]
            for name in members[1:]:
                if levels[name] - levels[cluster[-1]] < 0.025 * e_span:
                    cluster.append(name)
                else:
                    clusters.append(cluster)
                    cluster = [name]
            clusters.append(cluster)
            texts, heights = [], []
            for cl in clusters:
                js = ",".join(c.rsplit(" J=", 1)[1] for c in cl if " J=" in c)
                words = cl[0].rsplit(" J=", 1)[0].split()
                config = " ".join(words[:-1][-1:])
                label = (f"{config}\n" if config else "") + words[-1] + (f" J={js}" if js else "")
                texts.append(label)
                heights.append(float(np.mean([levels[c] for c in cl])))
            placed = _stack_labels(heights, min_gap)
            x_end = xpos[members[0]] + 1.0
            for label, e_true, e_text in zip(texts, heights, placed, strict=True):
                ax.annotate(label, (x_end, e_true), xytext=(x_end + 0.06, e_text),
                            fontsize=6, ha="left", va="center", linespacing=1.0,
                            zorder=6, annotation_clip=False,
                            bbox={"boxstyle": "square,pad=0.1", "fc": "white", "ec": "none",
                                  "alpha": 0.85},
                            arrowprops=None if abs(e_text - e_true) < 0.3 * min_gap else
                            {"arrowstyle": "-", "color": "0.6", "lw": 0.4,
                             "shrinkA": 0, "shrinkB": 0})
        colours = _identify_wavelength_colours(wl, lo, hi)
        order = np.argsort(fl)
        for k in order:
            x1 = xpos[up_n[k]] + 0.5
            x2 = xpos[lo_n[k]] + 0.5
            frac = np.log(fl[k] / fmin) / max(np.log(fmax / fmin), 1e-9) if fl[k] > 0 else 0
            ax.annotate(
                "", xy=(x2, lo_e[k]), xytext=(x1, up_e[k]), zorder=4,
                arrowprops={"arrowstyle": "-|>", "color": colours[k], "lw": 0.6 + 3.0 * frac,
                            "shrinkA": 0, "shrinkB": 0},
            )  # fmt: skip
        if limit is not None:
            ax.axhline(limit, color="#c62828", ls="--", lw=0.8)
            ax.annotate(f"electron energy {limit:g} eV", (0, limit), fontsize=7,
                        color="#c62828", va="bottom")  # fmt: skip
        ax.set_xlim(-0.2, _LEVEL_COLUMN * max(len(columns), 1) + 0.1)
        ax.set_xticks([])
        ax.set_ylabel("energy above ground (eV)")
        ax.set_title(sp or "no identified transitions")
    if species:
        import matplotlib as mpl

        sm = mpl.cm.ScalarMappable(norm=mpl.colors.Normalize(lo, hi), cmap="turbo")
        fig.colorbar(sm, ax=list(axes), label="wavelength (nm)", shrink=0.8)
    return save_figure(fig, path)


def _spread_labels(x, min_gap):
    """Label positions near ``x`` (sorted input order kept) at least ``min_gap`` apart:
    overlapping neighbours are pushed apart symmetrically about their mean."""
    import numpy as np

    x = np.asarray(x, float)
    order = np.argsort(x)
    pos = x[order].copy()
    for _ in range(200):
        moved = False
        for i in range(1, pos.size):
            gap = pos[i] - pos[i - 1]
            if gap < min_gap - 1e-12:
                shift = (min_gap - gap) / 2
                pos[i - 1] -= shift
                pos[i] += shift
                moved = True
        if not moved:
            break
    out = np.empty_like(pos)
    out[order] = pos
    return out


INTENSITY_SCALES = ("linear", "sqrt", "asinh", "log")


def _intensity_scale(ax, scale: str, y):
    """Set a compressed counts scale: sqrt, asinh (linear within a few noise sigma of zero,
    logarithmic above) or log (clipped at the noise level)."""
    import numpy as np

    from .errors import RitzlineError

    if scale not in INTENSITY_SCALES:
        raise RitzlineError(f"intensity scale {scale!r} is not one of {INTENSITY_SCALES}")
    finite = y[np.isfinite(y)]
    if scale == "linear" or not finite.size:
        return
    med = float(np.median(finite))
    noise = 1.4826 * float(np.median(np.abs(np.diff(finite)))) / np.sqrt(2) or 1.0
    if scale == "asinh":
        ax.set_yscale("asinh", linear_width=max(3.0 * noise, abs(med), 1e-12))
    elif scale == "sqrt":
        ax.set_yscale("function", functions=(
            lambda v: np.sign(v) * np.sqrt(np.abs(v)), lambda v: np.sign(v) * v ** 2))
    else:
        ax.set_yscale("log")
        ax.set_ylim(bottom=max(med - 3 * noise, noise, 1e-12))


def plot_identify_spectrum(identification, path, *, spectrum=None, solution=None,
                           wavelength=None, counts=None, max_labels: int = 60,
                           scale: str = "asinh") -> Path:
    """Spectrum with every identified line labelled by species and listed wavelength.

    Pass the ``spectrum`` (with the ``solution`` when its axis is in pixels), or its
    ``wavelength``/``counts`` arrays; with neither, the measured lines are drawn as sticks
    at their fluxes.  Unidentified lines are marked with a grey "?".  Labels stand above
    the spectrum, spread sideways so that none overprints another, each joined to its line
    by a thin leader.  ``scale``: "asinh" (default: weak lines visible beside strong ones),
    "sqrt", "log" or "linear".
    """
    import numpy as np

    if spectrum is not None:
        from .spectrum import spectrum_arrays

        arrays = spectrum_arrays(spectrum)
        wavelength = arrays.axis if arrays.unit == "nm" else solution.wavelength(arrays.axis)
        counts = np.where(arrays.mask, np.nan, arrays.counts)
    t = identification.lines
    fig, ax = new_figure(figsize=(13, 5.2))
    wl = np.asarray(t["wavelength"], float)
    fl = np.asarray(t["flux"], float)
    if wavelength is not None and counts is not None:
        x = np.asarray(wavelength, float)
        y = np.asarray(counts, float)
        ax.plot(x, y, color="0.25", lw=0.7)
        srt = np.argsort(x)
        # the highest sample within a pixel or two of the line, so leaders start at the top
        height = np.array([np.nanmax(np.interp(w + np.linspace(-1, 1, 9) * np.nanmedian(
            np.abs(np.diff(x))), x[srt], y[srt])) for w in wl]) if wl.size else wl
        ax.set_ylabel("counts (ADU)")
    else:
        y = fl
        ax.vlines(wl, 0, fl, color="0.25", lw=1.0)
        height = fl
        ax.set_ylabel("line flux (counts)")
    _intensity_scale(ax, scale, np.asarray(y, float))
    sp = np.asarray(t["species"], str)
    ref = np.asarray(t["ref_wavelength"], float)
    order = np.asarray(t["order"], int)
    idx = np.flatnonzero(sp != "")
    idx = idx[np.argsort(-fl[idx])][:max_labels]
    unknown = np.flatnonzero(sp == "")
    ax.margins(x=0.01)
    # headroom: the spectrum fills the lower 70 % of the (scaled) axis, labels the rest
    ymin, ymax = ax.get_ylim()
    fwd = ax.yaxis.get_transform()
    tmin, tmax = fwd.transform([[ymin], [ymax]]).ravel()
    new_top = fwd.inverted().transform([[tmin + (tmax - tmin) / 0.70]]).ravel()[0]
    if np.isfinite(new_top) and new_top > ymax:
        ax.set_ylim(ymin, new_top)
    fig.canvas.draw()  # fixes the axes size, so label widths can be turned into nm
    # counts ticks only where the spectrum is; the band above belongs to the labels
    ticks = [v for v in ax.get_yticks() if ymin <= v <= ymax]
    if len(ticks) >= 2:
        ax.set_yticks(ticks)
        ax.yaxis.set_minor_locator(__import__("matplotlib").ticker.NullLocator())
    lo, hi = ax.get_xlim()
    width_px = ax.get_window_extent().width
    min_gap = 9.0 / max(width_px, 1.0) * (hi - lo)  # a 6-pt rotated label is ~8 px wide
    both = np.r_[idx, unknown]
    if both.size:
        tops = np.where(np.isfinite(height[both]), height[both], np.nanmax(height))
        # labels sit in one band above the spectrum: a transformed offset above each top
        label_x = _spread_labels(wl[both], min_gap)
        ymin, ymax = ax.get_ylim()
        to_axes = ax.transScale + ax.transLimits
        top_frac = np.clip([to_axes.transform((0, v))[1] for v in tops], 0, 1)
        band = min(max(top_frac.max() + 0.03, 0.72), 0.8) if top_frac.size else 0.72
        for j, k in enumerate(both):
            known = sp[k] != ""
            label = (f"{sp[k]} {ref[k]:.2f}" + (" (2nd)" if order[k] == 2 else "")
                     if known else "?")
            colour = "#1f4e9c" if known else "0.5"
            note = ax.annotate(label, xy=(wl[k], top_frac[j]),
                               xycoords=("data", "axes fraction"),
                               xytext=(label_x[j], band), textcoords=("data", "axes fraction"),
                               rotation=90, fontsize=6, ha="center", va="bottom",
                               color=colour, arrowprops={"arrowstyle": "-", "color": colour,
                                                         "lw": 0.4, "shrinkA": 0,
                                                         "shrinkB": 1.5})
            note.set_in_layout(False)  # inside the axes by construction
        ax.set_ylim(ymin, ymax)
    ax.set_xlabel(f"wavelength ({identification.meta.get('medium', 'air')}, nm)")
    present = ", ".join(identification.present) or "none"
    ax.set_title(f"Identified lines (species present: {present}; {scale} intensity scale)")
    return save_figure(fig, path)


QUOTABLE_TEMPERATURE = 0.25
"""A Boltzmann temperature is quoted as a result only from at least three upper levels and
with a relative error below this; otherwise the plot says it is not constrained."""


def boltzmann_label(bp) -> str:
    """Legend text of one species' Boltzmann fit: the species, and the temperature only
    when it is a result (three or more upper levels, error below 25 %)."""
    import numpy as np

    n_levels = len(set(np.round(np.asarray(bp.energy_ev, float), 4)))
    t, dt = bp.temperature_k, bp.temperature_err_k
    if not (bp.corrected and np.isfinite(t)):
        return f"{bp.species}: {bp.message}" if bp.message else f"{bp.species}: no temperature"
    if n_levels < 3:
        return f"{bp.species}: {n_levels} upper levels, too few for a temperature"
    if not (np.isfinite(dt) and dt < QUOTABLE_TEMPERATURE * abs(t)):
        rel = dt / abs(t) * 100 if np.isfinite(dt) and t else float("inf")
        return f"{bp.species}: temperature not constrained (±{rel:.0f} %)"
    return f"{bp.species}: T = {t:.0f} ± {dt:.0f} K ({n_levels} upper levels)"


def plot_identify_boltzmann(plots, path) -> Path:
    """Boltzmann plot: ln(I λ / g A) against upper-level energy, with the fitted line.

    ``plots`` is a BoltzmannPlot or a sequence of them (one per species).  Every legend
    entry names its species.  A fit is drawn as a result (solid line, temperature in the
    legend) only from three or more upper levels with a temperature error below 25 %;
    otherwise it is drawn dotted and the legend says the temperature is not constrained.
    Uncorrected intensities are drawn as open symbols and no temperature is written.
    """
    import numpy as np

    plots = [plots] if hasattr(plots, "energy_ev") else list(plots)
    fig, ax = new_figure(figsize=(7.5, 4.5))
    for k, bp in enumerate(plots):
        colour = f"C{k}"
        label = boltzmann_label(bp)
        quotable = " T = " in label
        ax.errorbar(bp.energy_ev, bp.y, yerr=bp.y_err, fmt="o", ms=4, color=colour,
                    mfc=colour if bp.corrected else "none", label=label)
        if bp.corrected and np.isfinite(bp.slope):
            x = np.linspace(np.min(bp.energy_ev), np.max(bp.energy_ev), 10)
            ax.plot(x, bp.intercept + bp.slope * x, color=colour,
                    lw=1.2 if quotable else 0.8, ls="-" if quotable else ":")
    if plots and not all(bp.corrected for bp in plots):
        ax.annotate("intensities uncorrected for the spectral response: no temperature",
                    (0.02, 0.02), xycoords="axes fraction", fontsize=8, color="#c62828")
    ax.set_xlabel("upper-level energy (eV)")
    ax.set_ylabel("ln(I λ / g A)  (arbitrary zero per species)")
    ax.set_title("Boltzmann plot")
    ax.legend(fontsize="small", frameon=False, loc="best")
    return save_figure(fig, path)


# ---- check -----------------------------------------------------------------------------

CHECK_STATUS_COLOURS = {"pass": "#2e7d32", "warn": "#f9a825", "fail": "#c62828", "error": "#6a1b9a"}


def _check_axis(summary):
    """x values and label for batch figures: time stamps when every checked row has one
    that parses, else the exposure order."""
    from datetime import UTC, datetime

    import numpy as np

    n = len(summary)
    order = np.asarray(summary["index"], float) if "index" in summary.colnames else np.arange(n)
    if "timestamp" not in summary.colnames or n == 0:
        return order, "exposure (input order)", False
    status = np.asarray(summary["status"], str)
    stamps = [str(s).strip() for s in summary["timestamp"]]
    if not all(s for s, st in zip(stamps, status, strict=True) if st != "error"):
        return order, "exposure (input order)", False
    times = []
    aware = False
    for s in stamps:
        if not s:
            times.append(np.datetime64("NaT"))
            continue
        try:
            t = datetime.fromisoformat(s.replace("Z", "+00:00"))
        except ValueError:
            return order, "exposure (input order)", False
        if t.tzinfo is not None:
            aware = True
            t = t.astimezone(UTC).replace(tzinfo=None)
        times.append(np.datetime64(t, "ms"))
    label = "time stamp (UTC)" if aware else "time stamp (as written in the files)"
    return np.array(times, dtype="datetime64[ms]"), label, True


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


def fwhm_check_status(change_pct, max_change_pct: float | None, warn_fraction: float = 0.5):
    """The FWHM check's own verdict per exposure ("pass", "warn", "fail", or "not measured"),
    by the same rule as the batch check: fail beyond the limit, warn beyond its warn
    fraction."""
    import numpy as np

    change = np.abs(np.asarray(change_pct, float))
    out = np.full(change.shape, "not measured", dtype=object)
    if not max_change_pct:
        out[np.isfinite(change)] = "pass"
        return out
    ok = np.isfinite(change)
    out[ok] = "pass"
    out[ok & (change > warn_fraction * max_change_pct)] = "warn"
    out[ok & (change > max_change_pct)] = "fail"
    return out


def plot_check_fwhm(summary, path, *, reference_fwhm_px: float | None = None,
                    max_change_pct: float | None = None, warn_fraction: float = 0.5) -> Path:
    """Median line FWHM (px) with its uncertainty over exposure order or time, coloured by
    the FWHM check's own status, with the reference width and the warn and fail limits."""
    import numpy as np

    x, xlabel, _ = _check_axis(summary)
    fig, ax = new_figure(figsize=(10, 3.6))
    y = np.asarray(summary["fwhm_px"], float)
    err = np.nan_to_num(np.asarray(summary["fwhm_err_px"], float), nan=0.0)
    if "fwhm_change_pct" in summary.colnames:
        status = fwhm_check_status(summary["fwhm_change_pct"], max_change_pct, warn_fraction)
    else:
        status = np.where(np.isfinite(y), "pass", "not measured")
    for name in ("pass", "warn", "fail"):
        sel = (status == name) & np.isfinite(y)
        if sel.any():
            ax.errorbar(x[sel], y[sel], yerr=err[sel], fmt="o", ms=3,
                        color=CHECK_STATUS_COLOURS[name], ecolor=CHECK_STATUS_COLOURS[name],
                        elinewidth=0.8, capsize=0, label=f"FWHM {name}")  # fmt: skip
    sel = (status == "not measured") & np.isfinite(y)
    if sel.any():  # a width but no reference to compare it with
        ax.plot(x[sel], y[sel], "o", ms=3, color="0.5", label="no reference width")
    ref = reference_fwhm_px
    if ref and np.isfinite(ref):
        ax.axhline(ref, color="0.3", lw=0.8, ls=":", label=f"reference {ref:.3g} px")
        if max_change_pct:
            for frac, name, style in ((1.0, "fail", "--"), (warn_fraction, "warn", "-.")):
                lim = frac * max_change_pct / 100.0
                for k, level in enumerate((ref * (1 - lim), ref * (1 + lim))):
                    ax.axhline(level, color=CHECK_STATUS_COLOURS[name], lw=0.8, ls=style,
                               label=(f"{name} limit ±{frac * max_change_pct:g} %"
                                      if k == 0 else None))  # fmt: skip
    if ax.get_legend_handles_labels()[0]:
        ax.legend(loc="best", fontsize="small", frameon=False, ncol=2)
    ax.set_xlabel(xlabel)
    ax.set_ylabel("FWHM (px)")
    ax.set_title("Line width (coloured by the FWHM check)")
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
