"""Emission-line finder: background, detection, the search passes and the line table.

The detector noise model lives in :mod:`ritzline.noise`, the line profiles and the batched
fitter in :mod:`ritzline.profiles`; the instrument they describe (offset, gain, read noise,
line shape along the detector) in :mod:`ritzline.instrument`.  This module finds the lines:
background, saturation, spikes, matched-filter candidates, two fitting passes with a residual
search, the measured line shape, pruning, and the table with units and provenance.
"""

from __future__ import annotations

import functools
import math
import warnings
from dataclasses import replace
from typing import TYPE_CHECKING

import numpy as np
from scipy.special import chdtrc

from ._arrays import _cat, _median
from .errors import RitzlineError, SpectrumFormatError
from .instrument import Instrument, optical_black
from .noise import _instrument_record, _noise_model, _reestimate_slope, _second_diff_sigma
from .profiles import (
    _SQRT2PI,
    _WINDOW_HALF,
    _Context,
    _fit_all,
    _integrated,
    _lines_model,
    _measure_shape,
    _shape_from_coeffs,
    _State,
    centroid_crlb,
    line_crlb,
)
from .spectrum import spectrum_arrays
from .synthetic import FWHM_PER_SIGMA

if TYPE_CHECKING:  # pragma: no cover
    from astropy.table import Table

__all__ = ["attach_wavelengths", "centroid_crlb", "find_lines", "line_background", "line_crlb"]

#: Table meta key set by :func:`attach_wavelengths`: ``wavelength_err`` already holds the
#: solution's band, so later stages must not add it again.
BAND_INCLUDED = "wavelength_err_includes_band"

_DEFAULT_FWHM = 2.5  # px, used only when no line is bright enough to measure the LSF
_MAX_WIDTH = 3.0  # components wider than this many LSF FWHM are rejected
_SATURATION_MARGIN = 0.97
_NONLINEAR = 0.9  # of the saturation level: pixels above are left out of fits


# ---------------------------------------------------------------------------------------
# The pixel-integrated Gaussian and its derivatives


# ---------------------------------------------------------------------------------------
# Preparation: arrays, dark, saturation, noise at the background, spikes, background


def _as_counts(obj, n: int, what: str):
    arr = spectrum_arrays(obj)
    if arr.counts.size != n:
        raise SpectrumFormatError(
            f"the {what} has {arr.counts.size} samples but the spectrum has {n}; "
            "give a frame of the same detector and binning"
        )
    return arr.counts, arr.mask


def _detect_saturation(counts, valid) -> float | None:
    """The saturation level, if the spectrum shows a clipped top.

    A clipped line is a plateau: three or more neighbouring pixels within 0.3 % of the
    highest count above the spectrum's median (averaged scans and a full-well spread keep
    clipped values from being exactly equal; the top 0.3 % of a Gaussian line spans a sixth
    of its sigma, so no line narrower than 20 px has such a plateau).  Exactly repeated
    maxima, or two at a power of two (an ADC's full scale), count too.  Only a top far above
    the noise (30 sigma) can be clipped: a faint line on a large offset is not.  Returns the
    lowest value of the plateau pixels.
    """
    if not valid.any():
        return None
    usable = counts if valid.all() else np.where(valid, counts, -np.inf)
    top = float(usable.max())
    if not top > 0:
        return None
    base = float(_median(counts[valid]))
    if top - base <= 30.0 * (_second_diff_sigma(counts, valid) or 0.0):
        return None
    near = usable >= top - 0.003 * (top - base)
    run3 = near[:-2] & near[1:-1] & near[2:]
    if run3.any():
        plateau = near & (np.convolve(run3, np.ones(3), mode="full")[: near.size] > 0)
        return float(usable[plateau].min())
    n_top = int(np.count_nonzero(usable == top))
    if n_top >= 3:
        return top
    if n_top == 2 and (np.log2(top + 1) % 1 == 0 or np.log2(top) % 1 == 0):
        return top
    return None


def _block_background(y, ok, width, q=None, sigma=0.0):
    """Smooth background: a per-block statistic of ``y`` interpolated between block centres.

    ``q`` (0-1) takes that quantile and adds the Gaussian offset back to the mean (for
    dense spectra); ``q=None`` takes the median of the samples (lines already removed).
    """
    n = y.size
    nb = max(1, round(n / width))
    edges = np.rint(np.arange(nb + 1) * (n / nb)).astype(int)
    w = int((edges[1:] - edges[:-1]).max())
    idx = edges[:-1, None] + np.arange(w)[None, :]
    inside = idx < edges[1:, None]
    idx = np.minimum(idx, n - 1)
    use = inside & ok[idx]
    vals = np.where(use, y[idx], np.inf)
    vals.sort(axis=1)
    nval = np.add.reduce(use, axis=1)
    has = nval >= max(3, w // 4)
    quant = 0.5 if q is None else q
    pos = quant * np.maximum(nval - 1, 0)
    lo = np.floor(pos).astype(int)
    hi = np.minimum(lo + 1, np.maximum(nval - 1, 0))
    rows = np.arange(nb)
    frac = pos - lo
    vlo = vals[rows, lo]
    vhi = vals[rows, hi]
    # vhi is finite wherever ``has`` (hi < nval); elsewhere the result is NaN anyway.
    with np.errstate(invalid="ignore"):
        stat = np.where(has, vlo + frac * (vhi - vlo), np.nan)
    if q is not None:
        from scipy.special import ndtri

        stat = stat - ndtri(q) * sigma
    centres = 0.5 * (edges[:-1] + edges[1:] - 1)
    if not np.any(has):
        level = _median(y[ok]) if ok.any() else 0.0
        return np.full(n, level)
    return np.interp(np.arange(n), centres[has], stat[has])


@functools.lru_cache(maxsize=16)
def _unit_kernel(fwhm):
    """Matched-filter kernels (reversed for np.convolve): the unit profile and its square.

    Cached: every call of one search uses the same width.  Read-only arrays.
    """
    sigma = fwhm / FWHM_PER_SIGMA
    half = int(np.ceil(3.0 * sigma)) + 1
    k, _, _ = _integrated(np.arange(-half, half + 1, dtype=float), 0.0, sigma)
    k_rev, k2_rev = k[::-1].copy(), (k * k)[::-1].copy()
    k_rev.flags.writeable = k2_rev.flags.writeable = False
    return k_rev, k2_rev


def _matched_filter(excess, weight, fwhm):
    """Flux estimate and significance of a line centred on each pixel (known background)."""
    k_rev, k2_rev = _unit_kernel(float(fwhm))
    num = np.convolve(excess * weight, k_rev, mode="same")
    den = np.convolve(weight, k2_rev, mode="same")
    with np.errstate(divide="ignore", invalid="ignore"):
        flux = np.where(den > 0, num / den, 0.0)
        snr = np.where(den > 0, num / np.sqrt(den), 0.0)
    return flux, snr


def _local_maxima(z, threshold):
    """Indices where ``z`` is a strict-left/non-strict-right local maximum above threshold."""
    if z.size < 3:
        return np.zeros(0, int)
    mid = z[1:-1]
    peak = (mid > z[:-2]) & (mid >= z[2:]) & (mid > threshold)
    return np.flatnonzero(peak) + 1


def _neighbours(a, fill=None):
    """Each pixel's left and right neighbour values; ``fill`` (default: the end value itself)
    past the ends."""
    left = np.empty_like(a)
    left[1:] = a[:-1]
    left[0] = a[0] if fill is None else fill
    right = np.empty_like(a)
    right[:-1] = a[1:]
    right[-1] = a[-1] if fill is None else fill
    return left, right


def _spike_pixels(excess, var, ok, fwhm, min_snr):
    """Pixels far too sharp for the LSF: single-pixel spikes (hot pixels, cosmic-ray hits)."""
    # Neighbour/centre ratio of the sharpest line still allowed (half the LSF, centred).
    scale = np.sqrt(2.0) * 0.5 * fwhm / FWHM_PER_SIGMA
    r = (math.erf(1.5 / scale) - math.erf(0.5 / scale)) / (2.0 * math.erf(0.5 / scale))
    s = np.where(ok, excess, 0.0)
    left, right = _neighbours(s)
    ok_l, ok_r = _neighbours(ok, False)
    both = ok_l & ok_r
    neigh = np.where(both, 0.5 * (left + right), np.where(ok_l, left, right))
    v_l, v_r = _neighbours(var)
    v_n = np.where(both, 0.25 * (v_l + v_r), np.where(ok_l, v_l, v_r))
    stat = (r * s - neigh) / np.sqrt(r * r * var + v_n)
    sig = s / np.sqrt(var)
    return ok & (ok_l | ok_r) & (stat > 5.0) & (sig > min(5.0, min_snr))


def _half_max_widths(excess, ok, peaks, max_half=15):
    """Full width at half maximum of the profile around each peak (linear interpolation)."""
    n = excess.size
    off = np.arange(-max_half, max_half + 1)
    idx = np.minimum(np.maximum(peaks[:, None] + off[None, :], 0), n - 1)
    prof = np.where(ok[idx], excess[idx], np.nan)
    top = prof[:, max_half]
    half = 0.5 * top
    widths = np.full(peaks.size, np.nan)
    right = prof[:, max_half:]
    left = prof[:, max_half::-1]
    edges = []
    for side in (right, left):
        below = side < half[:, None]
        has = below.any(axis=1) & ~np.isnan(side).any(axis=1)
        j = np.argmax(below, axis=1)
        j = np.maximum(j, 1)
        rows = np.arange(peaks.size)
        y0 = side[rows, j - 1]
        y1 = side[rows, j]
        with np.errstate(divide="ignore", invalid="ignore"):
            t = (y0 - half) / (y0 - y1)
        edges.append(np.where(has, j - 1 + t, np.nan))
    widths = edges[0] + edges[1]
    return widths


# ---------------------------------------------------------------------------------------
# Batched Levenberg-Marquardt on stacked windows


# ---------------------------------------------------------------------------------------
# Public functions


def _empty_table(meta, has_wavelength):
    t = _build_table({k: np.zeros(0) for k in _COLUMNS}, np.zeros(0, dtype="U1"), meta)
    if has_wavelength:
        for name in ("wavelength", "wavelength_err", "fwhm"):
            t[name] = np.zeros(0)
            t[name].unit = "nm"
    return t


_COLUMNS = {
    "pixel": ("pix", "fitted line centre (0 = centre of the first pixel)"),
    "pixel_err": ("pix", "1-sigma uncertainty of the centre"),
    "fwhm_pixel": ("pix", "FWHM of the fitted Gaussian line-spread profile"),
    "fwhm_pixel_err": ("pix", "1-sigma uncertainty of the FWHM"),
    "amplitude": ("ct / pix", "peak height of the fitted Gaussian"),
    "flux": ("ct", "total counts in the line"),
    "flux_err": ("ct", "1-sigma uncertainty of the flux"),
    "background": ("ct / pix", "background level under the line centre"),
    "snr": ("", "matched-filter significance at the centre (LSF-shaped, other lines removed)"),
}


_FLAGS_DESCRIPTION = "comma-separated: saturated, blended, blend_suspect, edge; empty when clean"


@functools.cache
def _column_units():
    import astropy.units as u

    return {name: u.Unit(unit) for name, (unit, _) in _COLUMNS.items() if unit}


@functools.cache
def _column_descriptions():
    return {**{name: desc for name, (_, desc) in _COLUMNS.items()}, "flags": _FLAGS_DESCRIPTION}


def _build_table(cols, flags, meta):
    from astropy.table import Table

    # One Table call from plain arrays: handing it ready-made Columns makes it build every
    # column a second time (about half the cost of the table).
    data = {name: np.asarray(cols[name], float) for name in _COLUMNS}
    data["flags"] = np.asarray(flags, dtype=str)
    return Table(data, meta=meta, copy=False, units=_column_units(),
                 descriptions=_column_descriptions())


class _AxisSolution:
    """Wavelength axis of a spectrum seen through the Solution interface (no model band)."""

    def __init__(self, axis_nm):
        self._axis = axis_nm
        self._pix = np.arange(axis_nm.size, dtype=float)
        self._disp = np.gradient(axis_nm)

    def wavelength(self, p):
        p = np.asarray(p, float)
        lin = np.interp(p, self._pix, self._axis)
        # Extrapolate linearly past the ends.
        lin = np.where(p < 0, self._axis[0] + p * self._disp[0], lin)
        last = self._pix[-1]
        return np.where(p > last, self._axis[-1] + (p - last) * self._disp[-1], lin)

    def wavelength_err(self, p):
        return np.zeros(np.shape(p))

    def dispersion(self, p):
        return np.interp(np.asarray(p, float), self._pix, self._disp)


def attach_wavelengths(lines: Table, solution) -> Table:
    """Add ``wavelength``, ``wavelength_err`` and ``fwhm`` (nm) to a line table.

    Parameters
    ----------
    lines : astropy.table.Table
        A table from :func:`find_lines` (needs ``pixel``, ``pixel_err``, ``fwhm_pixel``).
    solution : object
        Anything with ``wavelength(p)``, ``wavelength_err(p)`` and ``dispersion(p)`` (nm per
        pixel), e.g. a :class:`ritzline.calibration.Solution`.

    Returns
    -------
    astropy.table.Table
        A copy of ``lines`` with the three columns added.  ``wavelength_err`` combines the
        centroid error through the dispersion with the solution's own band in quadrature.
    """
    if hasattr(solution, "n_pixels"):
        from .spectrum import require_solution_pixels

        require_solution_pixels(lines, solution, what="the line table")
    out = lines.copy(copy_data=True)
    p = np.asarray(out["pixel"], float)
    disp = np.abs(np.asarray(solution.dispersion(p), float))
    wl = np.asarray(solution.wavelength(p), float)
    band = np.asarray(solution.wavelength_err(p), float)
    err = np.hypot(disp * np.asarray(out["pixel_err"], float), band)
    out["wavelength"] = wl
    out["wavelength"].unit = "nm"
    out["wavelength"].description = "wavelength of the line centre"
    out["wavelength_err"] = err
    out["wavelength_err"].unit = "nm"
    out["wavelength_err"].description = "centroid error through the dispersion (+) solution band"
    out.meta[BAND_INCLUDED] = True
    out["fwhm"] = disp * np.asarray(out["fwhm_pixel"], float)
    out["fwhm"].unit = "nm"
    out["fwhm"].description = "FWHM in wavelength"
    medium = getattr(solution, "medium", None)
    if medium is not None:
        out.meta["medium"] = medium
    return out


def find_lines(
    spectrum,
    *,
    min_snr: float = 5.0,
    fwhm_guess: float | None = None,
    saturation: float | None = None,
    gain: float | None = None,
    read_noise: float | None = None,
    dark=None,
    offset: float | None = None,
    instrument: Instrument | None = None,
) -> Table:
    """Find the emission lines of a spectrum and fit each with a pixel-integrated Gaussian.

    Parameters
    ----------
    spectrum : specutils.Spectrum or array
        Counts (ADU) on a pixel or wavelength axis; masked samples are left out of every fit.
    min_snr : float
        Significance threshold: a line is reported when its matched-filter significance
        (the ``snr`` column) reaches this.
    fwhm_guess : float, optional
        Line-spread FWHM in pixels; estimated from the brightest isolated lines if omitted.
    saturation : float, optional
        Saturation level (ADU) of the raw counts; otherwise ``meta["saturation"]`` of the
        spectrum, otherwise detected from repeated maximum values.
    gain : float, optional
        Effective electrons per ADU.  Otherwise from ``instrument``, else estimated (from the
        background when the offset and read noise are known, from the background's level
        variation, or from the fit residuals of the lines, whichever pins it best).
    read_noise : float, optional
        Read noise (ADU rms).  With ``gain`` it fixes the electronic offset as well.
    dark : specutils.Spectrum or array, optional
        A dark/background exposure of the same detector, subtracted first.
    offset : float, optional
        Electronic offset (bias) in the counts, ADU.  Otherwise from ``instrument``, from
        leading optical-black pixels, or (counts near zero) taken as already removed.
    instrument : ritzline.instrument.Instrument, optional
        A measured instrument model (e.g. ``solution.instrument``): its gain, read noise and
        line width are used instead of being estimated again.

    Returns
    -------
    astropy.table.Table
        One row per line: ``pixel, pixel_err, fwhm_pixel, fwhm_pixel_err, amplitude, flux,
        flux_err, background, snr, flags`` and, on a wavelength axis, ``wavelength,
        wavelength_err, fwhm`` (nm).  ``meta`` records the noise model, the LSF FWHM, the
        saturation level and the candidates rejected per reason.

    Notes
    -----
    The background is a block quantile of the spectrum, then a block median of the spectrum
    minus the fitted lines.  Candidates are local maxima of a matched filter (an integrated
    Gaussian at the LSF width); single-pixel spikes far sharper than the LSF are masked
    first.  Lines closer than two FWHM are fitted together with one constant background
    offset; after a first fit the residuals are searched for missed components and every
    line is refitted with its neighbours' models held fixed.  Each window spans the group
    plus four FWHM on either side; the variance of every pixel comes from the model.  Errors
    come from the inverse Fisher matrix at the solution, inflated by the reduced chi-square
    when the fit is significantly poor (p < 0.01).  ``snr`` is the matched-filter
    significance (LSF-shaped profile at the fitted centre, other lines removed), the
    statistic ``min_snr`` is compared with.

    The noise model is ``var = a + b (level - background_level)``: ``a`` and, when the
    background spans enough levels, ``b`` from second differences of quiet pixels in
    blocks; otherwise ``b`` (1/gain) from the fit residuals of lines as wide as the LSF.
    When the LSF had to be guessed and the fitted widths disagree by more than 10 %, the
    whole search runs once more with the measured width.

    Pixels within 3 % of the saturation level form clipped runs (small gaps closed while they
    stay above 90 % of it: a deeper dip separates two clipped lines); each run is one
    ``saturated`` line fitted to its unclipped wings at the local line width, its centre
    inside the run, so its error is measured.  A wing fit whose top would pass what the
    run's length allows (or 3000 times the clip level) reports the run's middle with a
    run-length error and the run's flux.  Beside a run, a candidate is kept only where the
    counts show a maximum of their own, and the background is measured away from runs.

    A component that fits better as one pixel than as a line of the local width (a spike, a
    hot pixel) is rejected at any amplitude, and its pixel is left out of every later fit: a
    line beneath it is fitted again without it.
    """
    shape = None
    if instrument is not None:
        shape = (instrument.fwhm, instrument.asymmetry, instrument.wing,
                 instrument.shape_span)
        if fwhm_guess is None:
            fwhm_guess = instrument.median_fwhm
    return _find_lines(spectrum, min_snr=min_snr, fwhm_guess=fwhm_guess,
                       saturation=saturation, gain=gain, read_noise=read_noise, dark=dark,
                       offset=offset, instrument=instrument, shape_coeffs=shape, rerun=False)


def _find_lines(spectrum, *, min_snr, fwhm_guess, saturation, gain, read_noise, dark, offset,
                instrument, shape_coeffs, rerun, lsf_known=None):
    from . import __version__

    arr = spectrum_arrays(spectrum)
    raw = np.array(arr.counts, float)
    n = raw.size
    mask = np.array(arr.mask, bool)
    meta = {
        "ritzline_version": __version__,
        "stage": "find_lines",
        "min_snr": float(min_snr),
        "source": arr.meta.get("source"),
    }
    has_wavelength = arr.unit == "nm"
    if fwhm_guess is not None and not fwhm_guess > 0:
        raise RitzlineError(f"fwhm_guess must be a positive number of pixels, got {fwhm_guess}")
    min_len = 2 * int(np.ceil(_WINDOW_HALF * (fwhm_guess or 2.0))) + 1
    if n < min_len:
        raise RitzlineError(
            f"the spectrum has {n} samples, shorter than one line-fit window ({min_len} "
            "pixels for the line width); give a longer spectrum"
        )
    flags = []
    finite = raw[~mask & np.isfinite(raw)]
    if finite.size and np.any(finite != np.round(finite)):
        # Averaged scans, scaling or other processing: the gain is an effective one.
        flags.append("non_integer_counts")
    offset_known, offset_source, r_ob = offset, "given" if offset is not None else None, None
    if offset_known is None and instrument is not None:
        offset_known, offset_source = instrument.offset, "instrument model"
    if dark is not None:
        d_counts, d_mask = _as_counts(dark, n, "dark frame")
        mask |= d_mask
        offset_known, offset_source = 0.0, "dark frame subtracted"
        flags.append("dark_subtracted")
    else:
        n_ob, ob_level, ob_sigma = optical_black(raw, mask)
        if n_ob:
            # Shielded pixels read the offset: measure it there and keep them out of the search.
            mask[:n_ob] = True
            meta["optical_black_pixels"] = n_ob
            if offset is None:
                offset_known = ob_level
                offset_source = f"optical-black pixels 0-{n_ob - 1}"
            r_ob = ob_sigma
    if saturation is None:
        saturation = arr.meta.get("saturation")
    sat_source = "given" if saturation is not None else None
    valid = ~mask
    if saturation is None:
        saturation = _detect_saturation(raw, valid)
        sat_source = "detected from repeated maximum values" if saturation is not None else None
    saturated_px = np.zeros(n, bool)
    if saturation is not None:
        # Within 3% of the level a pixel is treated as clipped: full-well (bloomed) pixels
        # scatter just below the nominal level and linearity is lost there (common practice).
        saturated_px = valid & (raw >= _SATURATION_MARGIN * float(saturation))
        # Close small gaps in a clipped run (noise dips below the margin inside a bloom); a
        # dip below the non-linear range separates two clipped lines.
        gap = saturated_px.copy()
        for k in (1, 2):
            gap[k:-k] |= saturated_px[: -2 * k] & saturated_px[2 * k :]
        saturated_px = gap & valid & (raw >= _NONLINEAR * float(saturation))
    counts = raw - d_counts if dark is not None else raw
    counts = np.where(valid, counts, 0.0)
    meta["saturation"] = None if saturation is None else float(saturation)
    meta["saturation_source"] = sat_source
    meta["dark_subtracted"] = dark is not None

    def empty(reason):
        meta["warning"] = reason
        warnings.warn(f"find_lines: {reason}; returning an empty line table", stacklevel=4)
        return _empty_table(meta, has_wavelength)

    if not valid.any():
        return empty("every sample is masked")
    if not np.any(counts):  # masked samples are zero already
        return empty("every sample is zero")
    if np.ptp(counts[valid]) == 0:
        return empty("the spectrum is constant (all samples equal)")

    # Pixels used in fits: valid, not saturated, not next to a saturated pixel (bloom).
    sat_zone = saturated_px | _cat(False, saturated_px[:-1]) | _cat(saturated_px[1:], False)
    ok = valid & ~sat_zone
    sigma0 = _second_diff_sigma(counts, ok)
    if sigma0 is None or sigma0 <= 0:
        sigma0 = float(np.std(counts[ok])) if np.count_nonzero(ok) > 1 else 0.0
    if not sigma0 > 0:
        return empty("no noise could be measured (too few usable samples)")

    fwhm = float(fwhm_guess) if fwhm_guess is not None else None
    width_block = 8.0 * (fwhm or _DEFAULT_FWHM)
    bg = _block_background(counts, ok, max(12.0, width_block), q=0.25, sigma=sigma0)
    excess = counts - bg
    ref = float(_median(bg[valid]))
    # Noise model at the background: second differences on pixels away from any bright line.
    quiet = ok & (np.abs(excess) < 4.0 * sigma0)
    quiet = quiet & _cat(quiet[1:], True) & _cat(True, quiet[:-1])
    sig_bg = _second_diff_sigma(counts, quiet) or sigma0
    if offset_known is None and (abs(ref) < 5.0 * sig_bg or raw[valid].min() < -5.0 * sig_bg):
        # Counts at or below zero: the offset was removed before (a dark-corrected frame).
        offset_known, offset_source = 0.0, "counts near zero: offset already removed"
        flags.append("dark_corrected")
    noise = _noise_model(counts, bg, quiet, ref, sig_bg, gain=gain, read_noise=read_noise,
                         offset=offset_known, offset_source=offset_source, r_ob=r_ob,
                         instrument=instrument)
    var_null = noise.variance(bg)

    # Spikes narrower than the LSF: masked everywhere downstream.
    fwhm_for_spikes = fwhm or _DEFAULT_FWHM
    spikes = _spike_pixels(excess, noise.variance(bg + np.maximum(excess, 0)), ok,
                           min(fwhm_for_spikes, 2.0) if fwhm is None else fwhm, min_snr)
    rejected = {"spike": int(np.count_nonzero(spikes)), "too_narrow": 0, "too_wide": 0,
                "below_snr": 0,
                "bad_fit": 0, "duplicate": 0, "outside": 0}
    ok &= ~spikes

    # LSF width from the brightest isolated, unsaturated peaks.
    lsf_method = "given"
    # Only an LSF known beforehand or seen on several lines can call one line too wide.
    if lsf_known is None:
        lsf_known = fwhm is not None
    if fwhm is None:
        sig = np.where(ok, excess / np.sqrt(var_null), 0.0)
        pk = _local_maxima(sig, 15.0)
        if pk.size:
            gaps = np.diff(pk)
            iso = _cat(True, gaps > 12) & _cat(gaps > 12, True)
            if sat_zone.any():
                iso &= np.convolve(sat_zone, np.ones(9), mode="same")[pk] == 0
            pk = pk[iso]
        widths = _half_max_widths(excess, ok, pk) if pk.size else np.zeros(0)
        widths = widths[np.isfinite(widths) & (widths > 0.8)]
        # A hot pixel or spike the mask missed is a peak one pixel wide (half-maximum width
        # about 1 px): when three or more peaks are clearly wider, those are the lines.
        if np.count_nonzero(widths > 1.25) >= 3:
            widths = widths[widths > 1.25]
        if widths.size >= 1:
            # The narrowest well-populated widths are the lines; broad features (phosphor
            # bands, continuum humps) are far wider and stay out of the line width.
            narrow_set = widths[widths <= 2.0 * np.quantile(widths, 0.25)]
            # Pixel integration adds 1/12 px^2 to the profile variance.
            fwhm = float(np.sqrt(max(_median(narrow_set) ** 2 - FWHM_PER_SIGMA**2 / 12, 0.64)))
            lsf_method = f"half-maximum widths of {widths.size} bright peaks, then fits"
            lsf_known = narrow_set.size >= 3
        else:
            fwhm = _DEFAULT_FWHM
            lsf_method = "default (no bright isolated line)"
        if abs(max(12.0, 8.0 * fwhm) / max(12.0, width_block) - 1.0) > 0.25:
            bg = _block_background(counts, ok, max(12.0, 8.0 * fwhm), q=0.25, sigma=sig_bg)
            excess = counts - bg
    if n < 2 * int(np.ceil(_WINDOW_HALF * fwhm)) + 1:
        raise RitzlineError(
            f"the spectrum has {n} samples, shorter than one line-fit window for a "
            f"{fwhm:.2f}-pixel FWHM; give a longer spectrum"
        )
    sigma_lsf = fwhm / FWHM_PER_SIGMA
    shape = None if shape_coeffs is None else _shape_from_coeffs(shape_coeffs, n)
    if saturated_px.any():
        # A clipped line is fitted to its unclipped wings; pixels close to full well (where
        # detectors lose linearity) are left out with the clipped ones.
        ok &= ~(valid & (raw >= _NONLINEAR * float(saturation)))

    # Detection: matched filter on the background-subtracted counts.
    weight = np.where(ok, 1.0 / noise.variance(bg), 0.0)
    f_mf, snr_mf = _matched_filter(excess, weight, fwhm)
    cand = _local_maxima(snr_mf, 0.7 * min_snr)
    # Each clipped run is one line (added below); no other candidate is taken inside a run or
    # within 1.5 FWHM of it.
    if saturated_px.any():
        # Beside a clipped run the filter peaks on the clipped line's own wings: a line
        # there shows a maximum of its own in the counts.
        beside = _near_saturation(sat_zone, cand, fwhm, 1.0)
        peak = np.zeros(n, bool)
        peak[1:-1] = (counts[1:-1] >= counts[:-2]) & (counts[1:-1] >= counts[2:])
        peak &= ~sat_zone
        own_max = peak[cand] | peak[np.maximum(cand - 1, 0)] | peak[np.minimum(cand + 1, n - 1)]
        cand = cand[~sat_zone[cand] & (~beside | own_max)]
    cand_c = cand.astype(float)
    cand_f = f_mf[cand]
    clip_c, clip_f, clip_half, clip_level = _clipped_runs(counts, bg, saturated_px,
                                                          float(saturation or 0.0), sigma_lsf)
    if cand_c.size == 0 and clip_c.size == 0:
        meta.update(_meta_tail(noise, fwhm, None, lsf_method, rejected, 0, min_snr))
        meta["instrument"] = _instrument_record(noise, n, fwhm, lsf_method, flags, instrument,
                                            offset_source, shape_coeffs)
        return empty(f"no line reaches the detection threshold (min_snr={min_snr:g})")
    # Sub-pixel start: parabola through the filter peak.
    ic = np.minimum(np.maximum(cand, 1), n - 2)
    zl, z0, zr = snr_mf[ic - 1], snr_mf[ic], snr_mf[ic + 1]
    den = zl - 2 * z0 + zr
    shift = np.where(den < 0, 0.5 * (zl - zr) / np.where(den < 0, den, -1), 0.0)
    cand_c = cand_c + np.clip(shift, -0.5, 0.5)
    state = _State(cand_c, np.full(cand_c.size, sigma_lsf), cand_f)
    if clip_c.size:
        clip_s = np.full(clip_c.size, sigma_lsf) if shape is None else shape.sigma[
            np.clip(np.rint(clip_c), 0, n - 1).astype(int)]
        state = state.extend(clip_c, clip_s, clip_f, saturated=True)
        state.run_half[-clip_c.size:] = clip_half
        state.run_centre[-clip_c.size:] = clip_c
        state.run_flux[-clip_c.size:] = clip_f
        state.run_clip[-clip_c.size:] = clip_level
    n_candidates = int(state.centre.size)
    ctx = _Context(n=n, excess=excess, background=bg, ok=ok, sigma_lsf=sigma_lsf, shape=shape)

    # Pass 1; in an uncrowded spectrum its residuals already give the slope (1/gain).
    diag = _fit_all(state, ctx, noise, final=False)
    estimate_slope = gain is None and not noise.method.startswith("gain from the instrument")
    if estimate_slope:
        noise = _reestimate_slope(noise, diag)
    state, rejected = _prune(state, ctx, fwhm, 0.5 * min_snr, rejected, final=False)
    # The line shape along the detector, from the bright isolated lines of pass 1: pass 2
    # fits with it.  A width far from the one used for detection means searching again.
    shape_note = None
    if shape_coeffs is None and fwhm_guess is None:
        measured = _measure_shape(state, ctx, noise)
        if measured is not None:
            *coeffs, n_used = measured
            eta = coeffs[2]
            shape = _shape_from_coeffs(coeffs, n)
            fw_new = shape.sigma * FWHM_PER_SIGMA
            med = float(_median(fw_new))
            shape_note = (f"line shape measured on {n_used} bright lines (FWHM "
                          f"{fw_new.min():.2f}-{fw_new.max():.2f} px, skew up to "
                          f"{np.max(np.abs(shape.alpha)):.2f}, Lorentzian fraction {eta:.3f})")
            if abs(med / fwhm - 1.0) > 0.1 and not rerun:
                again = _find_lines(spectrum, min_snr=min_snr, fwhm_guess=med,
                                    saturation=saturation, gain=gain, read_noise=read_noise,
                                    dark=dark, offset=offset, instrument=instrument,
                                    shape_coeffs=tuple(coeffs), rerun=True,
                                    lsf_known=True)
                again.meta["lsf_method"] = f"{lsf_method}; {shape_note}"
                again.meta["instrument"]["sources"]["fwhm"] = again.meta["lsf_method"]
                return again
            shape_coeffs = tuple(coeffs)
            lsf_known = True
            ctx = replace(ctx, shape=shape)
    if lsf_known:
        state = _split_wide(state, ctx, min_snr)
    # Background again, from the spectrum minus the fitted lines.
    lines_now = _lines_model(state, n, shape)
    # Beside a clipped run the model of the clipped line (its wings extrapolated under
    # blooming) is no measure of the background: those pixels stay out of it.
    bg_ok = ok & ~_near_saturation(sat_zone, np.arange(n), fwhm, 2.5) if sat_zone.any() else ok
    bg = _block_background(counts - lines_now, bg_ok, max(12.0, 8.0 * fwhm), q=None)
    excess = counts - bg
    ctx = _Context(n=n, excess=excess, background=bg, ok=ok, sigma_lsf=sigma_lsf, shape=shape)
    # Residual search for components the first pass missed (close blends).
    resid = excess - lines_now
    weight = np.where(ok, 1.0 / noise.variance(bg + lines_now), 0.0)
    f_r, snr_r = _matched_filter(resid, weight, fwhm)
    extra = _local_maxima(snr_r, min_snr)
    if extra.size and state.centre.size:
        dist = np.min(np.abs(extra[:, None] - state.centre[None, :]), axis=1)
        extra = extra[(dist > 0.5 * fwhm) & ~_near_saturation(sat_zone, extra, fwhm)]
    n_candidates += int(extra.size)
    if extra.size:
        extra_state = _State(extra.astype(float), np.full(extra.size, sigma_lsf), f_r[extra])
        lines_now = lines_now + _lines_model(extra_state, n, shape)
        state = state.extend(extra_state.centre, extra_state.sigma, extra_state.flux)
    # Pass 2, neighbours from pass 1.
    diag = _fit_all(state, ctx, noise, lines=lines_now)
    if estimate_slope:
        # The slope again from the converged fits (neighbours and background settled); refit
        # with it when it moved (crowded spectra).
        new_noise = _reestimate_slope(noise, diag)
        moved = abs(new_noise.b / noise.b - 1.0) > 0.1
        noise = new_noise
        if moved:
            _fit_all(state, ctx, noise, tol=0.5)
    broad = []

    def settle(state, rejected, broad=None):
        """The final pruning; a component dropped from a joint fit shared flux with its
        partners, so those are refitted (and pruned) again."""
        before = state
        state, rejected = _prune(state, ctx, fwhm, min_snr, rejected, final=True, broad=broad)
        joint = before.group_size > 1
        gone = np.setdiff1d(before.centre[joint], state.centre) if joint.any() else joint[:0]
        if state.centre.size and gone.size:
            _fit_all(state, ctx, noise, near=gone)
            state, rejected = _prune(state, ctx, fwhm, min_snr, rejected, final=True)
        return state, rejected

    state, rejected = settle(state, rejected, broad)
    if lsf_known:
        # A component still far wider than the LSF after pass 2 (a pair the first fit merged)
        # is split once more and its group refitted.  The pair stays only when it beats the
        # wide line by a significant chi2 (three more parameters: 11.3, p = 0.01), else the
        # wide component (a tail, a shoulder) is kept as it was.
        split = _split_wide(state, ctx, min_snr)
        added = split.centre.size - state.centre.size
        if added:
            wide = np.setdiff1d(state.centre, split.centre)
            chi2_before = _window_chi2(state, wide)
            trial, rejected_trial = split, dict(rejected)
            _fit_all(trial, ctx, noise, near=trial.centre[-2 * added:])
            trial, rejected_trial = settle(trial, rejected_trial)
            if _window_chi2(trial, wide) < chi2_before - 11.3 * added:
                state, rejected = trial, rejected_trial

    # LSF estimate from the clean, isolated, bright lines.
    fw = FWHM_PER_SIGMA * state.sigma
    single = (state.group_size == 1) & state.converged
    clean = single & (state.snr > 20)
    if np.count_nonzero(clean) < 3:
        clean = single & (state.snr >= min_snr)  # a faint spectrum: use what there is
    lsf_fit = None
    if shape_note is not None:
        lsf_fit = fwhm = float(_median(shape.sigma)) * FWHM_PER_SIGMA
        lsf_method += f"; {shape_note}"
    elif np.count_nonzero(clean) >= 3:
        lsf_fit = float(_median(fw[clean]))
        if fwhm_guess is None:
            if abs(lsf_fit / fwhm - 1.0) > 0.1 and not rerun:
                # The width used for detection was far off: detect and fit again with the
                # measured one (matched filter, grouping and significance depend on it).
                again = _find_lines(spectrum, min_snr=min_snr, fwhm_guess=lsf_fit,
                                    saturation=saturation, gain=gain, read_noise=read_noise,
                                    dark=dark, offset=offset, instrument=instrument,
                                    shape_coeffs=None, rerun=True, lsf_known=lsf_known)
                again.meta["lsf_method"] = (
                    f"{lsf_method}; refitted with the median fitted FWHM of "
                    f"{np.count_nonzero(clean)} lines")
                return again
            fwhm = lsf_fit
            lsf_method += f" (median fitted FWHM of {np.count_nonzero(clean)} lines)"
    meta.update(_meta_tail(noise, fwhm, lsf_fit, lsf_method, rejected, n_candidates, min_snr))
    meta["broad_features"] = [
        {"pixel": round(p, 2), "fwhm_pixel": round(w, 2), "flux": f, "snr": round(z, 1)}
        for p, w, f, z in sorted(broad)]
    meta["instrument"] = _instrument_record(noise, n, fwhm, lsf_method, flags, instrument,
                                            offset_source, shape_coeffs)
    meta["background_method"] = (
        "block quantile (25%, corrected to the mean) then block median of the spectrum "
        f"minus the fitted lines, blocks of {max(12.0, 8.0 * fwhm):.0f} px, linear "
        "interpolation; plus a constant offset fitted in each line window")
    if state.centre.size == 0:
        return empty(f"no line reaches min_snr={min_snr:g} after fitting")

    table = _table_from_state(state, ctx, fwhm, meta, n, noise)
    if has_wavelength:
        table = attach_wavelengths(table, _AxisSolution(arr.axis))
    return table


def _window_chi2(state, near, reach=3.0):
    """Sum of the chi2 of the fit groups with a component within ``reach`` of its own FWHM
    of the positions ``near`` (each group counted once)."""
    if state.centre.size == 0:
        return 0.0
    hit = np.min(np.abs(state.centre[:, None] - np.asarray(near)[None, :]), axis=1)
    sel = hit < reach * np.maximum(state.sigma, 1.0) * FWHM_PER_SIGMA
    return float(np.sum(np.unique(state.chi2[sel])))


def _near_saturation(sat_zone, idx, fwhm, reach_fwhm=1.5):
    """Whether pixels ``idx`` lie within ``reach_fwhm`` FWHM of a saturated (bloomed) pixel."""
    reach = int(np.ceil(reach_fwhm * fwhm))
    zone = np.convolve(sat_zone, np.ones(2 * reach + 1), mode="same") > 0
    return zone[idx]


def _clipped_runs(counts, bg, saturated_px, level, sigma):
    """One line per run of clipped pixels: a starting centre and flux for the wing fit.

    The centre is the middle of the run, each end extended by the fraction of the clip level
    its outer neighbour reaches; the flux is that of a line of the LSF width whose peak
    clears the clip level over the run's length (the fit to the unclipped wings refines both).
    """
    n = counts.size
    edges = np.diff(_cat(0, saturated_px.astype(np.int8), 0))
    starts, stops = np.flatnonzero(edges == 1), np.flatnonzero(edges == -1)
    if starts.size == 0:
        return np.zeros(0), np.zeros(0), np.zeros(0), np.zeros(0)
    bl = bg[starts]
    br = bg[stops - 1]
    left = counts[np.maximum(starts - 1, 0)]
    right = counts[np.minimum(stops, n - 1)]
    span_l = np.maximum(level - bl, 1e-9 * abs(level) + 1e-300)
    span_r = np.maximum(level - br, 1e-9 * abs(level) + 1e-300)
    fl = np.where(starts > 0, np.clip((left - bl) / span_l, 0, 1), 0.0)
    fr = np.where(stops < n, np.clip((right - br) / span_r, 0, 1), 0.0)
    centre = 0.5 * ((starts - fl) + (stops - 1 + fr))
    half_run = 0.5 * (stops - starts + fl + fr)
    clip = level - 0.5 * (bl + br)
    height = clip * np.exp(0.5 * np.minimum(half_run / sigma, 5.0) ** 2)
    return centre, height * _SQRT2PI * sigma, half_run, clip


def _meta_tail(noise, fwhm, lsf_fit, lsf_method, rejected, n_candidates, min_snr):
    return {
        "noise_model": noise.as_meta(),
        "lsf_fwhm_pixel": float(fwhm),
        "lsf_fwhm_fitted_median": lsf_fit,
        "lsf_method": lsf_method,
        "n_candidates": int(n_candidates),
        "rejected": dict(rejected),
        "detection": f"matched filter (integrated Gaussian, FWHM {fwhm:.3f} px); "
                     f"report when snr >= {min_snr:g}",
    }


def _split_wide(state, ctx, min_snr):
    """Components significantly wider than the local LSF become two lines of that width.

    An unresolved pair fitted as one line comes out wide; two components at the LSF width,
    as far apart as the excess width implies, start the next fit, which (with the pruning
    of weak, merged or duplicate components) decides whether the pair is real.
    """
    if state.centre.size == 0:
        return state
    local = ctx.shape_at(state.centre)[0]
    s, err = state.sigma, state.sigma_err
    wide = ((s > 1.25 * local) & (s - local > 3.0 * err) & (s < 3.0 * local)
            & (state.snr > 2.0 * min_snr) & state.converged & ~state.saturated)
    if not wide.any():
        return state
    half = np.sqrt(s[wide] ** 2 - local[wide] ** 2)
    keep = state.subset(~wide)
    c = state.centre[wide]
    f = 0.5 * state.flux[wide]
    return keep.extend(_cat(c - half, c + half), _cat(local[wide], local[wide]), _cat(f, f))


def _misfit_companions(state, local, snr_cut):
    """Components no more significant than a brighter neighbour's profile misfit could make.

    The misfit scale is measured on the bright isolated lines: ``eps = sqrt(chi2 - dof) /
    snr`` (the share of a line's significance its best-fit residuals keep; 0 for a perfect
    profile), upper quartile over lines with snr > 30.  A component within 3 FWHM of a line
    of significance ``S`` needs ``snr >= snr_cut + 2 eps S``; a clipped line's ``S`` is its
    flux over the flux error of its wing fit (its matched filter sees the wings only).
    """
    single = (state.group_size == 1) & (state.snr > 30) & ~state.saturated
    if np.count_nonzero(single) < 3 or state.centre.size < 2:
        return np.zeros(state.centre.size, bool)
    excess = np.maximum(state.chi2[single] - state.dof[single], 0.0)
    eps = float(np.quantile(np.sqrt(excess) / state.snr[single], 0.5))
    if eps <= 0:
        return np.zeros(state.centre.size, bool)
    c = state.centre
    near = np.abs(c[:, None] - c[None, :]) < 3.0 * np.maximum(local[:, None], local[None, :])
    np.fill_diagonal(near, False)
    with np.errstate(divide="ignore", invalid="ignore"):
        sig = np.where(state.saturated & (state.flux_err > 0),
                       np.abs(state.flux) / state.flux_err, np.abs(state.snr))
    brighter = np.where(near, np.nan_to_num(sig)[None, :], 0.0).max(axis=1)
    # A clipped line is no companion: its matched filter sees only its wings.
    return ((state.snr < snr_cut + 2.0 * eps * brighter) & (brighter > state.snr)
            & ~state.saturated)


def _prune(state, ctx, fwhm, snr_cut, rejected, *, final, broad=None):
    """Drop components that are not credible lines; count each reason in ``rejected``.

    Significant components far wider than the local LSF are broad features (phosphor bands,
    continuum humps, stray-light shoulders): appended to ``broad`` (pixel, FWHM, flux, snr).
    """
    if state.centre.size == 0:
        return state, rejected
    fw = FWHM_PER_SIGMA * state.sigma
    fw_err = FWHM_PER_SIGMA * state.sigma_err
    outside = (state.centre < -0.5) | (state.centre > ctx.n - 0.5) | ~np.isfinite(state.centre)
    local = FWHM_PER_SIGMA * ctx.shape_at(np.where(outside, 0.0, state.centre))[0]
    # A one-pixel event fits better as one pixel than as a line of the local width, and its
    # free width collapses (a real line's width follows the LSF).
    spike = state.one_pixel & (fw < 0.75 * local) & ~outside & ~state.saturated
    if spike.any():
        # The event's pixel leaves every later fit.  It may sit on a line: before the final
        # pass the component stays, at the local width, to be fitted again without it.
        ctx.ok[np.clip(np.rint(state.centre[spike]), 0, ctx.n - 1).astype(int)] = False
        rejected["spike"] += int(np.count_nonzero(spike))
        if not final:
            state.sigma[spike] = local[spike] / FWHM_PER_SIGMA
            state.one_pixel[spike] = False
            fw = np.where(spike, local, fw)
            spike[:] = False
    narrow = (fw < 0.5 * local) & ((0.5 * local - fw) > 2.0 * fw_err) & ~outside & ~spike
    # Far wider than the LSF: a background wiggle or a fit gone astray, not a line.
    wide = (fw > _MAX_WIDTH * local) & ~outside & ~narrow & ~spike & ~state.saturated
    weak = (state.snr < snr_cut) & ~outside & ~narrow & ~wide & ~spike & ~state.saturated
    drop = outside | narrow | wide | weak | spike
    if final:
        # A faint component beside a much brighter line must stand out from what the bright
        # line's own misfit (an unmodelled tail or wing) can leave in the residuals.
        echo = _misfit_companions(state, local, snr_cut) & ~drop
        rejected["misfit_companion"] = rejected.get("misfit_companion", 0) + int(
            np.count_nonzero(echo))
        drop |= echo
    if final and broad is not None and np.any(wide & (state.snr >= snr_cut)):
        sel = wide & (state.snr >= snr_cut)
        broad.extend(zip(state.centre[sel].tolist(), fw[sel].tolist(),
                         state.flux[sel].tolist(), state.snr[sel].tolist(), strict=True))
    # Duplicates: two components within 0.6 FWHM; keep the brighter.
    order = np.argsort(state.centre)
    c = state.centre[order]
    close = np.flatnonzero(c[1:] - c[:-1] < 0.6 * fwhm)
    dup = np.zeros(state.centre.size, bool)
    for_idx_a, for_idx_b = order[close], order[close + 1]
    weaker = np.where(state.flux[for_idx_a] < state.flux[for_idx_b], for_idx_a, for_idx_b)
    dup[weaker] = True
    dup &= ~drop
    if final:
        rejected["outside"] += int(np.count_nonzero(outside))
        rejected["too_narrow"] += int(np.count_nonzero(narrow))
        rejected["too_wide"] += int(np.count_nonzero(wide))
        rejected["below_snr"] += int(np.count_nonzero(weak))
        rejected["duplicate"] += int(np.count_nonzero(dup))
        # A component whose covariance is unusable (a degenerate fit) cannot be reported.
        bad_err = ~drop & ~dup & ~(np.isfinite(state.centre_err) & (state.centre_err > 0)
                                   & (state.flux_err > 0))
        rejected["bad_fit"] += int(np.count_nonzero(bad_err))
        drop = drop | dup | bad_err
    else:
        rejected["too_narrow"] += int(np.count_nonzero(narrow))
        drop = drop | dup
    return state.subset(~drop), rejected


@functools.cache
def _flag_combinations():
    """The ``flags`` string of each bit code (1 saturated, 2 blended, 4 blend_suspect, 8 edge)."""
    names = ("saturated", "blended", "blend_suspect", "edge")
    words = [",".join(w for j, w in enumerate(names) if code >> j & 1) for code in range(16)]
    return np.array(words), np.array([len(w) for w in words])


def _table_from_state(state, ctx, fwhm, meta, n, noise):
    st = state
    dof = np.maximum(st.dof, 1)
    poor = chdtrc(dof, st.chi2) < 0.01
    scale = np.where(poor, np.sqrt(st.chi2 / dof), 1.0)
    # The gain behind the weights was itself estimated: Student-t inflation of the photon share.
    peak = st.flux / (_SQRT2PI * st.sigma)
    level = np.interp(st.centre, np.arange(n), ctx.background) + st.bg_offset + peak
    scale = scale * np.sqrt(noise.inflation(level))
    fw = FWHM_PER_SIGMA * st.sigma
    fw_err = FWHM_PER_SIGMA * st.sigma_err * scale
    centre, centre_err = st.centre, st.centre_err * scale
    # A clipped line whose wing fit failed (several lines under one clipped run, a wing cut
    # by the detector end) keeps the middle of its run, uncertain by the run's half-length.
    # The run's length bounds the peak: a line of this width whose top stood higher would be
    # clipped over more pixels (one pixel of slack).  A fit beyond that bound extrapolates far
    # past the data (wings shaped by blooming or a neighbour): no honest error comes from it.
    peak_fit = st.flux / (_SQRT2PI * st.sigma)
    # A top beyond e^8 (3000) times the clip level is no line's: such a fit has followed the
    # far tails of a bloom, where the profile carries no centroid.
    reach = np.minimum(0.5 * ((st.run_half + 1.0) / st.sigma) ** 2, 8.0)
    failed = st.saturated & ~((np.abs(st.centre - st.run_centre) <= st.run_half + 0.5 * fw)
                              & (st.flux > 0) & (peak_fit <= st.run_clip * np.exp(reach))
                              & np.isfinite(centre_err) & (centre_err < st.run_half + 0.5))
    if failed.any():
        centre = np.where(failed, st.run_centre, centre)
        centre_err = np.where(failed, st.run_half / math.sqrt(3.0) + 0.25, centre_err)
    cols = {
        "pixel": centre,
        "pixel_err": centre_err,
        "fwhm_pixel": fw,
        "fwhm_pixel_err": fw_err,
        "amplitude": st.flux / (_SQRT2PI * st.sigma),
        "flux": np.where(failed, st.run_flux, st.flux),
        "flux_err": np.where(failed, 0.5 * st.run_flux, st.flux_err * scale),
        "background": np.interp(st.centre, np.arange(n), ctx.background) + st.bg_offset,
        "snr": np.where(failed, np.abs(st.snr), st.snr),
    }
    # Flags as bit codes (1 saturated, 2 blended, 4 blend_suspect, 8 edge).
    local = FWHM_PER_SIGMA * ctx.shape_at(st.centre)[0]
    code = (1 * st.saturated + 2 * (st.group_size > 1)
            + 4 * ((fw > 1.1 * local) & ((fw - local) > 3.0 * fw_err) & ~st.saturated))
    c = cols["pixel"]
    code = code + 8 * ((c < 1.5 * fwhm - 0.5) | (c > n - 0.5 - 1.5 * fwhm))
    # Every combination of the four words is one of 16 strings: look them up by bit code.
    words, lengths = _flag_combinations()
    flags = words[code].astype(f"U{max(1, int(lengths[code].max(initial=0)))}")
    if c.size > 1 and not np.all(c[1:] >= c[:-1]):  # the fitted lines are mostly in order
        order = np.argsort(c, kind="stable")
        cols = {k: v[order] for k, v in cols.items()}
        flags = flags[order]
    meta["n_lines"] = int(c.size)
    meta["error_scaling"] = "inverse Fisher matrix; x sqrt(chi2/dof) where p(chi2) < 0.01"
    return _build_table(cols, flags, meta)


def line_background(spectrum, lines: Table, *, dark=None) -> np.ndarray:
    """The background under a spectrum's lines, for display: counts minus the fitted lines.

    A block median (blocks of 8 LSF FWHM, from ``lines.meta``) of the (dark-subtracted)
    counts minus the fitted profiles of ``lines``, interpolated between blocks, as
    :func:`find_lines` estimates it.  Masked and saturated samples are left out.

    Parameters
    ----------
    spectrum : specutils.Spectrum or array
        The spectrum ``lines`` came from.
    lines : astropy.table.Table
        The table :func:`find_lines` returned for it.
    dark : specutils.Spectrum or array, optional
        The same dark frame given to :func:`find_lines`.

    Returns
    -------
    ndarray
        Background counts per pixel (ADU).
    """
    arr = spectrum_arrays(spectrum)
    counts = np.array(arr.counts, float)
    ok = ~np.asarray(arr.mask, bool)
    if dark is not None:
        d_counts, d_mask = _as_counts(dark, counts.size, "dark frame")
        counts = counts - d_counts
        ok &= ~d_mask
    sat = lines.meta.get("saturation")
    if sat is not None:
        ok &= np.asarray(arr.counts, float) < _SATURATION_MARGIN * float(sat)
    counts = np.where(ok, counts, 0.0)
    fwhm = float(lines.meta.get("lsf_fwhm_pixel") or _DEFAULT_FWHM)
    if len(lines):
        fitted = np.asarray([("saturated" not in f) for f in lines["flags"]], bool)
        sig = np.asarray(lines["fwhm_pixel"], float)[fitted] / FWHM_PER_SIGMA
        st = _State(np.asarray(lines["pixel"], float)[fitted], sig,
                    np.asarray(lines["flux"], float)[fitted])
        counts = counts - _lines_model(st, counts.size)
    if not ok.any():
        return np.zeros(counts.size)
    return _block_background(counts, ok, max(12.0, 8.0 * fwhm), q=None)
