"""Growth and fit: a Chebyshev pixel -> wavelength map under a curvature prior, grown
additively from a start of correspondences, and the tests a fit passes before it is trusted.

The map is ``wavelength = sum_k c_k T_k(x)``, ``x = 2 p / (n_pixels - 1) - 1``.  The
coefficients beyond the linear term have a Gaussian prior (zero mean, a few per cent of the
half-span ``|c_1|``: a grating spectrometer bends that little), so one model serves every
stage: with two lines the map is a straight line with an honest curvature band, with many
lines the data decide; match windows, the band beyond the outermost lines and the number of
parameters the lines determined all follow from the posterior covariance.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from numpy.polynomial import chebyshev as _cheb

from .inputs import Lines, Refs

DEGREE = 5  # highest Chebyshev degree; what the lines cannot determine the prior holds
# 1-sigma prior of |c_k / c_1| for k = 2, 3, 4, 5.  Grating spectrometers depart from a
# linear map by up to a few per cent of the span (common practice).  The grating equation
# of a flat detector behind a 50-200 mm camera (300-1800 lines/mm, diffraction angles
# 10-45 deg) gives |c_2| up to ~0.035, |c_3| ~0.005, |c_4| 3e-6 - 2e-4 and |c_5| <= 3e-5
# of c_1 (derived here; tests/test_calibration_growth.py): the 4th term of the steepest
# such designs sits at 2.2 sigma.
CURVATURE_PRIOR = (0.02, 0.01, 0.0001, 0.00005)
Z_WINDOW = 4.0  # a detection joins a listed line within this many sigma of the prediction
# lamp exposures show lines their list does not hold (impurities, second-order ghosts,
# unlisted weak lines): 10-30 % of the detections (common practice); the middle is taken
UNLISTED = 0.2
ODDS = 10.0  # an identity must be this much likelier than all the alternatives together
Z_REJECT = 4.5  # a matched line leaves when its leave-one-out residual exceeds this
Z_END = 3.0  # the outermost lines must lie this close to the map the other lines predict
# listed intensities are trusted to a factor e at best (lamp current, pressure and the
# spectral response change them; common practice): the flux scatter used is never below
LN_TRUST = 1.0
# a listed line far fainter than the detection named after it keeps this fraction of its
# likelihood: the list may be wrong about one line's strength
BRIGHT_FLOOR = 0.01
# a listed line a lamp does not show at all, whatever its listed intensity (common practice:
# lists compiled from several sources hold lines a given lamp lacks)
MISSING = 0.3


@dataclass(frozen=True)
class Model:
    """The prior of the map: degree, and mean and 1-sigma of each coefficient (``sd`` is
    relative to ``|c_1|`` when ``relative``; ``inf`` = free)."""

    degree: int = DEGREE
    mean: np.ndarray | None = None
    sd: np.ndarray | None = None
    relative: bool = True

    @classmethod
    def blind(cls, degree: int | None = None) -> Model:
        deg = DEGREE if degree is None else int(degree)
        sd = np.full(deg + 1, np.inf)
        k = np.arange(2, deg + 1)
        sd[2:] = np.asarray(CURVATURE_PRIOR + (CURVATURE_PRIOR[-1],) * deg)[k - 2]
        return cls(deg, np.zeros(deg + 1), sd, True)

    def prior(self, c1: float) -> tuple[np.ndarray, np.ndarray]:
        sd = self.sd * abs(c1) if self.relative else self.sd
        return self.mean, np.where(np.isfinite(sd) & (sd > 0), sd, np.inf)


@dataclass
class Fit:
    di: np.ndarray  # matched detections (index into Lines)
    ri: np.ndarray  # their listed lines (index into Refs)
    coef: np.ndarray
    cov: np.ndarray  # posterior covariance, scaled by the reduced chi-square when above 1
    chi2r: float
    n_eff: float  # parameters the lines determined (the rest is prior)
    sig: np.ndarray  # 1-sigma of each matched line, nm
    lev: np.ndarray  # leverage of each matched line
    dropped: dict = field(default_factory=dict)  # (di, ri) -> reason
    model: Model | None = None
    log10_p: float = 0.0
    n_trials: int = 1
    method: str = "search"

    @property
    def scale(self) -> float:
        return max(1.0, self.chi2r)


def xnorm(p, n):
    return 2.0 * np.asarray(p, float) / (n - 1) - 1.0


def _map_fit(x, y, sig, model: Model, c1: float):
    v = _cheb.chebvander(x, model.degree)
    mean, sd = model.prior(c1)
    free = np.isinf(sd)
    a = np.vstack([v / sig[:, None], np.eye(model.degree + 1)[~free] / sd[~free, None]])
    b = np.r_[y / sig, mean[~free] / sd[~free]]
    coef, *_ = np.linalg.lstsq(a, b, rcond=None)
    cov = np.linalg.pinv(a.T @ a)
    vs = v / sig[:, None]
    lev = np.einsum("ij,jk,ik->i", vs, cov, vs)
    # the prior terms count: a map that threads the lines only by bending far beyond what
    # spectrometers do is a poor fit (expected total: lines - 2 free parameters)
    chi2 = float(np.sum((a @ coef - b) ** 2))
    return coef, cov, chi2, lev


def fit_pairs(det: Lines, ref: Refs, di, ri, model: Model, dropped=None) -> Fit | None:
    """The map through matched pairs under the model's prior."""
    di, ri = np.asarray(di, int), np.asarray(ri, int)
    if di.size < 2:
        return None
    n = det.n_pixels
    x = xnorm(det.pixel[di], n)
    y = ref.wavelength[ri]
    if np.ptp(x) <= 0:
        return None
    c1 = float(np.polyfit(x, y, 1)[0])
    coef = None
    for _ in range(2):
        disp = abs(c1) * 2 / (n - 1) if coef is None else np.abs(
            _cheb.chebval(x, _cheb.chebder(coef))) * 2 / (n - 1)
        sig = np.sqrt((det.pixel_err[di] * disp) ** 2 + ref.wavelength_err[ri] ** 2)
        coef, cov, chi2, lev = _map_fit(x, y, sig, model, c1)
        c1 = float(coef[1])
    n_eff = float(lev.sum())
    chi2r = chi2 / max(1.0, di.size - 2.0)
    return Fit(di, ri, coef, cov * max(1.0, chi2r), chi2r, n_eff, sig, lev,
               dict(dropped or {}), model)


def loo(det: Lines, ref: Refs, fit: Fit):
    """Predicted wavelength and its 1-sigma (map and centroid, as :func:`predict`) at every
    detection, a matched line's from the map of the others: in closed form through its
    leverage, by refitting without it when it pins the map alone (leverage above 0.9)."""
    mu, sd, disp = predict(det, fit)
    y = ref.wavelength[fit.ri]
    keep = 1.0 - fit.lev
    soft = keep > 0.1
    d = fit.di[soft]
    mu[d] = y[soft] - (y[soft] - mu[d]) / keep[soft]
    sd[d] = np.sqrt(fit.scale * (fit.sig[soft] ** 2 * fit.lev[soft] / keep[soft]
                                 + (det.pixel_err[d] * disp[d]) ** 2))
    for k in np.flatnonzero(~soft):
        sel = np.arange(fit.di.size) != k
        other = fit_pairs(det, ref, fit.di[sel], fit.ri[sel], fit.model)
        if other is None:
            mu[fit.di[k]], sd[fit.di[k]] = y[k], np.inf
            continue
        m, s_, _ = predict(det, other)
        mu[fit.di[k]], sd[fit.di[k]] = m[fit.di[k]], s_[fit.di[k]]
    return mu, sd


def predict(det: Lines, fit: Fit):
    """Predicted wavelength at every detection, and its 1-sigma (fit and centroid)."""
    n = det.n_pixels
    x = xnorm(det.pixel, n)
    mu = _cheb.chebval(x, fit.coef)
    v = _cheb.chebvander(x, len(fit.coef) - 1)
    var = np.einsum("ij,jk,ik->i", v, fit.cov, v)
    disp = np.abs(_cheb.chebval(x, _cheb.chebder(fit.coef))) * 2 / (n - 1)
    return mu, np.sqrt(var + fit.scale * (det.pixel_err * disp) ** 2), disp


def _flux_scale(det: Lines, ref: Refs, fit: Fit) -> tuple[dict, float]:
    """Detected flux per listed intensity, per species (median of the matched lines), and
    how far listed intensities can be trusted here: the robust scatter (in ln) of the
    matched lines' flux about that scale, never below ``LN_TRUST``."""
    out = {}
    f, inten = det.flux[fit.di], ref.intensity[fit.ri]
    ok = np.isfinite(f) & (f > 0) & np.isfinite(inten) & (inten > 0)
    dev = []
    for s in np.unique(ref.species[fit.ri][ok]):
        sel = ok & (ref.species[fit.ri] == s)
        if sel.sum() >= 3:
            r = np.log(f[sel] / inten[sel])
            out[s] = float(np.exp(np.median(r)))
            dev.append(r - np.median(r))
    spread = 1.4826 * float(np.median(np.abs(np.concatenate(dev)))) if dev else 0.0
    return out, max(LN_TRUST, spread)


def _likelihoods(det: Lines, ref: Refs, fit: Fit, mu=None, sd=None):
    """Likelihood (per nm) of every (detection, listed line) identity of the same exposure
    given the predicted wavelengths ``mu`` +- ``sd`` (default: the fit's), and z.

    A detection far brighter than a listed line should be (at the matched lines' flux per
    listed intensity, beyond their own scatter) is a less likely identity for it: the
    likelihood falls as a Gaussian in ln flux beyond one scatter, to a floor ``BRIGHT_FLOOR``
    (the list may simply be wrong about a line).  Zero where the centroid is too poor to
    name a line (known to worse than an eighth of the LSF width: its window would hold a
    neighbour half a width away)."""
    if mu is None:
        mu, sd, _ = predict(det, fit)
    var = (sd**2)[:, None] + fit.scale * (ref.wavelength_err**2)[None, :]
    z = np.abs(ref.wavelength[None, :] - mu[:, None]) / np.sqrt(var)
    z[det.frame[:, None] != ref.frame[None, :]] = np.inf
    fw = np.where(np.isfinite(det.lsf), det.lsf, det.fwhm_median)
    z[Z_WINDOW * det.pixel_err > 0.5 * fw] = np.inf
    like = np.exp(-0.5 * np.minimum(z, 40.0) ** 2) / (math.sqrt(2 * math.pi) * np.sqrt(var))
    like[~np.isfinite(z)] = 0.0
    return like * _brightness(det, ref, fit), z


def _brightness(det: Lines, ref: Refs, fit: Fit):
    """Factor on the likelihood of each (detection, listed line) identity from the flux:
    1 unless the detection is brighter than the listed line should be by more than the
    measured scatter, then a Gaussian in ln flux down to ``BRIGHT_FLOOR``."""
    scale, trust = _flux_scale(det, ref, fit)
    if not scale:
        return 1.0
    expected = np.array([scale.get(s, np.nan) for s in ref.species]) * ref.intensity
    with np.errstate(invalid="ignore", divide="ignore"):
        excess = np.log(det.flux[:, None] / expected[None, :]) / trust - 1.0
    excess = np.where(np.isfinite(excess), np.clip(excess, 0.0, None), 0.0)
    return np.maximum(np.exp(-0.5 * excess**2), BRIGHT_FLOOR)


def _odds(det: Lines, ref: Refs, fit: Fit, like, rows, cols) -> np.ndarray:
    """Posterior odds of identities (rows[k] is listed line cols[k]) against all the
    alternatives together: every other listed line of the exposure, an unlisted line (a
    fraction ``UNLISTED`` of the detections spread over the span), and, for the listed
    line, every other detection."""
    best = like[rows, cols]
    span = 2 * abs(float(fit.coef[1])) or 1.0  # nm over the detector
    unlisted = UNLISTED * np.bincount(det.frame)[det.frame[rows]] / span
    others = like[rows].sum(axis=1) - best + unlisted
    rivals = like[:, cols].sum(axis=0) - best
    return best / np.maximum(others + rivals, 1e-300)


def _new_pairs(det: Lines, ref: Refs, fit: Fit, banned: set):
    """Identities of unmatched detections, judged one hypothesis at a time but jointly.

    Far from the matched lines the map is uncertain mostly in a few smooth terms that all
    the detections there share: naming one of them pins those terms for the others.  Every
    plausible identity of an unmatched detection is a hypothesis: the map is conditioned on
    it (one Gaussian update of the posterior), the other detections are named under the
    conditioned map where ``ODDS`` allow, and the resulting set is scored by its marginal
    likelihood under the current map against all its lines being unlisted.  A pair of the
    best set joins when the sets holding it are ``ODDS`` times likelier than that null and
    every set naming its detection or listed line otherwise, together.  A lone detection is
    the one-member case."""
    _, z = _likelihoods(det, ref, fit)
    bright = np.broadcast_to(_brightness(det, ref, fit), z.shape)
    free_d = ~np.isin(np.arange(det.pixel.size), fit.di)
    free_r = ~np.isin(np.arange(ref.wavelength.size), fit.ri)
    ok = (z < Z_WINDOW) & free_d[:, None] & free_r[None, :]
    hd, hr = np.nonzero(ok)
    keep = np.array([(int(d), int(r)) not in banned for d, r in zip(hd, hr, strict=True)], bool)
    hd, hr = hd[keep], hr[keep]
    if hd.size < 1:
        return np.zeros(0, int), np.zeros(0, int)
    n = det.n_pixels
    x = xnorm(det.pixel, n)
    v = _cheb.chebvander(x, len(fit.coef) - 1)
    disp = np.abs(_cheb.chebval(x, _cheb.chebder(fit.coef))) * 2 / (n - 1)
    cen2 = fit.scale * (det.pixel_err * disp) ** 2
    ref2 = fit.scale * ref.wavelength_err**2
    # conditioned posteriors, one per hypothesis (H x K and H x K x K)
    vh = v[hd]
    pv = vh @ fit.cov
    s2 = np.einsum("hk,hk->h", pv, vh) + cen2[hd] + ref2[hr]
    gain = pv / s2[:, None]
    m1 = fit.coef[None, :] + gain * (ref.wavelength[hr] - vh @ fit.coef)[:, None]
    p1 = fit.cov[None] - gain[:, :, None] * pv[:, None, :]
    dd = np.flatnonzero(free_d)
    mu = m1 @ v[dd].T
    var = np.einsum("dk,hkl,dl->hd", v[dd], p1, v[dd]) + cen2[dd][None, :]
    sd = np.sqrt(np.clip(var, 0, None))
    tot = sd[:, :, None] ** 2 + ref2[None, None, :]
    zz = np.abs(ref.wavelength[None, None, :] - mu[:, :, None]) / np.sqrt(tot)
    zz = np.where(np.isfinite(z[dd])[None], zz, np.inf)
    lk = np.exp(-0.5 * np.minimum(zz, 40.0) ** 2) / (math.sqrt(2 * math.pi) * np.sqrt(tot))
    lk = np.where(np.isfinite(zz), lk * bright[dd][None], 0.0)
    lk[:, :, ~free_r] = 0.0
    near = np.argmin(zz, axis=2)
    best = np.take_along_axis(lk, near[:, :, None], 2)[:, :, 0]
    span = 2 * abs(float(fit.coef[1])) or 1.0
    unlisted = UNLISTED * np.bincount(det.frame)[det.frame[dd]] / span
    rivals = np.take_along_axis(lk.sum(axis=1), near, 1) - best
    odds = best / np.maximum(lk.sum(axis=2) - best + unlisted[None, :] + rivals, 1e-300)
    named = (np.take_along_axis(zz, near[:, :, None], 2)[:, :, 0] < Z_WINDOW) & (odds > ODDS)
    sets = {}
    for h in range(hd.size):
        pairs = {(int(hd[h]), int(hr[h]))}
        pairs |= {(int(d), int(r)) for d, r in zip(dd[named[h]], near[h, named[h]], strict=True)
                  if d != hd[h] and (int(d), int(r)) not in banned}
        ds, rs = zip(*sorted(pairs), strict=True)
        if len(set(rs)) == len(rs):
            sets[(ds, rs)] = None
    scored = []
    for ds, rs in sets:
        di, ri = np.asarray(ds), np.asarray(rs)
        vs = v[di]
        c = vs @ fit.cov @ vs.T + np.diag(cen2[di] + ref2[ri])
        r = ref.wavelength[ri] - vs @ fit.coef
        sign, logdet = np.linalg.slogdet(2 * np.pi * c)
        if sign <= 0:
            continue
        u = UNLISTED * np.bincount(det.frame)[det.frame[di]] / span
        score = -0.5 * (r @ np.linalg.solve(c, r) + logdet) + float(
            np.sum(np.log(bright[di, ri] / u)))
        scored.append((score, di, ri))
    if not scored:
        return np.zeros(0, int), np.zeros(0, int)
    scored.sort(key=lambda s: -s[0])
    top, di, ri = scored[0]
    # posterior odds of each pair of the best set: the sets naming it against every line
    # unlisted and the sets naming its detection or listed line otherwise
    support = np.zeros(di.size)
    against = np.full(di.size, math.exp(-top))
    for score, d2, r2 in scored:
        w = math.exp(score - top)
        same_d = d2[None, :] == di[:, None]
        same_r = r2[None, :] == ri[:, None]
        support += w * np.any(same_d & same_r, axis=1)
        against += w * np.any(same_d ^ same_r, axis=1)
    agreed = support > ODDS * against
    return di[agreed], ri[agreed]


def _reject(det: Lines, ref: Refs, fit: Fit, model: Model, banned: set) -> Fit | None:
    """Drop, one at a time, matched lines the map through the others rejects: a residual
    beyond ``Z_REJECT`` (robust) sigma, or an identity no longer the likeliest at the
    prediction of the others (leave one out)."""
    while fit is not None and fit.di.size > 3:
        x = xnorm(det.pixel[fit.di], det.n_pixels)
        y = ref.wavelength[fit.ri]
        r = (y - _cheb.chebval(x, fit.coef)) / fit.sig
        z = np.abs(r) / np.sqrt(np.clip(1.0 - fit.lev, 1e-3, None))
        s = max(1.0, 1.4826 * float(np.median(z)))
        worst = int(np.argmax(z))
        odds = None
        if z[worst] < Z_REJECT * s:
            mu, sd = loo(det, ref, fit)
            like, _ = _likelihoods(det, ref, fit, mu, sd)
            odds = _odds(det, ref, fit, like, fit.di, fit.ri)
            worst = int(np.argmin(odds))
            if odds[worst] >= 1.0:
                break
        key = (int(fit.di[worst]), int(fit.ri[worst]))
        banned.add(key)
        sel = np.arange(fit.di.size) != worst
        why = (f"outlier {z[worst] / s:.1f} sigma" if odds is None else
               f"identity not the likeliest at the map of the others (odds {odds[worst]:.2g})")
        fit = fit_pairs(det, ref, fit.di[sel], fit.ri[sel], model, {**fit.dropped, key: why})
    return fit


def _core(det: Lines, ref: Refs, di, ri, model: Model):
    """The consistent part of a start (which may hold look-alike pairs): the 60 % of pairs
    the map through them fits best, refitted until that subset no longer changes (least
    trimmed squares by concentration steps)."""
    di, ri = np.asarray(di, int), np.asarray(ri, int)
    if di.size < 5:
        return di, ri
    x = xnorm(det.pixel[di], det.n_pixels)
    y = ref.wavelength[ri]
    h = max(4, math.ceil(0.6 * di.size))
    sub = np.argsort(np.abs(y - np.polyval(np.polyfit(x, y, 1), x)))[:h]
    for _ in range(10):
        f = fit_pairs(det, ref, di[sub], ri[sub], model)
        if f is None:
            return di, ri
        sd = predict(det, f)[1][di]
        r = np.abs(y - _cheb.chebval(x, f.coef)) / np.hypot(sd, ref.wavelength_err[ri])
        new = np.sort(np.argsort(r)[:h])
        if np.array_equal(new, np.sort(sub)):
            break
        sub = new
    # the rest of the start joins only as growth admits any line: as a clear identity
    return di[sub], ri[sub]


def grow(det: Lines, ref: Refs, di, ri, model: Model, *, max_rounds=40) -> Fit | None:
    """Widen a start of correspondences to the whole detector: fit, add every detection the
    fit identifies without ambiguity, drop what the fit rejects (never to return), repeat."""
    banned: set = set()
    di, ri = _core(det, ref, di, ri, model)
    fit = _reject(det, ref, fit_pairs(det, ref, di, ri, model), model, banned)
    for _ in range(max_rounds):
        if fit is None:
            return None
        nd, nr = _new_pairs(det, ref, fit, banned)
        if nd.size == 0:
            break
        fit = fit_pairs(det, ref, np.r_[fit.di, nd], np.r_[fit.ri, nr], model, fit.dropped)
        fit = _reject(det, ref, fit, model, banned)
    return fit


def vouched_ends(det: Lines, ref: Refs, fit: Fit, model: Model) -> Fit:
    """Test the two outermost lines at each end jointly: the map of the other lines (with
    its curvature band) must put each within ``Z_END`` sigma; the worse one leaves until
    both pass.  A map bent to a pair of wrong end lines predicts them wherever they sit, so
    only the others can vouch for them."""
    for side in (0, 1):
        for _ in range(3):
            if fit.di.size < 6:
                return fit
            x = xnorm(det.pixel[fit.di], det.n_pixels)
            order = np.argsort(x)
            ends = order[:2] if side == 0 else order[-2:]
            keep = ~np.isin(np.arange(fit.di.size), ends)
            rest = fit_pairs(det, ref, fit.di[keep], fit.ri[keep], model)
            if rest is None:
                return fit
            mu, sd, _ = predict(det, rest)
            d = fit.di[ends]
            z = np.abs(mu[d] - ref.wavelength[fit.ri[ends]]) / np.sqrt(
                sd[d] ** 2 + rest.scale * ref.wavelength_err[fit.ri[ends]] ** 2)
            if z.max() < Z_END:
                break
            bad = ends[int(np.argmax(z))]
            key = (int(fit.di[bad]), int(fit.ri[bad]))
            sel = np.arange(fit.di.size) != bad
            dropped = {**fit.dropped, key: f"end line {z.max():.1f} sigma off the map of "
                       "the other lines"}
            fit = fit_pairs(det, ref, fit.di[sel], fit.ri[sel], model, dropped)
    return fit


def log10_chance(det: Lines, ref: Refs, fit: Fit, n_trials: int) -> float:
    """log10 of the chance that a line list of the same local density fits the detections
    this well by accident, over the whole search, counting missing strong lines against.

    Under that null hypothesis the distance from each predicted wavelength to the nearest
    listed line is exponential with rate 2 x density, so ``u = 1 - exp(-2 rho d)`` is uniform
    and ``sum(-ln u)`` over the detections is Gamma(n, 1) distributed.  A matched line is
    predicted by the map of the others (leave one out: a map cannot vouch for a line it was
    bent to), distances are floored at the uncertainty of that prediction, and the result is
    multiplied by the number of candidate maps the search examined.  Listed lines whose
    known intensity makes them strong at this exposure's flux scale but that fall on empty
    detector count against the map: the chance is divided by the probability of missing
    that many under it.
    """
    from scipy.stats import gamma

    _, sd, disp = predict(det, fit)
    floor = sd + math.sqrt(fit.scale) * float(np.median(ref.wavelength_err))
    mu, sd_loo = loo(det, ref, fit)
    floor[fit.di] = sd_loo[fit.di]
    span = abs(float(np.ptp(mu))) + float(np.median(disp)) * det.n_pixels * 0.1
    half = 0.05 * span
    terms = []
    for f in np.unique(det.frame):
        d_sel = det.frame == f
        w = ref.wavelength[ref.frame == f]
        if w.size < 2:
            continue
        pred = mu[d_sel]
        j = np.clip(np.searchsorted(w, pred), 1, w.size - 1)
        dist = np.minimum(np.abs(pred - w[j - 1]), np.abs(pred - w[j]))
        local = np.searchsorted(w, pred + half) - np.searchsorted(w, pred - half)
        density = np.maximum(local, 1) / (2 * half)
        u = -np.expm1(-2.0 * density * np.maximum(dist, floor[d_sel]))
        terms.append(-np.log(np.clip(u, 1e-300, 1.0)))
    if not terms:
        return 0.0
    terms = np.concatenate(terms)
    log10_p = float(gamma.logsf(terms.sum(), terms.size)) / math.log(10)
    log10_p -= _missing_chance(det, ref, fit) / math.log(10)
    return min(0.0, math.log10(max(n_trials, 1)) + log10_p)


def _missing_chance(det: Lines, ref: Refs, fit: Fit) -> float:
    """ln of the probability, were the map right, of missing listed lines (no detection
    inside the window) at least as unlikely as those it leaves missing.

    A listed line is missed with probability ``MISSING`` (lists hold lines a lamp does not
    show) or when its flux, expected from the matched lines' flux per listed intensity and
    trusted only to their measured scatter, falls below the faintest detections: lines whose
    intensity is unknown, or far below the detection limit, weigh nothing.  The statistic,
    the summed ln probability of the missed lines, is a sum of independent two-valued terms
    (a line seen adds nothing); its tail is taken as normal."""
    from scipy.stats import norm

    scale, trust = _flux_scale(det, ref, fit)
    if not scale:
        return 0.0
    n = det.n_pixels
    expected = np.array([scale.get(s, np.nan) for s in ref.species]) * ref.intensity
    p = _pixel_of(fit, ref.wavelength, n)
    margin = 3 * (det.fwhm_median if math.isfinite(det.fwhm_median) else 3.0)
    on = np.isfinite(p) & (p > margin) & (p < n - 1 - margin) & np.isfinite(expected) & (
        expected > 0)
    prob, missed = [], []
    for f in np.unique(det.frame):
        fl = det.flux[(det.frame == f) & np.isfinite(det.flux) & (det.flux > 0)]
        sel = on & (ref.frame == f)
        if fl.size < 3 or not sel.any():
            continue
        limit = np.percentile(fl, 10)
        prob.append(MISSING + (1 - MISSING) * norm.cdf(np.log(limit / expected[sel]) / trust))
        pf = det.pixel[det.frame == f]
        tol = np.maximum(Z_WINDOW * np.interp(p[sel], det.pixel, predict(det, fit)[1])
                         / np.abs(_dispersion(fit, p[sel], n)), 2 * margin / 3)
        missed.append(np.min(np.abs(pf[None, :] - p[sel][:, None]), axis=1) > tol)
    if not prob:
        return 0.0
    q, m = np.clip(np.concatenate(prob), 1e-9, 1.0), np.concatenate(missed)
    lq = np.log(q)
    observed = float(np.sum(lq[m]))
    mean = float(np.sum(q * lq))
    sd = math.sqrt(float(np.sum(q * (1 - q) * lq**2)))
    if sd == 0 or observed >= mean:
        return 0.0
    return float(norm.logcdf((observed - mean) / sd))


def _dispersion(fit: Fit, p, n):
    return _cheb.chebval(xnorm(p, n), _cheb.chebder(fit.coef)) * 2 / (n - 1)


def _pixel_of(fit: Fit, wl, n) -> np.ndarray:
    grid = np.linspace(0, n - 1, 513)
    wg = _cheb.chebval(xnorm(grid, n), fit.coef)
    if np.any(np.diff(wg) == 0) or not (np.all(np.diff(wg) > 0) or np.all(np.diff(wg) < 0)):
        return np.full(np.size(wl), np.nan)
    order = np.argsort(wg)
    return np.interp(wl, wg[order], grid[order], left=np.nan, right=np.nan)


def limited_degree(fit: Fit) -> int:
    """Highest degree the lines determined (posterior variance below half the prior's)."""
    return max(1, min(len(fit.coef) - 1, math.floor(fit.n_eff + 1e-9) - 1))


def jackknife_cov(det: Lines, ref: Refs, fit: Fit) -> np.ndarray:
    """Jackknife covariance of the coefficients (leave one line out at a time, in closed
    form through the hat matrix): it sees what the formal covariance cannot, a map pinned
    somewhere by a single line whose centroid or identity is off."""
    x = xnorm(det.pixel[fit.di], det.n_pixels)
    a = _cheb.chebvander(x, len(fit.coef) - 1) / fit.sig[:, None]
    r = (ref.wavelength[fit.ri] - _cheb.chebval(x, fit.coef)) / fit.sig
    cu = fit.cov / fit.scale
    g = (a * (r / np.clip(1.0 - fit.lev, 1e-6, None))[:, None]) @ cu
    m = x.size
    g = g - g.mean(axis=0)
    return (m - 1) / m * (g.T @ g)
