"""Line profiles and the batched fitter.

A line is a pseudo-Voigt split normal integrated over each pixel (a Gaussian when the
instrument shows no skew and no Lorentzian wings).  All lines are fitted at once as one damped
Gauss-Newton (Levenberg-Marquardt) problem on stacked pixel windows; lines closer than about
two FWHM share a window and are fitted jointly, and each group stops when it has converged.
The line shape along the detector (FWHM, skew, wing fraction) is measured here from the
bright isolated lines.  Also the Cramer-Rao bounds of a line's parameters.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.special import ndtr

from ._arrays import _cat, _median
from .instrument import _cheb
from .synthetic import FWHM_PER_SIGMA

_SQRT2PI = np.sqrt(2.0 * np.pi)

_GROUP_SEPARATION = 2.0  # lines closer than this many FWHM are fitted jointly

_WINDOW_HALF = 4.0  # fit window half-width beyond the outer lines, in FWHM

_MAX_COMPONENTS = 8  # larger groups are cut into runs of this many components

_MAX_ITER = 20

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
        # A centre or width at its bound that the gradient pushes outwards is held there for
        # this step (the others take the step the constrained problem allows), so the
        # promised gain is that of a step that can be taken and a fit at a bound converges.
        g_c, g_s = grad[:, 1::3], grad[:, 2::3]
        dead[:, 1::3] |= ((c <= fx["c_lo"]) & (g_c < 0)) | ((c >= fx["c_hi"]) & (g_c > 0))
        dead[:, 2::3] |= ((s <= fx["s_lo"]) & (g_s < 0)) | ((s >= fx["s_hi"]) & (g_s > 0))
        if dead.any():
            damp = hess + (lam[:, None] * np.where(dead, 1.0, diag))[:, :, None] * eye
            damp = np.where(dead[:, :, None] | dead[:, None, :], eye, damp)
            grad = np.where(dead, 0.0, grad)
        else:
            damp = hess.copy()
            damp[:, on_diag, on_diag] = diag * (1.0 + lam[:, None])
        try:
            step = np.linalg.solve(damp, grad[..., None])[..., 0]
        except np.linalg.LinAlgError:
            step = np.zeros_like(grad)
        nb0 = b0 + step[:, 0]
        nc = np.minimum(np.maximum(c + step[:, 1::3], fx["c_lo"]), fx["c_hi"])
        ns = np.minimum(np.maximum(s + step[:, 2::3], fx["s_lo"]), fx["s_hi"])
        nf = f + step[:, 3::3]
        # The step actually taken (a bound may have shortened it) and the chi2 it promises.
        step[:, 1::3] = nc - c
        step[:, 2::3] = ns - s
        predicted = (2.0 * np.einsum("gp,gp->g", step, grad)
                     - np.einsum("gp,gpq,gq->g", step, hess, step))
        nmodel, njac, nfrac = _profile_and_jacobian(fx["edges"], nb0, nc, ns, nf,
                                                    fx.get("alpha"), fx.get("eta"))
        nres = fx["y"] - nmodel
        nchi2 = np.einsum("gl,gl->g", w * nres, nres)
        better = (nchi2 <= chi2) & active
        all_better = better.all()
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
    # Each group's background offset starts where its members' last fits left it.
    b0 = state.bg_offset[m].mean(axis=1)
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
    # A clipped line peaks inside its clipped run.
    c_lo = np.where(sat, state.run_centre[m] - state.run_half[m], groups.lo[:, None] - 0.5)
    c_hi = np.where(sat, state.run_centre[m] + state.run_half[m], groups.hi[:, None] + 0.5)
    s_lo = np.where(sat, sig_lsf, 0.4 * sig_lsf)
    s_hi = np.where(sat, sig_lsf,
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
        self.run_half = z.copy()  # clipped lines: half the clipped run (px); else 0
        self.run_centre = z.copy()
        self.run_flux = z.copy()
        self.run_clip = z.copy()

    def subset(self, keep):
        """The components where the boolean mask ``keep`` is True (copies, every attribute)."""
        new = object.__new__(_State)
        new.__dict__.update({name: value[keep] for name, value in self.__dict__.items()})
        return new

    def extend(self, centre, sigma, flux, saturated=False):
        """These components and new ones (their other attributes zero until fitted)."""
        k = np.size(centre)
        given = {"centre": centre, "sigma": sigma, "flux": flux,
                 "saturated": np.broadcast_to(saturated, (k,))}
        new = object.__new__(_State)
        new.__dict__.update({
            name: np.concatenate([value, given[name] if name in given
                                  else np.zeros(k, value.dtype)])
            for name, value in self.__dict__.items()})
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
    coefficient is significant at 3 sigma and whose curve stays inside ``bounds``; points
    beyond 4 sigma (with a 5 % scatter floor) of the median, then of the fit, are dropped.
    Returns the coefficient tuple.
    """
    keep = np.isfinite(y) & np.isfinite(err) & (err > 0)
    if not keep.any():
        return (0.0,)
    med = float(np.median(y[keep]))
    floor = 0.05 * abs(med) + 1e-12 * (abs(med) + 1.0)
    tol = 4.0 * np.hypot(err, floor)
    keep &= np.abs(y - med) < tol + 3.0 * floor
    if not keep.any():
        return (med,)
    t = 2.0 * x / max(n_pixels - 1, 1) - 1.0
    top = min(max_degree, np.count_nonzero(keep) // 4)
    vander = np.polynomial.chebyshev.chebvander(t, top) / err[:, None]
    yw = y / err
    grid = np.polynomial.chebyshev.chebvander(np.linspace(-1, 1, 65), top)
    best = (float(np.average(y[keep], weights=err[keep] ** -2)),)
    for deg in range(top + 1):
        use = keep
        for _ in range(2):
            coef, *_ = np.linalg.lstsq(vander[use, : deg + 1], yw[use], rcond=None)
            res = y - (vander[:, : deg + 1] @ coef) * err
            now = keep & (np.abs(res) < tol)
            if np.count_nonzero(now) <= deg + 1 or np.array_equal(now, use):
                break
            use = now
        a = vander[use, : deg + 1]
        coef, *_ = np.linalg.lstsq(a, yw[use], rcond=None)
        resid = yw[use] - a @ coef
        dof = max(np.count_nonzero(use) - deg - 1, 1)
        cov = np.linalg.pinv(a.T @ a) * max(float(resid @ resid) / dof, 1.0)
        curve = grid[:, : deg + 1] @ coef
        inside = bool(np.all((curve > bounds[0]) & (curve < bounds[1])))
        # Every degree is tried: a curve with a weak linear term may still bend (widths
        # that rise toward both ends), so an insignificant degree does not end the search.
        if deg == 0 or (inside and abs(coef[-1]) > 3.0 * math.sqrt(max(cov[-1, -1], 0))):
            best = tuple(float(c) for c in coef)
    return best


def _measure_shape(state, ctx, noise, n_max=16):
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
    half = int(np.ceil(4.0 * FWHM_PER_SIGMA * float(_median(s)))) + 1
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

    def fit(params, lo, hi, lam):
        """Batched Levenberg-Marquardt within bounds; params, 1-sigma errors, usable."""
        free = hi > lo  # a parameter held fixed has no error and takes no part
        k = int(free.sum())
        mod, jac = model_and_jac(*params.T)
        jac = jac[:, free]
        w = vf / noise.variance(base + mod)
        chi2 = np.einsum("gl,gl->g", w * (y - mod), y - mod)
        for _ in range(5):
            wj = jac * w[:, None, :]
            hess = wj @ jac.transpose(0, 2, 1)
            grad = (wj @ (y - mod)[:, :, None])[..., 0]
            d = hess[:, range(k), range(k)]
            damp = hess + (lam[:, None] * np.maximum(d, 1e-300))[:, :, None] * np.eye(k)
            try:
                step = np.linalg.solve(damp, grad[..., None])[..., 0]
            except np.linalg.LinAlgError:
                break
            trial = params.copy()
            trial[:, free] = np.clip(params[:, free] + step, lo[free], hi[free])
            nmod, njac = model_and_jac(*trial.T)
            njac = njac[:, free]
            nchi2 = np.einsum("gl,gl->g", w * (y - nmod), y - nmod)
            better = nchi2 < chi2
            gained = np.where(better, chi2 - nchi2, 0.0)
            params = np.where(better[:, None], trial, params)
            mod = np.where(better[:, None], nmod, mod)
            jac = np.where(better[:, None, None], njac, jac)
            chi2 = np.where(better, nchi2, chi2)
            lam = np.where(better, np.maximum(lam * 0.3, 1e-6), np.minimum(lam * 10.0, 1e6))
            w = vf / noise.variance(base + mod)
            if np.all(gained < 0.1) and np.any(better):  # nothing left to gain
                break
        wj = jac * w[:, None, :]
        hess = wj @ jac.transpose(0, 2, 1)
        try:
            cov = np.linalg.inv(hess)
        except np.linalg.LinAlgError:
            cov = np.linalg.pinv(hess)
        err = np.zeros_like(params)
        err[:, free] = np.sqrt(np.maximum(cov[:, range(k), range(k)], 0))
        dof = np.maximum(valid.sum(axis=1) - k, 1)
        err = err * np.sqrt(np.maximum(chi2 / dof, 1.0))[:, None]
        # Fits that ran into a bound (or whose covariance failed) say nothing about the shape.
        ok = (np.all(np.isfinite(err), axis=1) & (err[:, 2] > 0) & (params[:, 2] > 0.3 * s)
              & (params[:, 2] < 3.0 * s) & ((np.abs(params[:, 4]) < _MAX_SKEW - 1e-6) | ~free[4])
              & ((params[:, 5] < _MAX_WING - 1e-6) | ~free[5]))
        # No single line may dominate a smooth function: a floor of 1 % on each value's error.
        err[:, 2] = np.maximum(err[:, 2], 0.01 * params[:, 2])
        return params, err, ok

    start = np.stack([b0, c, s, f, a, e], axis=1)
    lo = np.array([-np.inf, -np.inf, 0.05, -np.inf, -_MAX_SKEW, 0.0])
    hi = np.array([np.inf, np.inf, np.inf, np.inf, _MAX_SKEW, _MAX_WING])
    params, err, ok = fit(start, lo, hi, lam)
    if np.count_nonzero(ok) < 3:
        return None
    few = np.count_nonzero(ok) < 6  # skew and wings from fewer lines would follow their noise
    # The skew must stand out of its line-to-line scatter (an empirical error that includes
    # what the fits of single lines do not know: neighbours, background, sampling).  A skew
    # below 0.05 moves a centroid by less than a tenth of sigma and is as likely a
    # Lorentzian-wing or sampling mismatch: the symmetric profile stays.
    p, e_p = params[ok], err[ok]
    sem = float(np.std(p[:, 4])) / math.sqrt(max(p.shape[0] - 1, 1))
    skew_coef = (0.0,)
    if not few and abs(float(np.median(p[:, 4]))) >= 3.0 * sem:
        skew_coef = _cheb_fit(p[:, 1], p[:, 4], np.maximum(e_p[:, 4], 1e-3), ctx.n, 2,
                              bounds=(-0.7, 0.7))
        pix = np.linspace(0, ctx.n - 1, 65)
        if np.max(np.abs(_cheb(skew_coef, pix, ctx.n))) < 0.05:
            skew_coef = (0.0,)
    we = 1.0 / np.maximum(e_p[:, 5], 1e-4) ** 2
    eta = float(np.sum(we * p[:, 5]) / np.sum(we))
    eta_err = float(1.0 / np.sqrt(np.sum(we)))
    if few or eta < 3.0 * eta_err or eta < 0.01:
        eta = 0.0
    # A shape term the lines do not bear out is held at its value (zero, or the Lorentzian
    # fraction found) and the widths measured again: with it free, each line's wings took
    # part of its width (a blend's shoulders read as Lorentzian wings narrow the core).
    held = [k for k, off in ((4, skew_coef == (0.0,)), (5, True)) if off]
    if held:
        lo2, hi2 = lo.copy(), hi.copy()
        start = params.copy()
        start[:, 4] = np.where(skew_coef == (0.0,), 0.0, params[:, 4])
        start[:, 5] = eta
        for k in held:
            lo2[k] = hi2[k] = float(start[0, k])
        params, err, ok2 = fit(start, lo2, hi2, np.full(g, 1e-2))
        ok &= ok2
        if np.count_nonzero(ok) < 3:
            return None
        p, e_p = params[ok], err[ok]
    fw = FWHM_PER_SIGMA * p[:, 2]
    med = float(_median(fw))
    fw_coef = _cheb_fit(p[:, 1], fw, FWHM_PER_SIGMA * e_p[:, 2], ctx.n, 2,
                        bounds=(0.5 * med, 2.0 * med))
    # The smooth functions hold their end values beyond the lines that measured them (a
    # polynomial extrapolated past its data follows no spectrometer).
    span = (float(p[:, 1].min()), float(p[:, 1].max()))
    return fw_coef, skew_coef, min(eta, _MAX_WING), span, int(p.shape[0])


def _shape_from_coeffs(coeffs, n):
    """The line shape per pixel from ``(fwhm, skew, eta, span)``: Chebyshev coefficients,
    the Lorentzian fraction and the pixel span (or None) beyond which the values hold."""
    fw_coef, skew_coef, eta, span = coeffs
    pix = np.arange(n) if span is None else np.clip(np.arange(n), *span)
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


