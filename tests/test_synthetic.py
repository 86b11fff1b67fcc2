"""The simulator against textbook facts: what a detector does to light, and what a line
profile integrated over pixels must add up to.

Each test checks one behaviour of ``ritzline.synthetic`` against a relation that does not
come from the project: photon transfer, Sheppard's corrections for binning and rounding,
the variance of a mean, the distributions of scipy.stats, numerical quadrature.
"""

import dataclasses

import numpy as np
import pytest
from scipy import stats
from scipy.integrate import quad

from ritzline.synthetic import (
    FWHM_PER_SIGMA,
    Detector,
    Instrument,
    LineShape,
    bloom,
    broad_bands,
    fluorescent_lamp_exposure,
    integrated_gaussians,
    lamp_exposure,
    line_profiles,
    observe,
    position_crlb,
    profile_cdf,
    profile_density,
    profile_fwhm,
    profile_mean,
    read_out,
    realistic_instrument,
    realistic_lamp_exposure,
)

HWHM_PER_SIGMA = np.sqrt(2.0 * np.log(2.0))


def flat(n=200_000, level=2000.0):
    return np.full(n, level)


def sampling_sigma_of_variance(var, n):
    # the variance of a sample variance of n normal values is 2 var^2 / (n - 1) (textbook)
    return var * np.sqrt(2.0 / (n - 1))


# ---- detector ---------------------------------------------------------------------------


def test_flat_field_variance_after_offset_removal_follows_photon_transfer():
    # photon transfer: var(ADU) = mean(ADU) / gain + read_noise^2 once the offset is
    # removed; the offset adds no shot noise (common practice; the photon-transfer method)
    gain, rn, level = 2.5, 4.0, 2000.0
    det = Detector(offset=1500.0)
    counts, truth = read_out(flat(level=level), np.random.default_rng(1), gain=gain,
                             read_noise=rn, detector=det)
    signal = counts - truth.offset
    expected = level / gain + rn**2
    assert signal.mean() == pytest.approx(level, abs=0.5)
    assert signal.var() == pytest.approx(expected, abs=4 * sampling_sigma_of_variance(
        expected, signal.size))


def test_offset_changes_the_level_but_not_the_noise():
    # an electronic offset is added after the photo-electrons are counted (common practice)
    a, _ = read_out(flat(), np.random.default_rng(2), gain=1.5, read_noise=5.0,
                    detector=Detector(offset=0.0))
    b, _ = read_out(flat(), np.random.default_rng(2), gain=1.5, read_noise=5.0,
                    detector=Detector(offset=3000.0))
    np.testing.assert_allclose(b - a, 3000.0)


def test_default_detector_reads_out_exactly_like_observe():
    # the new read-out with every effect off must reproduce the old one draw for draw
    expected = np.linspace(10.0, 5e4, 4000)
    old = observe(expected, np.random.default_rng(5), gain=2.0, read_noise=4.0)
    new, _ = read_out(expected, np.random.default_rng(5), gain=2.0, read_noise=4.0)
    np.testing.assert_array_equal(old, new)


def test_quantisation_adds_one_twelfth_adu_squared():
    # rounding to integers adds variance 1/12 LSB^2 when the noise spans more than about
    # one LSB (Sheppard's correction; B. Widrow & I. Kollar, Quantization Noise, Cambridge
    # University Press 2008 - citation from memory)
    rn, n = 1.0, 400_000
    det = Detector(offset=100.3, adc_bits=16)
    counts, _ = read_out(np.zeros(n), np.random.default_rng(3), gain=1.0, read_noise=rn,
                         detector=det)
    expected = rn**2 + 1.0 / 12.0
    assert counts.var() == pytest.approx(expected, abs=4 * sampling_sigma_of_variance(
        expected, n))
    assert abs(counts.var() - rn**2) > 0.05  # the 1/12 is there, not just read noise


def test_adc_output_is_integer_and_clipped_to_its_range():
    # an n-bit ADC writes integers 0 .. 2^n - 1 (common practice)
    light = np.r_[np.zeros(100), np.full(100, 1e6)]
    counts, truth = read_out(light, np.random.default_rng(4), gain=4.0, read_noise=3.0,
                             detector=Detector(offset=200.0, adc_bits=12))
    assert np.array_equal(counts, np.rint(counts))
    assert counts.min() >= 0 and counts.max() == 4095
    assert truth.clipped[100:].all() and not truth.clipped[:100].any()


def test_averaged_scans_divide_the_variance_by_their_number():
    # the variance of the mean of n independent scans is var / n (textbook)
    gain, rn, level, scans = 2.0, 6.0, 800.0, 5
    det = Detector(offset=500.0, adc_bits=16, n_scans=scans)
    counts, truth = read_out(flat(level=level), np.random.default_rng(5), gain=gain,
                             read_noise=rn, detector=det)
    expected = (level / gain + rn**2 + 1 / 12) / scans
    assert (counts - truth.offset).var() == pytest.approx(
        expected, abs=4 * sampling_sigma_of_variance(expected, counts.size))
    assert not np.array_equal(counts, np.rint(counts))  # averages are not integers
    np.testing.assert_allclose(truth.variance, expected)


def test_optical_black_pixels_see_no_light_only_offset_and_read_noise():
    # shielded pixels: offset + read noise, whatever the light (common practice)
    det = Detector(offset=1000.0, n_black=5000)
    counts, _ = read_out(np.full(20_000, 5e4), np.random.default_rng(6), gain=2.0,
                         read_noise=5.0, detector=det)
    black = counts[:5000]
    assert black.mean() == pytest.approx(1000.0, abs=0.5)
    assert black.std() == pytest.approx(5.0, rel=0.05)
    assert counts[5000:].mean() == pytest.approx(51000.0, rel=0.01)


def test_dark_signal_non_uniformity_is_a_fixed_pattern_that_cancels_in_frame_differences():
    # fixed-pattern noise is the same in every frame of a detector, so it cancels in the
    # difference of two frames while shot and read noise add (common practice; the
    # photon-transfer method separates the two this way)
    gain, rn, dark, dsnu = 2.0, 3.0, 1000.0, 0.1
    det = Detector(offset=500.0, dark=dark, dsnu=dsnu, pattern_seed=11)
    a, _ = read_out(np.zeros(100_000), np.random.default_rng(7), gain=gain, read_noise=rn,
                    detector=det)
    b, _ = read_out(np.zeros(100_000), np.random.default_rng(8), gain=gain, read_noise=rn,
                    detector=det)
    temporal = dark / gain + rn**2
    assert np.var(a - b) / 2 == pytest.approx(temporal, rel=0.03)
    assert np.var(a) - temporal == pytest.approx((dsnu * dark) ** 2, rel=0.06)


def test_hot_pixels_stay_put_between_exposures_while_spikes_move():
    # hot pixels belong to the detector, cosmic-ray hits to the exposure (common practice)
    det = Detector(dark=10.0, n_hot=5, hot_level=(2000.0, 4000.0), spike_rate=4.0,
                   spike_level=(3000.0, 5000.0), pattern_seed=3)
    _, t1 = read_out(np.zeros(4096), np.random.default_rng(9), detector=det)
    _, t2 = read_out(np.zeros(4096), np.random.default_rng(10), detector=det)
    np.testing.assert_array_equal(t1.hot_pixel, t2.hot_pixel)
    assert t1.spike_pixel.size and t2.spike_pixel.size
    assert not np.array_equal(t1.spike_pixel, t2.spike_pixel)


def test_a_cosmic_ray_hit_lights_one_pixel_only():
    det = Detector(spike_rate=6.0, spike_level=(500.0, 5000.0))
    counts, truth = read_out(np.zeros(8192), np.random.default_rng(12), gain=1.0,
                             read_noise=2.0, detector=det)
    # read noise 2 ADU: beyond 100 ADU (50 sigma) nothing but the hits themselves
    np.testing.assert_array_equal(np.flatnonzero(counts > 100.0), np.unique(truth.spike_pixel))


def test_blooming_conserves_charge_and_fills_no_pixel_above_full_well():
    # charge spilled from a full well moves to the neighbours, none is created or lost
    # while it stays on the detector (common practice)
    charge = np.zeros(300)
    charge[100] = 12_000.0
    charge[140:143] = [3000.0, 500.0, 2500.0]
    out = bloom(charge, 1000.0, right=0.3)
    assert out.sum() == pytest.approx(charge.sum(), rel=1e-12)
    assert out.max() <= 1000.0 * (1 + 1e-9)
    # the lone over-full pixel keeps 1000, passes 30 % of its 11000 excess up (three full
    # pixels and 300 in the next) and 70 % down (seven full pixels and 700)
    expected = np.r_[700.0, np.full(11, 1000.0), 300.0]
    np.testing.assert_allclose(out[92:105], expected)
    assert out[80:92].sum() == 0.0 and out[105:125].sum() == 0.0


def test_bloom_follows_the_requested_direction():
    charge = np.zeros(100)
    charge[50] = 9000.0
    out = bloom(charge, 1000.0, right=1.0)
    assert out[:50].sum() == 0.0 and out[50:59].sum() == pytest.approx(9000.0)


def test_full_well_clips_and_flags_the_bloomed_pixels():
    det = Detector(full_well=5000.0, bloom_right=0.5)
    light = integrated_gaussians(400, [200.0], [2e5], 3.0)
    counts, truth = read_out(light, np.random.default_rng(13), gain=1.0, read_noise=1.0,
                             detector=det)
    assert counts.max() < 5000.0 + 6 * 1.0
    assert truth.bloomed[195:206].all() and not truth.bloomed[:150].any()


def test_odd_even_offset_is_a_step_between_the_two_channels():
    det = Detector(offset=800.0, odd_even=4.0)
    counts, _ = read_out(np.zeros(200_000), np.random.default_rng(14), gain=1.0,
                         read_noise=3.0, detector=det)
    assert counts[1::2].mean() - counts[::2].mean() == pytest.approx(4.0, abs=0.05)


def test_dark_corrected_frames_scatter_about_zero_with_negative_values():
    det = Detector(offset=1000.0, dark=50.0, dsnu=0.1, dark_corrected=True)
    counts, _ = read_out(np.zeros(100_000), np.random.default_rng(15), gain=2.0,
                         read_noise=4.0, detector=det)
    assert counts.mean() == pytest.approx(0.0, abs=0.1)
    assert (counts < 0).mean() > 0.4
    assert counts.var() == pytest.approx(50.0 / 2.0 + 16.0, rel=0.03)  # photon transfer


# ---- line shapes ------------------------------------------------------------------------


def test_pixel_integrated_gaussian_matches_scipy_and_sums_to_the_flux():
    # a pixel collects the integral of the profile over [i - 0.5, i + 0.5]; the normal
    # distribution's CDF from scipy.stats is the reference
    c, flux, fwhm = 150.37, 5e4, 3.1
    out = line_profiles(300, [c], [flux], LineShape(fwhm=(fwhm,)))
    edges = np.arange(301) - 0.5
    ref = flux * np.diff(stats.norm.cdf(edges, loc=c, scale=fwhm / FWHM_PER_SIGMA))
    np.testing.assert_allclose(out, ref, rtol=1e-9, atol=1e-9 * flux)
    assert out.sum() == pytest.approx(flux, rel=1e-12)


def test_gaussian_line_shape_reproduces_the_old_integrated_gaussians():
    centres, fluxes = np.array([20.2, 100.9, 250.5]), np.array([1e3, 4e4, 7e2])
    np.testing.assert_allclose(line_profiles(300, centres, fluxes, LineShape(fwhm=(2.7,))),
                               integrated_gaussians(300, centres, fluxes, 2.7),
                               rtol=1e-10, atol=1e-9)


def split_normal_pdf(x, s1, s2):
    # two-piece normal: 2 / (sqrt(2 pi) (s1 + s2)) exp(-x^2 / (2 s^2)), s = s1 left, s2
    # right (K. F. Wallis, Statistical Science 29 (2014) 106 - citation from memory)
    s = np.where(x < 0, s1, s2)
    return 2.0 / (np.sqrt(2 * np.pi) * (s1 + s2)) * np.exp(-0.5 * (x / s) ** 2)


def test_split_normal_core_matches_quadrature_of_the_two_piece_normal():
    hl, hr = 1.1, 2.0
    shape = LineShape(fwhm=(hl + hr,), asymmetry=((hr - hl) / (hl + hr),))
    s1, s2 = hl / HWHM_PER_SIGMA, hr / HWHM_PER_SIGMA
    for x in (-6.0, -1.3, -0.2, 0.0, 0.4, 2.5, 9.0):
        # integrate each smooth piece on its own (the density has a kink at 0)
        ref = quad(split_normal_pdf, -np.inf, min(x, 0.0), args=(s1, s2))[0]
        if x > 0:
            ref += quad(split_normal_pdf, 0.0, x, args=(s1, s2))[0]
        assert profile_cdf(x, hl, hr, shape) == pytest.approx(ref, abs=1e-10)


def test_split_normal_mean_is_sqrt_two_over_pi_times_the_sigma_difference():
    # mean of the two-piece normal: sqrt(2/pi) (s2 - s1) (Wallis 2014, from memory),
    # checked by quadrature of x f(x)
    hl, hr = 0.9, 1.6
    s1, s2 = hl / HWHM_PER_SIGMA, hr / HWHM_PER_SIGMA
    ref = quad(lambda x: x * split_normal_pdf(x, s1, s2), -np.inf, np.inf)[0]
    assert profile_mean(LineShape(), hl, hr) == pytest.approx(ref, abs=1e-10)


def test_asymmetry_keeps_the_fwhm_and_puts_half_maximum_at_each_half_width():
    hl, hr = 1.0, 1.8
    shape = LineShape(lorentz_fraction=0.05)
    peak = profile_density(0.0, hl, hr, shape)
    assert profile_density(-hl, hl, hr, shape) == pytest.approx(peak / 2, rel=1e-12)
    assert profile_density(hr, hl, hr, shape) == pytest.approx(peak / 2, rel=1e-12)
    assert profile_fwhm(shape, hl, hr)[0] == pytest.approx(hl + hr)


def test_lorentzian_wings_integrated_over_pixels_match_scipy_cauchy():
    # pure Lorentzian (fraction 1): pixel counts are differences of arctan, i.e. of the
    # Cauchy CDF with scale = HWHM (scipy.stats.cauchy)
    c, flux, fwhm = 400.3, 1e5, 3.0
    out = line_profiles(800, [c], [flux], LineShape(fwhm=(fwhm,), lorentz_fraction=1.0))
    edges = np.arange(801) - 0.5
    ref = flux * np.diff(stats.cauchy.cdf(edges, loc=c, scale=fwhm / 2))
    np.testing.assert_allclose(out, ref, rtol=1e-9, atol=1e-10 * flux)
    # the wings beyond the detector hold the rest: 1 - (2/pi) arctan(400/1.5) on each side
    lost = stats.cauchy.sf(799.5, loc=c, scale=1.5) + stats.cauchy.cdf(-0.5, loc=c, scale=1.5)
    assert out.sum() == pytest.approx(flux * (1 - lost), rel=1e-9)


def test_exponential_tail_matches_scipy_exponentially_modified_normal():
    # Gaussian convolved with an exponential of scale tau: scipy.stats.exponnorm with
    # K = tau / sigma
    fwhm, tau = 2.6, 1.7
    sigma = fwhm / FWHM_PER_SIGMA
    red = LineShape(fwhm=(fwhm,), tail_fraction=1.0, tail_length=tau, tail_side=1)
    blue = dataclasses.replace(red, tail_side=-1)
    x = np.array([-8.0, -2.0, -0.3, 0.0, 1.1, 4.0, 15.0])
    ref = stats.exponnorm.cdf(x, tau / sigma, scale=sigma)
    np.testing.assert_allclose(profile_cdf(x, fwhm / 2, fwhm / 2, red), ref, atol=1e-12)
    np.testing.assert_allclose(profile_cdf(-x, fwhm / 2, fwhm / 2, blue), 1 - ref, atol=1e-12)
    np.testing.assert_allclose(profile_density(x, fwhm / 2, fwhm / 2, red),
                               stats.exponnorm.pdf(x, tau / sigma, scale=sigma), rtol=1e-9)


def test_profile_density_integrates_to_its_cdf_with_every_component():
    shape = LineShape(fwhm=(3.0,), lorentz_fraction=0.05, tail_fraction=0.2, tail_length=2.0,
                      tail_side=-1)
    for x in (-25.0, -3.0, 0.0, 0.8, 12.0):
        ref = quad(profile_density, -np.inf, x, args=(1.2, 1.8, shape), limit=400)[0]
        assert profile_cdf(x, 1.2, 1.8, shape) == pytest.approx(ref, abs=1e-8)


def test_every_line_shape_without_lorentz_wings_sums_to_its_flux():
    shape = LineShape(fwhm=(3.0, 0.8, 0.5), asymmetry=(0.2, 0.1), tail_fraction=0.3,
                      tail_length=2.5, tail_side=1)
    centres, fluxes = np.array([60.2, 500.7, 930.1]), np.array([1e4, 3e5, 2e3])
    out, peaks = line_profiles(1000, centres, fluxes, shape, peaks=True)
    assert out.sum() == pytest.approx(fluxes.sum(), rel=1e-10)
    assert np.all(peaks < fluxes) and np.all(peaks > 0.1 * fluxes / 6)


def test_line_width_follows_its_polynomial_across_the_detector():
    # the variance of a Gaussian integrated over unit pixels is sigma^2 + 1/12 (Sheppard's
    # correction for grouping; textbook)
    n = 2001
    shape = LineShape(fwhm=(3.0, 1.0, 0.5))
    centres = np.array([60.0, 1000.0, 1940.0])
    pix = np.arange(n)
    for c in centres:
        one = line_profiles(n, [c], [1.0], shape)
        var = np.sum(one * (pix - c) ** 2) / one.sum()
        sigma = shape.fwhm_at(c, n) / FWHM_PER_SIGMA
        assert var == pytest.approx(sigma**2 + 1 / 12, rel=1e-6)
    assert shape.fwhm_at(0, n) == pytest.approx(2.5) and shape.fwhm_at(n - 1, n) == 4.5


def test_broad_band_integrated_in_wavelength_matches_scipy_under_linear_dispersion():
    # with a linear dispersion a Gaussian band of sigma_nm is a Gaussian of
    # sigma_nm / dispersion pixels (scipy.stats.norm)
    n, disp, start = 2000, 0.2, 400.0
    edges = start + disp * (np.arange(n + 1) - 0.5)
    out = broad_bands(edges, [550.0], [1e6], [25.0])
    centre_px = (550.0 - start) / disp
    ref = 1e6 * np.diff(stats.norm.cdf(np.arange(n + 1) - 0.5, loc=centre_px,
                                       scale=25.0 / FWHM_PER_SIGMA / disp))
    np.testing.assert_allclose(out, ref, rtol=1e-9, atol=1e-6)
    # a reversed axis gives the same counts
    np.testing.assert_allclose(broad_bands(edges[::-1], [550.0], [1e6], [25.0])[::-1], out,
                               rtol=1e-12)


# ---- instruments and exposures ----------------------------------------------------------


def test_realistic_dispersion_curves_strongly_but_stays_monotonic():
    # grating spectrometers depart from a linear dispersion by up to a few % of the span
    # (common practice); the map must still be one-to-one
    rng = np.random.default_rng(20)
    worst = []
    for _ in range(40):
        ins = realistic_instrument(rng)
        p = np.linspace(0, ins.n_pixels - 1, 500)
        wl = ins.wavelength(p)
        d = ins.dispersion(p)
        assert np.all(d > 0) or np.all(d < 0)
        chord = wl[0] + (wl[-1] - wl[0]) * p / p[-1]
        worst.append(np.abs(wl - chord).max() / abs(wl[-1] - wl[0]))
        np.testing.assert_allclose(ins.pixel(wl), p, atol=1e-6)
    assert max(worst) <= 0.035 and max(worst) > 0.015


def test_instrument_without_shape_or_detector_renders_as_before():
    ins = Instrument(n_pixels=1000, coeffs=(500.0, 50.0), fwhm_px=2.4, gain=1.5,
                     read_noise=5.0, background=100.0)
    wl, fl = np.array([470.0, 512.3]), np.array([2e4, 5e3])
    old = observe(integrated_gaussians(1000, ins.pixel(wl), fl, 2.4) + 100.0,
                  np.random.default_rng(21), gain=1.5, read_noise=5.0, saturation=65535.0)
    np.testing.assert_array_equal(ins.render(wl, fl, np.random.default_rng(21)), old)


def test_instrument_with_a_detector_renders_through_it():
    det = Detector(offset=1000.0, n_black=20, adc_bits=16)
    ins = Instrument(n_pixels=1000, coeffs=(500.0, 50.0), fwhm_px=2.4, background=0.0,
                     detector=det, shape=LineShape(fwhm=(2.4,), asymmetry=(0.3,)))
    counts = ins.render([470.0], [2e4], np.random.default_rng(22))
    assert np.array_equal(counts, np.rint(counts))
    assert np.median(counts[:20]) == pytest.approx(1000.0, abs=5)
    p = ins.pixel(470.0)
    assert counts[round(float(p))] > 3000.0


def test_lamp_exposure_on_a_detector_saturates_exactly_the_lines_it_says():
    # a 14-bit ADC writes 16383 at most; the truth's saturated lines are those that reach it
    det = Detector(offset=1200.0, adc_bits=14, dark=20.0, dsnu=0.05)
    ins = Instrument(n_pixels=3648, coeffs=(609.0, 271.5, -2.6, -1.9), fwhm_px=3.0, gain=4.0,
                     read_noise=3.0, background=0.0, saturation=16383.0, detector=det,
                     shape=LineShape(fwhm=(3.0, 0.6), asymmetry=(0.2,)))
    counts, truth = lamp_exposure(ins, "Ne", np.random.default_rng(27), saturate=(0.1, 0.1),
                                  spikes=(0, 0))
    assert np.array_equal(counts, np.rint(counts)) and counts.min() > 1200.0 - 30.0
    near = np.rint(truth.pixel).astype(int)[:, None] + np.arange(-1, 2)[None, :]
    top = counts[np.clip(near, 0, ins.n_pixels - 1)].max(axis=1)
    assert truth.saturated.sum() >= 2
    assert np.all(top[truth.saturated] == 16383.0)
    assert np.all(top[~truth.saturated & truth.resolved] < 16383.0)  # not in a blend


def test_realistic_lamp_exposure_truth_matches_the_noise_free_counts():
    rng = np.random.default_rng(23)
    counts, truth = realistic_lamp_exposure(rng, "Ne", axis_error_px=3.0)
    ins = truth.instrument
    lines = truth.lines
    assert len(lines) > 5 and np.all(np.diff(lines["pixel"]) >= 0)
    # the truth's line fluxes, drawn with the instrument's shape, reproduce the line light
    lamp = line_profiles(ins.n_pixels, np.asarray(lines["pixel"]), np.asarray(lines["flux"]),
                         ins.line_shape)
    det = ins.detector
    mean = lamp + truth.continuum
    mean[: det.n_black] = 0.0
    if not det.dark_corrected:
        mean = mean + truth.readout.offset + truth.readout.dark
    ok = ~(truth.readout.bloomed | truth.readout.clipped)
    ok[truth.readout.spike_pixel] = False
    resid = (counts - mean)[ok] / np.sqrt(truth.readout.variance[ok])
    assert abs(resid.mean()) < 0.05 and resid.std() == pytest.approx(1.0, abs=0.08)
    assert abs(truth.axis_shift_px) <= 3.0
    np.testing.assert_allclose(truth.axis_nm, ins.wavelength(np.arange(ins.n_pixels)
                                                             + truth.axis_shift_px))


def test_realistic_lamp_exposures_cover_every_detector_effect():
    rng = np.random.default_rng(24)
    seen = {}
    for _ in range(60):
        _, truth = realistic_lamp_exposure(rng, "Ar")
        for k, v in truth.flags.items():
            seen[k] = seen.get(k, 0) + bool(v)
    missing = [k for k, v in seen.items() if k not in ("broad_bands", "axis_off") and v == 0]
    assert not missing


def test_realistic_lamp_exposure_is_reproducible_from_its_seed():
    a, ta = realistic_lamp_exposure(np.random.default_rng(25), "Hg+Ar")
    b, tb = realistic_lamp_exposure(np.random.default_rng(25), "Hg+Ar")
    np.testing.assert_array_equal(a, b)
    np.testing.assert_array_equal(ta.lines["pixel"], tb.lines["pixel"])


def test_fluorescent_lamp_puts_narrow_mercury_lines_on_broad_bands():
    _, truth = fluorescent_lamp_exposure(np.random.default_rng(26))
    lines, bands = truth.lines, truth.bands
    wide = bands["fwhm_nm"] >= 10.0
    assert wide.sum() >= 3 and np.all(bands["fwhm_nm"][wide] <= 40.0)
    hg = lines[np.abs(lines["wavelength"] - 546.0750) < 1e-3][0]  # Hg I, NIST ASD
    assert 4.0 <= hg["fwhm"] <= 7.0
    # the green line stands on the band: the band's light under it is a sizeable part
    under = truth.continuum[round(hg["pixel"])]
    assert under > 0.05 * hg["peak"]
    # every band and phosphor peak is several times wider than any mercury line
    band_fwhm_px = bands["fwhm_nm"] / np.abs(truth.instrument.dispersion(bands["pixel"]))
    assert np.all(band_fwhm_px > 2 * lines["fwhm"].max())
    assert np.all(band_fwhm_px[wide] > 10 * lines["fwhm"].max())


def test_position_bound_of_a_photon_limited_line_is_sigma_over_root_n():
    # with photon noise alone (variance = mean, in electrons) the centroid of a Gaussian of
    # width sigma made of N photons cannot be known better than sigma / sqrt(N); pixels of
    # width 1 raise sigma^2 by about 1/12 (textbook; e.g. R. E. Thompson, D. R. Larson,
    # W. W. Webb, Biophys. J. 82 (2002) 2775 - citation from memory)
    n, c, flux, sigma = 400, 200.3, 1e6, 5.0
    shape = LineShape(fwhm=(sigma * FWHM_PER_SIGMA,))
    mean = line_profiles(n, [c], [flux], shape)
    # a negligible read variance keeps the far wings (where mean underflows) finite
    bound = position_crlb(n, [c], [flux], shape, mean + 1e-3)[0]
    assert bound == pytest.approx(np.sqrt(sigma**2 + 1 / 12) / np.sqrt(flux), rel=0.01)


def test_position_bound_on_a_flat_background_follows_the_gaussian_integral():
    # constant variance v per pixel: I = F^2 / v * integral g'(x)^2 dx = F^2 / (4 sqrt(pi)
    # sigma^3 v) for a unit Gaussian g, so the bound is sqrt(4 sqrt(pi) sigma^3 v) / F
    # (textbook integral; pixelation neglected for sigma = 6 px)
    n, c, flux, sigma, v = 600, 300.0, 5e4, 6.0, 400.0
    shape = LineShape(fwhm=(sigma * FWHM_PER_SIGMA,))
    bound = position_crlb(n, [c], [flux], shape, np.full(n, v))[0]
    assert bound == pytest.approx(np.sqrt(4 * np.sqrt(np.pi) * sigma**3 * v) / flux, rel=0.01)


def test_position_bound_ignores_clipped_pixels():
    n, shape = 200, LineShape(fwhm=(3.0,))
    all_pixels = position_crlb(n, [100.0], [1e5], shape, np.full(n, 100.0))[0]
    core_lost = np.zeros(n, bool)
    core_lost[98:103] = True
    assert position_crlb(n, [100.0], [1e5], shape, np.full(n, 100.0),
                         ignore=core_lost)[0] > all_pixels
