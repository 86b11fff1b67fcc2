"""The detector noise model of one exposure: variance against level, gain, offset.

The variance of a sample is ``a + b (level - ref)`` (ADU^2) with ``b = 1/gain``, never below
the quietest background's variance.  ``a`` is measured on the background; ``b`` is given,
pinned by the background (a known offset and read noise, or a background that spans several
levels), or estimated from the residuals of the fitted lines with its own uncertainty.  What
was found is recorded as an :class:`~ritzline.instrument.Instrument`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np

from ._arrays import _median
from .instrument import Instrument


@dataclass(frozen=True)
class _Noise:
    """Variance model ``var = a + b * (level - ref)`` (ADU^2), level = expected counts.

    ``b`` is 1/gain; ``b_rel_err`` its relative 1-sigma uncertainty when it was estimated from
    the data (the errors of photon-dominated lines are inflated to match); ``offset`` the
    electronic offset (None when unknown), which turns ``a`` into a read noise.
    """

    a: float
    b: float
    ref: float
    method: str
    b_rel_err: float = 0.0
    offset: float | None = None
    floor: float = 0.0

    def variance(self, level):
        # Never below the quietest background's variance: read noise and the dark pattern are
        # there at every level (a large, conservative b must not extrapolate below them).
        return np.maximum(self.b * level + (self.a - self.b * self.ref),
                          max(self.floor, 0.05 * self.a, 1e-300))

    def read_noise2(self) -> float:
        """Read-noise variance (ADU^2): what is left of ``a`` at the offset."""
        if self.offset is None:
            return self.a
        return max(self.a - self.b * max(self.ref - self.offset, 0.0), 0.0)

    def inflation(self, level):
        """Variance factor of a line error for the uncertainty of ``b`` (Student-t, common
        practice): ``1 / (1 - r^2)`` for the photon share of the variance, ``r`` = rel. error."""
        r2 = min(self.b_rel_err**2, 0.6)
        if r2 <= 0:
            return np.ones(np.shape(level))
        v = self.variance(level)
        photon = np.clip(1.0 - self.a / v, 0.0, 1.0)
        return 1.0 + photon * (r2 / (1.0 - r2))

    def as_meta(self) -> dict:
        gain = 1.0 / self.b if self.b > 0 else None
        return {
            "method": self.method,
            "gain": gain,
            "gain_rel_err": float(self.b_rel_err),
            "read_noise": float(np.sqrt(self.read_noise2())),
            "offset": self.offset,
            "variance_at_background": self.a,
            "background_level": self.ref,
            "formula": "var = a + b*(level - background_level), b = 1/gain",
            "a": self.a,
            "b": self.b,
        }


def _second_diff_sigma(y, ok):
    """Robust white-noise sigma from the second difference (MAD), on pixels where ``ok``."""
    d2 = y[1:-1] - 0.5 * (y[:-2] + y[2:])
    good = ok[1:-1] & ok[:-2] & ok[2:]
    if np.count_nonzero(good) < 8:
        return None
    d = d2[good]
    mad = _median(np.abs(d - _median(d)))
    return 1.4826 * mad / np.sqrt(1.5)


def _variance_slope_from_background(counts, bg, quiet, ref, block=64):
    """Fit ``var = a + b (level - ref)`` to the noise of quiet pixels in blocks of the spectrum.

    Returns ``(a, b)`` when the background spans enough levels to pin the slope down to 25 %,
    else None.  The noise per block is the MAD of second differences (white-noise sigma).
    """
    n = counts.size
    nb = n // block
    if nb < 4:
        return None
    d2 = np.zeros(n)
    d2[1:-1] = counts[1:-1] - 0.5 * (counts[:-2] + counts[2:])
    good = quiet.copy()
    good[0] = good[-1] = False
    good[1:-1] &= quiet[:-2] & quiet[2:]
    good = good[: nb * block].reshape(nb, block)
    n_q = np.count_nonzero(good, axis=1)
    use = n_q >= 16
    if np.count_nonzero(use) < 4:
        return None
    good, n_q = good[use], n_q[use]
    d = d2[: nb * block].reshape(nb, block)[use]
    x = bg[: nb * block].reshape(nb, block)[use, block // 2] - ref
    rows = np.arange(n_q.size)

    def masked_median(v):
        srt = np.sort(np.where(good, v, np.inf), axis=1)
        return 0.5 * (srt[rows, (n_q - 1) // 2] + srt[rows, n_q // 2])

    med = masked_median(d)
    var = (1.4826 * masked_median(np.abs(d - med[:, None]))) ** 2 / 1.5
    # Weighted least squares (a straight line: normal equations solved in closed form); the
    # relative error of a MAD variance is about 2.3/sqrt(n).
    tiny = 1e-6 * float(np.max(var)) + 1e-300  # relative: counts may come in any scale
    model = np.full(x.size, max(float(_median(var)), tiny))
    for _ in range(2):
        w = n_q / (2.3 * model) ** 2
        s0, s1, s2 = float(np.sum(w)), float(w @ x), float(w @ (x * x))
        t0, t1 = float(w @ var), float(w @ (x * var))
        det = s0 * s2 - s1 * s1
        if not det > 0:
            return None
        a, b = (s2 * t0 - s1 * t1) / det, (s0 * t1 - s1 * t0) / det
        model = np.maximum(a + b * x, tiny)
    b_var = s0 / det
    if not (a > 0 and b > 0 and np.sqrt(b_var) < 0.25 * b):
        return None
    return a, b, float(np.sqrt(b_var) / b)


def _slope_for_quantile(e2, delta, a, b0, q, chi2_q):
    """The slope b at which the ``q`` quantile of ``e2 / (a + b delta)`` equals ``chi2_q``.

    All ``delta`` are positive.  Term i is at most ``chi2_q`` exactly when b reaches its
    threshold ``(e2_i / chi2_q - a) / delta_i``, so the ``q`` quantile of the terms is at
    most ``chi2_q`` exactly when b reaches the same order statistic of the thresholds: that
    order statistic is the answer (no search).  It is kept within 0.05-20 times the
    starting slope ``b0``.
    """
    kth = int(q * (e2.size - 1))
    thresholds = (e2 * (1.0 / chi2_q) - a) / delta
    b = float(np.partition(thresholds, kth)[kth])
    return min(max(b, 0.05 * b0), 20.0 * b0)


def _reestimate_slope(noise, diag):
    """Re-estimate the variance slope b (1/gain) from fit residuals (leverage-corrected).

    Pixels of lines as wide as the LSF whose level stands clear of the background noise are
    used.  The estimate is the maximum-likelihood slope of ``e2 ~ (a + b delta) chi2_1``
    (Fisher scoring, squared residuals capped at 9 variances so a few misfit pixels cannot
    drag it); when more than 2 % of the pixels are misfits (faint unresolved companions in a
    lamp spectrum, which only ever inflate residuals) the 30 % quantile of the normalised
    residuals is matched to chi-square instead.  The relative error of b comes from the
    Fisher information, ``2 / sum((b delta / v)^2 (1 - h))``; when the pixels cannot pin b
    within 82 %, the largest slope they allow (two sigma above the estimate) is taken, or the
    starting (conservative) value when that is smaller.
    """
    if not diag:
        return noise
    x_res = np.concatenate([d["resid"] for d in diag])
    lev = np.concatenate([d["lev"] for d in diag])
    level = np.concatenate([d["level"] for d in diag])
    keep = np.clip(1.0 - lev, 0.05, 1.0)
    e2_all = x_res * x_res / keep
    delta_all = level - noise.ref
    b_start = noise.b if noise.b > 0 else noise.a / max(noise.ref, np.sqrt(noise.a))
    use = delta_all > 3.0 * np.sqrt(noise.a)
    if np.count_nonzero(use) < 3:
        return noise
    e2, delta, dof = e2_all[use], delta_all[use], keep[use]
    if e2.size > 600:  # 600 pixels pin the slope to a few per cent
        take = np.linspace(0, e2.size - 1, 600).astype(int)
        e2, delta, dof = e2[take], delta[take], dof[take]
    a = noise.a
    b = b_start
    misfit = float(np.mean(e2 / (a + b * delta) > 9.0))
    if misfit > 0.02 and e2.size >= 30:
        b = _slope_for_quantile(e2, delta, a, b, 0.3, 0.14847186183254)
    else:
        for _ in range(8):
            v = a + b * delta
            capped = np.minimum(e2, 9.0 * v) / 0.9952  # E[min(chi2_1, 9)] = 0.9952
            info = float(np.sum(delta * delta / (v * v) * dof))
            step = float(np.sum(delta * (capped - v) / (v * v))) / max(info, 1e-300)
            b_new = min(max(b + step, 0.2 * b), 5.0 * b)
            done = abs(b_new - b) < 1e-4 * b
            b = b_new
            if done:
                break

    def slope_sigma(bb):
        """1-sigma error of the slope from the residuals' Fisher information at ``bb``."""
        info = float(np.sum((delta / (a + bb * delta)) ** 2 * dof))
        return math.sqrt(2.0 / info) if info > 0 else np.inf

    rel = slope_sigma(b) / b
    if rel >= noise.b_rel_err and _FROM_RESIDUALS not in noise.method:
        return noise  # the background pinned b better
    if rel > 0.82:
        # Fewer than 3 photon-dominated degrees of freedom: the data cannot tell the gain.
        # The largest slope the residuals allow (two sigma above the estimate, the error
        # taken at the bound itself), or the conservative start when that is smaller.
        up = b
        for _ in range(3):
            up = b + 2.0 * slope_sigma(up)
        if not up < b_start:
            return noise
        b, rel = up, 0.82
    method = noise.method.split("; ")[0] + "; " + _FROM_RESIDUALS
    return replace(noise, b=float(b), method=method, b_rel_err=float(rel))


_FROM_RESIDUALS = "gain from the fit residuals of the lines"

def _quietest_variance(counts, quiet, a, block=64):
    """The white-noise variance of the quietest stretch of background (10 % quantile of
    per-block second-difference variances), at most ``a``; ``a / 2`` when too short."""
    n = counts.size // block
    if n < 3:
        return 0.5 * a
    d2 = np.zeros(counts.size)
    d2[1:-1] = counts[1:-1] - 0.5 * (counts[:-2] + counts[2:])
    good = quiet.copy()
    good[1:-1] &= quiet[:-2] & quiet[2:]
    good = good[: n * block].reshape(n, block)
    n_q = np.count_nonzero(good, axis=1)
    enough = n_q >= 16
    if np.count_nonzero(enough) < 3:
        return 0.5 * a
    # |d2| per block, sorted with the masked samples last: the median is the middle one.
    d = np.sort(np.where(good, np.abs(d2[: n * block].reshape(n, block)), np.inf)[enough],
                axis=1)
    rows = np.arange(d.shape[0])
    mad = 0.5 * (d[rows, (n_q[enough] - 1) // 2] + d[rows, n_q[enough] // 2])
    var = (1.4826 * mad) ** 2 / 1.5
    return float(min(np.quantile(var, 0.1), a))


def _noise_model(counts, bg, quiet, ref, sig_bg, *, gain, read_noise, offset, offset_source,
                 r_ob, instrument):
    """The variance model at the start: ``a`` measured at the background, ``b`` = 1/gain.

    ``b`` is given (``gain`` or the instrument), or pinned by the background: with a known
    offset and read noise, ``b = (a - read^2) / (background - offset)``; or by the way the
    background noise follows its level along the spectrum.  Otherwise it starts at a
    conservative (large) value -- all background variance taken as photon noise above the
    lowest level in the spectrum -- and the fit residuals refine it.
    """
    a = sig_bg**2
    floor = _quietest_variance(counts, quiet, a)
    given_rn = read_noise if read_noise is not None else (
        instrument.read_noise if instrument is not None else r_ob)
    if instrument is not None and gain is None and not instrument.describes(
            counts, ~quiet):
        # These counts do not have the model's noise (scaled, normalised, another setting):
        # its gain would weight them wrongly; estimate from the data instead.
        instrument = None
    if gain is not None or instrument is not None:
        b = 1.0 / (gain if gain is not None else instrument.gain)
        rel = 0.0 if gain is not None else instrument.gain_rel_err
        method = ("given gain" + (" and read noise" if read_noise is not None else "")
                  if gain is not None else "gain from the instrument model")
        if offset is None and given_rn is not None and a > given_rn**2:
            # Gain and read noise fix the offset: the background's variance above read noise
            # is its photon noise.
            offset = ref - (a - given_rn**2) / b
        return _Noise(a=a, b=b, ref=ref, method=method, b_rel_err=rel, offset=offset,
                      floor=floor)
    candidates = []
    sig_a = 2.3 / math.sqrt(max(np.count_nonzero(quiet), 1))  # rel. error of a MAD variance
    if offset is not None and given_rn is not None and ref - offset > 3.0 * sig_bg:
        excess_var = a - given_rn**2
        if excess_var > 0:
            err = math.hypot(sig_a * a, 0.2 * given_rn**2)
            candidates.append((excess_var / (ref - offset), err / excess_var,
                               f"gain from the background above the offset ({offset_source})"))
    slope = _variance_slope_from_background(counts, bg, quiet, ref)
    if slope is not None:
        a_s, b_s, rel_s = slope
        candidates.append((b_s, rel_s, "gain from the background noise against its level"))
    if candidates:
        b, rel, method = min(candidates, key=lambda c: c[1])
        if "against its level" in method:
            a = a_s
        return _Noise(a=a, b=b, ref=ref, method=method, b_rel_err=rel, offset=offset,
                      floor=floor)
    lowest = offset if offset is not None else float(np.quantile(counts[quiet], 0.01)) \
        if quiet.any() else ref
    b = a / max(ref - lowest, 3.0 * sig_bg)
    return _Noise(a=a, b=b, ref=ref, method="conservative start; " + _FROM_RESIDUALS,
                  b_rel_err=np.inf, offset=offset, floor=floor)


def _instrument_record(noise, n, fwhm, lsf_method, flags, given, offset_source, shape):
    """The instrument model this search used or estimated, as ``Instrument.to_dict()``."""
    if given is not None:
        return given.to_dict()
    flags = list(flags)
    sources = {"gain": noise.method, "fwhm": lsf_method}
    if noise.offset is None:
        # All of the background variance is then photon noise: the highest offset possible.
        offset = noise.ref - noise.a / noise.b
        flags += ["offset_unconstrained", "read_noise_unconstrained"]
        sources["offset"] = "unconstrained (upper bound: background variance all photon noise)"
        read_noise = 0.0
    else:
        offset = noise.offset
        sources["offset"] = offset_source or "derived from the given gain and read noise"
        read_noise = math.sqrt(noise.read_noise2())
    if not noise.b_rel_err < 0.82:
        flags.append("gain_unconstrained")
    if "default" in lsf_method:
        flags.append("fwhm_unconstrained")
    gain = min(max(1.0 / noise.b, 1e-6), 1e6)
    if gain > 1e3 or gain < 1e-3:
        flags.append("not_raw_adu")
    fw_coef, skew_coef, eta, span = (shape if shape is not None
                                     else ((float(fwhm),), (0.0,), 0.0, None))
    inst = Instrument(n_pixels=max(int(n), 2), offset=float(offset), gain=gain,
                      read_noise=float(read_noise), fwhm=fw_coef, asymmetry=skew_coef,
                      wing=float(eta), shape_span=span, sources=sources,
                      flags=tuple(flags),
                      gain_rel_err=float(min(noise.b_rel_err, 1.0)))
    return inst.to_dict()


