"""Batch checking of exposures against a reference wavelength solution.

Each exposure is read, its lines are found and re-matched to the reference lines, and the
drift (shift and stretch on the detector, with uncertainties), line width, resolving power,
saturation and missing lines are measured and judged pass / warn / fail (or ``error`` for a
file that cannot be read).  The batch runner spreads exposures over local processes (or a
Dask cluster), appends each result to a JSON-lines journal in the output folder as it
arrives, and rebuilds ``summary.ecsv`` from that journal, so an interrupted run can resume
without losing or repeating an exposure.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
import re
import signal
import time
from collections.abc import Callable, Iterable, Iterator, Sequence
from dataclasses import asdict, dataclass, field
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
    "Reference",
    "check_exposures",
    "collect_exposures",
    "fit_drift",
    "judge",
    "read_journal",
    "reference_from_solution",
    "run_batch",
    "summary_table",
]

JOURNAL_NAME = "journal.jsonl"
JOURNAL_SCHEMA = 1
SPECTRUM_SUFFIXES = (".fits", ".fit", ".fts", ".fits.gz", ".ecsv", ".txt", ".csv", ".dat", ".tsv")

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
    min_snr: float = 10.0
    detect_snr: float = 5.0
    warn_fraction: float = 0.5
    saturation: float | None = None

    def __post_init__(self) -> None:
        if not self.max_shift_px > 0 or not self.max_fwhm_change_pct > 0:
            raise RitzlineError("max shift and max FWHM change must be positive")
        if self.min_lines < 1:
            raise RitzlineError(f"min_lines must be at least 1, got {self.min_lines}")
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


def _coarse_shift(found: np.ndarray, ref: np.ndarray, search: float, bin_px: float) -> float:
    """The offset found - ref that lines up most lines (histogram vote of all pair offsets)."""
    if found.size == 0 or ref.size == 0:
        return 0.0
    d = (found[:, None] - ref[None, :]).ravel()
    d = d[np.abs(d) <= search]
    if d.size == 0:
        return 0.0
    edges = np.arange(-search, search + bin_px, bin_px)
    counts, edges = np.histogram(d, bins=edges)
    # smooth over three bins so a vote split across a bin edge still wins
    smooth = np.convolve(counts, np.ones(3), mode="same")
    k = int(np.argmax(smooth))
    lo, hi = edges[max(k - 1, 0)], edges[min(k + 2, edges.size - 1)]
    near = d[(d >= lo) & (d <= hi)]
    return float(np.median(near)) if near.size else 0.0


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
) -> DriftFit:
    """Match found lines to reference lines and fit shift + stretch by weighted least squares.

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
        Outlier rejection in units of the robust scatter of normalised residuals.

    Returns
    -------
    DriftFit

    Notes
    -----
    The model is ``found - ref = shift + stretch * (ref - centre)``, weights
    ``1 / (found_err**2 + ref_err**2)``.  The parameter covariance is scaled by the reduced
    chi-square when that exceeds one, so scatter beyond the quoted centroid errors widens
    the uncertainties rather than being hidden.
    """
    found = np.asarray(found_pixel, float)
    ferr = np.asarray(found_err, float)
    ref = np.asarray(ref_pixel, float)
    rerr = np.asarray(ref_err, float)
    mask = np.ones(found.size, bool) if fit_mask is None else np.asarray(fit_mask, bool)
    nan = float("nan")
    s0 = _coarse_shift(found[mask] if mask.any() else found, ref, search_px, match_px / 2)
    fi, ri = _match_nearest(found, ref + s0, match_px)
    empty = np.zeros(0, bool)
    if fi.size == 0:
        return DriftFit(nan, nan, nan, nan, nan, fi, ri, empty, s0)

    def solve(sel):
        x = ref[ri][sel] - centre
        y = found[fi][sel] - ref[ri][sel]
        var = ferr[fi][sel] ** 2 + rerr[ri][sel] ** 2
        good = np.isfinite(var) & (var > 0)
        floor = np.median(var[good]) if good.any() else 0.01**2
        w = 1.0 / np.where(good, var, floor)
        if sel.sum() >= 3 and np.ptp(x) > 0:
            a = np.stack([np.ones_like(x), x], axis=1)
            ata = a.T @ (a * w[:, None])
            cov = np.linalg.inv(ata)
            p = cov @ (a.T @ (w * y))
            r = y - a @ p
        else:
            cov = np.array([[1.0 / w.sum(), 0.0], [0.0, nan]])
            p = np.array([np.sum(w * y) / w.sum(), 0.0])
            r = y - p[0]
        return p, cov, r, w

    usable = mask[fi]
    if not usable.any():
        return DriftFit(nan, nan, nan, nan, nan, fi, ri, np.zeros(fi.size, bool), s0)
    # second pass with the stretch from a first fit, so the far ends match too
    p, _, _, _ = solve(usable)
    predicted = ref + p[0] + p[1] * (ref - centre)
    fi, ri = _match_nearest(found, predicted, match_px)
    usable = mask[fi]
    if not usable.any():
        return DriftFit(nan, nan, nan, nan, nan, fi, ri, np.zeros(fi.size, bool), s0)
    keep = usable.copy()
    for _ in range(3):
        p, cov, r, w = solve(keep)
        x = ref[ri] - centre
        resid = found[fi] - ref[ri] - (p[0] + p[1] * x)
        norm = resid * np.sqrt(_weights_all(ferr[fi], rerr[ri], w))
        scale = max(1.4826 * float(np.median(np.abs(norm[keep]))), 1.0)
        new = usable & (np.abs(norm) <= clip * scale)
        if new.sum() < 1 or np.array_equal(new, keep):
            break
        keep = new
    p, cov, r, w = solve(keep)
    n = int(keep.sum())
    dof = n - (2 if n >= 3 else 1)
    chi2 = float(np.sum(w * r**2))
    factor = max(1.0, chi2 / dof) if dof > 0 else 1.0
    rms = float(np.sqrt(np.mean(r**2))) if n else nan
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


def _weights_all(ferr, rerr, w_sel):
    var = ferr**2 + rerr**2
    floor = 1.0 / np.median(w_sel) if w_sel.size else 0.01**2
    return 1.0 / np.where(np.isfinite(var) & (var > 0), var, floor)


# ---- per-exposure check -----------------------------------------------------------------


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
    if n_lines < limits.min_lines:
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


@dataclass(frozen=True, eq=False)
class ExposureChecker:
    """Checks one exposure file against a :class:`Reference`; picklable, built once per run.

    Calling it with a path returns one summary row (a dict with :data:`SUMMARY_COLUMNS`
    except ``index``).  A file that cannot be read gives status ``error`` with the reader's
    message; nothing raises.
    """

    reference: Reference
    limits: CheckLimits = CheckLimits()

    def fingerprint(self) -> dict:
        return {
            "reference": self.reference.digest(),
            "limits": asdict(self.limits),
            "lamps": list(self.reference.lamps),
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
        from .peaks import find_lines
        from .spectrum import spectrum_arrays

        ref, limits = self.reference, self.limits
        arrays = spectrum_arrays(spectrum)
        meta = arrays.meta
        row["timestamp"] = str(meta.get("timestamp") or "")
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
        if sat_level is not None:
            good = ~arrays.mask
            row["saturated_pixels"] = int(np.count_nonzero(arrays.counts[good] >= sat_level))
        lines = find_lines(
            spectrum,
            min_snr=limits.detect_snr,
            fwhm_guess=ref_fwhm,
            saturation=sat_level,
            dark=ref.dark,
        )
        pixel = np.asarray(lines["pixel"], float)
        pixel_err = np.asarray(lines["pixel_err"], float)
        fwhm = np.asarray(lines["fwhm_pixel"], float)
        snr = np.asarray(lines["snr"], float)
        # A line wider than the reference LSF is only a *suspected* blend: a defocused
        # exposure widens every line, and that is what the FWHM check must see.  Saturated,
        # blended and edge lines stay out of the drift fit and the width.
        flags = np.char.replace(np.asarray(lines["flags"], str), "blend_suspect", "")
        clean = (np.char.strip(flags, ", ") == "") & np.isfinite(pixel) & np.isfinite(pixel_err)
        row["n_found"] = int(pixel.size)
        search = max(25.0, 3.0 * limits.max_shift_px)
        match = max(1.5, 0.8 * ref_fwhm) if ref_fwhm else 2.0
        fit = fit_drift(
            pixel, pixel_err, ref.pixel, ref.pixel_err, ref.centre,
            search_px=search, match_px=match, fit_mask=clean,
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
            fi = fit.found_index[fit.used]
            w = fwhm[fi]
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
                rp = fit.ref_index[fit.used][ok]
                lam = ref.wavelength[rp]
                r = lam / (w * np.abs(ref.dispersion_at(ref.pixel[rp])))
                row["resolving_power"] = float(np.median(r))
        status, reasons = judge(row, limits, ref.centre)
        row["status"] = status
        row["reasons"] = "; ".join(reasons)


# ---- files -------------------------------------------------------------------------------


def _natural_key(path: Path):
    return [int(t) if t.isdigit() else t.lower() for t in re.split(r"(\d+)", str(path))]


def collect_exposures(
    inputs: Iterable[str | os.PathLike],
    *,
    pattern: str | None = None,
    exclude: str | os.PathLike | None = None,
) -> list[Path]:
    """Expand files and folders into the list of exposure files, in a stable order.

    Files are kept in the order given; each folder contributes the files matching
    ``pattern`` (a glob relative to the folder, e.g. ``"*.fits"`` or ``"**/*.txt"``; by
    default the usual spectrum suffixes, not recursive) in natural order (``exp2`` before
    ``exp10``).  Duplicates are dropped and files under ``exclude`` (the output folder)
    skipped.

    Raises
    ------
    RitzlineError
        When an input does not exist or nothing is found.
    """
    out: list[Path] = []
    seen: set[str] = set()
    excl = Path(exclude).resolve() if exclude is not None else None

    def add(p: Path) -> None:
        key = str(p.resolve())
        if key in seen:
            return
        if excl is not None and (excl == p.resolve() or excl in p.resolve().parents):
            return
        seen.add(key)
        out.append(p)

    for item in inputs:
        p = Path(item)
        if p.is_dir():
            if pattern:
                found = [q for q in p.glob(pattern) if q.is_file()]
            else:
                found = [
                    q
                    for q in p.iterdir()
                    if q.is_file() and q.name.lower().endswith(SPECTRUM_SUFFIXES)
                    and not q.name.startswith(".")
                ]
            for q in sorted(found, key=_natural_key):
                add(q)
        elif p.exists():
            add(p)
        else:
            raise RitzlineError(f"{p}: no such file or folder")
    if not out:
        what = f"matching {pattern!r}" if pattern else "with a spectrum suffix"
        raise RitzlineError(f"no exposure files {what} found in {', '.join(map(str, inputs))}")
    return out


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


def _init_worker(task: Callable[[str], dict]) -> None:
    global _WORKER_TASK
    _WORKER_TASK = task
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
                                   initializer=_init_worker, initargs=(task,))

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
        raise RitzlineError(
            "a worker process died (killed or out of memory); the exposures finished so far "
            "are kept: run the same command again with --resume"
        ) from exc
    finally:
        executor.shutdown(wait=True, cancel_futures=True)


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

    Returns
    -------
    BatchResult

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
    journal = None
    done: dict[str, list | None] = {}
    in_memory: dict[int, dict] = {}
    out = Path(outdir) if outdir is not None else None
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

    Returns
    -------
    astropy.table.Table
        One row per exposure in input order (:data:`SUMMARY_COLUMNS`); ``meta`` holds the
        totals, thresholds and reference description.
    """
    from . import __version__

    limits = limits or CheckLimits()
    files = collect_exposures(paths, pattern=pattern, exclude=outdir)
    reference = reference_from_solution(solution, lamp=lamp, dark=dark)
    checker = ExposureChecker(reference, limits)
    meta = {
        "ritzline_version": __version__,
        "reference_solution": reference.source or "(in memory)",
        "reference_fwhm_px": reference.fwhm_px,
        "reference_resolving_power": reference.resolving_power,
        "n_pixels": reference.n_pixels,
        "medium": reference.medium,
        "lamps": list(reference.lamps),
        "expected_lines": "lamp list" if lamp is not None else "reference matches",
        "dark": str(dark) if isinstance(dark, (str, os.PathLike)) else bool(dark is not None),
        "thresholds": asdict(limits),
        "drift_model": "line at reference pixel p appears at p + shift_px + stretch*(p - centre),"
        " centre = (n_pixels - 1)/2; positive shift = toward higher pixel index",
    }
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
    )
    table = result.table
    totals = _totals(table["status"])
    table.meta["totals"] = totals
    table.meta["complete"] = result.complete
    table.meta["resumed_exposures"] = result.n_skipped
    if outdir is not None:
        out = Path(outdir)
        write_table(table, out / "summary.ecsv")
        rate = result.n_run / result.elapsed if result.elapsed > 0 else float("nan")
        ref_keys = ("reference_solution", "reference_fwhm_px", "reference_resolving_power",
                    "n_pixels", "medium", "lamps", "expected_lines", "dark")
        info = {
            "totals": totals,
            "thresholds": asdict(limits),
            # a solution may not know its line width (fwhm_pixel null): NaN -> null
            "reference": {k: None if isinstance(meta[k], float) and not np.isfinite(meta[k])
                          else meta[k] for k in ref_keys},
            "complete": result.complete,
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
