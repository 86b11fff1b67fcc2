"""Calibration internals: the curvature prior against the grating equation, joint
identification of a far group of lines, chords bent through their anchors, and how far
listed intensities are trusted."""

import numpy as np
import pytest
from astropy.table import Table
from numpy.polynomial import chebyshev as cheb

from ritzline.calibration import fit as F
from ritzline.calibration.inputs import Lines, Refs
from ritzline.calibration.search import _bend


def _grating_map(n, focal_mm, detector_mm, lines_per_mm, beta0_deg, deviation_deg):
    """Wavelength (nm) on a flat detector behind a plane grating: m lambda = d (sin alpha +
    sin beta), first order, beta = beta0 + atan(s / f) (the grating equation, any optics
    textbook, e.g. Hecht, Optics, ch. 10)."""
    d = 1e6 / lines_per_mm
    x = np.linspace(-1, 1, 2001)
    beta = np.radians(beta0_deg) + np.arctan(x * detector_mm / 2 / focal_mm)
    alpha = np.radians(beta0_deg - deviation_deg)
    return x, d * (np.sin(alpha) + np.sin(beta))


@pytest.mark.parametrize("design", [
    (100, 29.2, 600, 20, 20),   # a typical compact CCD spectrometer (invented numbers)
    (75, 28.7, 1200, 35, 30),   # steeper, shorter camera
    (50, 14.3, 1800, 45, 30),   # steep UV-visible unit
    (200, 27.6, 300, 10, 15),   # long camera, low dispersion
])
def test_curvature_prior_covers_the_grating_equation_of_real_designs(design):
    x, lam = _grating_map(3648, *design)
    c = cheb.chebfit(x, lam, 7)
    rel = np.abs(c[2:6] / c[1])
    # every term within 2.5 sigma of the prior (the steepest design's 4th term at 2.2);
    # the terms beyond the 5th are negligible
    assert np.all(rel <= 2.5 * np.asarray(F.CURVATURE_PRIOR))
    assert np.all(np.abs(c[6:] / c[1]) < 1e-5)


def _lines(pixel, n, flux=1000.0):
    m = pixel.size
    return Lines(pixel=np.asarray(pixel, float), pixel_err=np.full(m, 0.05),
                 flux=np.full(m, flux), snr=np.full(m, 50.0), fwhm=np.full(m, 2.5),
                 lsf=np.full(m, 2.5), frame=np.zeros(m, int), n_pixels=n)


def _refs(wl, intensity=None):
    wl = np.asarray(wl, float)
    order = np.argsort(wl)
    inten = np.full(wl.size, np.nan) if intensity is None else np.asarray(intensity, float)
    return Refs(wl[order], np.full(wl.size, 1e-4), inten[order], np.full(wl.size, "X I"),
                np.full(wl.size, ""), np.zeros(wl.size, int))


def test_a_far_group_of_lines_is_named_jointly_when_no_line_alone_can_be():
    # an invented detector: 2048 px, 400-610 nm, 1.5 % quadratic bend (within the prior)
    n = 2048
    true = lambda p: cheb.chebval(F.xnorm(p, n), [505.0, 105.0, 1.5])  # noqa: E731
    near_px = np.array([1250.0, 1330, 1420, 1500, 1610, 1700, 1790, 1880, 1960, 2030])
    far_px = np.array([60.0, 115, 170, 245])
    # beside each far line, one listed line it could also be, at an offset no common
    # shift of the group explains
    decoys = true(far_px) + np.array([0.9, -1.1, 1.2, -0.8])
    ref = _refs(np.r_[true(near_px), true(far_px), decoys])
    det = _lines(np.r_[far_px, near_px], n)
    index = {round(w, 6): i for i, w in enumerate(ref.wavelength)}
    ri_of = lambda p: np.array([index[round(w, 6)] for w in true(p)])  # noqa: E731
    start = F.fit_pairs(det, ref, np.arange(4, 14), ri_of(near_px), F.Model.blind())
    like, z = F._likelihoods(det, ref, start)
    for k in range(4):  # alone, each far line has two plausible identities
        cand = np.flatnonzero(z[k] < F.Z_WINDOW)
        assert cand.size >= 2
        assert F._odds(det, ref, start, like, np.full(cand.size, k), cand).max() < F.ODDS
    grown = F.grow(det, ref, np.arange(4, 14), ri_of(near_px), F.Model.blind())
    named = dict(zip(grown.di.tolist(), grown.ri.tolist(), strict=True))
    assert [named.get(k) for k in range(4)] == ri_of(far_px).tolist()


def test_a_bent_chord_reaches_the_lines_of_a_curved_map():
    # a chord through two lines of a cubic map misses the others by pixels; bent by the
    # quadratic and cubic terms that keep its two anchors (two free coefficients: a cubic
    # through two fixed points, textbook), it reaches them
    n = 2048
    coef = [600.0, 200.0, 3.0, -1.2]  # c2, c3 at 1.5 % and 0.6 % of c1
    p = np.array([40.0, 300, 700, 1100, 1500, 1900, 2000])
    x = F.xnorm(p, n)
    lam = cheb.chebval(x, coef)
    a, b = 1, 5
    d = (lam[b] - lam[a]) / (p[b] - p[a])
    chord = lam[a] + d * (p - p[a])
    assert np.max(np.abs(chord - lam)) / d > 5  # the chord alone is pixels off
    bent = _bend(chord[None, :], lam[None, :], np.ones((1, p.size), bool), x,
                 np.array([x[a]]), np.array([x[b]]), np.array([d * (n - 1) / 2]),
                 np.array([0.05 * d]))[0]
    assert np.max(np.abs(bent - lam)) / d < 0.1


def _matched(scatter, seed=0):
    """A fit of 12 matched lines whose fluxes scatter about the listed intensities by
    ``scatter`` (in ln), and one more detection to judge."""
    rng = np.random.default_rng(seed)
    n = 2048
    px = np.linspace(100, 1900, 13)
    inten = np.full(13, 1000.0)
    flux = 5.0 * inten * np.exp(scatter * rng.standard_normal(13))
    det = Lines(px, np.full(13, 0.05), flux, np.full(13, 50.0), np.full(13, 2.5),
                np.full(13, 2.5), np.zeros(13, int), n)
    ref = _refs(cheb.chebval(F.xnorm(px, n), [500.0, 100.0]), inten)
    return det, ref, F.fit_pairs(det, ref, np.arange(12), np.arange(12), F.Model.blind())


def test_a_detection_far_brighter_than_its_listed_line_is_less_likely_not_impossible():
    det, ref, fit = _matched(scatter=0.3)
    scale, trust = F._flux_scale(det, ref, fit)
    assert trust == F.LN_TRUST  # a scatter below a factor e is not trusted further
    expected = scale["X I"] * 1000.0
    for ratio, low, high in [(0.01, 1.0, 1.0),  # fainter: the response may have cut it
                             (2.0, 1.0, 1.0),  # within the scatter
                             (60.0, F.BRIGHT_FLOOR, 0.1)]:  # 60x: far beyond, not zero
        det_k = Lines(det.pixel, det.pixel_err, np.r_[det.flux[:12], ratio * expected],
                      det.snr, det.fwhm, det.lsf, det.frame, det.n_pixels)
        factor = F._brightness(det_k, ref, fit)[12, 12]
        assert low <= factor <= high


def test_the_intensity_trust_is_the_scatter_measured_on_the_matched_lines():
    _, _, fit_wide = _matched(scatter=2.0)
    det, ref, _ = _matched(scatter=2.0)
    _, trust = F._flux_scale(det, ref, fit_wide)
    # robust sd of 12 normal deviates about their median: within a factor ~1.6 of the truth
    assert 1.2 < trust < 3.2


def test_bright_listed_lines_on_empty_detector_count_against_a_map_faint_ones_do_not():
    det, ref, _ = _matched(scatter=0.3)
    det12 = Lines(det.pixel[:12], det.pixel_err[:12], det.flux[:12], det.snr[:12],
                  det.fwhm[:12], det.lsf[:12], det.frame[:12], det.n_pixels)
    # ten more listed lines between the matched ones, none of them detected
    extra = ref.wavelength[:12][:-2] + 0.5 * np.diff(ref.wavelength[:12])[:-1]

    def cost(intensity):
        wl = np.r_[ref.wavelength[:12], extra]
        r = Refs(wl, np.full(wl.size, 1e-4), np.r_[ref.intensity[:12], np.full(10, intensity)],
                 np.full(wl.size, "X I"), np.full(wl.size, ""), np.zeros(wl.size, int))
        fit = F.fit_pairs(det12, r, np.arange(12), np.arange(12), F.Model.blind())
        return F._missing_chance(det12, r, fit)

    # 100x the matched ones: each is missed only by a list error (MISSING), while the
    # fainter matched lines are all seen: a pattern unlikely were the map right
    assert cost(1e5) < np.log(0.05)
    assert cost(1e-3) > -1e-3  # far below the detection limit: simply not seen


def test_a_line_as_broad_as_its_neighbours_is_no_blend_where_the_instrument_model_is_narrower():
    # the instrument model's width (a constant 2.0 px) is too narrow at this end of the
    # detector, where every line is 3 px wide: the lines themselves say what a single line
    # looks like there (common practice: a blend is broader than the lines around it)
    from ritzline.calibration.inputs import detections
    from ritzline.instrument import Instrument

    n = 2048
    pixel = np.linspace(100, 2000, 12)
    width = np.where(pixel > 1500, 3.0, 2.0)
    table = Table({"pixel": pixel, "pixel_err": np.full(12, 0.02), "fwhm_pixel": width,
                   "flux": np.full(12, 1e4), "snr": np.full(12, 100.0),
                   "flags": np.full(12, "")})
    table.meta["instrument"] = Instrument(n_pixels=n, offset=0.0, gain=1.0, read_noise=5.0,
                                          fwhm=(2.0,)).to_dict()
    lines, _ = detections(table, n)
    assert np.all(lines.pixel_err == pytest.approx(0.02))  # no error widened as a blend
    # a line twice as broad as its neighbours still is one
    table["fwhm_pixel"][-1] = 6.0
    lines, _ = detections(table, n)
    assert lines.pixel_err[-1] > 0.5
