"""find_lines: truth recovery on synthetic detector data, artefacts, bad input, the CRLB."""

import warnings

import numpy as np
import pytest

from ritzline.errors import RitzlineError
from ritzline.peaks import (
    BAND_INCLUDED,
    attach_wavelengths,
    centroid_crlb,
    find_lines,
    line_crlb,
)
from ritzline.synthetic import FWHM_PER_SIGMA, busy_spectrum, integrated_gaussians, observe

COLUMNS = ["pixel", "pixel_err", "fwhm_pixel", "fwhm_pixel_err", "amplitude", "flux",
           "flux_err", "background", "snr", "flags"]


def _isolated(rng, *, n=3000, spacing=75, flux=2e4, fwhm=2.8, bg=100.0, gain=1.5, rn=5.0,
              saturation=None):
    centres = np.arange(40, n - 40, spacing, dtype=float)
    centres += rng.uniform(-0.5, 0.5, centres.size)
    expected = integrated_gaussians(n, centres, flux, fwhm) + bg
    return observe(expected, rng, gain=gain, read_noise=rn, saturation=saturation), centres


def _match(table, centres):
    p = np.asarray(table["pixel"])
    j = np.argmin(np.abs(p[None, :] - centres[:, None]), axis=1)
    return j, p[j] - centres


# ---- the Cramér-Rao bound -------------------------------------------------------------

def test_crlb_equals_photon_counting_limit_for_well_sampled_line():
    # Photon-limited centroid of N detected photons from a Gaussian of width sigma:
    # sigma_x = sigma / sqrt(N) (standard error of the mean; e.g. Lindegren 1978, IAU Colloq.
    # 48, "Photoelectric astrometry"; memory).  Well sampled (FWHM 20 px), no background,
    # no read noise, gain 1 so counts are photons.
    fwhm, n_photons = 20.0, 1e6
    got = centroid_crlb(100.3, fwhm, n_photons, 0.0, gain=1.0, read_noise=0.0,
                        fit_background=False)
    expected = fwhm / FWHM_PER_SIGMA / np.sqrt(n_photons)
    assert got == pytest.approx(expected, rel=0.01)


def test_crlb_grows_with_background_and_read_noise():
    base = line_crlb(50.0, 3.0, 5e3, 0.0, read_noise=0.0)["pixel"]
    with_bg = line_crlb(50.0, 3.0, 5e3, 500.0, read_noise=0.0)["pixel"]
    with_rn = line_crlb(50.0, 3.0, 5e3, 500.0, read_noise=20.0)["pixel"]
    assert base < with_bg < with_rn


# ---- truth recovery -------------------------------------------------------------------

def test_isolated_lines_recover_centre_width_and_flux():
    rng = np.random.default_rng(11)
    y, centres = _isolated(rng, fwhm=2.8, flux=2e4)
    t = find_lines(y)
    j, d = _match(t, centres)
    assert len(t) == centres.size
    assert np.all(np.abs(d) < 5 * np.asarray(t["pixel_err"])[j])
    assert np.median(np.asarray(t["fwhm_pixel"])[j]) == pytest.approx(2.8, rel=0.03)
    assert np.median(np.asarray(t["flux"])[j]) == pytest.approx(2e4, rel=0.03)
    assert t.meta["lsf_fwhm_pixel"] == pytest.approx(2.8, rel=0.03)


def test_centroid_pulls_have_unit_spread():
    rng = np.random.default_rng(12)
    pulls, fpulls = [], []
    for _ in range(5):
        y, centres = _isolated(rng, flux=3e3, fwhm=3.0)
        t = find_lines(y)
        j, d = _match(t, centres)
        pulls.append(d / np.asarray(t["pixel_err"])[j])
        fpulls.append((np.asarray(t["flux"])[j] - 3e3) / np.asarray(t["flux_err"])[j])
    pulls = np.concatenate(pulls)
    assert 0.85 < np.std(pulls) < 1.15
    assert abs(np.mean(pulls)) < 0.2
    assert 0.8 < np.std(np.concatenate(fpulls)) < 1.2


def test_given_gain_and_read_noise_are_used_and_recorded():
    rng = np.random.default_rng(13)
    y, _ = _isolated(rng, gain=2.0, rn=4.0)
    t = find_lines(y, gain=2.0, read_noise=4.0)
    noise = t.meta["noise_model"]
    assert noise["method"] == "given gain and read noise"
    assert noise["gain"] == pytest.approx(2.0)
    assert noise["read_noise"] == pytest.approx(4.0)


def test_gain_is_estimated_from_the_data():
    rng = np.random.default_rng(14)
    y, _ = _isolated(rng, gain=2.0, rn=4.0, flux=1e5, spacing=40)
    t = find_lines(y)
    assert t.meta["noise_model"]["gain"] == pytest.approx(2.0, rel=0.2)


def test_recall_of_snr8_lines_and_no_false_lines():
    rng = np.random.default_rng(15)
    fwhm, bg, gain, rn = 3.0, 100.0, 1.0, 5.0
    # Flux for matched-filter SNR 8: F * sqrt(sum(frac^2 / var)) = 8, var = (F frac + bg)/gain
    # + rn^2 (solved by fixed-point iteration).
    frac = integrated_gaussians(61, [30.0], 1.0, fwhm)
    flux = 100.0
    for _ in range(50):
        flux = 8.0 / np.sqrt(np.sum(frac**2 / ((flux * frac + bg) / gain + rn**2)))
    found = total = false = 0
    for _ in range(4):
        y, centres = _isolated(rng, flux=flux, fwhm=fwhm, bg=bg, gain=gain, rn=rn)
        t = find_lines(y, fwhm_guess=fwhm)
        p = np.asarray(t["pixel"])
        dist = np.abs(p[None, :] - centres[:, None])
        found += np.count_nonzero(dist.min(axis=1) < fwhm)
        total += centres.size
        false += np.count_nonzero(dist.min(axis=0) > fwhm)
    assert found / total >= 0.97
    assert false <= 2


def test_pure_noise_gives_an_empty_table_and_a_warning():
    rng = np.random.default_rng(16)
    false = 0
    for _ in range(5):
        y = observe(np.full(4000, 200.0), rng, gain=1.0, read_noise=5.0)
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            t = find_lines(y, min_snr=5.0)
        false += len(t)
        if len(t) == 0:
            assert any("empty line table" in str(w.message) for w in caught)
    # Target: <= 1 false line per 4000 px; five spectra allow a little luck.
    assert false <= 2


# ---- artefacts ------------------------------------------------------------------------

def test_saturated_line_is_measured_from_its_wings_with_an_honest_error():
    # A clipped line keeps its centre in the unclipped wings: fitted there, its centroid
    # errors must describe the scatter (pull spread near 1), far below the run's length.
    rng = np.random.default_rng(17)
    n, sat = 400, 30000.0
    pulls, errs = [], []
    for _ in range(30):
        centre = 150.0 + rng.uniform(-0.5, 0.5)
        expected = integrated_gaussians(n, [centre, 280.0], [4e5, 2e4], 3.0) + 100
        y = observe(expected, rng, gain=1.0, read_noise=5.0, saturation=sat)
        # Gain and read noise given: this checks the wing fit, not the gain estimate.
        t = find_lines(y, saturation=sat, gain=1.0, read_noise=5.0)
        j, d = _match(t, np.array([centre, 280.0]))
        assert "saturated" in t["flags"][j[0]]
        assert t["flags"][j[1]] == ""
        pulls.append(d[0] / t["pixel_err"][j[0]])
        errs.append(t["pixel_err"][j[0]])
    assert 0.6 < np.std(pulls) < 1.5
    assert np.median(errs) < 0.1  # the clipped run is ~6 px long


def test_saturation_level_is_detected_from_repeated_maxima():
    rng = np.random.default_rng(18)
    expected = integrated_gaussians(300, [150.0], [5e5], 3.0) + 100
    y = observe(expected, rng, saturation=20000.0)
    t = find_lines(y)
    assert t.meta["saturation"] == pytest.approx(20000.0)
    assert "saturated" in t["flags"][0]


def test_saturation_from_spectrum_meta_is_used():
    from astropy import units as u
    from specutils import Spectrum

    rng = np.random.default_rng(19)
    expected = integrated_gaussians(300, [150.0], [5e5], 3.0) + 100
    y = np.minimum(observe(expected, rng), 25000.0)
    y[150] = 24990.0  # not a repeated maximum: only the meta can tell
    spec = Spectrum(flux=y * u.ct, spectral_axis=np.arange(300) * u.pix,
                    meta={"saturation": 25000.0})
    t = find_lines(spec)
    assert t.meta["saturation"] == 25000.0
    assert t.meta["saturation_source"] == "given"


def test_single_pixel_spikes_are_rejected_and_counted():
    rng = np.random.default_rng(20)
    y, centres = _isolated(rng, n=1500)
    spikes = np.array([100, 333, 777, 1201])  # between lines
    y[spikes] += 3000.0
    t = find_lines(y)
    assert len(t) == centres.size
    assert np.min(np.abs(np.asarray(t["pixel"])[:, None] - spikes[None, :])) > 3
    assert t.meta["rejected"]["spike"] >= spikes.size


def test_close_pair_is_fitted_jointly_and_flagged_blended():
    rng = np.random.default_rng(21)
    fwhm = 3.0
    truth = np.array([200.0, 204.5])  # 1.5 FWHM apart
    y = observe(integrated_gaussians(400, truth, [2e4, 1.2e4], fwhm) + 100, rng)
    t = find_lines(y, fwhm_guess=fwhm)
    assert len(t) == 2
    j, d = _match(t, truth)
    assert np.all(np.abs(d) < 5 * np.asarray(t["pixel_err"])[j])
    assert all("blended" in f for f in t["flags"])


def test_unresolved_blend_is_flagged_blend_suspect():
    rng = np.random.default_rng(22)
    fwhm = 3.0
    y = observe(integrated_gaussians(400, [200.0, 201.5], [2e4, 2e4], fwhm) + 100, rng)
    t = find_lines(y, fwhm_guess=fwhm)
    assert len(t) == 1
    assert "blend_suspect" in t["flags"][0]


def test_line_at_the_end_is_flagged_edge():
    rng = np.random.default_rng(23)
    y = observe(integrated_gaussians(300, [1.5, 150.0], [2e4, 2e4], 3.0) + 100, rng)
    t = find_lines(y, fwhm_guess=3.0)
    assert "edge" in t["flags"][0]
    assert t["flags"][1] == ""


def test_masked_samples_are_left_out_of_the_fit():
    rng = np.random.default_rng(24)
    y = observe(integrated_gaussians(300, [150.2], [2e4], 3.0) + 100, rng)
    y[151] = 1e6  # a wild value, but masked
    y[151] = np.nan
    t = find_lines(y, fwhm_guess=3.0)
    assert len(t) == 1
    assert abs(t["pixel"][0] - 150.2) < 5 * t["pixel_err"][0]


def test_dark_frame_is_subtracted_and_length_checked():
    rng = np.random.default_rng(25)
    counts, dark, truth = busy_spectrum(rng, n_hot=10, n_spikes=0, n_saturated=0)
    t = find_lines(counts, dark=dark)
    assert t.meta["dark_subtracted"]
    near_hot = np.abs(np.asarray(t["pixel"])[:, None] - truth.hot_pixel[None, :]).min(axis=0)
    true_near = np.abs(truth.centre[:, None] - truth.hot_pixel[None, :]).min(axis=0)
    # No reported line sits on a hot pixel unless a true line is there too.
    assert np.all((near_hot > 1.5) | (true_near < 3))
    with pytest.raises(RitzlineError, match="samples"):
        find_lines(counts, dark=dark[:-5])


# ---- bad input ------------------------------------------------------------------------

@pytest.mark.parametrize(
    "data",
    [np.zeros(500), np.full(500, 42.0), np.full(500, np.nan)],
    ids=["all-zero", "constant", "all-masked"],
)
def test_degenerate_input_gives_empty_table_and_warning(data):
    with pytest.warns(UserWarning, match="empty line table"):
        t = find_lines(data)
    assert len(t) == 0
    assert t.colnames[: len(COLUMNS)] == COLUMNS


def test_spectrum_shorter_than_the_fit_window_raises():
    with pytest.raises(RitzlineError, match="shorter"):
        find_lines(np.ones(4), fwhm_guess=3.0)


# ---- wavelengths ------------------------------------------------------------------------

class _StandIn:
    """A minimal Solution: linear dispersion with a constant model band."""

    medium = "air"

    def wavelength(self, p):
        return 400.0 + 0.05 * np.asarray(p, float)

    def wavelength_err(self, p):
        return np.full(np.shape(p), 0.002)

    def dispersion(self, p):
        return np.full(np.shape(p), 0.05)


def test_attach_wavelengths_combines_centroid_error_and_band_in_quadrature():
    rng = np.random.default_rng(26)
    y, _ = _isolated(rng, n=800)
    t = attach_wavelengths(find_lines(y), _StandIn())
    p, pe = np.asarray(t["pixel"]), np.asarray(t["pixel_err"])
    np.testing.assert_allclose(t["wavelength"], 400.0 + 0.05 * p)
    np.testing.assert_allclose(t["wavelength_err"], np.hypot(0.05 * pe, 0.002))
    np.testing.assert_allclose(t["fwhm"], 0.05 * np.asarray(t["fwhm_pixel"]))
    assert str(t["wavelength"].unit) == "nm"
    assert t.meta["medium"] == "air"
    assert t.meta[BAND_INCLUDED] is True  # later stages must not add the band again


def test_wavelength_axis_adds_wavelength_columns():
    from astropy import units as u
    from specutils import Spectrum

    rng = np.random.default_rng(27)
    y, centres = _isolated(rng, n=800)
    wl = 500.0 + 0.02 * np.arange(800)
    t = find_lines(Spectrum(flux=y * u.ct, spectral_axis=wl * u.nm))
    j, _ = _match(t, centres)
    np.testing.assert_allclose(np.asarray(t["wavelength"])[j], 500.0 + 0.02 * centres,
                               atol=5 * 0.02 * np.max(t["pixel_err"]))
    np.testing.assert_allclose(t["fwhm"], 0.02 * np.asarray(t["fwhm_pixel"]), rtol=1e-9)


def test_table_has_units_and_provenance():
    rng = np.random.default_rng(28)
    y, _ = _isolated(rng, n=800)
    t = find_lines(y)
    assert str(t["pixel"].unit) == "pix"
    assert str(t["flux"].unit) == "ct"
    for key in ("noise_model", "lsf_fwhm_pixel", "rejected", "min_snr", "ritzline_version"):
        assert key in t.meta


def test_lsf_is_measured_even_when_every_line_is_faint():
    rng = np.random.default_rng(29)
    # SNR ~ 10 lines, FWHM 5 px: no peak is bright enough for the half-maximum estimate, so
    # the search starts from the default width and must rerun with the fitted one.
    y, centres = _isolated(rng, flux=350.0, fwhm=5.0, spacing=90)
    t = find_lines(y)
    assert t.meta["lsf_fwhm_pixel"] == pytest.approx(5.0, rel=0.1)
    assert "refitted" in t.meta["lsf_method"]
    assert len(t) >= 0.95 * centres.size


def test_line_background_follows_a_sloped_continuum():
    from ritzline.peaks import line_background

    rng = np.random.default_rng(30)
    n = 2000
    continuum = 200.0 + 0.3 * np.arange(n)
    centres = np.arange(50.0, n - 50, 37.0)
    y = observe(integrated_gaussians(n, centres, 3e4, 3.0) + continuum, rng)
    t = find_lines(y)
    bg = line_background(y, t)
    # Block medians of ~24 px: within a few sigma of the noise per block (~16 ADU / sqrt(24)).
    assert np.median(np.abs(bg - continuum)) < 5.0



def test_line_width_of_a_crowded_low_resolution_lamp():
    # A 1024-px xenon exposure over several hundred nm (project simulator: unresolved blends,
    # missing and extra lines).  Fitted one by one with a free Lorentzian fraction, blends read
    # as wings; once the lines as a whole do not bear the wings out, each width is measured
    # again without them, so the LSF FWHM is that of the pure-Gaussian truth (this draw read
    # 23 % wide before).  Blends only widen lines (common practice): they must not set the LSF.
    from ritzline.synthetic import lamp_exposure, random_instrument

    rng = np.random.default_rng(27)
    ins = random_instrument(rng, n_pixels=(1024, 1024), span_nm=(300, 800),
                            fwhm_px=(2.5, 5.0))
    counts, _ = lamp_exposure(ins, "Xe", rng)
    t = find_lines(counts)
    assert t.meta["lsf_fwhm_pixel"] == pytest.approx(ins.fwhm_px, rel=0.05)
