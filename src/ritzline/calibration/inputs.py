"""What a calibration starts from: the detected lamp lines of each exposure (with the
uncertainty their shape allows) and every listed line of each exposure's lamps (with the
uncertainty the list and the resolution allow)."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..errors import CalibrationError

# Listed lines closer than this fraction of the FWHM make one feature at this resolution
# (common practice: two equal Gaussians closer than ~0.8 FWHM show a single peak).
MERGE_FRACTION = 0.6
# A listed line the lamp definition or the list flags (value from memory, no Ritz check,
# self-absorbed resonance line, ...) takes part with this fraction of the FWHM added to its
# reference uncertainty instead of being dropped.
FLAGGED_FRACTION = 0.05
# Lamp line intensities vary with current, pressure and spectral response: the ratio of two
# listed intensities is taken as known to a factor e (1 sigma in ln) when a blend's centroid
# is computed from them.
LN_INTENSITY_SCATTER = 1.0
# A line broader than the local LSF by this factor is taken as an unresolved blend.
BROAD = 1.25


@dataclass(frozen=True)
class Lines:
    """Detected lines of one or several exposures of one detector, sorted by pixel."""

    pixel: np.ndarray
    pixel_err: np.ndarray
    flux: np.ndarray
    snr: np.ndarray
    fwhm: np.ndarray
    lsf: np.ndarray  # LSF FWHM expected at each line (pixels), from its neighbours' widths
    frame: np.ndarray  # index of the exposure each line was found in
    n_pixels: int

    @property
    def fwhm_median(self) -> float:
        ok = np.isfinite(self.fwhm)
        return float(np.median(self.fwhm[ok])) if ok.any() else float("nan")


@dataclass(frozen=True)
class Refs:
    """Listed lamp lines (one row per exposure whose lamps list them), sorted by wavelength."""

    wavelength: np.ndarray
    wavelength_err: np.ndarray
    intensity: np.ndarray
    species: np.ndarray
    designation: np.ndarray
    frame: np.ndarray


def detections(spectrum, n_pixels: int | None) -> tuple[Lines, dict]:
    """Lines of a lamp exposure: run ``find_lines`` on a spectrum, or take a line table.

    Every line takes part with the ``pixel_err`` it was given, except that a line broader
    than the LSF around it (an unresolved blend, judged against its neighbours' widths, not
    one global width) has its error widened by a quarter of its excess width.  Flags are
    not a reason to leave a line out: saturated and edge lines carry their own errors."""
    from astropy.table import Table

    info: dict = {}
    if isinstance(spectrum, Table):
        table = spectrum
        n = n_pixels or table.meta.get("n_pixels")
        if n is None:
            raise CalibrationError(
                "a line table was given without the detector length: pass n_pixels= or put "
                "'n_pixels' in the table meta"
            )
    else:
        from ..peaks import find_lines
        from ..spectrum import spectrum_arrays

        arrays = spectrum_arrays(spectrum)
        n = arrays.counts.size
        info = {k: arrays.meta.get(k) for k in ("source", "sha256") if arrays.meta.get(k)}
        table = find_lines(spectrum)
    if "pixel" not in table.colnames:
        raise CalibrationError("the line table has no 'pixel' column")
    info["instrument"] = table.meta.get("instrument")
    p = np.asarray(table["pixel"], float)
    m = p.size

    def col(name, default):
        return np.asarray(table[name], float) if name in table.colnames else np.full(m, default)

    perr = col("pixel_err", 0.05)
    perr = np.where(np.isfinite(perr) & (perr > 0), perr, 0.05)
    fwhm = col("fwhm_pixel", np.nan)
    flags = np.asarray(table["flags"], str) if "flags" in table.colnames else np.full(m, "")
    saturated = np.char.find(flags.astype(str), "saturated") >= 0
    local = _local_lsf(p, fwhm, ~saturated, int(n), info["instrument"])
    excess = np.sqrt(np.clip(fwhm**2 - local**2, 0, None))
    broad = np.isfinite(excess) & (fwhm > BROAD * local) & ~saturated
    perr = np.where(broad, np.hypot(perr, 0.25 * excess), perr)
    order = np.argsort(p)
    lines = Lines(pixel=p[order], pixel_err=perr[order], flux=col("flux", np.nan)[order],
                  snr=col("snr", np.nan)[order], fwhm=fwhm[order], lsf=local[order],
                  frame=np.zeros(m, int), n_pixels=int(n))
    return lines, info


def _local_lsf(p, fwhm, ok, n, instrument) -> np.ndarray:
    """The LSF width expected at each line: a robust quadratic through the lines' own widths
    along the detector, or the instrument model's width where that is larger (the model is
    extrapolated beyond its bright lines; a line is a blend only when broader than both)."""
    own = _width_trend(p, fwhm, ok, n)
    if isinstance(instrument, dict):
        try:
            from ..instrument import Instrument

            model = np.asarray(Instrument.from_dict(instrument).fwhm_at(p), float)
            return np.fmax(model, own)
        except Exception:
            pass
    return own


def _width_trend(p, fwhm, ok, n) -> np.ndarray:
    ok = ok & np.isfinite(fwhm) & (fwhm > 0)
    if ok.sum() < 4:
        med = np.nanmedian(fwhm) if np.isfinite(fwhm).any() else np.nan
        return np.full(p.size, med)
    x = 2 * p / (n - 1) - 1
    deg = 2 if ok.sum() >= 8 else 0
    use = ok.copy()
    for _ in range(4):
        c = np.polynomial.polynomial.polyfit(x[use], np.log(fwhm[use]), deg)
        r = np.log(fwhm) - np.polynomial.polynomial.polyval(x, c)
        s = max(0.05, 1.4826 * float(np.median(np.abs(r[use]))))
        new = ok & (np.abs(r) < 3 * s)
        if new.sum() < deg + 3 or np.array_equal(new, use):
            break
        use = new
    return np.exp(np.polynomial.polynomial.polyval(x, c))


def pooled(parts: list[Lines]) -> Lines:
    """Lines of several exposures of one detector, each tagged with its exposure index."""
    if len(parts) == 1:
        return parts[0]
    n = {p.n_pixels for p in parts}
    if len(n) != 1:
        raise CalibrationError(f"the exposures have different lengths {sorted(n)}: one "
                               "detector is needed for one solution")
    cat = {k: np.concatenate([getattr(p, k) for p in parts])
           for k in ("pixel", "pixel_err", "flux", "snr", "fwhm", "lsf")}
    frame = np.concatenate([np.full(p.pixel.size, i) for i, p in enumerate(parts)])
    order = np.argsort(cat["pixel"], kind="stable")
    return Lines(**{k: v[order] for k, v in cat.items()}, frame=frame[order],
                 n_pixels=n.pop())


def references(lamps_per_frame, wavelength_range, medium: str,
               fwhm_nm: float | None = None) -> Refs:
    """Every listed line of each exposure's lamps inside the range.

    With ``fwhm_nm`` (the resolution in nm), listed lines closer than ``MERGE_FRACTION`` of
    it become one feature: at the centroid of their listed intensities, with the error that
    a factor-e doubt on each intensity gives (at the middle, with half the extent as error,
    when an intensity is unknown or the species differ); and lines the list flags get
    ``FLAGGED_FRACTION`` of the FWHM added to their error.  Nothing is dropped."""
    from .. import levels

    parts = []
    for frame, lamps in enumerate(lamps_per_frame):
        for name in lamps:
            t = levels.lamp_lines(name, wavelength_range=wavelength_range, medium=medium)
            wl = np.asarray(t["wavelength"], float)
            err = np.asarray(t["wavelength_err"], float)
            err = np.where(np.isfinite(err) & (err >= 0), err, 0.001)
            flagged = ~np.asarray(t["usable"], bool)
            if fwhm_nm is not None:
                err = np.where(flagged, np.hypot(err, FLAGGED_FRACTION * fwhm_nm), err)
            parts.append((wl, err, np.asarray(t["intensity"], float),
                          np.asarray(t["species"], str), np.asarray(t["designation"], str),
                          np.full(wl.size, frame)))
    if not parts:
        return Refs(*(np.zeros(0) for _ in range(6)))
    wl, err, inten, species, desig, frame = (np.concatenate(c) for c in zip(*parts, strict=True))
    # one row per (frame, wavelength): a species listed by two lamps of one frame counts once
    key = np.round(wl, 6) + 1e4 * frame
    _, first = np.unique(key, return_index=True)
    cols = [c[first] for c in (wl, err, inten, species, desig.astype(object), frame)]
    if fwhm_nm is not None:
        cols = _merge_unresolved(*cols, fwhm_nm)
    order = np.lexsort((cols[5], cols[0]))
    wl, err, inten, species, desig, frame = (c[order] for c in cols)
    return Refs(wl, err, inten, species, desig.astype(str), frame)


def _merge_unresolved(wl, err, inten, species, desig, frame, fwhm_nm):
    keep = np.ones(wl.size, bool)
    wl, err, inten, desig = wl.copy(), err.copy(), inten.copy(), desig.copy()
    for f in np.unique(frame):
        idx = np.flatnonzero(frame == f)
        idx = idx[np.argsort(wl[idx])]
        breaks = np.flatnonzero(np.diff(wl[idx]) >= MERGE_FRACTION * fwhm_nm) + 1
        for grp in np.split(idx, breaks):
            if grp.size < 2:
                continue
            w = inten[grp]
            lo, hi = wl[grp].min(), wl[grp].max()
            if np.all(np.isfinite(w) & (w > 0)) and np.unique(species[grp]).size == 1:
                c = float(np.sum(w * wl[grp]) / w.sum())
                # d c / d ln w_i = w_i (wl_i - c) / sum w
                doubt = LN_INTENSITY_SCATTER * math.sqrt(
                    float(np.sum((w * (wl[grp] - c) / w.sum()) ** 2)))
                total = float(w.sum())
            else:
                c, doubt, total = 0.5 * (lo + hi), 0.5 * (hi - lo), float(np.nansum(w)) or np.nan
            head = grp[0]
            desig[head] = "unresolved: " + " + ".join(
                f"{species[i]} {wl[i]:.4f}" for i in grp)
            wl[head], inten[head] = c, total
            err[head] = math.hypot(float(err[grp].max()), doubt)
            keep[grp[1:]] = False
    return [c[keep] for c in (wl, err, inten, species, desig, frame)]
