"""Emission-line finder: background, noise model, matched-filter detection and batched fits.

Every line is fitted as a Gaussian line-spread function integrated over each pixel, weighted
by a Poisson + read-noise model whose variance comes from the model (not the data).  The fits
of all lines run at once as one damped Gauss-Newton (Levenberg-Marquardt) problem on stacked
pixel windows; lines closer than about two FWHM share a window and are fitted jointly.
"""

from __future__ import annotations

import functools
import math
import warnings
from dataclasses import dataclass, replace
from typing import TYPE_CHECKING

import numpy as np
from scipy.special import chdtrc, ndtr

from .errors import RitzlineError, SpectrumFormatError
from .instrument import Instrument, optical_black
from .spectrum import spectrum_arrays
from .synthetic import FWHM_PER_SIGMA

if TYPE_CHECKING:  # pragma: no cover
    from astropy.table import Table

__all__ = ["attach_wavelengths", "centroid_crlb", "find_lines", "line_background", "line_crlb"]

#: Table meta key set by :func:`attach_wavelengths`: ``wavelength_err`` already holds the
#: solution's band, so later stages must not add it again.
BAND_INCLUDED = "wavelength_err_includes_band"

_SQRT2PI = np.sqrt(2.0 * np.pi)
_DEFAULT_FWHM = 2.5  # px, used only when no line is bright enough to measure the LSF
_GROUP_SEPARATION = 2.0  # lines closer than this many FWHM are fitted jointly
_WINDOW_HALF = 4.0  # fit window half-width beyond the outer lines, in FWHM
_MAX_COMPONENTS = 8  # larger groups are cut into runs of this many components
_MAX_ITER = 20
_MAX_WIDTH = 3.5  # components wider than this many LSF FWHM are rejected
_SATURATION_MARGIN = 0.97
_NONLINEAR = 0.9  # of the saturation level: pixels above are left out of fits


def _cat(*parts):
    """Concatenate scalars and 1-D arrays (a cheaper ``np.r_`` for short hot-path joins)."""
    return np.concatenate([np.atleast_1d(p) for p in parts])


def _median(x):
    """Median of a non-empty 1-D array of finite values.

    The same value as ``np.median``, without its general-axis machinery (several times its
    partition cost on the short arrays of the hot path).
    """
    k = x.size // 2
    part = np.partition(x, k)
    if x.size % 2:
        return part[k]
    # The lower middle value is the largest of the lower part (cheaper than a second kth).
    return 0.5 * (part[:k].max() + part[k])


# ---------------------------------------------------------------------------------------
# The pixel-integrated Gaussian and its derivatives


def _integrated(x, c, s):
    """Fraction of a unit-flux Gaussian (centre ``c``, sigma ``s``) falling in pixel ``x``.

    Returns the fraction and its derivatives with respect to ``c`` and ``s``; arrays
    broadcast.
    """
    up = (x + 0.5 - c) / s
    um = (x - 0.5 - c) / s
    pp = np.exp(-0.5 * up * up) / _SQRT2PI
    pm = np.exp(-0.5 * um * um) / _SQRT2PI
    frac = ndtr(up) - ndtr(um)
    d_c = (pm - pp) / s
    d_s = (um * pm - up * pp) / s
    return frac, d_c, d_s


def line_crlb(
    centre: float,
    fwhm: float,
    flux: float,
    background: float = 0.0,
    *,
    gain: float = 1.0,
    read_noise: float = 0.0,
    half_width: float | None = None,
    fit_background: bool = True,
) -> dict[str, float]:
    """Cramér-Rao lower bounds for one pixel-integrated Gaussian line.

    The Fisher information is computed numerically over the pixels within ``half_width``
    (default 6 FWHM) of the centre, for the parameters centre, sigma, flux and (when
    ``fit_background``) a constant background, with the Poisson + read-noise variance
    ``(model) / gain + read_noise**2`` (counts in ADU).

    Parameters
    ----------
    centre, fwhm : float
        Line centre and FWHM in pixels.
    flux : float
        Total line counts (ADU).
    background : float
        Background level (ADU per pixel).
    gain : float
        Electrons per ADU.
    read_noise : float
        Read noise in ADU.
    half_width : float, optional
        Half-width of the pixel window, in pixels.
    fit_background : bool
        Whether the background is an unknown of the problem.

    Returns
    -------
    dict
        ``pixel``, ``fwhm`` and ``flux``: the smallest standard deviations any unbiased
        estimator can reach.
    """
    sigma = fwhm / FWHM_PER_SIGMA
    hw = 6.0 * fwhm if half_width is None else half_width
    x = np.arange(np.floor(centre - hw), np.ceil(centre + hw) + 1)
    frac, d_c, d_s = _integrated(x, centre, sigma)
    var = np.clip(flux * frac + background, 0, None) / gain + read_noise**2
    cols = [flux * d_c, flux * d_s, frac]
    if fit_background:
        cols.append(np.ones_like(x))
    jac = np.stack(cols, axis=1)
    # Pixels expecting no counts at all carry no information (their Poisson term vanishes).
    use = var > 1e-300
    jac, var = jac[use], var[use]
    fisher = jac.T @ (jac / var[:, None])
    cov = np.linalg.inv(fisher)
    return {
        "pixel": float(np.sqrt(cov[0, 0])),
        "fwhm": float(FWHM_PER_SIGMA * np.sqrt(cov[1, 1])),
        "flux": float(np.sqrt(cov[2, 2])),
    }


def centroid_crlb(centre: float, fwhm: float, flux: float, background: float = 0.0,
                  **kwargs) -> float:
    """Cramér-Rao bound on the centroid (pixels); see :func:`line_crlb` for the arguments."""
    return line_crlb(centre, fwhm, flux, background, **kwargs)["pixel"]


# ---------------------------------------------------------------------------------------
# Preparation: arrays, dark, saturation, noise at the background, spikes, background


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
                          max(self.floor, 0.05 * self.a) + 1e-12)

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
    highest count (averaged scans and a full-well spread keep clipped values from being
    exactly equal; the top 0.3 % of a Gaussian line spans a sixth of its sigma, so no line
    narrower than 20 px has such a plateau).  Exactly repeated maxima, or two at a power of
    two (an ADC's full scale), count too.  Returns the lowest value of the plateau pixels.
    """
    if not valid.any():
        return None
    usable = counts if valid.all() else np.where(valid, counts, -np.inf)
    top = float(usable.max())
    if not top > 0:
        return None
    near = usable >= top - 0.003 * abs(top)
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


def _second_diff_sigma(y, ok):
    """Robust white-noise sigma from the second difference (MAD), on pixels where ``ok``."""
    d2 = y[1:-1] - 0.5 * (y[:-2] + y[2:])
    good = ok[1:-1] & ok[:-2] & ok[2:]
    if np.count_nonzero(good) < 8:
        return None
    d = d2[good]
    mad = _median(np.abs(d - _median(d)))
    return 1.4826 * mad / np.sqrt(1.5)


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


@dataclass
class _Groups:
    """Groups of K components each (one size class): members (G, K) and pixel windows."""

    member: np.ndarray  # (G, K) index into the component list
    lo: np.ndarray  # (G,) first pixel of each window
    hi: np.ndarray  # (G,) last pixel of each window


def _make_groups(centres, fwhm, n):
    """Group sorted component centres closer than ``_GROUP_SEPARATION`` FWHM, by size class."""
    order = np.argsort(centres)
    c = centres[order]
    new = _cat(True, np.diff(c) > _GROUP_SEPARATION * fwhm)
    start = np.flatnonzero(new)
    rank = np.arange(c.size) - start[np.cumsum(new) - 1]
    # Split oversized groups: cut every _MAX_COMPONENTS members (rare: dense forests).
    first = np.flatnonzero(rank % _MAX_COMPONENTS == 0)
    size = np.diff(_cat(first, c.size))
    hw = _WINDOW_HALF * fwhm + 1.0
    lo = np.minimum(np.maximum(np.floor(c[first] - hw), 0), n - 1).astype(int)
    hi = np.minimum(np.maximum(np.ceil(c[first + size - 1] + hw), 0), n - 1).astype(int)
    k_min, k_max = int(size.min()), int(size.max())
    out = []
    # Loop over group sizes (a handful), not over lines.
    for k in ((k_min,) if k_min == k_max else np.unique(size)):
        sel = np.flatnonzero(size == k)
        member = order[first[sel][:, None] + np.arange(k)[None, :]]
        out.append(_Groups(member=member, lo=lo[sel], hi=hi[sel]))
    return out


_HWHM_PER_SIGMA = 1.1774100225154747  # sqrt(2 ln 2): the Lorentzian of the same FWHM


def _shaped_cdf(edges, c, s, alpha, eta, want_shape=False):
    """Cumulative profile of a unit line at the pixel edges, and its derivatives.

    The line is a pseudo-Voigt: ``1 - eta`` of a split normal (mode ``c``; sigma ``s (1 - a)``
    on the blue side, ``s (1 + a)`` on the red side, so the FWHM is that of a Gaussian of
    sigma ``s``) plus ``eta`` of a Lorentzian of the same FWHM.  Returns ``F, dF/dc, dF/ds``
    (and ``dF/da, dF/deta`` with ``want_shape``); arrays broadcast as ``edges - c[..., None]``.
    """
    t = edges - c[..., None]
    a = alpha[..., None]
    right = t >= 0
    w = np.where(right, 1.0 + a, 1.0 - a)
    inv_s = 1.0 / s[..., None]
    u = t * inv_s / w
    cdf = ndtr(u)
    pdf = np.exp(-0.5 * u * u) * (1.0 / _SQRT2PI)
    f_sn = w * cdf - np.where(right, a, 0.0)
    d_c = -pdf * inv_s
    d_s = -w * u * pdf * inv_s
    out_shape = None
    if want_shape:
        d_a = np.where(right, cdf - 1.0 - u * pdf, -cdf + u * pdf)
    e = None if eta is None else np.asarray(eta, float)[..., None]
    if e is not None and np.any(e > 0):
        g = _HWHM_PER_SIGMA * s[..., None]
        r = t / g
        den = g * (1.0 + r * r)  # g^2 + t^2, divided by g (no overflow for wide components)
        f_l = 0.5 + np.arctan(r) * (1.0 / np.pi)
        l_c = -(1.0 / den) * (1.0 / np.pi)
        l_s = -(r / den) * (_HWHM_PER_SIGMA / np.pi)
        if want_shape:
            out_shape = ((1.0 - e) * d_a, f_l - f_sn)
        f_sn = (1.0 - e) * f_sn + e * f_l
        d_c = (1.0 - e) * d_c + e * l_c
        d_s = (1.0 - e) * d_s + e * l_s
    elif want_shape:
        g = _HWHM_PER_SIGMA * s[..., None]
        f_l = 0.5 + np.arctan(t / g) * (1.0 / np.pi)
        out_shape = (d_a, f_l - f_sn)
    if want_shape:
        return f_sn, d_c, d_s, out_shape
    return f_sn, d_c, d_s


def _shaped_profile_and_jacobian(edges, b0, c, s, f, alpha, eta):
    """:func:`_profile_and_jacobian` for the pseudo-Voigt split-normal line shape."""
    cdf, d_c, d_s = _shaped_cdf(edges, c, s, alpha, eta)
    n_g, k, n_edges = cdf.shape
    jac = np.empty((n_g, 1 + 3 * k, n_edges - 1))
    jac[:, 0, :] = 1.0
    frac = jac[:, 3::3, :]
    np.subtract(cdf[..., 1:], cdf[..., :-1], out=frac)
    fx = f[..., None]
    jac[:, 1::3, :] = fx * (d_c[..., 1:] - d_c[..., :-1])
    jac[:, 2::3, :] = fx * (d_s[..., 1:] - d_s[..., :-1])
    model = b0[:, None] + np.einsum("gk,gkl->gl", f, frac)
    return model, jac, frac


def _profile_and_jacobian(edges, b0, c, s, f, alpha=None, eta=None):
    """Model counts, Jacobian (G, P, L) and unit profiles (G, K, L) from the pixel edges.

    The unit profiles are a view into the Jacobian (its flux rows); the derivatives are
    written straight into it, since on windows this small every array pass costs about as
    much as the arithmetic.  With a line shape (``alpha``, ``eta``: skew per component and
    Lorentzian fraction per group) the pseudo-Voigt split normal is used instead.
    """
    if alpha is not None:
        return _shaped_profile_and_jacobian(edges, b0, c, s, f, alpha, eta)
    inv_s = 1.0 / s[..., None]
    u = (edges - c[..., None]) * inv_s
    cdf = ndtr(u)
    pdf = np.exp(-0.5 * u * u)
    n_g, k, n_edges = u.shape
    jac = np.empty((n_g, 1 + 3 * k, n_edges - 1))
    jac[:, 0, :] = 1.0
    frac = jac[:, 3::3, :]
    np.subtract(cdf[..., 1:], cdf[..., :-1], out=frac)  # each edge is shared by two pixels
    scale = f[..., None] * inv_s * (1.0 / _SQRT2PI)
    d_c = jac[:, 1::3, :]
    np.subtract(pdf[..., :-1], pdf[..., 1:], out=d_c)
    d_c *= scale
    updf = np.multiply(u, pdf, out=u)
    d_s = jac[:, 2::3, :]
    np.subtract(updf[..., :-1], updf[..., 1:], out=d_s)
    d_s *= scale
    if k == 1:
        model = b0[:, None] + f * frac[:, 0, :]
    else:
        model = b0[:, None] + np.einsum("gk,gkl->gl", f, frac)
    return model, jac, frac


def _weights(noise, level, valid_f):
    """Fit weights: 1 / variance of the noise model at the expected counts (0 when masked)."""
    return valid_f / noise.variance(level)


def _levenberg_marquardt(fixed, b0, c, s, f, noise, tol, start=None):
    """Damped Gauss-Newton on a stack of windows, every group with its own damping.

    ``start`` is the model, Jacobian and unit profiles at the starting point when the caller
    has them already.  A group has converged when the Gauss-Newton step it just took
    promised to lower chi2 by less than ``tol``, or when the chi2 it actually gained matched
    the promise closely: what is left to gain after such a step is at most about
    ``2.25 (gain - promise)**2 / promise`` (a wrong curvature gives factor 1, a cubic term
    2.25), so when that is below ``tol`` the confirming step is skipped.  That test is used
    for steps within 5 sigma (a promise below 25) taken with little damping.
    Groups that have converged drop out of the arrays (so a few slow fits do not keep the
    whole batch busy); their results are written back at the end.
    """
    n_all = b0.size
    if start is None:
        start = _profile_and_jacobian(fixed["edges"], b0, c, s, f, fixed.get("alpha"),
                                      fixed.get("eta"))
    model, jac, frac = start
    w = _weights(noise, fixed["base_level"] + model, fixed["valid_f"])
    resid = fixed["y"] - model
    chi2 = np.einsum("gl,gl->g", w * resid, resid)
    lam = np.full(n_all, 1e-3)
    active = np.ones(n_all, bool)
    n_par = jac.shape[1]
    eye = np.eye(n_par)
    on_diag = np.arange(n_par)
    names = ("b0", "c", "s", "f", "model", "jac", "w", "resid", "chi2", "lam")
    out = None  # full-size results, once the working set has been compressed
    rows = np.arange(n_all)
    fx = fixed
    for it in range(_MAX_ITER):
        if out is None and np.count_nonzero(active) <= active.size // 2 and active.size > 4:
            cur = dict(zip(names, (b0, c, s, f, model, jac, w, resid, chi2, lam),
                           strict=True))
            out = {k: v.copy() for k, v in cur.items()}
            out["active"] = active.copy()
            keep = np.flatnonzero(active)
            rows = rows[keep]
            fx = {k: v[keep] for k, v in fixed.items()}
            b0, c, s, f, model, jac, w, resid, chi2, lam = (cur[k][keep] for k in names)
            frac = jac[:, 3::3, :]
            active = active[keep]
        wj = jac * w[:, None, :]
        hess = wj @ jac.transpose(0, 2, 1)
        grad = (wj @ resid[:, :, None])[..., 0]
        diag = hess[:, on_diag, on_diag]
        dead = diag <= 0  # no information (e.g. a component over masked pixels only)
        if dead.any():
            damp = hess + (lam[:, None] * np.where(dead, 1.0, diag))[:, :, None] * eye
            damp = np.where(dead[:, :, None] | dead[:, None, :], eye, damp)
            grad = np.where(dead, 0.0, grad)
        else:
            damp = hess
            damp[:, on_diag, on_diag] = diag * (1.0 + lam[:, None])
        try:
            step = np.linalg.solve(damp, grad[..., None])[..., 0]
        except np.linalg.LinAlgError:
            step = np.zeros_like(grad)
        nb0 = b0 + step[:, 0]
        nc = np.minimum(np.maximum(c + step[:, 1::3], fx["c_lo"]), fx["c_hi"])
        ns = np.minimum(np.maximum(s + step[:, 2::3], fx["s_lo"]), fx["s_hi"])
        nf = f + step[:, 3::3]
        nmodel, njac, nfrac = _profile_and_jacobian(fx["edges"], nb0, nc, ns, nf,
                                                    fx.get("alpha"), fx.get("eta"))
        nres = fx["y"] - nmodel
        nchi2 = np.einsum("gl,gl->g", w * nres, nres)
        better = (nchi2 <= chi2) & active
        all_better = better.all()
        predicted = np.einsum("gp,gp->g", step, grad)
        miss = chi2 - nchi2 - predicted
        done = (predicted < tol) | (better & (lam <= 1e-2) & (predicted < 25.0)
                                    & (2.25 * miss * miss < tol * predicted))
        if it >= 5:
            # Ill-conditioned fits (weak candidates with a flat width direction) creep along
            # a valley; after a few steps, a possible gain below one unit of chi2 will do.
            done |= predicted < 1.0
        if all_better:
            lam = np.maximum(lam * 0.2, 1e-7)
            b0, c, s, f, model, jac, frac, resid = nb0, nc, ns, nf, nmodel, njac, nfrac, nres
        else:
            lam = np.where(better, np.maximum(lam * 0.2, 1e-7), np.minimum(lam * 4.0, 1e7))
            done |= lam >= 1e7
            bsel = better[:, None]
            b0 = np.where(better, nb0, b0)
            c = np.where(bsel, nc, c)
            s = np.where(bsel, ns, s)
            f = np.where(bsel, nf, f)
            model = np.where(bsel, nmodel, model)
            jac = np.where(better[:, None, None], njac, jac)
            frac = jac[:, 3::3, :]
            resid = fx["y"] - model
        # Variance from the model at the accepted point (not from the data).
        w = _weights(noise, fx["base_level"] + model, fx["valid_f"])
        chi2 = np.einsum("gl,gl->g", w * resid, resid)
        active &= ~done
        if not active.any():
            break
    if out is not None:
        for k, v in zip(names, (b0, c, s, f, model, jac, w, resid, chi2, lam), strict=True):
            out[k][rows] = v
        out["active"][rows] = active
        b0, c, s, f, model, jac, w, resid, chi2 = (out[k] for k in names[:-1])
        frac = jac[:, 3::3, :]
        active = out["active"]
    return b0, c, s, f, model, jac, frac, w, resid, chi2, ~active


def _fit_batch(groups, state, ctx, noise, neighbours_model, tol, final):
    """Fit one size class of groups; updates ``state`` (component arrays) in place.

    Returns the residuals, leverages and model levels of the pixels of LSF-width groups
    (for the noise re-estimate) and each group's chi2 and degrees of freedom.
    """
    m = groups.member
    n_g, k = m.shape
    n_par = 1 + 3 * k
    length = int((groups.hi - groups.lo).max()) + 1
    x = groups.lo[:, None] + np.arange(length)[None, :]
    inside = x <= groups.hi[:, None]
    xi = np.minimum(x, ctx.n - 1)
    valid = inside & ctx.ok[xi]
    bg_glob = ctx.background[xi]
    # Data minus global background minus the other lines' current models.
    c = state.centre[m]  # fancy indexing: copies
    s = state.sigma[m]
    f = state.flux[m]
    edges = (groups.lo[:, None, None] - 0.5) + np.arange(length + 1.0)[None, None, :]
    b0 = np.zeros(n_g)
    # The local line shape at each component: LSF sigma, skew, Lorentzian fraction.
    sig_lsf, alpha, eta = ctx.shape_at(c)
    # A clipped line keeps the LSF width: its unclipped wings fix centre and flux, not width.
    sat = state.saturated[m]
    s = np.where(sat, sig_lsf, s)
    # The groups' own current models (b0 = 0) also start the fit.
    start = _profile_and_jacobian(edges, b0, c, s, f, alpha, eta)
    others = neighbours_model[xi] - start[0]
    y = ctx.excess[xi] - others

    base_level = bg_glob + others
    c_lo = groups.lo[:, None] - 0.5
    c_hi = groups.hi[:, None] + 0.5
    s_lo = np.where(sat, 0.999 * sig_lsf, 0.2 * sig_lsf)
    s_hi = np.where(sat, 1.001 * sig_lsf,
                    np.maximum(6.0 * sig_lsf, (groups.hi - groups.lo)[:, None] / 4.0))
    valid_f = valid.astype(float)
    fixed = {"y": y, "valid_f": valid_f, "edges": edges, "base_level": base_level,
             "c_lo": c_lo, "c_hi": c_hi, "s_hi": s_hi, "s_lo": s_lo}
    if alpha is not None:
        fixed["alpha"], fixed["eta"] = alpha, eta
    b0, c, s, f, model, jac, frac, w, resid, chi2, converged = _levenberg_marquardt(
        fixed, b0, c, s, f, noise, tol, start)
    on_diag = np.arange(n_par)

    def covariance(jac):
        wj = jac * w[:, None, :]
        hess = wj @ jac.transpose(0, 2, 1)
        dead = hess[:, on_diag, on_diag] <= 0
        if not dead.any():
            try:
                return np.linalg.inv(hess), dead
            except np.linalg.LinAlgError:
                return np.linalg.pinv(hess), dead
        eye = np.eye(n_par)
        off = dead[:, :, None] | dead[:, None, :]
        try:
            cov = np.linalg.inv(np.where(off, eye, hess))
        except np.linalg.LinAlgError:
            cov = np.linalg.pinv(np.where(off, eye, hess))
        return np.where(off, 0.0, cov), dead

    # Covariance from the Jacobian at the solution -- with the width of a component that is
    # consistent with the LSF taken at the LSF: noise in the fitted width would otherwise
    # scatter the error bars themselves (too small for lines that came out narrow).
    cov, dead = covariance(jac)
    var_diag = np.maximum(cov[:, on_diag, on_diag], 0)
    lsf_consistent = np.abs(s - sig_lsf) < 2.0 * np.sqrt(var_diag[:, 2::3])
    # Profiles at the LSF width: the matched-filter significance below and, in the final
    # pass, the Jacobian rows of the LSF-consistent components.
    if final and lsf_consistent.any():
        _, jac_lsf, frac_lsf = _profile_and_jacobian(edges, b0, c, sig_lsf + 0.0 * s, f,
                                                     alpha, eta)
        rows_lsf = np.concatenate([np.zeros((n_g, 1), bool),
                                   np.repeat(lsf_consistent, 3, axis=1)], axis=1)
        cov, dead = covariance(np.where(rows_lsf[:, :, None], jac_lsf, jac))
        var_diag = np.maximum(cov[:, on_diag, on_diag], 0)
    else:
        _, _, frac_lsf = _profile_and_jacobian(edges, b0, c, sig_lsf + 0.0 * s, f, alpha, eta)
    n_free = n_par - np.count_nonzero(dead, axis=1) if dead.any() else n_par
    dof = np.add.reduce(valid, axis=1) - n_free
    # Leverage of each pixel (for the noise re-estimate).
    lev = np.einsum("gpl,gpl->gl", cov @ jac, jac) * w
    # Detection significance: the matched filter (LSF-shaped, known background) applied at
    # the fitted centre to the data minus every other component -- a statistic with unit
    # spread under noise, unlike the flux over its free-shape error.
    # The variance under the null hypothesis (no line here): the significance does not
    # depend on the line's own photon noise, so an uncertain gain cannot hide a faint line.
    own = f[..., None] * frac
    w_null = _weights(noise, (base_level + model)[:, None, :] - own, valid_f[:, None, :])
    alone = resid[:, None, :] + own
    info_f = np.einsum("gkl,gkl->gk", frac_lsf * frac_lsf, w_null)
    mf_num = np.einsum("gkl,gkl->gk", frac_lsf * alone, w_null)
    comp = m
    state.centre[comp] = c
    state.sigma[comp] = s
    state.flux[comp] = f
    state.bg_offset[comp] = b0[:, None]
    errors = np.sqrt(var_diag)
    state.centre_err[comp] = errors[:, 1::3]
    state.sigma_err[comp] = errors[:, 2::3]
    state.flux_err[comp] = errors[:, 3::3]
    with np.errstate(divide="ignore", invalid="ignore"):
        state.snr[comp] = np.where(info_f > 0, mf_num / np.sqrt(info_f), 0.0)
    # One-pixel model (a spike or hot pixel: all the flux in the pixel under the centre)
    # against a line of the local width: the chi2 each removes from the no-line fit.
    under = np.abs((groups.lo[:, None] + np.arange(length)[None, :])[:, None, :]
                   - c[..., None]) <= 0.5
    one_px = np.max(np.where(under, w_null * alone * alone, 0.0), axis=-1)
    with np.errstate(divide="ignore", invalid="ignore"):
        lsf_gain = np.where(info_f > 0, mf_num * mf_num / info_f, 0.0)
    state.one_pixel[comp] = one_px > lsf_gain
    state.chi2[comp] = chi2[:, None]
    state.dof[comp] = dof[:, None]
    state.converged[comp] = converged[:, None]
    state.group_size[comp] = k
    # Groups whose widths all match the LSF (no unresolved blend) inform the noise estimate.
    lsf_like = (k == 1) & (np.abs(s[:, 0] / sig_lsf[:, 0] - 1.0) < 0.15) & ~sat.any(axis=1)
    use = valid & lsf_like[:, None]
    return {
        "x": xi[use], "resid": resid[use], "lev": lev[use], "level": (base_level + model)[use],
        "chi2": chi2, "dof": dof,
    }


@dataclass
class _State:
    centre: np.ndarray
    sigma: np.ndarray
    flux: np.ndarray

    def __post_init__(self):
        n = self.centre.size
        z = np.zeros(n)
        self.bg_offset = z.copy()
        self.centre_err = z.copy()
        self.sigma_err = z.copy()
        self.flux_err = z.copy()
        self.snr = z.copy()
        self.chi2 = z.copy()
        self.dof = np.zeros(n, int)
        self.converged = np.zeros(n, bool)
        self.group_size = np.ones(n, int)
        self.one_pixel = np.zeros(n, bool)
        self.saturated = np.zeros(n, bool)

    def subset(self, keep):
        """The components where the boolean mask ``keep`` is True (copies, every attribute)."""
        new = object.__new__(_State)
        new.__dict__.update({name: value[keep] for name, value in self.__dict__.items()})
        return new

    def extend(self, centre, sigma, flux, saturated=False):
        new = _State(_cat(self.centre, centre), _cat(self.sigma, sigma),
                     _cat(self.flux, flux))
        new.saturated = _cat(self.saturated, np.broadcast_to(saturated, np.shape(centre)))
        return new


@dataclass(frozen=True)
class _Context:
    n: int
    excess: np.ndarray  # counts - background
    background: np.ndarray
    ok: np.ndarray  # usable for fitting
    sigma_lsf: float  # median LSF sigma: grouping, detection kernel
    shape: _Shape | None = None  # the line shape along the detector, when measured

    def shape_at(self, c):
        """LSF sigma, skew (or None) and Lorentzian fraction (per group) at centres ``c``."""
        if self.shape is None:
            return np.full(c.shape, self.sigma_lsf), None, None
        i = np.clip(np.rint(c), 0, self.n - 1).astype(int)
        sh = self.shape
        alpha = sh.alpha[i] if sh.skewed or sh.eta > 0 else None
        eta = np.full((c.shape[0], 1), sh.eta) if alpha is not None else None
        return sh.sigma[i], alpha, eta


@dataclass(frozen=True)
class _Shape:
    """The measured line shape per pixel: LSF sigma, skew; the Lorentzian fraction."""

    sigma: np.ndarray
    alpha: np.ndarray
    eta: float
    skewed: bool


_MAX_SKEW = 0.6
_MAX_WING = 0.6


def _cheb_fit(x, y, err, n_pixels, max_degree, bounds=(-np.inf, np.inf)):
    """Weighted, clipped Chebyshev fit of ``y(x)`` on the detector; degree grows with the data.

    The degree is the highest (up to ``max_degree``, and one per four points) whose last
    coefficient is significant at 3 sigma; points beyond 4 sigma of the fit (with a 5 %
    scatter floor) are dropped.  Returns the coefficient tuple.
    """
    t = 2.0 * x / max(n_pixels - 1, 1) - 1.0
    keep = np.isfinite(y) & np.isfinite(err) & (err > 0)
    best = (float(np.average(y[keep], weights=err[keep] ** -2)),) if keep.any() else (0.0,)
    if not keep.any():
        return best
    # Robust start: nothing farther than 4 sigma (5 % floor) from the median takes part.
    floor = 0.05 * np.abs(np.median(y[keep])) + 1e-12
    keep &= np.abs(y - np.median(y[keep])) < 4.0 * np.hypot(err, floor) + 3.0 * floor
    for deg in range(0, min(max_degree, np.count_nonzero(keep) // 4) + 1):
        use = keep.copy()
        for _ in range(3):
            if np.count_nonzero(use) <= deg + 1:
                break
            v = np.polynomial.chebyshev.chebvander(t[use], deg)
            wgt = 1.0 / err[use]
            coef, *_ = np.linalg.lstsq(v * wgt[:, None], y[use] * wgt, rcond=None)
            res = y - np.polynomial.chebyshev.chebval(t, coef)
            use = keep & (np.abs(res) < 4.0 * np.hypot(err, floor))
        if np.count_nonzero(use) <= deg + 1:
            break
        v = np.polynomial.chebyshev.chebvander(t[use], deg)
        wgt = 1.0 / np.hypot(err[use], 1e-12)
        a = v * wgt[:, None]
        coef, *_ = np.linalg.lstsq(a, y[use] * wgt, rcond=None)
        resid = (y[use] - v @ coef) * wgt
        dof = max(np.count_nonzero(use) - deg - 1, 1)
        scale = max(float(resid @ resid) / dof, 1.0)
        cov = np.linalg.pinv(a.T @ a) * scale
        curve = np.polynomial.chebyshev.chebval(np.linspace(-1, 1, 65), coef)
        inside = bool(np.all((curve > bounds[0]) & (curve < bounds[1])))
        if deg == 0 or (inside and abs(coef[-1]) > 3.0 * math.sqrt(max(cov[-1, -1], 0))):
            best = tuple(float(c) for c in coef)
        else:
            break
    return best


def _measure_shape(state, ctx, noise, n_max=40):
    """The line shape along the detector from the bright isolated lines.

    Each line is fitted with the pseudo-Voigt split normal, skew ``a`` and Lorentzian
    fraction ``eta`` free (batched Gauss-Newton); FWHM and skew then become smooth functions
    of pixel (Chebyshev, degree as the lines allow), the Lorentzian fraction one
    inverse-variance weighted value.  Returns ``(fwhm_coeffs, skew_coeffs, eta, n_lines)``
    or None when fewer than three lines qualify.
    """
    single = (state.group_size == 1) & state.converged & (state.snr > 30)
    idx = np.flatnonzero(single)
    if idx.size < 3:
        return None
    idx = idx[np.argsort(state.snr[idx])[::-1][:n_max]]
    c = state.centre[idx].copy()
    s = state.sigma[idx].copy()
    f = state.flux[idx].copy()
    half = int(np.ceil(5.0 * FWHM_PER_SIGMA * float(np.max(s)))) + 1
    x = np.rint(c)[:, None].astype(int) + np.arange(-half, half + 1)[None, :]
    inside = (x >= 0) & (x < ctx.n)
    xi = np.clip(x, 0, ctx.n - 1)
    valid = inside & ctx.ok[xi]
    keep = valid.sum(axis=1) > 0.8 * x.shape[1]
    if np.count_nonzero(keep) < 3:
        return None
    c, s, f, x, xi = c[keep], s[keep], f[keep], x[keep], xi[keep]
    valid, idx = valid[keep], idx[keep]
    sub = state.subset(np.isin(np.arange(state.centre.size), idx, invert=True))
    others = _lines_model(sub, ctx.n, ctx.shape)
    y = (ctx.excess - others)[xi]
    base = (ctx.background + others)[xi]
    edges = x[:, None, :] - 0.5
    edges = np.concatenate([edges, edges[..., -1:] + 1.0], axis=-1)
    g = c.size
    b0 = np.zeros(g)
    a = np.zeros(g)
    e = np.full(g, 0.02)
    lam = np.full(g, 1e-2)
    vf = valid.astype(float)

    def model_and_jac(b0, c, s, f, a, e):
        cdf, d_c, d_s, (d_a, d_e) = _shaped_cdf(edges, c[:, None], s[:, None], a[:, None],
                                                e[:, None], want_shape=True)
        frac = np.diff(cdf, axis=-1)[:, 0]
        fx = f[:, None]
        jac = np.stack([np.ones_like(frac), fx * np.diff(d_c, axis=-1)[:, 0],
                        fx * np.diff(d_s, axis=-1)[:, 0], frac,
                        fx * np.diff(d_a, axis=-1)[:, 0], fx * np.diff(d_e, axis=-1)[:, 0]],
                       axis=1)
        return b0[:, None] + fx * frac, jac

    params = np.stack([b0, c, s, f, a, e], axis=1)
    lo = np.array([-np.inf, -np.inf, 0.05, -np.inf, -_MAX_SKEW, 0.0])
    hi = np.array([np.inf, np.inf, np.inf, np.inf, _MAX_SKEW, _MAX_WING])
    mod, jac = model_and_jac(*params.T)
    w = vf / noise.variance(base + mod)
    chi2 = np.einsum("gl,gl->g", w * (y - mod), y - mod)
    for _ in range(15):
        wj = jac * w[:, None, :]
        hess = wj @ jac.transpose(0, 2, 1)
        grad = (wj @ (y - mod)[:, :, None])[..., 0]
        d = hess[:, range(6), range(6)]
        damp = hess + (lam[:, None] * np.maximum(d, 1e-300))[:, :, None] * np.eye(6)
        try:
            step = np.linalg.solve(damp, grad[..., None])[..., 0]
        except np.linalg.LinAlgError:
            break
        trial = np.clip(params + step, lo, hi)
        nmod, njac = model_and_jac(*trial.T)
        nchi2 = np.einsum("gl,gl->g", w * (y - nmod), y - nmod)
        better = nchi2 < chi2
        params = np.where(better[:, None], trial, params)
        mod = np.where(better[:, None], nmod, mod)
        jac = np.where(better[:, None, None], njac, jac)
        chi2 = np.where(better, nchi2, chi2)
        lam = np.where(better, np.maximum(lam * 0.3, 1e-6), np.minimum(lam * 10.0, 1e6))
        w = vf / noise.variance(base + mod)
    wj = jac * w[:, None, :]
    hess = wj @ jac.transpose(0, 2, 1)
    try:
        cov = np.linalg.inv(hess)
    except np.linalg.LinAlgError:
        cov = np.linalg.pinv(hess)
    err = np.sqrt(np.maximum(cov[:, range(6), range(6)], 0))
    dof = np.maximum(valid.sum(axis=1) - 6, 1)
    err = err * np.sqrt(np.maximum(chi2 / dof, 1.0))[:, None]
    # Fits that ran into a bound (or whose covariance failed) say nothing about the shape.
    ok = (np.all(np.isfinite(err), axis=1) & (err[:, 2] > 0) & (params[:, 2] > 0.3 * s)
          & (params[:, 2] < 3.0 * s) & (np.abs(params[:, 4]) < _MAX_SKEW - 1e-6)
          & (params[:, 5] < _MAX_WING - 1e-6))
    # No single line may dominate a smooth function: a floor of 1 % on each value's error.
    err[:, 2] = np.maximum(err[:, 2], 0.01 * params[:, 2])
    if np.count_nonzero(ok) < 3:
        return None
    p, e_p = params[ok], err[ok]
    fw = FWHM_PER_SIGMA * p[:, 2]
    med = float(_median(fw))
    fw_coef = _cheb_fit(p[:, 1], fw, FWHM_PER_SIGMA * e_p[:, 2], ctx.n, 2,
                        bounds=(0.5 * med, 2.0 * med))
    skew_coef = _cheb_fit(p[:, 1], p[:, 4], np.maximum(e_p[:, 4], 1e-3), ctx.n, 2,
                          bounds=(-0.7, 0.7))
    # A skew below 0.05 moves a centroid by less than a tenth of sigma and is as likely a
    # Lorentzian-wing or sampling mismatch: the symmetric profile stays.
    pix = np.linspace(0, ctx.n - 1, 65)
    from .instrument import _cheb

    if np.max(np.abs(_cheb(skew_coef, pix, ctx.n))) < 0.05:
        skew_coef = (0.0,)
    we = 1.0 / np.maximum(e_p[:, 5], 1e-4) ** 2
    eta = float(np.sum(we * p[:, 5]) / np.sum(we))
    eta_err = float(1.0 / np.sqrt(np.sum(we)))
    if eta < 3.0 * eta_err or eta < 0.01:
        eta = 0.0
    return fw_coef, skew_coef, min(eta, _MAX_WING), int(p.shape[0])


def _shape_from_coeffs(coeffs, n):
    fw_coef, skew_coef, eta = coeffs
    from .instrument import _cheb

    pix = np.arange(n)
    sig = np.maximum(_cheb(fw_coef, pix, n), 0.5) / FWHM_PER_SIGMA
    alpha = np.clip(_cheb(skew_coef, pix, n), -_MAX_SKEW, _MAX_SKEW)
    skewed = bool(np.any(np.abs(alpha) > 0.005))
    return _Shape(sigma=sig, alpha=alpha, eta=float(eta), skewed=skewed)


def _lines_model(state, n, shape=None):
    """Noise-free counts of all components on the full pixel grid."""
    c, s, f = state.centre, state.sigma, state.flux
    out = np.zeros(n)
    if c.size == 0:
        return out
    reach = 6.0 if shape is None or shape.eta == 0 else 15.0
    half = int(np.ceil(reach * float(np.max(s)))) + 1
    near = np.rint(c)
    pix = near[:, None].astype(int) + np.arange(-half, half + 1)[None, :]
    edges = near[:, None] + np.arange(-half - 0.5, half + 1.0)[None, :]
    if shape is None or not (shape.skewed or shape.eta > 0):
        cdf = ndtr((edges - c[:, None]) / s[:, None])
    else:
        i = np.clip(near, 0, n - 1).astype(int)
        cdf = _shaped_cdf(edges, c, s, shape.alpha[i], np.full(c.size, shape.eta))[0]
    counts = f[:, None] * (cdf[:, 1:] - cdf[:, :-1])
    if near.min() - half < 0 or near.max() + half >= n:  # a window passes an end
        ok = (pix >= 0) & (pix < n)
        pix, counts = pix[ok], counts[ok]
    return np.bincount(pix.ravel(), weights=counts.ravel(), minlength=n)


def _fit_all(state, ctx, noise, near=None, tol=1e-2, final=True, lines=None):
    """Fit every component (grouped jointly), other lines' models held fixed.

    With ``near`` (pixel positions), only the groups within reach of those are refitted.
    ``lines`` is the model of all components (``_lines_model(state, n)``) when the caller
    has it already.
    """
    if state.centre.size == 0:
        return []
    everything = _lines_model(state, ctx.n, ctx.shape) if lines is None else lines
    diag = []
    fwhm = ctx.sigma_lsf * FWHM_PER_SIGMA
    for groups in _make_groups(state.centre, fwhm, ctx.n):
        if near is not None:
            reach = (_WINDOW_HALF + _GROUP_SEPARATION) * fwhm + 1.0
            hit = ((near[None, :] > groups.lo[:, None] - reach)
                   & (near[None, :] < groups.hi[:, None] + reach)).any(axis=1)
            if not hit.any():
                continue
            groups = _Groups(member=groups.member[hit], lo=groups.lo[hit], hi=groups.hi[hit])
        diag.append(_fit_batch(groups, state, ctx, noise, everything, tol, final))
    return diag


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
    model = np.full(x.size, max(float(_median(var)), 1e-12))
    for _ in range(2):
        w = n_q / (2.3 * model) ** 2
        s0, s1, s2 = float(np.sum(w)), float(w @ x), float(w @ (x * x))
        t0, t1 = float(w @ var), float(w @ (x * var))
        det = s0 * s2 - s1 * s1
        if not det > 0:
            return None
        a, b = (s2 * t0 - s1 * t1) / det, (s0 * t1 - s1 * t0) / det
        model = np.maximum(a + b * x, 1e-12)
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
    within 70 % the starting (conservative) value stays.
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
    v = a + b * delta
    k_eff = float(np.sum((b * delta / v) ** 2 * dof))
    rel = math.sqrt(2.0 / k_eff) if k_eff > 0 else np.inf
    if rel >= noise.b_rel_err and _FROM_RESIDUALS not in noise.method:
        return noise  # the background pinned b better
    if rel > 0.82:
        # Fewer than 3 photon-dominated degrees of freedom: the data cannot tell the gain;
        # keep the conservative start if larger.
        if b_start > b:
            return noise
        rel = 0.82
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
    d = np.where(good, d2, np.nan)[: n * block].reshape(n, block)
    enough = np.count_nonzero(good[: n * block].reshape(n, block), axis=1) >= 16
    if np.count_nonzero(enough) < 3:
        return 0.5 * a
    mad = np.nanmedian(np.abs(d[enough] - np.nanmedian(d[enough], axis=1)[:, None]), axis=1)
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

    Pixels within 3 % of the saturation level (and their neighbours) form clipped runs; each
    run is one ``saturated`` line measured from the run itself (centre from its ends, error
    0.25 px + 0.15 px per clipped pixel for unknown blooming asymmetry, flux a lower bound
    with 50 % error), and pixels
    within 2.5 FWHM of a run are left out of other fits.
    """
    shape = None
    if instrument is not None:
        shape = (instrument.fwhm, instrument.asymmetry, instrument.wing)
        if fwhm_guess is None:
            fwhm_guess = instrument.median_fwhm
    return _find_lines(spectrum, min_snr=min_snr, fwhm_guess=fwhm_guess,
                       saturation=saturation, gain=gain, read_noise=read_noise, dark=dark,
                       offset=offset, instrument=instrument, shape_coeffs=shape, rerun=False)


def _find_lines(spectrum, *, min_snr, fwhm_guess, saturation, gain, read_noise, dark, offset,
                instrument, shape_coeffs, rerun):
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
        # Close small gaps in a clipped run (noise dips below the margin inside a bloom).
        gap = saturated_px.copy()
        for k in (1, 2):
            gap[k:-k] |= saturated_px[: -2 * k] & saturated_px[2 * k :]
        saturated_px = gap & valid
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
        if widths.size >= 1:
            # Pixel integration adds 1/12 px^2 to the profile variance.
            fwhm = float(np.sqrt(max(_median(widths) ** 2 - FWHM_PER_SIGMA**2 / 12, 0.64)))
            lsf_method = f"half-maximum widths of {widths.size} bright peaks, then fits"
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
        cand = cand[~_near_saturation(sat_zone, cand, fwhm)]
    cand_c = cand.astype(float)
    cand_f = f_mf[cand]
    clip_c, clip_f = _clipped_runs(counts, bg, saturated_px, float(saturation or 0.0),
                                   sigma_lsf)
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
    n_candidates = int(state.centre.size)
    ctx = _Context(n=n, excess=excess, background=bg, ok=ok, sigma_lsf=sigma_lsf, shape=shape)

    # Pass 1; in an uncrowded spectrum its residuals already give the slope (1/gain).
    diag = _fit_all(state, ctx, noise, final=False)
    estimate_slope = gain is None and instrument is None
    if estimate_slope:
        noise = _reestimate_slope(noise, diag)
    state, rejected = _prune(state, ctx, fwhm, 0.5 * min_snr, rejected, final=False)
    state = _split_wide(state, ctx, min_snr)
    # Background again, from the spectrum minus the fitted lines.
    lines_now = _lines_model(state, n, shape)
    bg = _block_background(counts - lines_now, ok, max(12.0, 8.0 * fwhm), q=None)
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
        if abs(new_noise.b / noise.b - 1.0) > 0.1 or new_noise.b_rel_err != noise.b_rel_err:
            noise = new_noise
            _fit_all(state, ctx, noise, tol=0.5)
    before = state
    broad = []
    state, rejected = _prune(state, ctx, fwhm, min_snr, rejected, final=True, broad=broad)
    # A component dropped from a joint fit shared flux with its partners: refit those.
    joint = before.group_size > 1
    gone = np.setdiff1d(before.centre[joint], state.centre) if joint.any() else joint[:0]
    if state.centre.size and gone.size:
        _fit_all(state, ctx, noise, near=gone)
        state, rejected = _prune(state, ctx, fwhm, min_snr, rejected, final=True)

    # LSF estimate from the clean, isolated, bright lines.
    fw = FWHM_PER_SIGMA * state.sigma
    single = (state.group_size == 1) & state.converged
    clean = single & (state.snr > 20)
    if np.count_nonzero(clean) < 3:
        clean = single & (state.snr >= min_snr)  # a faint spectrum: use what there is
    lsf_fit = None
    measured = None
    if shape_coeffs is None and fwhm_guess is None:
        measured = _measure_shape(state, ctx, noise)
    if measured is not None:
        fw_coef, skew_coef, eta, n_used = measured
        new = _shape_from_coeffs((fw_coef, skew_coef, eta), n)
        fw_new = new.sigma * FWHM_PER_SIGMA
        med = float(_median(fw_new))
        differs = (eta > 0 or new.skewed or np.ptp(fw_new) > 0.1 * med
                   or abs(med / fwhm - 1.0) > 0.05)
        how = (f"line shape measured on {n_used} bright lines (FWHM {fw_new.min():.2f}-"
               f"{fw_new.max():.2f} px, skew up to {np.max(np.abs(new.alpha)):.2f}, Lorentzian "
               f"fraction {eta:.3f})")
        if differs and not rerun:
            # Detect and fit again with the measured shape (grouping, significance, the
            # fitted profile and the noise estimate from residuals all depend on it).
            again = _find_lines(spectrum, min_snr=min_snr, fwhm_guess=med,
                                saturation=saturation, gain=gain, read_noise=read_noise,
                                dark=dark, offset=offset, instrument=instrument,
                                shape_coeffs=(fw_coef, skew_coef, eta), rerun=True)
            again.meta["lsf_method"] = f"{lsf_method}; {how}"
            again.meta["instrument"]["sources"]["fwhm"] = again.meta["lsf_method"]
            return again
        shape_coeffs = (fw_coef, skew_coef, eta)
        lsf_fit = fwhm = med
        lsf_method += f"; {how}"
    elif np.count_nonzero(clean) >= 3:
        lsf_fit = float(_median(fw[clean]))
        if fwhm_guess is None:
            if abs(lsf_fit / fwhm - 1.0) > 0.1 and not rerun:
                # The width used for detection was far off: detect and fit again with the
                # measured one (matched filter, grouping and significance depend on it).
                again = _find_lines(spectrum, min_snr=min_snr, fwhm_guess=lsf_fit,
                                    saturation=saturation, gain=gain, read_noise=read_noise,
                                    dark=dark, offset=offset, instrument=instrument,
                                    shape_coeffs=None, rerun=True)
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
        return np.zeros(0), np.zeros(0)
    bl = bg[starts]
    br = bg[stops - 1]
    left = counts[np.maximum(starts - 1, 0)]
    right = counts[np.minimum(stops, n - 1)]
    fl = np.where(starts > 0, np.clip((left - bl) / np.maximum(level - bl, 1e-9), 0, 1), 0.0)
    fr = np.where(stops < n, np.clip((right - br) / np.maximum(level - br, 1e-9), 0, 1), 0.0)
    centre = 0.5 * ((starts - fl) + (stops - 1 + fr))
    half_run = 0.5 * (stops - starts + fl + fr)
    height = (level - 0.5 * (bl + br)) * np.exp(0.5 * np.minimum(half_run / sigma, 5.0) ** 2)
    return centre, height * _SQRT2PI * sigma


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
    if "lsf" not in lsf_method and "default" in lsf_method:
        flags.append("fwhm_unconstrained")
    gain = min(max(1.0 / noise.b, 1e-6), 1e6)
    if gain > 1e3 or gain < 1e-3:
        flags.append("not_raw_adu")
    fw_coef, skew_coef, eta = shape if shape is not None else ((float(fwhm),), (0.0,), 0.0)
    inst = Instrument(n_pixels=max(int(n), 2), offset=float(offset), gain=gain,
                      read_noise=float(read_noise), fwhm=fw_coef, asymmetry=skew_coef,
                      wing=float(eta), sources=sources,
                      flags=tuple(flags),
                      gain_rel_err=float(min(noise.b_rel_err, 1.0)))
    return inst.to_dict()


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
    narrow = (fw < 0.5 * local) & ((0.5 * local - fw) > 2.0 * fw_err) & ~outside & ~spike
    # Far wider than the LSF: a background wiggle or a fit gone astray, not a line.
    wide = (fw > _MAX_WIDTH * local) & ~outside & ~narrow & ~spike & ~state.saturated
    weak = (state.snr < snr_cut) & ~outside & ~narrow & ~wide & ~spike & ~state.saturated
    drop = outside | narrow | wide | weak | spike
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
    rejected["spike"] += int(np.count_nonzero(spike))
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
    cols = {
        "pixel": st.centre,
        "pixel_err": st.centre_err * scale,
        "fwhm_pixel": fw,
        "fwhm_pixel_err": fw_err,
        "amplitude": st.flux / (_SQRT2PI * st.sigma),
        "flux": st.flux,
        "flux_err": st.flux_err * scale,
        "background": np.interp(st.centre, np.arange(n), ctx.background) + st.bg_offset,
        "snr": st.snr,
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
