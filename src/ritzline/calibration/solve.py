"""``calibrate``: from one or several lamp exposures of one detector to one trusted
:class:`Solution`, or a :class:`~ritzline.errors.CalibrationError` saying what was tried."""

from __future__ import annotations

import math
import time
from functools import lru_cache

import numpy as np
from numpy.polynomial import chebyshev as _cheb

from ..errors import CalibrationError
from ..instrument import Instrument
from . import fit as _fit
from .inputs import Lines, Refs, detections, pooled, references
from .search import initial_pairs, pair_starts, vote_cells
from .solution import Solution, _line_columns, _version

DEFAULT_RANGE_NM = (200.0, 1100.0)
# largest look-elsewhere-corrected chance probability accepted.  The growth bends each
# candidate map within the curvature prior, a freedom the count of candidate maps does not
# see: on simulated wrong-lamp and random-line exposures (tests/benchmarks/
# bench_calibrate.py) the best corrected chance reaches ~3e-5, so the bar sits below it.
CONFIDENT_P = 1e-5
# with a guess the map's shape is the earlier one: the shift hypotheses are the whole search
CONFIDENT_P_GUESS = 1e-3
MAX_CHI2 = 25.0  # residuals above 5x the measured centroid errors are not a solution
MIN_LINES = 4  # a map checked by fewer lines is never returned without a guess
# a candidate this many orders of magnitude below chance (after the look-elsewhere factor)
# ends the search: no other start could do better by enough to matter
DECISIVE = 20.0


def calibrate(
    spectrum,
    lamps=("Ne",),
    *,
    wavelength_range=None,
    degree: int | None = None,
    guess: Solution | None = None,
    medium: str = "air",
    n_pixels: int | None = None,
    max_shift: float = 40.0,
) -> Solution:
    """Solve the pixel -> wavelength map of reference-lamp exposures without a starting guess.

    Parameters
    ----------
    spectrum : specutils.Spectrum, 1-D array of counts, astropy Table of lines, or a list
        The lamp exposure on a pixel axis (lines are found with ``peaks.find_lines``), or a
        line table with at least a ``pixel`` column (``pixel_err``, ``flux``, ``snr``,
        ``fwhm_pixel``, ``flags`` used when present) and ``n_pixels`` in its meta.  A list
        of such exposures of one detector (e.g. a neon and a mercury frame taken one after
        the other) gives one solution from all of them.
    lamps : str, sequence of str, or (with a list of exposures) one of those per exposure
        Lamp names known to ``levels.lamp_lines`` (e.g. "Ne", ("Hg", "Ar")); with several
        exposures, e.g. ``[("Ne",), ("Hg",)]`` or ``["Ne", "Hg+Ar"]``.
    wavelength_range : (low, high), nm or Quantity, optional
        Coarse range the detector lies in; default 200-1100 nm.
    degree : int, optional
        Chebyshev degree (default 5, with a curvature prior on the terms beyond the linear
        one: the lines decide what they can, the prior holds the rest; the solution's
        ``meta["degree_limited"]`` says when the number of lines limited it).
    guess : Solution, optional
        An earlier solution of the same detector: it seeds the search (a shift of up to
        ``max_shift`` pixels) and its shape becomes the prior of the new map, which the
        lines may bend as far as they can tell; fewer lines are needed.
    medium : {"air", "vacuum"}
        Medium of the reference wavelengths and of the solution.
    n_pixels : int, optional
        Detector length, needed only when ``spectrum`` is a line table without it in meta.
    max_shift : float
        Largest drift (pixels) searched on the ``guess`` path.

    Returns
    -------
    Solution

    Raises
    ------
    CalibrationError
        When no trustworthy solution exists: too few lines, no consistent match (wrong lamp,
        wrong range, not a lamp exposure), or a match that could be chance.  The message says
        what was tried and what is missing.
    """
    t0 = time.perf_counter()
    if medium not in ("air", "vacuum"):
        raise CalibrationError(f"medium must be 'air' or 'vacuum', got {medium!r}")
    frames, lamps_per_frame = _frames(spectrum, lamps)
    wrange = _as_nm_range(wavelength_range)
    parts, infos = zip(*(detections(s, n_pixels) for s in frames), strict=True)
    det = pooled(list(parts))
    if guess is not None:
        if guess.n_pixels != det.n_pixels:
            raise CalibrationError(f"the guess was made for {guess.n_pixels} pixels, this "
                                   f"exposure has {det.n_pixels}")
        if guess.medium != medium:
            raise CalibrationError(
                f"the guess is in {guess.medium} wavelengths but medium={medium!r} was asked")
        lo, hi = guess.wavelength_limits
        margin = (hi - lo) * 0.1
        wrange = (max(wrange[0], lo - margin), min(wrange[1], hi + margin))

    @lru_cache(maxsize=16)
    def refs_at(key: int | None) -> Refs:
        fwhm = None if key is None else 10 ** (key / 20)
        return references(lamps_per_frame, wrange, medium, fwhm)

    raw = refs_at(None)
    all_lamps = tuple(dict.fromkeys(n for f in lamps_per_frame for n in f))
    tried = (f"{det.pixel.size} lines detected, {raw.wavelength.size} listed "
             f"{'+'.join(all_lamps)} lines in {wrange[0]:.0f}-{wrange[1]:.0f} nm ({medium})")
    if det.pixel.size < (3 if guess is not None else MIN_LINES):
        raise CalibrationError(
            f"too few lines to calibrate: {tried}. Is this a lamp exposure? Check the "
            "exposure level (lines need SNR >= 5) and that the lamp was on.")
    if raw.wavelength.size < 4:
        raise CalibrationError(
            f"too few reference lines: {tried}. Widen the wavelength range or add a lamp.")
    if guess is not None:
        found = _from_guess(det, refs_at, guess, degree, max_shift)
        verdict, what = "confident (from guess)", (
            f"a shift of up to {max_shift:g} px of the guess, its shape as the prior")
    else:
        found = _blind(det, refs_at, raw, wrange, degree)
        verdict, what = "confident", "spacing-ratio votes of line quadruplets and line pairs"
    if found is None:
        raise CalibrationError(
            f"no consistent match found ({what}): {tried}. Wrong lamp, wrong wavelength "
            "range, or not a lamp exposure?")
    fit, ref = found
    n_used = int(fit.di.size)
    need = 3 if guess is not None else MIN_LINES
    if n_used < need:
        raise CalibrationError(
            f"only {n_used} lines matched, too few to check the map, after {what}: {tried}. "
            "Add a lamp or an exposure of another lamp, expose longer, or give --guess.")
    if fit.chi2r > MAX_CHI2:
        raise CalibrationError(
            f"the best match ({n_used} lines) leaves residuals {math.sqrt(fit.chi2r):.1f}x "
            f"larger than the centroid errors (reduced chi-square {fit.chi2r:.0f} > "
            f"{MAX_CHI2:g}): misidentified or blended lines, after {what}: {tried}. Check the "
            "lamp and range, or give --degree/--guess.")
    bar = CONFIDENT_P if guess is None else CONFIDENT_P_GUESS
    if fit.log10_p > math.log10(bar):
        raise CalibrationError(
            f"best match ({n_used} lines) could be chance (p = {10**fit.log10_p:.2g} > "
            f"{bar:g}, {fit.n_trials} candidate maps examined) after {what}: "
            f"{tried}. Wrong lamp or range, or too few lines: add a lamp or an exposure of "
            "another lamp, expose longer, or give --range/--guess.")
    one = len(infos) == 1
    meta = {"created": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
            "ritzline_version": _version(), "wavelength_range": list(wrange),
            "n_detected": int(det.pixel.size), "n_reference": int(ref.wavelength.size),
            **{k: infos[0].get(s) if one else [i.get(s) for i in infos]
               for k, s in (("input", "source"), ("input_sha256", "sha256"))},
            "exposures": [list(f) for f in lamps_per_frame],
            "solve_seconds": time.perf_counter() - t0}
    return _solution(det, ref, fit, all_lamps, medium, meta, verdict, infos[0])


def _frames(spectrum, lamps):
    """(exposures, lamp names per exposure) from calibrate's two first arguments."""
    many = isinstance(spectrum, (list, tuple)) and len(spectrum) > 0 and not np.isscalar(
        spectrum[0])
    if not many:
        names = (lamps,) if isinstance(lamps, str) else tuple(lamps)
        if not names:
            raise CalibrationError("no lamp given: name the lamp species, e.g. lamps=('Ne',)")
        return [spectrum], (names,)
    per = [lamps] * len(spectrum) if isinstance(lamps, str) else list(lamps)
    if len(per) != len(spectrum):
        raise CalibrationError(f"{len(spectrum)} exposures need one lamp entry each, got "
                               f"{len(per)}: e.g. lamps=[('Ne',), ('Hg',)]")
    names = tuple((p,) if isinstance(p, str) else tuple(p) for p in per)
    if not all(names):
        raise CalibrationError("every exposure needs its lamp named, e.g. [('Ne',), ('Hg',)]")
    return list(spectrum), names


def _as_nm_range(wavelength_range) -> tuple[float, float]:
    if wavelength_range is None:
        return DEFAULT_RANGE_NM
    import astropy.units as u

    lo, hi = sorted(float(v.to_value(u.nm, equivalencies=u.spectral()) if hasattr(v, "unit")
                          else v) for v in wavelength_range)
    if not (math.isfinite(lo) and math.isfinite(hi)) or hi - lo <= 0:
        raise CalibrationError(f"wavelength_range {wavelength_range!r} is empty or not finite")
    return lo, hi


def _resolution_key(fwhm_nm: float) -> int | None:
    """Resolutions within 12 % share one merged reference list."""
    return round(20 * math.log10(fwhm_nm)) if math.isfinite(fwhm_nm) and fwhm_nm > 0 else None


def _remap(raw: Refs, ref: Refs, ri) -> np.ndarray:
    """Index in ``ref`` (a merged list) of each ``raw`` line: the same exposure's nearest."""
    ri = np.asarray(ri, int)
    d = np.abs(ref.wavelength[None, :] - raw.wavelength[ri, None])
    return np.argmin(np.where(ref.frame[None, :] == raw.frame[ri, None], d, np.inf), axis=1)


def _fwhm_nm(det: Lines, fit) -> float:
    fw = det.fwhm[fit.di]
    ok = np.isfinite(fw)
    if not ok.any():
        return float("nan")
    disp = np.abs(_fit._dispersion(fit, det.pixel[fit.di][ok], det.n_pixels))
    return float(np.median(fw[ok] * disp))


def _blind(det: Lines, refs_at, raw: Refs, wrange, degree):
    """Grow every start the searches propose, keep the least likely to be chance, regrow it
    against the list merged at the measured resolution, and test it."""
    model = _fit.Model.blind(degree)
    seeds, n_cells = vote_cells(det, raw, wrange)
    fw_px = det.fwhm_median
    candidates = []

    def try_start(ref, di, ri):
        f = _fit.grow(det, ref, di, ri, model)
        if f is not None and f.di.size >= MIN_LINES:
            f.log10_p = _fit.log10_chance(det, ref, f, 1)
            candidates.append((f, ref))
        return f

    for _count, _direction, pairs, d_cell in seeds:
        if candidates and min(c[0].log10_p for c in candidates) < -DECISIVE - math.log10(
                max(n_cells, 1)):
            break
        pairs = pairs[det.frame[pairs[:, 0]] == raw.frame[pairs[:, 1]]]
        if pairs.shape[0] < 3:
            continue
        ref = refs_at(_resolution_key(fw_px * d_cell))
        pairs = np.stack([pairs[:, 0], _remap(raw, ref, pairs[:, 1])], 1)
        try_start(ref, *initial_pairs(pairs))
    n_trials = n_cells
    best = min(candidates, key=lambda c: c[0].log10_p, default=None)
    if best is None or best[0].log10_p + math.log10(max(n_trials, 1)) > math.log10(
            CONFIDENT_P):
        starts, n_pairs = pair_starts(det, raw, wrange)
        n_trials += n_pairs
        for di, ri in starts:
            d_est = abs(np.polyfit(det.pixel[di], raw.wavelength[ri], 1)[0])
            ref = refs_at(_resolution_key(fw_px * d_est))
            try_start(ref, di, _remap(raw, ref, ri))
        best = min(candidates, key=lambda c: c[0].log10_p, default=None)
    if best is None:
        return None
    fit, ref = best
    key = _resolution_key(_fwhm_nm(det, fit))
    if key is not None and refs_at(key) is not ref:
        ref2 = refs_at(key)
        again = _fit.grow(det, ref2, fit.di, _remap(ref, ref2, fit.ri), model)
        if again is not None and again.di.size >= fit.di.size - 1:
            fit, ref = again, ref2
    fit = _fit.vouched_ends(det, ref, fit, model)
    fit.n_trials = max(n_trials, len(candidates), 1)
    fit.log10_p = _fit.log10_chance(det, ref, fit, fit.n_trials)
    return fit, ref


def _from_guess(det: Lines, refs_at, guess: Solution, degree, max_shift):
    """Seed with the earlier solution: vote for the shift, start from the lines it then
    predicts, and grow under a prior centred on the earlier shape."""
    n = det.n_pixels
    disp = np.abs(guess.dispersion(np.linspace(0, n - 1, 16)))
    fwhm_nm = guess.fwhm_pixel * float(np.median(disp)) if math.isfinite(
        guess.fwhm_pixel) else float("nan")
    ref = refs_at(_resolution_key(fwhm_nm))
    p_old = guess.pixel(ref.wavelength)
    inside = np.isfinite(p_old) & (p_old > -max_shift) & (p_old < n - 1 + max_shift)
    if inside.sum() < 2:
        return None
    delta = det.pixel[:, None] - p_old[None, inside]
    near = (np.abs(delta) < max_shift) & (det.frame[:, None] == ref.frame[None, inside])
    if not near.any():
        return None
    bins = np.arange(-max_shift, max_shift + 0.5, 0.5)
    hist, _ = np.histogram(delta[near], bins=bins)
    hist = hist + np.r_[0, hist[:-1]] + np.r_[hist[1:], 0]
    shift = float(bins[np.argmax(hist)] + 0.25)
    n_trials = int(near.sum())
    coef = _shifted(guess, shift)
    deg = guess.degree if degree is None else int(degree)
    blind = _fit.Model.blind(deg)
    mean = np.zeros(deg + 1)
    mean[: min(deg, guess.degree) + 1] = coef[: deg + 1]
    sd_old = np.zeros(deg + 1)
    k = min(deg, guess.degree) + 1
    sd_old[:k] = np.sqrt(np.clip(np.diag(guess.covariance)[:k], 0, None))
    # the earlier shape, loosened by a tenth of the blind curvature prior: the lines may
    # bend it as far as they can tell, a few lines only shift and stretch it
    sd = np.hypot(sd_old, 0.1 * blind.sd * abs(coef[1]))
    sd[:2] = np.inf
    model = _fit.Model(deg, mean, sd, relative=False)
    band_px = guess.wavelength_err(det.pixel) / np.abs(guess.dispersion(det.pixel))
    tol = np.hypot(2.0, _fit.Z_WINDOW * band_px)
    p_new = p_old + shift
    d = np.abs(det.pixel[:, None] - p_new[None, :]) / tol[:, None]
    d[det.frame[:, None] != ref.frame[None, :]] = np.inf
    best_r = np.argmin(d, axis=1)
    ok = d[np.arange(det.pixel.size), best_r] < 1
    di, ri = np.flatnonzero(ok), best_r[ok]
    if di.size < 2:
        return None
    _, first = np.unique(ri, return_index=True)
    fit = _fit.grow(det, ref, di[first], ri[first], model)
    if fit is None:
        return None
    fit.n_trials, fit.method = n_trials, "guess as prior"
    fit.log10_p = _fit.log10_chance(det, ref, fit, n_trials)
    return fit, ref


def _shifted(guess: Solution, shift: float) -> np.ndarray:
    """Chebyshev coefficients of the earlier map moved by ``shift`` pixels."""
    n, deg = guess.n_pixels, guess.degree
    nodes = np.cos(np.pi * (np.arange(deg + 1) + 0.5) / (deg + 1))
    p = (nodes + 1) * (n - 1) / 2
    return _cheb.chebfit(nodes, guess.wavelength(p - shift), deg)


def _symmetric(cov) -> np.ndarray:
    """Exactly symmetric (inversions leave rounding-level asymmetry, which the solution
    file's reader refuses)."""
    cov = np.asarray(cov, float)
    return 0.5 * (cov + cov.T)


def _solution(det: Lines, ref: Refs, fit, lamps, medium, meta, verdict, info) -> Solution:
    n = det.n_pixels
    dropped = list(fit.dropped.items())
    di = np.r_[fit.di, [k[0] for k, _ in dropped]].astype(int)
    ri = np.r_[fit.ri, [k[1] for k, _ in dropped]].astype(int)
    used = np.r_[np.ones(fit.di.size, bool), np.zeros(len(dropped), bool)]
    reason = np.r_[np.full(fit.di.size, ""), [r for _, r in dropped]].astype(str)
    x = _fit.xnorm(det.pixel[di], n)
    resid = _cheb.chebval(x, fit.coef) - ref.wavelength[ri]
    disp = _cheb.chebval(x, _cheb.chebder(fit.coef)) * 2 / (n - 1)
    lines = _line_columns(
        pixel=det.pixel[di], pixel_err=det.pixel_err[di], wavelength_ref=ref.wavelength[ri],
        wavelength_ref_err=ref.wavelength_err[ri], species=ref.species[ri],
        designation=ref.designation[ri], flux=det.flux[di], snr=det.snr[di],
        residual_nm=resid, used=used, reason=reason, exposure=det.frame[di])
    fw = det.fwhm[fit.di]
    fw = fw[np.isfinite(fw)]
    determined = _fit.limited_degree(fit)
    meta = dict(meta, p_chance=10.0**fit.log10_p, log10_p_chance=fit.log10_p,
                n_trials=fit.n_trials, chi2_reduced=fit.chi2r, method=fit.method,
                n_parameters_determined=fit.n_eff)
    if determined < len(fit.coef) - 1:
        meta["degree_limited"] = (
            f"{fit.di.size} lines determine about {fit.n_eff:.1f} parameters (a degree-"
            f"{determined} map); the terms beyond come from the curvature prior")
    return Solution(
        coefficients=np.asarray(fit.coef, float),
        covariance=_symmetric(fit.cov + _fit.jackknife_cov(det, ref, fit)),
        n_pixels=n, medium=medium, lamps=tuple(lamps), lines=lines,
        rms_nm=float(np.sqrt(np.mean(resid[used] ** 2))),
        rms_pixel=float(np.sqrt(np.mean((resid[used] / disp[used]) ** 2))),
        confidence=float(1.0 - 10.0**fit.log10_p), verdict=verdict,
        fwhm_pixel=float(np.median(fw)) if fw.size else float("nan"),
        model_spread=np.zeros(1), meta=meta, instrument=_instrument(info))


def _instrument(info: dict):
    doc = info.get("instrument")
    return Instrument.from_dict(doc) if isinstance(doc, dict) else None
