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
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
from scipy.special import chdtrc, ndtr

from .errors import RitzlineError, SpectrumFormatError
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
_WING_REACH = 2.5  # FWHM beyond a clipped run whose pixels are left out of fits
_MAX_WIDTH = 3.5  # components wider than this many LSF FWHM are rejected
_SATURATION_MARGIN = 0.97
_CLIPPED_ERR_PER_PX = 0.15  # centroid allowance per clipped pixel (blooming asymmetry)


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
    """Variance model ``var = a + b * (level - ref)`` (ADU^2), level = expected counts."""

    a: float
    b: float
    ref: float
    method: str

    def variance(self, level):
        return np.maximum(self.b * level + (self.a - self.b * self.ref), 0.05 * self.a + 1e-12)

    def as_meta(self) -> dict:
        gain = 1.0 / self.b if self.b > 0 else None
        rn2 = self.a - self.b * self.ref
        return {
            "method": self.method,
            "gain": gain,
            "read_noise": float(np.sqrt(rn2)) if rn2 > 0 else 0.0,
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
    """The saturation level, if the spectrum shows repeated maximum values (a clipped top)."""
    if not valid.any():
        return None
    usable = counts if valid.all() else counts[valid]
    top = usable.max()
    n_top = int(np.count_nonzero(usable == top))
    if n_top >= 3:
        return float(top)
    if n_top == 2 and top > 0 and (np.log2(top + 1) % 1 == 0 or np.log2(top) % 1 == 0):
        return float(top)
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


def _profile_and_jacobian(edges, b0, c, s, f):
    """Model counts, Jacobian (G, P, L) and unit profiles (G, K, L) from the pixel edges.

    The unit profiles are a view into the Jacobian (its flux rows); the derivatives are
    written straight into it, since on windows this small every array pass costs about as
    much as the arithmetic.
    """
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


def _levenberg_marquardt(fixed, b0, c, s, f, noise, s_lo, tol, start=None):
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
        start = _profile_and_jacobian(fixed["edges"], b0, c, s, f)
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
        ns = np.minimum(np.maximum(s + step[:, 2::3], s_lo), fx["s_hi"])
        nf = f + step[:, 3::3]
        nmodel, njac, nfrac = _profile_and_jacobian(fx["edges"], nb0, nc, ns, nf)
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
    # The groups' own current models (b0 = 0) also start the fit.
    start = _profile_and_jacobian(edges, b0, c, s, f)
    others = neighbours_model[xi] - start[0]
    y = ctx.excess[xi] - others

    base_level = bg_glob + others
    c_lo = groups.lo[:, None] - 0.5
    c_hi = groups.hi[:, None] + 0.5
    s_lo = 0.2 * ctx.sigma_lsf
    s_hi = np.maximum(6.0 * ctx.sigma_lsf, (groups.hi - groups.lo)[:, None] / 4.0)
    valid_f = valid.astype(float)
    fixed = {"y": y, "valid_f": valid_f, "edges": edges, "base_level": base_level,
             "c_lo": c_lo, "c_hi": c_hi, "s_hi": s_hi}
    b0, c, s, f, model, jac, frac, w, resid, chi2, converged = _levenberg_marquardt(
        fixed, b0, c, s, f, noise, s_lo, tol, start)
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
    lsf_consistent = np.abs(s - ctx.sigma_lsf) < 2.0 * np.sqrt(var_diag[:, 2::3])
    # Profiles at the LSF width: the matched-filter significance below and, in the final
    # pass, the Jacobian rows of the LSF-consistent components.
    if final and lsf_consistent.any():
        _, jac_lsf, frac_lsf = _profile_and_jacobian(edges, b0, c, np.full_like(s, ctx.sigma_lsf),
                                                     f)
        rows_lsf = np.concatenate([np.zeros((n_g, 1), bool),
                                   np.repeat(lsf_consistent, 3, axis=1)], axis=1)
        cov, dead = covariance(np.where(rows_lsf[:, :, None], jac_lsf, jac))
        var_diag = np.maximum(cov[:, on_diag, on_diag], 0)
    else:
        cdf_lsf = ndtr((edges - c[..., None]) / ctx.sigma_lsf)
        frac_lsf = cdf_lsf[..., 1:] - cdf_lsf[..., :-1]
    n_free = n_par - np.count_nonzero(dead, axis=1) if dead.any() else n_par
    dof = np.add.reduce(valid, axis=1) - n_free
    # Leverage of each pixel (for the noise re-estimate).
    lev = np.einsum("gpl,gpl->gl", cov @ jac, jac) * w
    # Detection significance: the matched filter (LSF-shaped, known background) applied at
    # the fitted centre to the data minus every other component -- a statistic with unit
    # spread under noise, unlike the flux over its free-shape error.
    alone = resid[:, None, :] + f[..., None] * frac
    info_f = np.einsum("gkl,gl->gk", frac_lsf * frac_lsf, w)
    mf_num = np.einsum("gkl,gl->gk", frac_lsf * alone, w)
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
    state.chi2[comp] = chi2[:, None]
    state.dof[comp] = dof[:, None]
    state.converged[comp] = converged[:, None]
    state.group_size[comp] = k
    # Groups whose widths all match the LSF (no unresolved blend) inform the noise estimate.
    lsf_like = (k == 1) & (np.abs(s[:, 0] / ctx.sigma_lsf - 1.0) < 0.15)
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

    def subset(self, keep):
        """The components where the boolean mask ``keep`` is True (copies, every attribute)."""
        new = object.__new__(_State)
        new.__dict__.update({name: value[keep] for name, value in self.__dict__.items()})
        return new

    def extend(self, centre, sigma, flux):
        new = _State(_cat(self.centre, centre), _cat(self.sigma, sigma),
                     _cat(self.flux, flux))
        return new


@dataclass(frozen=True)
class _Context:
    n: int
    excess: np.ndarray  # counts - background
    background: np.ndarray
    ok: np.ndarray  # usable for fitting
    sigma_lsf: float


def _lines_model(state, n):
    """Noise-free counts of all components on the full pixel grid."""
    c, s, f = state.centre, state.sigma, state.flux
    out = np.zeros(n)
    if c.size == 0:
        return out
    half = int(np.ceil(6.0 * float(np.max(s)))) + 1
    near = np.rint(c)
    pix = near[:, None].astype(int) + np.arange(-half, half + 1)[None, :]
    edges = near[:, None] + np.arange(-half - 0.5, half + 1.0)[None, :]
    cdf = ndtr((edges - c[:, None]) / s[:, None])
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
    everything = _lines_model(state, ctx.n) if lines is None else lines
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
    return a, b


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

    Only pixels where the line's own photon noise is at least the background noise are used
    (fainter ones cannot tell the slope).  b is chosen so that the median of the normalised
    squared residuals equals that of chi-square with one degree of freedom -- or, when more
    than 2 % of them then exceed 9 (profile mismatches such as faint unresolved companions
    in a lamp spectrum, which only ever inflate residuals), so that their 30 % quantile
    does.  On dense lamp spectra it still tends to overestimate b (errors on the safe side).
    """
    if not diag:
        return noise
    x_res = np.concatenate([d["resid"] for d in diag])
    lev = np.concatenate([d["lev"] for d in diag])
    level = np.concatenate([d["level"] for d in diag])
    e2_all = x_res * x_res / np.clip(1.0 - lev, 0.2, 1.0)
    delta_all = level - noise.ref
    b = noise.b if noise.b > 0 else noise.a / max(noise.ref, np.sqrt(noise.a))
    use = (delta_all > 5.0 * np.sqrt(noise.a)) & (b * delta_all > noise.a)
    if np.count_nonzero(use) < 30:
        return noise
    e2, delta = e2_all[use], delta_all[use]
    if e2.size > 400:  # 400 pixels pin the slope to a few per cent
        take = np.linspace(0, e2.size - 1, 400).astype(int)
        e2, delta = e2[take], delta[take]
    # Quantiles of chi-square with 1 dof (common practice): the median (efficient) and the
    # 30 % point (robust); the robust one is used when the residuals show misfits.
    median_b = _slope_for_quantile(e2, delta, noise.a, b, 0.5, 0.45493642311957283)
    misfit = np.mean(e2 / (noise.a + median_b * delta) > 9.0)  # 0.27 % for pure noise
    b = median_b if misfit < 0.02 else _slope_for_quantile(e2, delta, noise.a, b, 0.3,
                                                           0.14847186183254)
    return _Noise(a=noise.a, b=float(b), ref=noise.ref, method=noise.method)


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
        Electrons per ADU.  Estimated from the fit residuals when omitted.
    read_noise : float, optional
        Read noise (ADU).  With ``gain`` and ``read_noise`` both given the variance is
        ``counts / gain + read_noise**2``; otherwise the variance at the background is
        measured from the data.
    dark : specutils.Spectrum or array, optional
        A dark/background exposure of the same detector, subtracted first.

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
    return _find_lines(spectrum, min_snr=min_snr, fwhm_guess=fwhm_guess,
                       saturation=saturation, gain=gain, read_noise=read_noise, dark=dark,
                       rerun=False)


def _find_lines(spectrum, *, min_snr, fwhm_guess, saturation, gain, read_noise, dark, rerun):
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
    if dark is not None:
        d_counts, d_mask = _as_counts(dark, n, "dark frame")
        mask |= d_mask
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
    if gain is not None and read_noise is not None:
        noise = _Noise(a=read_noise**2 + max(ref, 0.0) / gain, b=1.0 / gain, ref=ref,
                       method="given gain and read noise")
    else:
        a = sig_bg**2
        if gain is not None:
            b, method = 1.0 / gain, "given gain; variance at background measured"
        else:
            slope = _variance_slope_from_background(counts, bg, quiet, ref)
            if slope is not None:
                a, b = slope
                method = ("estimated: variance against background level from second "
                          "differences")
            else:
                # Until the fit residuals say otherwise: all background variance photon noise.
                b = a / max(ref, a) if ref > 0 else 1.0
                method = ("estimated: background variance from second differences, gain from "
                          "fit residuals")
        noise = _Noise(a=a, b=b, ref=ref, method=method)
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
    if saturated_px.any():
        # The wings of a clipped line are not modelled: keep them out of every other fit.
        ok &= ~_near_saturation(sat_zone, np.arange(n), fwhm, _WING_REACH)

    # Detection: matched filter on the background-subtracted counts.
    weight = np.where(ok, 1.0 / noise.variance(bg), 0.0)
    f_mf, snr_mf = _matched_filter(excess, weight, fwhm)
    cand = _local_maxima(snr_mf, 0.7 * min_snr)
    # Lines whose cores are clipped are measured from their clipped runs (see _clipped_lines);
    # no other candidate is taken inside a run or within 1.5 FWHM of it.
    if saturated_px.any():
        cand = cand[~_near_saturation(sat_zone, cand, fwhm)]
    cand_c = cand.astype(float)
    cand_f = f_mf[cand]
    clipped = _clipped_lines(counts, bg, saturated_px, float(saturation or 0.0), fwhm, noise)
    if cand_c.size == 0 and clipped["pixel"].size == 0:
        meta.update(_meta_tail(noise, fwhm, None, lsf_method, rejected, 0, min_snr))
        return empty(f"no line reaches the detection threshold (min_snr={min_snr:g})")
    # Sub-pixel start: parabola through the filter peak.
    ic = np.minimum(np.maximum(cand, 1), n - 2)
    zl, z0, zr = snr_mf[ic - 1], snr_mf[ic], snr_mf[ic + 1]
    den = zl - 2 * z0 + zr
    shift = np.where(den < 0, 0.5 * (zl - zr) / np.where(den < 0, den, -1), 0.0)
    cand_c = cand_c + np.clip(shift, -0.5, 0.5)
    state = _State(cand_c, np.full(cand_c.size, sigma_lsf), cand_f)
    n_candidates = int(cand_c.size + clipped["pixel"].size)
    ctx = _Context(n=n, excess=excess, background=bg, ok=ok, sigma_lsf=sigma_lsf)

    # Pass 1; in an uncrowded spectrum its residuals already give the slope (1/gain).
    diag = _fit_all(state, ctx, noise, final=False)
    estimate_slope = gain is None and "fit residuals" in noise.method
    if estimate_slope:
        noise = _reestimate_slope(noise, diag)
    state, rejected = _prune(state, ctx, fwhm, 0.5 * min_snr, rejected, final=False)
    # Background again, from the spectrum minus the fitted lines.
    lines_now = _lines_model(state, n)
    bg = _block_background(counts - lines_now, ok, max(12.0, 8.0 * fwhm), q=None)
    excess = counts - bg
    ctx = _Context(n=n, excess=excess, background=bg, ok=ok, sigma_lsf=sigma_lsf)
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
        lines_now = lines_now + _lines_model(extra_state, n)
        state = state.extend(extra_state.centre, extra_state.sigma, extra_state.flux)
    # Pass 2, neighbours from pass 1.
    diag = _fit_all(state, ctx, noise, lines=lines_now)
    if estimate_slope:
        # The slope again from the converged fits (neighbours and background settled); refit
        # with it when it moved (crowded spectra).
        new_noise = _reestimate_slope(noise, diag)
        if abs(new_noise.b / noise.b - 1.0) > 0.1:
            noise = new_noise
            _fit_all(state, ctx, noise, tol=0.5)
    before = state
    state, rejected = _prune(state, ctx, fwhm, min_snr, rejected, final=True)
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
    if np.count_nonzero(clean) >= 3:
        lsf_fit = float(_median(fw[clean]))
        if fwhm_guess is None:
            if abs(lsf_fit / fwhm - 1.0) > 0.1 and not rerun:
                # The width used for detection was far off: detect and fit again with the
                # measured one (matched filter, grouping and significance depend on it).
                again = _find_lines(spectrum, min_snr=min_snr, fwhm_guess=lsf_fit,
                                    saturation=saturation, gain=gain, read_noise=read_noise,
                                    dark=dark, rerun=True)
                again.meta["lsf_method"] = (
                    f"{lsf_method}; refitted with the median fitted FWHM of "
                    f"{np.count_nonzero(clean)} lines")
                return again
            fwhm = lsf_fit
            lsf_method += f" (median fitted FWHM of {np.count_nonzero(clean)} lines)"
    meta.update(_meta_tail(noise, fwhm, lsf_fit, lsf_method, rejected, n_candidates, min_snr))
    meta["background_method"] = (
        "block quantile (25%, corrected to the mean) then block median of the spectrum "
        f"minus the fitted lines, blocks of {max(12.0, 8.0 * fwhm):.0f} px, linear "
        "interpolation; plus a constant offset fitted in each line window")
    if state.centre.size == 0 and clipped["pixel"].size == 0:
        return empty(f"no line reaches min_snr={min_snr:g} after fitting")

    table = _table_from_state(state, ctx, fwhm, clipped, meta, n)
    if has_wavelength:
        table = attach_wavelengths(table, _AxisSolution(arr.axis))
    return table


def _near_saturation(sat_zone, idx, fwhm, reach_fwhm=1.5):
    """Whether pixels ``idx`` lie within ``reach_fwhm`` FWHM of a saturated (bloomed) pixel."""
    reach = int(np.ceil(reach_fwhm * fwhm))
    zone = np.convolve(sat_zone, np.ones(2 * reach + 1), mode="same") > 0
    return zone[idx]


def _clipped_lines(counts, bg, saturated_px, level, fwhm, noise):
    """Lines whose cores are clipped: one per run of saturated pixels, measured from the run.

    The centre is the middle of the run, each end extended by the fraction of the clip level
    its outer neighbour reaches.  Blooming and the unknown shape of the clipped core make the
    centre uncertain by far more than photon noise (the data cannot tell which way charge
    bloomed): the error is 0.25 px plus 0.15 px per clipped pixel, an allowance that covers
    blooming split up to 65/35 between the two sides at one sigma (measured in the
    benchmark; symmetric blooming does ten times better), the flux is the counts above the
    background within 2 FWHM of the run (a lower bound, 50 % error), the FWHM the run length
    plus the LSF (an upper bound, error half the run length).
    """
    n = counts.size
    edges = np.diff(_cat(0, saturated_px.astype(np.int8), 0))
    starts, stops = np.flatnonzero(edges == 1), np.flatnonzero(edges == -1)
    if starts.size == 0:
        return {k: np.zeros(0) for k in ("pixel", "pixel_err", "fwhm", "fwhm_err", "flux",
                                         "flux_err", "snr", "background", "run")}
    bl = bg[starts]
    br = bg[stops - 1]
    left = counts[np.maximum(starts - 1, 0)]
    right = counts[np.minimum(stops, n - 1)]
    fl = np.clip((left - bl) / np.maximum(level - bl, 1e-9), 0, 1)
    fr = np.clip((right - br) / np.maximum(level - br, 1e-9), 0, 1)
    fl = np.where(starts > 0, fl, 0.0)
    fr = np.where(stops < n, fr, 0.0)
    centre = 0.5 * ((starts - fl) + (stops - 1 + fr))
    run = (stops - starts).astype(float)
    reach = int(np.ceil(2.0 * fwhm))
    cs = _cat(0, np.cumsum(counts - bg))
    cv = _cat(0, np.cumsum(noise.variance(np.maximum(counts, bg))))
    lo = np.clip(starts - reach, 0, n)
    hi = np.clip(stops + reach, 0, n)
    flux = cs[hi] - cs[lo]
    return {
        "pixel": centre,
        "pixel_err": 0.25 + _CLIPPED_ERR_PER_PX * run,
        "fwhm": run + fwhm,
        "fwhm_err": 0.5 * run,
        "flux": flux,
        "flux_err": 0.5 * np.abs(flux),
        "snr": flux / np.sqrt(cv[hi] - cv[lo]),
        "background": 0.5 * (bl + br),
        "run": run,
    }


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


def _prune(state, ctx, fwhm, snr_cut, rejected, *, final):
    """Drop components that are not credible lines; count each reason in ``rejected``."""
    if state.centre.size == 0:
        return state, rejected
    fw = FWHM_PER_SIGMA * state.sigma
    fw_err = FWHM_PER_SIGMA * state.sigma_err
    outside = (state.centre < -0.5) | (state.centre > ctx.n - 0.5) | ~np.isfinite(state.centre)
    narrow = (fw < 0.5 * fwhm) & ((0.5 * fwhm - fw) > 2.0 * fw_err) & ~outside
    # Far wider than the LSF: a background wiggle or a fit gone astray, not a line.
    wide = (fw > _MAX_WIDTH * fwhm) & ~outside & ~narrow
    weak = (state.snr < snr_cut) & ~outside & ~narrow & ~wide
    drop = outside | narrow | wide | weak
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


def _table_from_state(state, ctx, fwhm, clipped, meta, n):
    st = state
    dof = np.maximum(st.dof, 1)
    poor = chdtrc(dof, st.chi2) < 0.01
    scale = np.where(poor, np.sqrt(st.chi2 / dof), 1.0)
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
    code = 2 * (st.group_size > 1) + 4 * ((fw > 1.1 * fwhm) & ((fw - fwhm) > 3.0 * fw_err))
    n_sat = clipped["pixel"].size
    if n_sat:
        extra = {"pixel": clipped["pixel"], "pixel_err": clipped["pixel_err"],
                 "fwhm_pixel": clipped["fwhm"], "fwhm_pixel_err": clipped["fwhm_err"],
                 "amplitude": np.full(n_sat, np.nan), "flux": clipped["flux"],
                 "flux_err": clipped["flux_err"], "background": clipped["background"],
                 "snr": clipped["snr"]}
        cols = {k: np.concatenate([v, extra[k]]) for k, v in cols.items()}
        code = np.concatenate([code, np.ones(n_sat, code.dtype)])
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
