"""Batch checking of exposures against a reference wavelength solution.

Each exposure is read, the reference's lines are measured where they are expected (or found
by a blind search) and re-matched to the reference, and the drift (shift and stretch on the
detector, with uncertainties, from a robust fit of every matched line), line width,
resolving power, saturation, masked samples and missing lines are measured and judged
pass / warn / fail (or ``error`` for a file that cannot be read).  The batch runner owns
its output folder for the whole run (a lock file), spreads exposures over local processes
that end with it (or a Dask cluster), appends each result to a JSON-lines journal in the
output folder as it arrives, and rebuilds ``summary.ecsv`` from that journal, so an
interrupted run can resume without losing or repeating an exposure; a run that ends with
exposures unchecked says so (``complete`` is False).
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
import re
import signal
import socket
import sys
import threading
import time
import warnings
from collections.abc import Callable, Iterable, Iterator, Sequence
from dataclasses import asdict, dataclass, field
from dataclasses import replace as dataclasses_replace
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from ._io import atomic_write, write_table
from .errors import RitzlineError

if TYPE_CHECKING:  # pragma: no cover
    from astropy.table import Table

__all__ = [
    "SUMMARY_COLUMNS",
    "CheckLimits",
    "DriftFit",
    "ExposureChecker",
    "Inputs",
    "MeasuredLines",
    "OutputLock",
    "OutputLockWarning",
    "Reference",
    "check_exposures",
    "collect_exposures",
    "find_exposures",
    "fit_drift",
    "judge",
    "measure_known_lines",
    "read_journal",
    "reference_from_solution",
    "run_batch",
    "summary_table",
]

JOURNAL_NAME = "journal.jsonl"
LOCK_NAME = ".ritzline-check.lock"
JOURNAL_SCHEMA = 1
SPECTRUM_SUFFIXES = (".fits", ".fit", ".fts", ".fits.gz", ".ecsv", ".txt", ".csv", ".dat", ".tsv")
# Files that travel with data but are not spectra: skipped (and listed once), not errors.
# A name counts when its suffix is one of these, or its stem is one of the usual notes.
NOT_SPECTRUM_SUFFIXES = (
    ".json", ".png", ".jpg", ".jpeg", ".gif", ".svg", ".pdf", ".md", ".rst", ".html", ".htm",
    ".log", ".xml", ".yaml", ".yml", ".toml", ".ini", ".cfg", ".py", ".ipynb", ".sh", ".bat",
    ".zip", ".tar", ".tgz", ".doc", ".docx", ".xls", ".xlsx", ".odt", ".ods", ".jsonl",
)  # fmt: skip
NOT_SPECTRUM_STEMS = ("readme", "license", "licence", "notes", "changelog", "changes",
                      "authors", "copying", "todo", "manifest")  # fmt: skip

# (name, kind, unit, description): the summary table, one row per exposure.
SUMMARY_COLUMNS: tuple[tuple[str, str, str | None, str], ...] = (
    ("index", "int", None, "position of the exposure in the input list"),
    ("file", "str", None, "exposure file as given"),
    ("status", "str", None, "pass, warn, fail or error"),
    ("reasons", "str", None, "every reason for the status, '; '-separated"),
    ("timestamp", "str", None, "time stamp from the file (ISO 8601) or empty"),
    ("shift_px", "float", "pix", "shift of the spectrum on the detector (+ = toward higher pixel)"),
    ("shift_err_px", "float", "pix", "1-sigma uncertainty of shift_px"),
    ("shift_nm", "float", "nm", "wavelength error of the reference solution at the centre pixel"),
    ("shift_err_nm", "float", "nm", "1-sigma uncertainty of shift_nm"),
    ("stretch", "float", None, "relative stretch: extra shift per pixel from the centre"),
    ("stretch_err", "float", None, "1-sigma uncertainty of stretch"),
    ("fwhm_px", "float", "pix", "median FWHM of the clean matched lines"),
    ("fwhm_err_px", "float", "pix", "uncertainty of the median FWHM"),
    ("fwhm_change_pct", "float", "%", "FWHM change relative to the reference"),
    ("resolving_power", "float", None, "median lambda / delta-lambda of the clean matched lines"),
    ("n_lines", "int", None, "expected lines found"),
    ("n_expected", "int", None, "expected lines on the detector"),
    ("n_found", "int", None, "lines found in the exposure (matched or not)"),
    ("n_fit", "int", None, "lines used in the drift fit"),
    ("missing", "str", None, "reference wavelengths (nm) of expected lines not found"),
    ("saturated_pixels", "int", None, "pixels at or above the saturation level"),
    ("masked_samples", "int", None, "samples that are not numbers (NaN, inf) or masked"),
    ("snr_median", "float", None, "median signal-to-noise ratio of the matched lines"),
    ("fit_rms_px", "float", "pix", "RMS residual of the drift fit"),
)
_COLUMN_NAMES = tuple(c[0] for c in SUMMARY_COLUMNS)
STATUSES = ("pass", "warn", "fail", "error")


# ---- thresholds and reference ------------------------------------------------------------


@dataclass(frozen=True)
class CheckLimits:
    """Thresholds that turn measurements into pass / warn / fail.

    Parameters
    ----------
    max_shift_px : float
        Fail when the shift, or the displacement the stretch causes at the detector ends,
        exceeds this many pixels; warn above ``warn_fraction`` of it.
    max_fwhm_change_pct : float
        Fail when the median FWHM differs from the reference by more than this (percent);
        warn above ``warn_fraction`` of it.
    min_lines : int
        Fail when fewer expected lines than this are found (the drift is then unmeasured).
    max_missing_fraction : float
        Warn when more than this fraction of the expected lines is missing.
    max_masked_samples : int
        Warn when an exposure has more masked samples (NaN, inf, or masked by the file)
        than this.
    min_snr : float
        Warn when the median line SNR is below this.
    detect_snr : float
        Detection threshold passed to the line finder.
    warn_fraction : float
        Fraction of a fail limit above which a measurement is a warning.
    saturation : float or None
        Saturation level (ADU) used when the file does not state one.
    """

    max_shift_px: float = 1.0
    max_fwhm_change_pct: float = 15.0
    min_lines: int = 5
    max_missing_fraction: float = 0.2
    max_masked_samples: int = 0
    min_snr: float = 10.0
    detect_snr: float = 5.0
    warn_fraction: float = 0.5
    saturation: float | None = None

    def __post_init__(self) -> None:
        if not self.max_shift_px > 0 or not self.max_fwhm_change_pct > 0:
            raise RitzlineError("max shift and max FWHM change must be positive")
        if self.min_lines < 1:
            raise RitzlineError(f"min_lines must be at least 1, got {self.min_lines}")
        if self.max_masked_samples < 0:
            raise RitzlineError(
                f"max_masked_samples must be 0 or more, got {self.max_masked_samples}"
            )
        if not 0 < self.warn_fraction <= 1:
            raise RitzlineError(f"warn_fraction must be in (0, 1], got {self.warn_fraction}")


@dataclass(frozen=True, eq=False)
class Reference:
    """The reference solution reduced to plain arrays, cheap to send to worker processes.

    ``pixel``/``pixel_err``/``wavelength`` are the expected lines (sorted by pixel) as the
    reference saw them; ``wavelength_grid`` and ``dispersion_grid`` hold the reference
    solution's wavelength (nm) and dispersion (nm/px) at every integer pixel.
    """

    pixel: np.ndarray
    pixel_err: np.ndarray
    wavelength: np.ndarray
    n_pixels: int
    fwhm_px: float
    wavelength_grid: np.ndarray
    dispersion_grid: np.ndarray
    centre_dispersion: float = float("nan")
    medium: str = "air"
    source: str = ""
    lamps: tuple[str, ...] = ()
    dark: np.ndarray | None = field(default=None, repr=False)
    instrument: object | None = field(default=None, repr=False)

    @property
    def centre(self) -> float:
        """The detector's middle pixel, (n_pixels - 1) / 2: the pivot of the stretch."""
        return (self.n_pixels - 1) / 2.0

    def wavelength_at(self, pixels) -> np.ndarray:
        return np.interp(pixels, np.arange(self.n_pixels), self.wavelength_grid)

    def dispersion_at(self, pixels) -> np.ndarray:
        return np.interp(pixels, np.arange(self.n_pixels), self.dispersion_grid)

    @property
    def resolving_power(self) -> float:
        """Median lambda / delta-lambda of the expected lines at the reference FWHM."""
        if self.pixel.size == 0:
            return float("nan")
        r = self.wavelength / (self.fwhm_px * np.abs(self.dispersion_at(self.pixel)))
        return float(np.median(r))

    def digest(self) -> str:
        """A short fingerprint of everything a result depends on (for safe resumes)."""
        h = hashlib.sha256()
        for a in (self.pixel, self.pixel_err, self.wavelength, self.wavelength_grid):
            h.update(np.ascontiguousarray(a, float).tobytes())
        h.update(f"{self.n_pixels}|{self.fwhm_px!r}|{self.medium}".encode())
        if self.instrument is not None and hasattr(self.instrument, "to_dict"):
            h.update(json.dumps(self.instrument.to_dict(), sort_keys=True,
                                default=str).encode())
        if self.dark is not None:
            h.update(np.ascontiguousarray(self.dark, float).tobytes())
        return h.hexdigest()[:16]


def reference_from_solution(
    solution, *, lamp: str | Sequence[str] | None = None, dark=None
) -> Reference:
    """Build a :class:`Reference` from a ``calibration.Solution`` (or a path to one).

    Parameters
    ----------
    solution : Solution or path
        The reference wavelength solution; a path is loaded with ``Solution.load``.
    lamp : str or sequence of str, optional
        When given, the expected lines are this lamp's listed usable lines that fall on the
        detector; by default they are the lines the reference solution used (the lines the
        reference exposure actually showed), which is usually the better choice.
    dark : Spectrum, array or path, optional
        Dark frame subtracted by the line finder in every exposure.

    Returns
    -------
    Reference
    """
    from .calibration import Solution

    source = ""
    if isinstance(solution, (str, os.PathLike)):
        source = str(solution)
        solution = Solution.load(solution)
    n_pixels = int(solution.n_pixels)
    grid = np.arange(n_pixels, dtype=float)
    wl_grid = np.asarray(solution.wavelength(grid), float)
    disp_grid = np.asarray(solution.dispersion(grid), float)
    if lamp is None:
        matches = solution.matches
        used = np.asarray(matches["used"], bool) if "used" in matches.colnames else True
        pixel = np.asarray(matches["pixel"], float)[used]
        wavelength = np.asarray(matches["wavelength_ref"], float)[used]
        if "pixel_err" in matches.colnames:
            pixel_err = np.asarray(matches["pixel_err"], float)[used]
        else:
            pixel_err = np.zeros_like(pixel)
    else:
        from . import levels

        names = [lamp] if isinstance(lamp, str) else list(lamp)
        lo, hi = float(np.min(wl_grid)), float(np.max(wl_grid))
        wls = []
        for name in names:
            table = levels.lamp_lines(name, wavelength_range=(lo, hi), medium=solution.medium)
            keep = np.asarray(table["usable"], bool) if "usable" in table.colnames else True
            wls.append(np.asarray(table["wavelength"], float)[keep])
        wavelength = np.concatenate(wls) if wls else np.zeros(0)
        pixel = np.asarray(solution.pixel(wavelength), float)
        pixel_err = np.zeros_like(pixel)
    fwhm = float(solution.fwhm_pixel)
    inside = np.isfinite(pixel) & (pixel >= 0) & (pixel <= n_pixels - 1)
    order = np.argsort(pixel[inside])
    dark_counts = None
    if dark is not None:
        dark_counts = _dark_counts(dark)
        if dark_counts.size != n_pixels:
            raise RitzlineError(
                f"dark frame has {dark_counts.size} pixels but the reference solution has "
                f"{n_pixels}; use a dark taken with the same detector"
            )
    lamps = tuple(names) if lamp is not None else tuple(getattr(solution, "lamps", ()) or ())
    return Reference(
        pixel=pixel[inside][order],
        pixel_err=np.nan_to_num(pixel_err[inside][order], nan=0.0),
        wavelength=wavelength[inside][order],
        n_pixels=n_pixels,
        fwhm_px=fwhm,
        wavelength_grid=wl_grid,
        dispersion_grid=disp_grid,
        centre_dispersion=float(solution.dispersion((n_pixels - 1) / 2.0)),
        medium=str(solution.medium),
        source=source,
        lamps=lamps,
        dark=dark_counts,
        # the instrument model the solution was made with (noise, line shape), when the
        # solution carries one: exposures then need no fresh noise or width estimate
        instrument=getattr(solution, "instrument", None),
    )


def _dark_counts(dark) -> np.ndarray:
    from .spectrum import read_spectrum, spectrum_arrays

    if isinstance(dark, (str, os.PathLike)):
        dark = read_spectrum(dark)
    return np.asarray(spectrum_arrays(dark).counts, float)


# ---- drift measurement ------------------------------------------------------------------


@dataclass(frozen=True)
class DriftFit:
    """Result of re-matching found lines to the reference lines and fitting the drift.

    ``found_index``/``ref_index`` pair the matched lines; ``used`` marks the pairs kept in
    the fit (after outlier rejection).  A line at reference pixel p appears at
    p + shift + stretch * (p - centre).
    """

    shift: float
    shift_err: float
    stretch: float
    stretch_err: float
    rms: float
    found_index: np.ndarray
    ref_index: np.ndarray
    used: np.ndarray
    coarse_shift: float

    @property
    def n_used(self) -> int:
        return int(np.count_nonzero(self.used))


HUBER_K = 1.345  # Huber's tuning constant: 95 % efficiency for Gaussian errors (common practice)


def _coarse_shift(found: np.ndarray, ref: np.ndarray, search: float, bin_px: float,
                  weight: np.ndarray | None = None) -> float:
    """The offset found - ref that lines up most lines (histogram vote of all pair offsets,
    each found line voting with its ``weight``)."""
    if found.size == 0 or ref.size == 0:
        return 0.0
    d = (found[:, None] - ref[None, :]).ravel()
    wv = None if weight is None else np.repeat(np.asarray(weight, float), ref.size)
    near = np.abs(d) <= search
    d = d[near]
    if d.size == 0:
        return 0.0
    wv = None if wv is None else wv[near]
    edges = np.arange(-search, search + bin_px, bin_px)
    counts, edges = np.histogram(d, bins=edges, weights=wv)
    # smooth over three bins so a vote split across a bin edge still wins
    smooth = np.convolve(counts, np.ones(3), mode="same")
    k = int(np.argmax(smooth))
    lo, hi = edges[max(k - 1, 0)], edges[min(k + 2, edges.size - 1)]
    sel = (d >= lo) & (d <= hi)
    if not sel.any():
        return 0.0
    # weighted median: when a faint companion's votes share the window, the bright lines win
    near = d[sel]
    wn = np.ones(near.size) if wv is None else wv[sel]
    order = np.argsort(near)
    cum = np.cumsum(wn[order])
    if cum[-1] <= 0:
        return float(np.median(near))
    return float(near[order][np.searchsorted(cum, 0.5 * cum[-1])])


def _match_nearest(found: np.ndarray, predicted: np.ndarray, tol: float):
    """One-to-one pairs (found_index, ref_index) with |found - predicted| <= tol."""
    if found.size == 0 or predicted.size == 0:
        empty = np.zeros(0, int)
        return empty, empty
    order = np.argsort(found)
    fs = found[order]
    j = np.clip(np.searchsorted(fs, predicted), 1, fs.size - 1) if fs.size > 1 else None
    if j is None:
        nearest = np.zeros(predicted.size, int)
    else:
        left_closer = np.abs(predicted - fs[j - 1]) <= np.abs(fs[j] - predicted)
        nearest = np.where(left_closer, j - 1, j)
    dist = np.abs(fs[nearest] - predicted)
    ok = np.flatnonzero(dist <= tol)
    # a found line claimed by two reference lines goes to the closer one
    ok = ok[np.argsort(dist[ok], kind="stable")]
    _, first = np.unique(nearest[ok], return_index=True)
    ref_idx = np.sort(ok[first])
    return order[nearest[ref_idx]], ref_idx


def fit_drift(
    found_pixel: np.ndarray,
    found_err: np.ndarray,
    ref_pixel: np.ndarray,
    ref_err: np.ndarray,
    centre: float,
    *,
    search_px: float = 25.0,
    match_px: float = 2.0,
    fit_mask: np.ndarray | None = None,
    clip: float = 5.0,
    vote_weight: np.ndarray | None = None,
) -> DriftFit:
    """Match found lines to reference lines and fit shift + stretch, robustly.

    Parameters
    ----------
    found_pixel, found_err : array
        Centroids (px) and their 1-sigma errors in the exposure.
    ref_pixel, ref_err : array
        The same lines in the reference (px); errors may be zero.
    centre : float
        Pivot of the stretch, (n_pixels - 1) / 2.
    search_px : float
        Largest shift searched for (px).
    match_px : float
        Largest distance (px) between a found line and its predicted position after the
        coarse shift.
    fit_mask : array of bool, optional
        Found lines allowed in the fit (e.g. not saturated or blended); all by default.
        Lines outside the mask still count as matched.
    clip : float
        Lines farther than this many robust sigmas from the fit get no weight.
    vote_weight : array, optional
        Weight of each found line in the coarse-shift vote (e.g. its SNR, so that the
        bright lines the reference lists outvote faint companions or unlisted lines);
        equal by default.

    Returns
    -------
    DriftFit

    Notes
    -----
    The model is ``found - ref = shift + stretch * (ref - centre)``, weights
    ``1 / (found_err**2 + ref_err**2)`` times Huber weights (iteratively reweighted least
    squares, k = 1.345 robust sigmas: 95 % efficiency on Gaussian errors, common practice).
    The parameter covariance is scaled by the reduced chi-square when that exceeds one, so
    scatter beyond the quoted centroid errors widens the uncertainties rather than being
    hidden.
    """
    found = np.asarray(found_pixel, float)
    ferr = np.asarray(found_err, float)
    ref = np.asarray(ref_pixel, float)
    rerr = np.asarray(ref_err, float)
    mask = np.ones(found.size, bool) if fit_mask is None else np.asarray(fit_mask, bool)
    nan = float("nan")
    vw = None if vote_weight is None else np.nan_to_num(np.asarray(vote_weight, float), nan=0.0)
    pick = mask if mask.any() else np.ones(found.size, bool)
    s0 = _coarse_shift(found[pick], ref, search_px, match_px / 2,
                       None if vw is None else np.clip(vw[pick], 0.0, None))
    fi, ri = _match_nearest(found, ref + s0, match_px)
    empty = np.zeros(0, bool)
    if fi.size == 0:
        return DriftFit(nan, nan, nan, nan, nan, fi, ri, empty, s0)

    x_all = ref - centre

    def solve(fi, ri, w):
        """Weighted least squares of found - ref = shift + stretch * x with weights ``w``
        (the 2 x 2 normal equations solved in closed form)."""
        x = x_all[ri]
        y = found[fi] - ref[ri]
        s0, s1, s2 = w.sum(), (w * x).sum(), (w * x * x).sum()
        t0, t1 = (w * y).sum(), (w * x * y).sum()
        det = s0 * s2 - s1 * s1
        if np.count_nonzero(w) >= 3 and det > 1e-9 * s0 * s2:
            cov = np.array([[s2, -s1], [-s1, s0]]) / det
            p = cov @ np.array([t0, t1])
        else:
            cov = np.array([[1.0 / s0, 0.0], [0.0, nan]])
            p = np.array([t0 / s0, 0.0])
        return p, cov, y - (p[0] + p[1] * x)

    def inverse_variance(fi, ri):
        var = ferr[fi] ** 2 + rerr[ri] ** 2
        good = np.isfinite(var) & (var > 0)
        floor = np.median(var[good]) if good.any() else 0.01**2
        return 1.0 / np.where(good, var, floor)

    usable = mask[fi]
    if not usable.any():
        return DriftFit(nan, nan, nan, nan, nan, fi, ri, np.zeros(fi.size, bool), s0)
    # second pass with the stretch from a first fit, so the far ends match too
    p, _, _ = solve(fi, ri, inverse_variance(fi, ri) * usable)
    predicted = ref + p[0] + p[1] * x_all
    fi, ri = _match_nearest(found, predicted, match_px)
    usable = mask[fi]
    if not usable.any():
        return DriftFit(nan, nan, nan, nan, nan, fi, ri, np.zeros(fi.size, bool), s0)
    # Iteratively reweighted least squares with Huber weights (full weight within
    # HUBER_K robust sigmas, k/|z| beyond) and none beyond ``clip``: a few lines pulled by
    # an unseen blend or a spike cannot move the fit, and every other line counts.
    w0 = inverse_variance(fi, ri) * usable
    h = usable.astype(float)
    for _ in range(12):
        p, cov, resid = solve(fi, ri, w0 * h)
        u = resid * np.sqrt(w0)
        act = usable & (h > 0)
        scale = max(1.4826 * float(np.median(np.abs(u[act]))), 1.0) if act.any() else 1.0
        z = np.abs(u) / scale
        new = np.where(z <= HUBER_K, 1.0, HUBER_K / np.maximum(z, 1e-300))
        new = np.where(usable & (z <= clip), new, 0.0)
        if not new.any():
            break
        if np.max(np.abs(new - h)) < 1e-3:
            h = new
            break
        h = new
    keep = h > 0
    w = w0 * h
    p, cov, r = solve(fi, ri, w)
    n = int(keep.sum())
    dof = n - (2 if n >= 3 else 1)
    chi2 = float(np.sum(w * r**2))
    factor = max(1.0, chi2 / dof) if dof > 0 else 1.0
    rms = float(np.sqrt(np.mean(r[keep] ** 2))) if n else nan
    return DriftFit(
        shift=float(p[0]),
        shift_err=float(np.sqrt(cov[0, 0] * factor)),
        stretch=float(p[1]),
        stretch_err=float(np.sqrt(cov[1, 1] * factor)) if np.isfinite(cov[1, 1]) else nan,
        rms=rms,
        found_index=fi,
        ref_index=ri,
        used=keep,
        coarse_shift=s0,
    )


# ---- measuring the reference lines where they are expected ------------------------------

_FWHM_PER_SIGMA = 2.0 * np.sqrt(2.0 * np.log(2.0))  # Gaussian FWHM / sigma (textbook)
_INV_SQRT2 = 1.0 / np.sqrt(2.0)
_INV_SQRT2PI = 1.0 / np.sqrt(2.0 * np.pi)


@dataclass(frozen=True)
class MeasuredLines:
    """Lines measured in one exposure (the columns the check uses from a line table)."""

    pixel: np.ndarray
    pixel_err: np.ndarray
    fwhm_pixel: np.ndarray
    snr: np.ndarray
    flags: np.ndarray
    n_found: int
    ref_index: np.ndarray | None = None  # expected line measured, when measured by reference

    def __len__(self) -> int:
        return int(self.pixel.size)

    @classmethod
    def from_table(cls, lines) -> MeasuredLines:
        return cls(
            pixel=np.asarray(lines["pixel"], float),
            pixel_err=np.asarray(lines["pixel_err"], float),
            fwhm_pixel=np.asarray(lines["fwhm_pixel"], float),
            snr=np.asarray(lines["snr"], float),
            flags=np.asarray(lines["flags"], str),
            n_found=len(lines),
        )


def _block_level(y: np.ndarray, valid: np.ndarray, block: int = 64, q: int = 30) -> np.ndarray:
    """A smooth background under a lamp spectrum: the ``q``-th percentile of each block of
    pixels, interpolated (lines fill a small fraction of each block)."""
    n = y.size
    nb = max(1, n // block)
    block = n // nb
    head = np.where(valid, y, np.nan)[: nb * block].reshape(nb, block)
    if valid[: nb * block].all():
        k = (q * (block - 1)) // 100
        level = np.partition(head, k, axis=1)[:, k]
    else:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            level = np.nanpercentile(head, q, axis=1)
        fill = np.isfinite(level)
        level = np.interp(np.arange(nb), np.flatnonzero(fill), level[fill]) if fill.any() \
            else np.zeros(nb)
    centres = (np.arange(nb) + 0.5) * block - 0.5
    return np.interp(np.arange(n, dtype=float), centres, level)


def _candidate_peaks(excess, valid, sigma_bg, fwhm, min_snr):
    """Positions (px) and matched-filter significances of every line-like peak: maxima of
    the excess convolved with the line profile, above ``min_snr`` and not a one-pixel spike.
    """
    from scipy.ndimage import maximum_filter1d

    sig = fwhm / _FWHM_PER_SIGMA
    half = max(1, int(np.ceil(2.5 * sig)))
    t = np.arange(-half, half + 1, dtype=float)
    kernel = np.exp(-0.5 * (t / sig) ** 2)
    kernel /= np.sqrt(np.sum(kernel**2))
    ex = np.where(valid, excess, 0.0)
    z = np.convolve(ex, kernel, mode="same") / max(sigma_bg, 1e-12)
    reach = max(1, round(0.5 * fwhm))
    top = maximum_filter1d(z, 2 * reach + 1, mode="nearest")
    left = np.concatenate(([-np.inf], z[:-1]))
    idx = np.flatnonzero((z == top) & (z > left) & (z >= min_snr))
    idx = idx[(idx > 0) & (idx < z.size - 1)]
    if idx.size == 0:
        return np.zeros(0), np.zeros(0)
    # a cosmic-ray hit or hot pixel is narrower than any line the optics can make
    raw = ex[idx]
    side = np.maximum(ex[idx - 1], ex[idx + 1])
    idx = idx[(side >= 0.15 * raw) | (fwhm < 1.5)]
    zm, z0, zp = z[idx - 1], z[idx], z[idx + 1]
    den = zm - 2.0 * z0 + zp
    frac = np.where(den < 0, 0.5 * (zm - zp) / np.where(den < 0, den, -1.0), 0.0)
    return idx + np.clip(frac, -0.5, 0.5), z0


def _profile(edges, c, s, derivatives=True):
    """Pixel-integrated unit Gaussian between consecutive pixel ``edges`` (last axis one
    longer than the result) and its derivatives by the centre c and the sigma s."""
    from scipy.special import ndtr

    u = (edges - c) / s
    cdf = ndtr(u)
    g = cdf[..., 1:] - cdf[..., :-1]
    if not derivatives:
        return g, None, None
    phi = _INV_SQRT2PI * np.exp(-0.5 * u * u)
    dg_dc = -(phi[..., 1:] - phi[..., :-1]) / s
    phiu = phi * u
    dg_ds = -(phiu[..., 1:] - phiu[..., :-1]) / s
    return g, dg_dc, dg_ds


def measure_known_lines(
    counts: np.ndarray,
    valid: np.ndarray,
    expected: np.ndarray,
    fwhm: float,
    *,
    saturation: float | None = None,
    variance=None,
    min_snr: float = 5.0,
    search_px: float = 25.0,
    match_px: float = 2.0,
    iterations: int = 6,
) -> MeasuredLines:
    """Measure lines where a reference says they are, instead of searching blind.

    A matched filter finds the line-like peaks; their vote against ``expected`` gives the
    coarse shift; then every expected line on the detector, and every other peak close
    enough to disturb it, is fitted at once (pixel-integrated Gaussian plus a linear local
    background, Gauss-Newton with the neighbours' current profiles subtracted, vectorised
    over lines).  Saturated and masked samples carry no weight, so a clipped line is
    measured from its wings.

    Parameters
    ----------
    counts, valid : array
        Counts (dark already subtracted) and the samples that may be used.
    expected : array
        Reference pixel of each expected line.
    fwhm : float
        Line FWHM (px) to start from.
    saturation : float, optional
        Samples at or above it are not fitted; lines touching them are flagged.
    variance : array, optional
        Noise variance (ADU^2) of every sample, from an instrument model; without it the
        variance is background noise plus a photon term estimated from the fit residuals.
    min_snr : float
        A line is found when its flux is at least this many standard errors.
    search_px, match_px : float
        Largest shift searched for, and largest distance of a fitted line from where the
        coarse shift puts it.

    Returns
    -------
    MeasuredLines
        One entry per expected line that was found (in no particular order) and
        ``n_found``, the number of distinct line-like features in the exposure.
    """
    y = np.where(valid, counts, 0.0)
    n = y.size
    clipped = (counts >= saturation) if saturation is not None else np.zeros(n, bool)
    usable = valid & ~clipped
    background = _block_level(counts, valid)
    excess = y - background
    d = np.diff(counts[valid])
    sigma_bg = 1.4826 * float(np.median(np.abs(d - np.median(d)))) / np.sqrt(2.0) if d.size \
        else 0.0
    empty = MeasuredLines(*(np.zeros(0) for _ in range(4)), np.zeros(0, str), 0,
                          np.zeros(0, int))
    if not sigma_bg > 0:
        # quantised, noiseless data: one count is the resolution of the measurement
        sigma_bg = 1.0
    peaks, z = _candidate_peaks(excess, valid, sigma_bg, fwhm, min_snr)
    if peaks.size == 0 or expected.size == 0:
        return dataclasses_replace(empty, n_found=int(peaks.size))
    s0 = _coarse_shift(peaks, expected, search_px, match_px / 2, z)
    predicted = expected + s0
    sig_ref = fwhm / _FWHM_PER_SIGMA
    on = (predicted > 1.0) & (predicted < n - 2.0)
    ref_idx = np.flatnonzero(on)
    if ref_idx.size == 0:
        return dataclasses_replace(empty, n_found=int(peaks.size))
    half = max(4, int(np.ceil(2.0 * fwhm)))
    # other peaks near an expected line are fitted too, so that they do not pull it
    pos_ref = predicted[ref_idx]
    gap = np.abs(peaks[:, None] - pos_ref[None, :])
    lonely = gap.min(axis=1) > 0.8 * fwhm
    near = gap.min(axis=1) <= half + 3.0 * fwhm
    extra = peaks[lonely & near]
    centre = np.concatenate([pos_ref, extra])
    m = centre.size
    is_ref = np.zeros(m, bool)
    is_ref[: ref_idx.size] = True
    offsets = np.arange(-half, half + 1)
    pix = np.rint(centre).astype(int)[:, None] + offsets[None, :]
    inside = (pix >= 0) & (pix < n)
    pix_c = np.clip(pix, 0, n - 1)
    x = pix.astype(float)
    yw = y[pix_c]
    w = (usable[pix_c] & inside).astype(float)
    if variance is not None:
        var = np.asarray(variance, float)[pix_c]
        w = w / np.where(var > 0, var, np.inf)
    # neighbours whose profile reaches a line's window
    reach = half + 3.0 * sig_ref
    dist = np.abs(centre[:, None] - centre[None, :])
    np.fill_diagonal(dist, np.inf)
    n_nb = int((dist <= reach).sum(axis=1).max()) if m > 1 else 0
    if n_nb:
        nb = np.argsort(dist, axis=1)[:, :n_nb]
        nb_ok = np.take_along_axis(dist, nb, axis=1) <= reach
    c = centre.copy()
    s = np.full(m, sig_ref)
    b0 = background[np.clip(np.rint(centre).astype(int), 0, n - 1)]
    b1 = np.zeros(m)
    f = np.maximum(excess[np.clip(np.rint(centre).astype(int), 0, n - 1)], 0.0) * \
        np.sqrt(2.0 * np.pi) * s
    xc = x - centre[:, None]
    edges = np.concatenate([x - 0.5, x[:, -1:] + 0.5], axis=1)
    jac = np.empty((m, 2 * half + 1, 5))
    jac[:, :, 3] = 1.0
    jac[:, :, 4] = xc
    eye = np.eye(5)[None]

    def linearise():
        """Residuals and Jacobian at the current parameters (neighbours held fixed)."""
        g, dgc, dgs = _profile(edges, c[:, None], s[:, None])
        model = b0[:, None] + b1[:, None] * xc + f[:, None] * g
        if n_nb:
            gn, _, _ = _profile(edges[:, None, :], c[nb][:, :, None], s[nb][:, :, None],
                                derivatives=False)
            model += np.einsum("mkw,mk->mw", gn, f[nb] * nb_ok)
        jac[:, :, 0] = f[:, None] * dgc
        jac[:, :, 1] = f[:, None] * dgs
        jac[:, :, 2] = g
        jw = jac * w[:, :, None]
        return yw - model, jw, np.einsum("mwi,mwj->mij", jw, jac)

    # Lines whose profiles overlap are updated alternately (red-black Gauss-Seidel in
    # position order): updating both of a close pair at once against each other's old
    # profile oscillates.
    colour = np.zeros(m, int)
    colour[np.argsort(centre)] = np.arange(m) % 2
    coupled = nb_ok.any(axis=1) if n_nb else np.zeros(m, bool)
    phases = [np.ones(m, bool)] if not coupled.any() else \
        [~coupled | (colour == 0), coupled & (colour == 1)]

    def iterate(n_iter, shape=True):
        """Gauss-Newton steps; with ``shape`` False only fluxes and backgrounds move."""
        nonlocal c, s, f, b0, b1
        for k_it in range(n_iter * len(phases)):
            move = phases[k_it % len(phases)]
            r, jw, ata = linearise()
            atr = np.einsum("mwi,mw->mi", jw, r)
            damp = 1e-6 * np.einsum("mii->mi", ata) + 1e-30
            try:
                step = np.linalg.solve(ata + damp[:, :, None] * eye, atr[:, :, None])[:, :, 0]
            except np.linalg.LinAlgError:
                step = np.zeros((m, 5))
            step[~np.isfinite(step) | ~move[:, None]] = 0.0
            if not shape:
                step[:, :2] = 0.0
            np.clip(step[:, 0], -0.5 * s, 0.5 * s, out=step[:, 0])
            np.clip(step[:, 1], -0.3 * s, 0.3 * s, out=step[:, 1])
            # a line stays near where the reference puts it (it may not wander onto
            # a neighbour and take its flux)
            c = np.clip(c + step[:, 0], centre - 0.6 * fwhm, centre + 0.6 * fwhm)
            s = np.clip(s + step[:, 1], 0.3 * sig_ref, 3.0 * sig_ref)
            f = f + step[:, 2]
            b0 = b0 + step[:, 3]
            b1 = b1 + step[:, 4]
            if shape and k_it % len(phases) == len(phases) - 1 and \
                    np.all(np.abs(step[:, 0]) < 1e-3 * s):
                break

    # fluxes first, at the expected positions and width: close pairs share their light
    # as the reference says before the positions and widths are let go
    iterate(2, shape=False)
    iterate(iterations)
    if variance is None:
        # No noise model: the variance of a sample is the background noise plus a photon
        # term proportional to the line signal there, var = sigma_bg^2 + k * signal (common
        # practice for counting detectors); k comes from the residuals of this first,
        # unweighted fit (least squares of r^2 / (1 - leverage) - sigma_bg^2 on the signal:
        # the fit follows its high-leverage samples, whose residuals understate the noise).
        # Twice: the second time from the residuals of the weighted fit.
        usable_w = w > 0
        for _ in range(2):
            r, jw, ata = linearise()
            g, _, _ = _profile(edges, c[:, None], s[:, None], derivatives=False)
            signal = np.maximum(f[:, None] * g, 0.0)
            try:
                lev = np.einsum("mwi,mij,mwj->mw", jw, np.linalg.inv(ata), jac)
            except np.linalg.LinAlgError:
                lev = np.zeros_like(r)
            use = usable_w & (f[:, None] > 0) & (lev < 0.95) & np.isfinite(r) & \
                np.isfinite(signal)
            # E[r^2] = variance * (1 - h), h the diagonal of the (weighted) hat matrix
            r2 = r[use] ** 2 / (1.0 - lev[use])
            den = float(np.sum(signal[use] ** 2))
            k = float(np.sum((r2 - sigma_bg**2) * signal[use])) / den if den > 0 else 0.0
            k = k if np.isfinite(k) and k > 0 else 0.0
            w = usable_w / (sigma_bg**2 + k * signal)
            iterate(3)
    r, jw, ata = linearise()
    n_used = (w > 0).sum(axis=1)
    dof = np.maximum(n_used - 5, 1)
    chi2 = np.sum(w * r * r, axis=1)
    # One noise scale for the exposure, the median reduced chi-square (every line's own
    # would be noisy); a line fitted far worse than the rest (a spike on it, an unlisted
    # neighbour) keeps its own, larger one.
    red = chi2 / dof
    fitted = (n_used >= 7) & (f > 0) & np.isfinite(red)
    scale_all = float(np.median(red[fitted])) if fitted.any() else 1.0
    if variance is not None:
        scale_all = max(scale_all, 1.0)
    scale = np.where(np.isfinite(red) & (red > 3.0 * scale_all), red, scale_all)
    with np.errstate(invalid="ignore", divide="ignore"):
        det_ok = np.ones(m, bool)
        try:
            cov = np.linalg.inv(ata) * scale[:, None, None]
        except np.linalg.LinAlgError:  # a line without enough usable samples
            det_ok = np.linalg.cond(ata) < 1e12
            cov = np.linalg.pinv(ata) * scale[:, None, None]
        c_err = np.sqrt(np.maximum(cov[:, 0, 0], 0))
        # significance against the noise alone: a bright line whose shape the Gaussian
        # misses (wings, skew) is no less there; its centroid error keeps the misfit
        f_err = np.sqrt(np.maximum(cov[:, 2, 2] * (scale_all / scale), 0))
        snr = f / f_err
    fwhm_fit = _FWHM_PER_SIGMA * s
    found = (
        is_ref & det_ok & (n_used >= 7) & np.isfinite(c) & np.isfinite(c_err) & (c_err > 0)
        & (snr >= min_snr) & (np.abs(c - centre) <= match_px)
        & (s > 0.31 * sig_ref) & (s < 2.99 * sig_ref)
    )  # fmt: skip
    core = np.abs(x - c[:, None]) <= max(1.0, 0.5 * fwhm)
    touched = np.any(core & clipped[pix_c] & inside, axis=1)
    flags = np.where(touched, "saturated", "")
    # An expected line whose fit did not hold (a shape the Gaussian misses, a tangle of
    # neighbours) but with a significant peak where it should be is there all the same:
    # it counts as found (not missing) and stays out of the drift fit (infinite error).
    unfit = is_ref & ~found
    gap_p = np.abs(peaks[:, None] - centre[None, unfit])
    near_p = gap_p.argmin(axis=0) if peaks.size else np.zeros(0, int)
    seen = gap_p[near_p, np.arange(near_p.size)] <= match_px if peaks.size else near_p > 0
    present = np.flatnonzero(unfit)[seen]
    keep = np.concatenate([np.flatnonzero(found), present])
    pixel_out = np.concatenate([c[found], peaks[near_p[seen]]])
    err_out = np.concatenate([c_err[found], np.full(present.size, np.inf)])
    fwhm_out = np.concatenate([fwhm_fit[found], np.full(present.size, np.nan)])
    snr_out = np.concatenate([snr[found], z[near_p[seen]]])
    flags_out = np.concatenate([flags[found], np.full(present.size, "unfitted")])
    # features: the expected lines found, and every other peak not sitting on one of them
    if keep.size:
        taken = np.abs(peaks[:, None] - pixel_out[None, :]).min(axis=1) <= 0.8 * fwhm
        n_found = int(keep.size + np.count_nonzero(~taken))
    else:
        n_found = int(peaks.size)
    return MeasuredLines(
        pixel=pixel_out,
        pixel_err=err_out,
        fwhm_pixel=fwhm_out,
        snr=snr_out,
        flags=flags_out.astype(str),
        n_found=n_found,
        ref_index=ref_idx[keep],
    )


@dataclass(frozen=True)
class FinderScale:
    """How the fit at expected positions relates to the line finder, per expected line.

    The reference positions come from the line finder; a fit of a plain Gaussian at a
    known position can centre an asymmetric or blended line differently, by a constant
    amount per line.  ``offset`` (px, fit minus finder) and ``width_ratio`` are measured
    once, on the first good exposure where both were run, and put every later fit on the
    finder's scale, so drift and width are measured against the reference consistently.
    """

    offset: np.ndarray
    width_ratio: float
    source: str = ""

    def digest(self) -> str:
        h = hashlib.sha256(np.ascontiguousarray(self.offset, float).tobytes())
        h.update(repr(self.width_ratio).encode())
        return h.hexdigest()[:16]


def finder_scale(checker: ExposureChecker, paths: Sequence[str | os.PathLike], *,
                 tries: int = 5) -> FinderScale | None:
    """Measure a :class:`FinderScale` on the first of ``paths`` (at most ``tries``) where
    the line finder and the fit at expected positions both match enough expected lines;
    None when none does."""
    from .spectrum import read_spectrum, spectrum_arrays

    ref, limits = checker.reference, checker.limits
    for path in list(paths)[:tries]:
        try:
            spectrum = read_spectrum(path)
        except Exception:
            continue
        arrays = spectrum_arrays(spectrum)
        if arrays.counts.size != ref.n_pixels:
            continue
        found = checker._lines(spectrum, arrays, "search")
        fast = checker._lines(spectrum, arrays, "expected")
        if found is None or fast is None or not len(fast) or fast.ref_index is None:
            continue
        fit = fit_drift(found.pixel, found.pixel_err, ref.pixel, ref.pixel_err, ref.centre,
                        search_px=checker.search_px, match_px=checker.match_px,
                        vote_weight=found.snr)  # fmt: skip
        if fit.n_used < limits.min_lines:
            continue
        finder_at = np.full(ref.pixel.size, np.nan)
        finder_at[fit.ref_index] = found.pixel[fit.found_index]
        finder_w = np.full(ref.pixel.size, np.nan)
        finder_w[fit.ref_index] = found.fwhm_pixel[fit.found_index]
        d = fast.pixel - finder_at[fast.ref_index]
        both = np.isfinite(d) & (np.abs(d) < checker.match_px)
        if both.sum() < limits.min_lines:
            continue
        offset = np.full(ref.pixel.size, float(np.median(d[both])))
        offset[fast.ref_index[both]] = d[both]
        ratio = float(np.median(fast.fwhm_pixel[both] / finder_w[fast.ref_index[both]]))
        return FinderScale(offset=offset, width_ratio=ratio if ratio > 0 else 1.0,
                           source=str(path))
    return None


# ---- per-exposure check -----------------------------------------------------------------


NO_LINES_REASON = "no lines found (lamp off?)"


def judge(row: dict, limits: CheckLimits, centre: float) -> tuple[str, list[str]]:
    """Status (pass / warn / fail) and every reason for it, from a measured row."""
    fail: list[str] = []
    warn: list[str] = []
    wf = limits.warn_fraction

    def grade(value: float, limit: float, fail_text: str, warn_text: str) -> None:
        """Fail above ``limit``, warn above the warn fraction of it."""
        if value > limit:
            fail.append(fail_text)
        elif value > wf * limit:
            warn.append(warn_text)

    n_lines, n_expected = row["n_lines"], row["n_expected"]
    if row.get("n_found") == 0:
        fail.append(NO_LINES_REASON)
    elif n_lines < limits.min_lines:
        fail.append(
            f"only {n_lines} of {n_expected} expected lines found (minimum {limits.min_lines})"
        )
    shift = row["shift_px"]
    if np.isfinite(shift):
        text = f"shift {shift:+.3f} ± {row['shift_err_px']:.3f} px"
        grade(abs(shift), limits.max_shift_px,
              f"{text} exceeds the limit of {limits.max_shift_px:g} px",
              f"{text} is above {wf:.0%} of the limit ({limits.max_shift_px:g} px)")
    elif n_lines >= limits.min_lines:
        fail.append("drift could not be measured (no clean matched lines)")
    stretch = row["stretch"]
    if np.isfinite(stretch):
        ends = abs(stretch) * centre
        text = f"stretch {stretch:+.2e} moves the detector ends by {ends:.3f} px"
        grade(ends, limits.max_shift_px,
              f"{text}, over the limit of {limits.max_shift_px:g} px",
              f"{text}, above {wf:.0%} of the limit ({limits.max_shift_px:g} px)")
    change = row["fwhm_change_pct"]
    if np.isfinite(change):
        text = f"FWHM {row['fwhm_px']:.3f} px is {change:+.1f}% vs the reference"
        grade(abs(change), limits.max_fwhm_change_pct,
              f"{text} (limit ±{limits.max_fwhm_change_pct:g}%)",
              f"{text}, above {wf:.0%} of the limit (±{limits.max_fwhm_change_pct:g}%)")
    n_missing = n_expected - n_lines
    if n_expected and n_missing / n_expected > limits.max_missing_fraction:
        listed = row["missing"].split(",")
        shown = ", ".join(listed[:8]) + (", …" if len(listed) > 8 else "")
        warn.append(f"{n_missing} of {n_expected} expected lines missing ({shown} nm)")
    masked = row.get("masked_samples")
    if masked is not None and masked > limits.max_masked_samples:
        warn.append(
            f"{masked} masked sample{'s' if masked != 1 else ''} (NaN, inf or masked in the "
            f"file), above the limit of {limits.max_masked_samples}"
        )
    sat = row["saturated_pixels"]
    if sat is not None and sat > 0:
        warn.append(f"{sat} saturated pixel{'s' if sat != 1 else ''}")
    snr = row["snr_median"]
    if np.isfinite(snr) and snr < limits.min_snr:
        warn.append(f"median line SNR {snr:.1f} is below {limits.min_snr:g}")
    if fail:
        return "fail", fail + warn
    if warn:
        return "warn", warn
    return "pass", []


def _blank_row(file: str) -> dict:
    row: dict = {}
    for name, kind, _, _ in SUMMARY_COLUMNS:
        row[name] = {"int": None, "float": float("nan"), "str": ""}[kind]
    row["file"] = file
    return row


# How an exposure's lines are measured: "expected" fits the reference's lines where the
# coarse shift puts them (fast; a matched filter still counts every line-like peak);
# "search" runs the blind line finder (peaks.find_lines) on the whole exposure.
MEASURE_METHODS = ("expected", "search")


@dataclass(frozen=True, eq=False)
class ExposureChecker:
    """Checks one exposure file against a :class:`Reference`; picklable, built once per run.

    Calling it with a path returns one summary row (a dict with :data:`SUMMARY_COLUMNS`
    except ``index``).  A file that cannot be read gives status ``error`` with the reader's
    message; nothing raises.
    """

    reference: Reference
    limits: CheckLimits = CheckLimits()
    method: str = "expected"
    scale: FinderScale | None = None

    def __post_init__(self) -> None:
        if self.method not in MEASURE_METHODS:
            raise RitzlineError(
                f"unknown line measurement {self.method!r}; use one of {', '.join(MEASURE_METHODS)}"
            )

    def fingerprint(self) -> dict:
        return {
            "reference": self.reference.digest(),
            "limits": asdict(self.limits),
            "lamps": list(self.reference.lamps),
            "method": self.method,
            "finder_scale": self.scale.digest() if self.scale is not None else None,
        }

    def __call__(self, path: str) -> dict:
        row = _blank_row(str(path))
        import warnings

        from .errors import RitzlineWarning

        try:
            from .spectrum import read_spectrum

            with warnings.catch_warnings(record=True) as caught:
                warnings.simplefilter("always", RitzlineWarning)
                spectrum = read_spectrum(path)
            # what the reader doubted goes into the row (worker processes print nothing)
            notes = [" ".join(str(w.message).split()) for w in caught
                     if issubclass(w.category, RitzlineWarning)]
        except (RitzlineError, OSError) as exc:
            row["status"] = "error"
            row["reasons"] = " ".join(str(exc).split()) or type(exc).__name__
            return row
        except Exception as exc:  # a reader bug on one odd file must not stop the batch
            row["status"] = "error"
            msg = " ".join(str(exc).split())
            row["reasons"] = f"{path}: could not be read ({type(exc).__name__}: {msg})"
            return row
        try:
            self._measure(spectrum, row)
        except Exception as exc:  # one bad exposure must not stop the batch
            row["status"] = "error"
            msg = " ".join(str(exc).split())
            row["reasons"] = f"check failed: {type(exc).__name__}: {msg}"
        if notes and row["status"] != "error":
            row["status"] = "warn" if row["status"] == "pass" else row["status"]
            row["reasons"] = "; ".join([r for r in [row["reasons"]] if r] + notes)
        return row

    def _measure(self, spectrum, row: dict) -> None:
        from .spectrum import spectrum_arrays

        ref, limits = self.reference, self.limits
        arrays = spectrum_arrays(spectrum)
        meta = arrays.meta
        row["timestamp"] = str(meta.get("timestamp") or "")
        row["masked_samples"] = int(np.count_nonzero(arrays.mask))
        if arrays.counts.size != ref.n_pixels or arrays.first_pixel != 0:
            row["status"] = "fail"
            row["reasons"] = (
                f"exposure has {arrays.counts.size} pixels (detector pixels "
                f"{arrays.first_pixel}-{arrays.last_pixel} in the file) but the reference "
                f"solution has {ref.n_pixels}; it was cropped or taken with another detector "
                "setting"
            )
            return
        # a solution that does not know its line width: the finder estimates it, and the
        # FWHM change stays unmeasured
        ref_fwhm = ref.fwhm_px if np.isfinite(ref.fwhm_px) and ref.fwhm_px > 0 else None
        sat_level = meta.get("saturation") or limits.saturation
        good = ~arrays.mask
        if sat_level is not None:
            row["saturated_pixels"] = int(np.count_nonzero(arrays.counts[good] >= sat_level))
        lines = self._lines(spectrum, arrays, self.method)
        if lines is not None and lines.ref_index is not None and self.scale is not None:
            lines = dataclasses_replace(
                lines, pixel=lines.pixel - self.scale.offset[lines.ref_index],
                fwhm_pixel=lines.fwhm_pixel / self.scale.width_ratio)  # fmt: skip
        search, match = self.search_px, self.match_px
        if lines is None or len(lines) == 0:
            row["n_found"] = 0 if lines is None else lines.n_found
            row["n_lines"] = 0
            row["n_fit"] = 0
            on = (ref.pixel >= 0) & (ref.pixel <= ref.n_pixels - 1)
            row["n_expected"] = int(np.count_nonzero(on))
            row["missing"] = ",".join(f"{w:.3f}" for w in ref.wavelength[on])
            status, reasons = judge(row, limits, ref.centre)
            row["status"], row["reasons"] = status, "; ".join(reasons)
            return
        pixel, pixel_err, fwhm = lines.pixel, lines.pixel_err, lines.fwhm_pixel
        snr, flags = lines.snr, lines.flags
        # Every matched line enters the drift fit with its own centroid error (which grows
        # with its measured width), blended and saturated ones included: the robust fit
        # down-weights the few that disagree.  On an instrument with asymmetric lines the
        # finder may flag every line as blended; leaving them out left 1-5 lines and
        # shifts of tens of pixels.  Only the width statistics keep to clean lines (a
        # blend or a clipped top is no measure of the resolution), with every line as the
        # fallback when too few are clean to speak for the detector.
        fittable = np.isfinite(pixel) & np.isfinite(pixel_err)
        # a line wider than the reference LSF is only a *suspected* blend: a defocused
        # exposure widens every line, and that is what the FWHM check must see
        clean = np.char.strip(np.char.replace(flags, "blend_suspect", ""), ", ") == ""
        row["n_found"] = int(lines.n_found)
        fit = fit_drift(
            pixel, pixel_err, ref.pixel, ref.pixel_err, ref.centre,
            search_px=search, match_px=match, fit_mask=fittable, vote_weight=snr,
        )
        shift = fit.shift if np.isfinite(fit.shift) else fit.coarse_shift
        stretch = fit.stretch if np.isfinite(fit.stretch) else 0.0
        predicted = ref.pixel + shift + stretch * (ref.pixel - ref.centre)
        edge = max(1.0, ref_fwhm or 1.0)
        on_detector = (predicted >= edge) & (predicted <= ref.n_pixels - 1 - edge)
        matched = np.zeros(ref.pixel.size, bool)
        matched[fit.ref_index] = True
        row["n_expected"] = int(np.count_nonzero(on_detector | matched))
        row["n_lines"] = int(fit.ref_index.size)
        row["missing"] = ",".join(f"{w:.3f}" for w in ref.wavelength[on_detector & ~matched])
        row["n_fit"] = fit.n_used
        if fit.ref_index.size:
            row["snr_median"] = float(np.median(snr[fit.found_index]))
        if fit.n_used:
            d_centre = ref.centre_dispersion
            row["shift_px"] = fit.shift
            row["shift_err_px"] = fit.shift_err
            row["shift_nm"] = fit.shift * d_centre
            row["shift_err_nm"] = fit.shift_err * abs(d_centre)
            row["stretch"] = fit.stretch
            row["stretch_err"] = fit.stretch_err
            row["fit_rms_px"] = fit.rms
            fi_all, ri_all = fit.found_index[fit.used], fit.ref_index[fit.used]
            pick = clean[fi_all]
            if pick.sum() < max(3, 0.25 * fi_all.size):
                pick = np.ones(fi_all.size, bool)
            w = fwhm[fi_all[pick]]
            ok = np.isfinite(w) & (w > 0)
            if ok.any():
                w = w[ok]
                med = float(np.median(w))
                row["fwhm_px"] = med
                # standard error of a median: 1.2533 sigma / sqrt(n) (common practice)
                spread = 1.4826 * float(np.median(np.abs(w - med)))
                n_w = w.size
                row["fwhm_err_px"] = float(1.2533 * spread / np.sqrt(n_w)) if n_w > 1 else np.nan
                if ref_fwhm:
                    row["fwhm_change_pct"] = 100.0 * (med / ref_fwhm - 1.0)
                rp = ri_all[pick][ok]
                lam = ref.wavelength[rp]
                r = lam / (w * np.abs(ref.dispersion_at(ref.pixel[rp])))
                row["resolving_power"] = float(np.median(r))
        status, reasons = judge(row, limits, ref.centre)
        row["status"] = status
        row["reasons"] = "; ".join(reasons)

    @property
    def search_px(self) -> float:
        """Largest shift searched for (px)."""
        return max(25.0, 3.0 * self.limits.max_shift_px)

    @property
    def match_px(self) -> float:
        """Largest distance (px) of a line from where the coarse shift puts it."""
        fwhm = self.reference.fwhm_px
        return max(1.5, 0.8 * fwhm) if np.isfinite(fwhm) and fwhm > 0 else 2.0

    def _lines(self, spectrum, arrays, method: str) -> MeasuredLines | None:
        """The exposure's lines by ``method``; None for a constant frame (nothing to find)."""
        ref, limits = self.reference, self.limits
        good = ~arrays.mask
        counts = arrays.counts[good]
        if counts.size == 0 or np.ptp(counts) == 0:
            return None
        ref_fwhm = ref.fwhm_px if np.isfinite(ref.fwhm_px) and ref.fwhm_px > 0 else None
        sat_level = arrays.meta.get("saturation") or limits.saturation
        if method == "expected" and ref_fwhm:
            y = arrays.counts if ref.dark is None else arrays.counts - ref.dark
            variance = None
            # of the raw counts, offset included; not for counts the model does not describe
            # (scaled or normalised files: their noise is measured instead)
            if hasattr(ref.instrument, "variance") and ref.instrument.describes(
                    arrays.counts, ~good):
                variance = ref.instrument.variance(np.where(good, arrays.counts, 0.0))
            return measure_known_lines(
                y, good, ref.pixel, ref_fwhm, saturation=sat_level, variance=variance,
                min_snr=limits.detect_snr, search_px=self.search_px, match_px=self.match_px,
            )  # fmt: skip
        return MeasuredLines.from_table(self._find_lines(spectrum, ref_fwhm, sat_level))

    def _find_lines(self, spectrum, ref_fwhm, sat_level):
        """The line table of one exposure: the reference's instrument model when the
        solution carries one (noise and width are then not re-estimated), else the finder's
        own estimates seeded with the reference FWHM."""
        from .peaks import find_lines

        kw = {}
        if self.reference.instrument is not None:
            kw["instrument"] = self.reference.instrument
        else:
            kw["fwhm_guess"] = ref_fwhm
        with warnings.catch_warnings():
            # "no line reaches the threshold" is this check's own verdict, not a warning
            warnings.simplefilter("ignore", UserWarning)
            return find_lines(spectrum, min_snr=self.limits.detect_snr, saturation=sat_level,
                              dark=self.reference.dark, **kw)


# ---- files -------------------------------------------------------------------------------


def _natural_key(path: Path):
    return [int(t) if t.isdigit() else t.lower() for t in re.split(r"(\d+)", str(path))]


def is_spectrum_name(path: str | os.PathLike) -> bool:
    """False for a file that is plainly not a spectrum by its name (``README.txt``,
    ``notes.json``, ``plot.png`` ...): see :data:`NOT_SPECTRUM_SUFFIXES`."""
    name = Path(path).name.lower()
    if name.endswith(NOT_SPECTRUM_SUFFIXES):
        return False
    stem = name.split(".", 1)[0]
    return stem not in NOT_SPECTRUM_STEMS


@dataclass(frozen=True)
class Inputs:
    """The exposure files to check and the files skipped because they are not spectra."""

    files: list[Path]
    skipped: list[Path]


def find_exposures(
    inputs: Iterable[str | os.PathLike],
    *,
    pattern: str | None = None,
    exclude: str | os.PathLike | None = None,
) -> Inputs:
    """Expand files and folders into the exposure files, in a stable order.

    Files are kept in the order given; each folder contributes the files matching
    ``pattern`` (a glob relative to the folder, e.g. ``"*.fits"`` or ``"**/*.txt"``; by
    default the usual spectrum suffixes, not recursive) in natural order (``exp2`` before
    ``exp10``).  Duplicates are dropped and files under ``exclude`` (the output folder)
    skipped.  Files that are not spectra by their name (:func:`is_spectrum_name`), given
    directly or found in a folder, go to ``skipped`` instead of becoming error rows; hidden
    files in folders are ignored.

    Raises
    ------
    RitzlineError
        When an input does not exist or no exposure file is found.
    """
    out: list[Path] = []
    skipped: list[Path] = []
    seen: set[str] = set()
    excl = Path(exclude).resolve() if exclude is not None else None

    def add(p: Path) -> None:
        key = str(p.resolve())
        if key in seen:
            return
        if excl is not None and (excl == p.resolve() or excl in p.resolve().parents):
            return
        seen.add(key)
        (out if is_spectrum_name(p) else skipped).append(p)

    inputs = list(inputs)
    for item in inputs:
        p = Path(item)
        if p.is_dir():
            if pattern:
                found = [q for q in p.glob(pattern) if q.is_file()]
            else:
                found = [q for q in p.iterdir() if q.is_file() and not q.name.startswith(".")]
            for q in sorted(found, key=_natural_key):
                if pattern or q.name.lower().endswith(SPECTRUM_SUFFIXES) or not is_spectrum_name(q):
                    add(q)
        elif p.exists():
            add(p)
        else:
            raise RitzlineError(f"{p}: no such file or folder")
    if not out:
        what = f"matching {pattern!r}" if pattern else "with a spectrum suffix"
        also = f" ({len(skipped)} other files skipped)" if skipped else ""
        raise RitzlineError(
            f"no exposure files {what} found in {', '.join(map(str, inputs))}{also}"
        )
    return Inputs(files=out, skipped=skipped)


def collect_exposures(
    inputs: Iterable[str | os.PathLike],
    *,
    pattern: str | None = None,
    exclude: str | os.PathLike | None = None,
) -> list[Path]:
    """The exposure files of :func:`find_exposures` (without the skipped ones)."""
    return find_exposures(inputs, pattern=pattern, exclude=exclude).files


# ---- output folder ownership -------------------------------------------------------------


# Lock files this process holds open: a forked worker closes its inherited copies, so the
# lock goes away with the run's parent process alone.
_HELD_LOCK_FDS: set[int] = set()


class OutputLockWarning(UserWarning):
    """A lock left by a run that is no longer alive was taken over."""


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # alive, owned by someone else
        return True
    try:  # a zombie is dead for our purpose
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except (OSError, IndexError):
        return True
    return state != "Z"


class OutputLock:
    """Exclusive ownership of an output folder while a batch run writes into it.

    The folder gets a lock file (``.ritzline-check.lock``: pid, host, start time, command)
    held with an advisory ``flock`` for the life of the run.  A second run into the same
    folder is refused with a message naming the owner.  A lock whose process is gone (killed,
    machine rebooted) is detected and taken over with an :class:`OutputLockWarning`: the
    kernel drops the ``flock`` of a dead process, and a lock written on this host by a pid
    that no longer runs is stale too.  A lock written by a run on *another* host that still
    holds it cannot be checked from here and is refused.
    """

    def __init__(self, folder: str | os.PathLike) -> None:
        self.folder = Path(folder)
        self.path = self.folder / LOCK_NAME
        self._fd: int | None = None

    @staticmethod
    def _describe(info: dict) -> str:
        return (f"pid {info.get('pid', '?')} on host {info.get('host', '?')}, started "
                f"{info.get('started', '?')}")  # fmt: skip

    def _read(self, fd: int) -> dict:
        os.lseek(fd, 0, os.SEEK_SET)
        raw = os.read(fd, 65536)
        try:
            info = json.loads(raw.decode("utf-8")) if raw.strip() else {}
        except (UnicodeDecodeError, json.JSONDecodeError):
            info = {"unreadable": True}
        return info if isinstance(info, dict) else {"unreadable": True}

    def acquire(self) -> OutputLock:
        import fcntl

        self.folder.mkdir(parents=True, exist_ok=True)
        host = socket.gethostname()
        for _ in range(20):
            fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except BlockingIOError:
                info = self._read(fd)
                os.close(fd)
                raise RitzlineError(
                    f"{self.folder} is in use by another check run ({self._describe(info)}); "
                    "wait for it to finish or write to another output folder"
                ) from None
            # the file may have been removed and recreated by its owner in the meantime
            try:
                same = os.fstat(fd).st_ino == os.stat(self.path).st_ino
            except FileNotFoundError:
                same = False
            if not same:
                os.close(fd)
                continue
            previous = self._read(fd)
            if previous and not previous.get("unreadable"):
                pid = previous.get("pid")
                other_host = previous.get("host") not in (None, host)
                if other_host:
                    os.close(fd)
                    raise RitzlineError(
                        f"{self.folder} holds a lock from a run on another host "
                        f"({self._describe(previous)}) that this host cannot check; if that "
                        f"run is over, delete {self.path} and start again"
                    )
                # we hold the flock, so its writer has died; a live pid is a reused one
                gone = "no longer running" if not (isinstance(pid, int) and _pid_alive(pid)) \
                    else "no longer holding it (its pid now belongs to another process)"
                warnings.warn(
                    f"{self.folder}: taking over a stale lock ({self._describe(previous)}; "
                    f"that run is {gone}); its finished exposures are kept",
                    OutputLockWarning,
                    stacklevel=3,
                )
            info = {
                "pid": os.getpid(),
                "host": host,
                "started": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
                "command": " ".join(sys.argv)[:2000],
            }
            os.ftruncate(fd, 0)
            os.lseek(fd, 0, os.SEEK_SET)
            os.write(fd, (json.dumps(info) + "\n").encode("utf-8"))
            os.fsync(fd)
            self._fd = fd
            _HELD_LOCK_FDS.add(fd)
            return self
        raise RitzlineError(f"{self.path}: could not take the lock (it keeps changing)")

    def release(self) -> None:
        if self._fd is None:
            return
        with contextlib.suppress(OSError):
            self.path.unlink()
        _HELD_LOCK_FDS.discard(self._fd)
        os.close(self._fd)
        self._fd = None

    def __enter__(self) -> OutputLock:
        return self.acquire()

    def __exit__(self, *exc) -> None:
        self.release()


# ---- journal -----------------------------------------------------------------------------


def _journal_header(fingerprint: dict) -> str:
    return json.dumps({"ritzline_journal": JOURNAL_SCHEMA, "config": fingerprint}) + "\n"


def _iter_journal(path: Path) -> Iterator[tuple[int, str, dict]]:
    """(line number, raw line, parsed object) of every complete, valid journal line.

    A torn last line (a run killed mid-write) has no newline and is skipped.
    """
    with open(path, encoding="utf-8") as fh:
        for number, line in enumerate(fh):
            if not line.endswith("\n"):
                break
            try:
                obj = json.loads(line)
            except json.JSONDecodeError:
                continue
            if isinstance(obj, dict):
                yield number, line, obj


def read_journal(path: str | os.PathLike) -> tuple[dict | None, dict[str, dict]]:
    """Read a journal: (header config or None, rows keyed by resolved file path).

    A torn last line is ignored; a file appearing twice keeps its last row.
    """
    path = Path(path)
    config = None
    rows: dict[str, dict] = {}
    if not path.exists():
        return None, rows
    for _, _, obj in _iter_journal(path):
        if "ritzline_journal" in obj:
            config = obj.get("config")
        elif "key" in obj:
            rows[obj["key"]] = obj
    return config, rows


class _Journal:
    """Append-only JSON-lines record of finished exposures; flushed after every row.

    Only the keys of finished exposures (with the size and modification time their file
    had) stay in memory; the rows live in the file.
    """

    def __init__(self, path: Path, fingerprint: dict, *, resume: bool) -> None:
        self.path = path
        self.done: dict[str, list | None] = {}
        last: dict[str, int] = {}
        config = None
        if resume and path.exists():
            for number, _, obj in _iter_journal(path):
                if "ritzline_journal" in obj:
                    config = obj.get("config")
                elif "key" in obj:
                    last[obj["key"]] = number
                    self.done[obj["key"]] = obj.get("file_stat")
            if last and config != json.loads(json.dumps(fingerprint)):
                raise RitzlineError(
                    f"{path}: the finished exposures were checked with another reference "
                    "solution or other thresholds; run without --resume to start over"
                )
        keep = set(last.values())
        # rewrite without torn or duplicate lines (streaming), then append
        with atomic_write(path, "w", encoding="utf-8") as fh:
            fh.write(_journal_header(fingerprint))
            if keep:
                for number, line, _ in _iter_journal(path):
                    if number in keep:
                        fh.write(line)
        self._fh = open(path, "a", encoding="utf-8")
        self._last_sync = time.monotonic()

    def append(self, row: dict) -> None:
        self._fh.write(json.dumps(row, allow_nan=True) + "\n")
        self._fh.flush()
        if time.monotonic() - self._last_sync > 1.0:
            os.fsync(self._fh.fileno())
            self._last_sync = time.monotonic()

    def close(self) -> None:
        with contextlib.suppress(OSError, ValueError):
            self._fh.flush()
            os.fsync(self._fh.fileno())
        self._fh.close()


# ---- summary -----------------------------------------------------------------------------


class _SummaryColumns:
    """Column arrays for ``n`` rows, filled in any order by input position."""

    def __init__(self, n: int) -> None:
        self.filled = np.zeros(n, bool)
        self.data: dict[str, np.ndarray] = {}
        self.masks: dict[str, np.ndarray] = {}
        for name, kind, _, _ in SUMMARY_COLUMNS:
            if kind == "int":
                self.data[name] = np.zeros(n, np.int64)
                self.masks[name] = np.ones(n, bool)
            elif kind == "float":
                self.data[name] = np.full(n, np.nan)
            else:
                self.data[name] = np.full(n, "", dtype=object)

    def put(self, i: int, row: dict) -> None:
        self.filled[i] = True
        for name, kind, _, _ in SUMMARY_COLUMNS:
            v = row.get(name)
            if v is None:
                continue
            if kind == "int":
                self.data[name][i] = int(v)
                self.masks[name][i] = False
            elif kind == "float":
                self.data[name][i] = float(v)
            else:
                self.data[name][i] = str(v)

    def table(self, meta: dict | None = None):
        import astropy.units as u
        from astropy.table import Column, MaskedColumn, Table

        sel = np.flatnonzero(self.filled)
        table = Table(meta=dict(meta or {}))
        for name, kind, unit, desc in SUMMARY_COLUMNS:
            unit_obj = u.Unit(unit) if unit else None
            data = self.data[name][sel]
            if kind == "int" and self.masks[name][sel].any():
                col = MaskedColumn(data, name=name, mask=self.masks[name][sel],
                                   description=desc, unit=unit_obj)
            elif kind == "str":
                text = data.astype(str) if data.size else np.zeros(0, dtype="U1")
                col = Column(text, name=name, description=desc)
            else:
                col = Column(data, name=name, description=desc, unit=unit_obj)
            table.add_column(col)
        return table


def summary_table(rows: Sequence[dict], meta: dict | None = None) -> Table:
    """The summary Table (units, descriptions, meta) from result rows, in the given order.

    ``index`` is the row's own ``index`` when set, else its position.
    """
    cols = _SummaryColumns(len(rows))
    for i, r in enumerate(rows):
        cols.put(i, r if r.get("index") is not None else dict(r, index=i))
    return cols.table(meta)


def _table_rows(table) -> list[dict]:
    """Plain-Python dicts of a summary table's rows (masked values -> None)."""
    out = []
    cols = {name: table[name] for name in _COLUMN_NAMES}
    for i in range(len(table)):
        row = {}
        for name, kind, _, _ in SUMMARY_COLUMNS:
            col = cols[name]
            if getattr(col, "mask", None) is not None and bool(np.ma.getmaskarray(col)[i]):
                row[name] = None
            elif kind == "int":
                row[name] = int(col[i])
            elif kind == "float":
                row[name] = float(col[i])
            else:
                row[name] = str(col[i])
        out.append(row)
    return out


def _totals(status) -> dict:
    status = np.asarray(status, str)
    counts = {s: int(np.count_nonzero(status == s)) for s in STATUSES}
    return {"exposures": int(status.size), **counts}


# ---- runner ------------------------------------------------------------------------------

_WORKER_TASK: Callable[[str], dict] | None = None


PARENT_POLL_S = 0.5


def _die_with_parent(parent: int) -> None:
    """End this worker when its parent process ends, however it ends (even SIGKILL).

    On Linux the kernel delivers SIGKILL when the parent dies (``PR_SET_PDEATHSIG``); on
    every platform a daemon thread also polls the parent pid, since a killed parent leaves
    the worker with another parent (or none).
    """
    with contextlib.suppress(Exception):
        import ctypes

        pr_set_pdeathsig = 1
        ctypes.CDLL(None, use_errno=True).prctl(pr_set_pdeathsig, int(signal.SIGKILL), 0, 0, 0)

    def watch() -> None:
        while True:
            if os.getppid() != parent:
                os._exit(1)
            time.sleep(PARENT_POLL_S)

    if os.getppid() != parent:  # the parent died before the signal was armed
        os._exit(1)
    threading.Thread(target=watch, name="ritzline-parent-watch", daemon=True).start()


def _init_worker(task: Callable[[str], dict], parent: int) -> None:
    global _WORKER_TASK
    _WORKER_TASK = task
    _die_with_parent(parent)
    # a forked worker must not keep the output folder's lock alive after its parent
    for fd in list(_HELD_LOCK_FDS):
        with contextlib.suppress(OSError):
            os.close(fd)
    _HELD_LOCK_FDS.clear()
    # the parent handles Ctrl-C and stops the pool; workers just stop when told
    signal.signal(signal.SIGINT, signal.SIG_IGN)


def _run_one(item: tuple[int, str, str]) -> tuple[int, str, dict]:
    index, key, path = item
    return index, key, _WORKER_TASK(path)


def _run_chunk(task: Callable[[str], dict], items: list[tuple[int, str, str]]):
    return [(index, key, task(path)) for index, key, path in items]


def _chunks(items: list, size: int) -> Iterator[list]:
    for i in range(0, len(items), size):
        yield items[i : i + size]


def _run_chunk_in_worker(items: list[tuple[int, str, str]]):
    return _run_chunk(_WORKER_TASK, items)


def _results_pool(task, items, workers: int, chunksize: int):
    """Results from ``workers`` processes: this one and ``workers - 1`` forked helpers.

    The parent checks exposures too (between collecting the helpers' results), so
    ``workers=2`` is two processes, not three: the scientific stack is loaded once less.
    The parent checks the first exposure before the helpers start, so they inherit its
    imports.  A helper that dies (killed, out of memory) stops the run with an error
    instead of leaving it waiting; the journal keeps what was finished.
    """
    items = list(items)
    if not items:
        return
    first, rest = items[0], items[1:]
    yield first[0], first[1], task(first[2])
    if workers <= 1 or not rest:
        for index, key, path in rest:
            yield index, key, task(path)
        return
    import collections
    import multiprocessing as mp
    from concurrent.futures import ProcessPoolExecutor
    from concurrent.futures.process import BrokenProcessPool

    chunks = _chunks(rest, chunksize)
    window = 2 * (workers - 1)  # chunks queued per helper: enough to keep it busy
    pending: collections.deque = collections.deque()
    executor = ProcessPoolExecutor(workers - 1, mp_context=mp.get_context(),
                                   initializer=_init_worker, initargs=(task, os.getpid()))

    def submit() -> None:
        while len(pending) < window:
            chunk = next(chunks, None)
            if chunk is None:
                return
            pending.append(executor.submit(_run_chunk_in_worker, chunk))

    def harvest(block: bool = False):
        while pending and (block or pending[0].done()):
            yield from pending.popleft().result()
            if block:
                return
        submit()

    try:
        submit()
        while True:
            mine = next(chunks, None)
            if mine is None:
                break
            for index, key, path in mine:
                yield index, key, task(path)
                yield from harvest()
        while pending:
            yield from harvest(block=True)
    except BrokenProcessPool as exc:
        raise _WorkerDied(
            "a worker process died (killed or out of memory); the exposures finished so far "
            "are kept: run the same command again with --resume"
        ) from exc
    finally:
        executor.shutdown(wait=True, cancel_futures=True)


class _WorkerDied(RitzlineError):
    """A helper process of the pool ended without returning its exposures."""


def _results_dask(task, items, scheduler: str, chunksize: int, workers: int | None):
    try:
        from distributed import Client, LocalCluster, as_completed
    except ImportError as exc:
        raise RitzlineError(
            'the Dask backend needs the optional dependency: pip install "ritzline[dask]"'
        ) from exc
    cluster = None
    if scheduler == "local":
        # worker processes on this machine, reachable on loopback only
        cluster = LocalCluster(n_workers=workers or os.cpu_count() or 1, threads_per_worker=1,
                               host="127.0.0.1", dashboard_address=None, processes=True)
        client = Client(cluster)
    elif scheduler == "local-threads":
        # one in-process worker with threads: no pickling, for notebooks and quick tests
        cluster = LocalCluster(n_workers=1, threads_per_worker=workers or 1, processes=False,
                               dashboard_address=None)
        client = Client(cluster)
    else:
        try:
            client = Client(scheduler, timeout="10s")
        except (OSError, TimeoutError) as exc:
            raise RitzlineError(f"cannot reach the Dask scheduler at {scheduler}: {exc}") from exc
    try:
        # one copy of the checker per worker, not one per task
        task_future = client.scatter(task, broadcast=True)
        n_workers = max(1, len(client.scheduler_info().get("workers", {})) or 1)
        window = 4 * n_workers
        chunks = _chunks(items, chunksize)
        pending = as_completed()
        for chunk in chunks:
            pending.add(client.submit(_run_chunk, task_future, chunk, pure=False))
            if pending.count() >= window:
                break
        for fut in pending:
            yield from fut.result()
            fut.release()
            nxt = next(chunks, None)
            if nxt is not None:
                pending.add(client.submit(_run_chunk, task_future, nxt, pure=False))
    finally:
        client.close()
        if cluster is not None:
            cluster.close()


def _file_stat(path: str) -> list | None:
    """[size, mtime in ns] of a file (None when it cannot be stat'ed), as JSON stores it."""
    try:
        st = os.stat(path)
    except OSError:
        return None
    return [st.st_size, st.st_mtime_ns]


OUTPUT_NAMES = (JOURNAL_NAME, "summary.ecsv", "summary.json", "report.html", "drift.png",
                "fwhm.png", "status.png")


def _remove_stale_temporaries(out: Path) -> None:
    """Delete temporary files a killed run left behind while writing one of our outputs."""
    for name in OUTPUT_NAMES:
        for tmp in out.glob(f".{name}.*.tmp"):
            with contextlib.suppress(OSError):
                tmp.unlink()


@dataclass(frozen=True)
class BatchResult:
    """What :func:`run_batch` did: the summary table (input order) and bookkeeping."""

    table: object
    n_skipped: int
    n_run: int
    elapsed: float
    complete: bool
    stopped: str = ""  # why the run stopped before the end ("" when it did not)

    @property
    def rows(self) -> list[dict]:
        """The summary rows as plain dicts (masked values as None)."""
        return _table_rows(self.table)


def run_batch(
    paths: Sequence[str | os.PathLike],
    task: Callable[[str], dict],
    *,
    outdir: str | os.PathLike | None = None,
    workers: int | None = None,
    dask_scheduler: str | None = None,
    resume: bool = False,
    fingerprint: dict | None = None,
    meta: dict | None = None,
    progress: Callable[[int, int], None] | None = None,
    summary_interval: float = 15.0,
    chunksize: int | None = None,
    lock: bool = True,
) -> BatchResult:
    """Run ``task(path) -> row`` over ``paths`` in parallel, journalled and resumable.

    Parameters
    ----------
    paths : sequence of path
        Exposure files, in the order the summary keeps.
    task : callable
        Picklable; sent once to each worker process.  Must not raise (rows carry errors).
    outdir : path, optional
        Where ``journal.jsonl`` and ``summary.ecsv`` go; nothing is written without it.
    workers : int, optional
        Local worker processes (default: the number of cores); 1 runs in this process.
    dask_scheduler : str, optional
        ``"local"`` for a local Dask cluster of worker processes (loopback only),
        ``"local-threads"`` for an in-process one, or a scheduler address
        ``tcp://host:port``.
    resume : bool
        Keep rows already in the journal (same ``fingerprint``) and skip those files.
    fingerprint : dict, optional
        JSON-able description of the task's configuration, stored in the journal header;
        a resume with a different fingerprint is refused.
    meta : dict, optional
        ``meta`` of the summary table.
    progress : callable(done, total), optional
        Called after every finished exposure.
    summary_interval : float
        Seconds between rebuilds of ``summary.ecsv`` during the run.
    chunksize : int, optional
        Exposures per task sent to a worker.
    lock : bool
        Take the output folder's :class:`OutputLock` for the run (pass False only when the
        caller already holds it).

    Returns
    -------
    BatchResult
        ``complete`` is False when some exposure has no row (a worker died: ``stopped``
        says so); the rows finished so far are in the journal and the summary.

    Raises
    ------
    RitzlineError
        When another run owns ``outdir``, or a resume meets a journal made with another
        configuration.

    Notes
    -----
    Each row is appended to the journal and flushed as soon as it arrives, so a run killed
    at any moment (Ctrl-C, SIGKILL) loses at most the exposures in flight; ``resume=True``
    then does only what is missing.  With ``outdir`` the parent keeps only the keys of
    finished exposures: the rows live in the journal, from which ``summary.ecsv`` is rebuilt
    atomically in input order, periodically and at the end (also after Ctrl-C), so memory
    does not grow with the number of exposures beyond the final table.
    """
    t0 = time.monotonic()
    files = [str(p) for p in paths]
    keys = [str(Path(p).resolve()) for p in files]
    index_of = {k: i for i, k in enumerate(keys)}
    if len(index_of) != len(keys):
        raise RitzlineError("the same exposure file is listed twice")
    workers = int(workers or os.cpu_count() or 1)
    out = Path(outdir) if outdir is not None else None
    owner = OutputLock(out).acquire() if out is not None and lock else None
    try:
        return _run_batch_locked(files, keys, index_of, task, out, workers, dask_scheduler,
                                 resume, fingerprint, meta, progress, summary_interval,
                                 chunksize, t0)
    finally:
        if owner is not None:
            owner.release()


def _run_batch_locked(files, keys, index_of, task, out, workers, dask_scheduler, resume,
                      fingerprint, meta, progress, summary_interval, chunksize, t0):
    journal = None
    done: dict[str, list | None] = {}
    in_memory: dict[int, dict] = {}
    if out is not None:
        out.mkdir(parents=True, exist_ok=True)
        _remove_stale_temporaries(out)
        journal = _Journal(out / JOURNAL_NAME, fingerprint or {}, resume=resume)
        done = journal.done
    # a finished exposure whose file changed since (size or modification time) is redone
    todo = [
        (i, k, f)
        for i, (k, f) in enumerate(zip(keys, files, strict=True))
        if k not in done or done[k] != _file_stat(f)
    ]
    n_skipped = len(keys) - len(todo)
    chunksize = chunksize or max(1, min(8, len(todo) // (8 * workers) or 1))

    def build_table():
        cols = _SummaryColumns(len(keys))
        if journal is not None:
            for _, _, obj in _iter_journal(journal.path):
                i = index_of.get(obj.get("key"))
                if i is not None:
                    cols.put(i, dict(obj, index=i, file=files[i]))
        else:
            for i, row in in_memory.items():
                cols.put(i, dict(row, index=i, file=files[i]))
        return cols.table(meta), int(cols.filled.sum())

    def write_summary():
        table, n_filled = build_table()
        if out is not None:
            write_table(table, out / "summary.ecsv")
        return table, n_filled

    n_run = 0
    table = None
    n_filled = 0
    stopped = ""
    try:
        if dask_scheduler:
            results = _results_dask(task, todo, dask_scheduler, chunksize, workers)
        else:
            results = _results_pool(task, todo, workers, chunksize)
        last_summary = time.monotonic()
        total = len(files)
        if progress is not None:
            progress(n_skipped, total)
        for index, key, row in results:
            if journal is not None:
                journal.append(dict(row, key=key, file_stat=_file_stat(files[index])))
            else:
                in_memory[index] = row
            n_run += 1
            if progress is not None:
                progress(n_skipped + n_run, total)
            if out is not None and time.monotonic() - last_summary > summary_interval:
                journal._fh.flush()
                write_summary()
                last_summary = time.monotonic()
    except _WorkerDied as exc:
        stopped = str(exc)
    finally:
        if journal is not None:
            journal.close()
        table, n_filled = write_summary()
    return BatchResult(
        table=table,
        n_skipped=n_skipped,
        n_run=n_run,
        elapsed=time.monotonic() - t0,
        complete=n_filled == len(keys),
        stopped=stopped,
    )


# ---- the public entry point ---------------------------------------------------------------


def check_exposures(
    paths: Iterable[str | os.PathLike],
    solution,
    *,
    lamp: str | Sequence[str] | None = None,
    dark=None,
    limits: CheckLimits | None = None,
    outdir: str | os.PathLike | None = None,
    workers: int | None = None,
    dask_scheduler: str | None = None,
    resume: bool = False,
    pattern: str | None = None,
    progress: Callable[[int, int], None] | None = None,
    figures: bool = True,
    method: str = "expected",
) -> Table:
    """Check exposures against a reference solution; return the summary table.

    Parameters
    ----------
    paths : iterable of path
        Exposure files and/or folders (folders are expanded with ``pattern``).
    solution : Solution or path
        The reference wavelength solution (``calibration.Solution`` or its JSON file).
    lamp : str or sequence of str, optional
        Take the expected lines from this lamp's line list instead of the reference's
        matched lines.
    dark : Spectrum, array or path, optional
        Dark frame passed to the line finder.
    limits : CheckLimits, optional
        Thresholds (defaults: :class:`CheckLimits`).
    outdir : path, optional
        Output folder: ``journal.jsonl``, ``summary.ecsv``, ``summary.json``, the figures and
        ``report.html``.  Without it nothing is written.
    workers : int, optional
        Local worker processes (default: number of cores).
    dask_scheduler : str, optional
        ``"local"`` or a Dask scheduler address instead of local processes.
    resume : bool
        Skip exposures already finished in ``outdir`` by an interrupted run.
    pattern : str, optional
        Glob for files inside folders.
    progress : callable(done, total), optional
        Progress callback.
    figures : bool
        Draw the figures and the HTML report (needs ``outdir``).
    method : {"expected", "search"}
        How each exposure's lines are measured: ``"expected"`` fits the reference's lines
        where they are expected (fast; see :func:`measure_known_lines`), ``"search"`` runs
        the blind line finder on the whole exposure.

    Returns
    -------
    astropy.table.Table
        One row per exposure in input order (:data:`SUMMARY_COLUMNS`); ``meta`` holds the
        totals, thresholds and reference description.
    """
    from . import __version__

    limits = limits or CheckLimits()
    found = find_exposures(paths, pattern=pattern, exclude=outdir)
    files = found.files
    reference = reference_from_solution(solution, lamp=lamp, dark=dark)
    checker = ExposureChecker(reference, limits, method)
    if method == "expected":
        checker = dataclasses_replace(checker, scale=finder_scale(checker, files))
    meta = {
        "ritzline_version": __version__,
        "reference_solution": reference.source or "(in memory)",
        "reference_fwhm_px": reference.fwhm_px,
        "reference_resolving_power": reference.resolving_power,
        "n_pixels": reference.n_pixels,
        "medium": reference.medium,
        "lamps": list(reference.lamps),
        "expected_lines": "lamp list" if lamp is not None else "reference matches",
        "line_measurement": method + (
            f" (put on the line finder's scale with {checker.scale.source})"
            if checker.scale is not None else ""),
        "instrument_model": "from the solution" if reference.instrument is not None
        else "none (noise and width estimated per exposure)",
        "dark": str(dark) if isinstance(dark, (str, os.PathLike)) else bool(dark is not None),
        "thresholds": asdict(limits),
        "drift_model": "line at reference pixel p appears at p + shift_px + stretch*(p - centre),"
        " centre = (n_pixels - 1)/2; positive shift = toward higher pixel index",
    }
    meta["skipped_files"] = [str(p) for p in found.skipped]
    owner = OutputLock(outdir) if outdir is not None else contextlib.nullcontext()
    with owner:
        result = run_batch(
            files,
            checker,
            outdir=outdir,
            workers=workers,
            dask_scheduler=dask_scheduler,
            resume=resume,
            fingerprint=checker.fingerprint(),
            meta=meta,
            progress=progress,
            lock=False,
        )
        return _finish_check(result, outdir, limits, meta, figures, len(files))


def _finish_check(result: BatchResult, outdir, limits: CheckLimits, meta: dict, figures: bool,
                  n_files: int):
    """Totals into the table's meta; summary.ecsv, summary.json and the report in OUTDIR."""
    from . import __version__

    table = result.table
    totals = _totals(table["status"])
    table.meta["totals"] = totals
    table.meta["complete"] = result.complete
    table.meta["missing_exposures"] = n_files - len(table)
    table.meta["stopped"] = result.stopped
    table.meta["resumed_exposures"] = result.n_skipped
    if outdir is not None:
        out = Path(outdir)
        write_table(table, out / "summary.ecsv")
        rate = result.n_run / result.elapsed if result.elapsed > 0 else float("nan")
        ref_keys = ("reference_solution", "reference_fwhm_px", "reference_resolving_power",
                    "n_pixels", "medium", "lamps", "expected_lines", "line_measurement",
                    "instrument_model", "dark")
        info = {
            "totals": totals,
            "thresholds": asdict(limits),
            # a solution may not know its line width (fwhm_pixel null): NaN -> null
            "reference": {k: None if isinstance(meta[k], float) and not np.isfinite(meta[k])
                          else meta[k] for k in ref_keys},
            "complete": result.complete,
            "missing_exposures": n_files - len(table),
            "stopped": result.stopped,
            "skipped_files": meta["skipped_files"],
            "resumed_exposures": result.n_skipped,
            "checked_exposures": result.n_run,
            "elapsed_s": round(result.elapsed, 3),
            "exposures_per_s": round(rate, 2) if np.isfinite(rate) else None,
            "ritzline_version": __version__,
            "drift_model": meta["drift_model"],
        }
        with atomic_write(out / "summary.json", "w", encoding="utf-8") as fh:
            json.dump(info, fh, indent=2, allow_nan=False, default=_json_default)
            fh.write("\n")
        if figures:
            from .report import write_report

            write_report(table, out, info)
    return table


def _json_default(obj):
    if isinstance(obj, float) and not np.isfinite(obj):
        return None
    if isinstance(obj, np.generic):
        return obj.item()
    return str(obj)
