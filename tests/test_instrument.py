"""The instrument model: offset, gain, read noise and line shape measured on real-looking frames.

Frames come from ``ritzline.synthetic`` with every detector effect of a real linear CCD
(offset, optical-black pixels, dark pattern, hot pixels, spikes, averaged scans, clipping) so
that the checks run on every test run.  The reference facts are textbook detector physics:
the photon-transfer relation (variance = signal/gain + read noise^2, common practice), and
scale invariance of a significance (a ratio of counts to their spread).
"""

import json
import warnings

import numpy as np
import pytest

from ritzline.errors import SolutionFormatError
from ritzline.instrument import Instrument, measure_instrument, optical_black
from ritzline.peaks import find_lines
from ritzline.synthetic import (
    Detector,
    LineShape,
    fluorescent_lamp_exposure,
    line_profiles,
    read_out,
)

warnings.filterwarnings("ignore", message="find_lines")


def _lamp_like(rng, *, n=3000, fwhm=3.0, flux=(2e3, 4e5), n_lines=40, shape=None):
    """Isolated lines of a known shape on a flat background (light in ADU at gain 1)."""
    centres = np.sort(rng.uniform(40, n - 40, n_lines))
    keep = np.concatenate([[True], np.diff(centres) > 6 * fwhm])
    centres = centres[keep]
    fluxes = np.exp(rng.uniform(np.log(flux[0]), np.log(flux[1]), centres.size))
    shape = shape or LineShape(fwhm=(fwhm,))
    light = line_profiles(n, centres, fluxes, shape) + 200.0
    return light, centres, fluxes


def test_offset_is_read_from_optical_black_pixels():
    # Shielded leading pixels read the electronic offset (common practice for linear arrays).
    rng = np.random.default_rng(1)
    light, _, _ = _lamp_like(rng)
    det = Detector(offset=1500.0, n_black=16)
    counts, _ = read_out(light, rng, gain=2.0, read_noise=8.0, detector=det)
    n, level, sigma = optical_black(counts)
    assert n == 16
    assert sigma == pytest.approx(4.0, rel=0.5)  # read noise 8 e- at 2 e-/ADU
    assert level == pytest.approx(1500.0, abs=3 * 4.0 / np.sqrt(16) + 0.5)
    t = find_lines(counts)
    inst = t.meta["instrument"]
    assert "optical-black" in inst["sources"]["offset"]
    assert inst["offset_adu"] == pytest.approx(1500.0, abs=2.0)
    assert t.meta["optical_black_pixels"] == 16


def test_gain_pooled_over_lines_despite_a_large_offset():
    # Photon transfer: var = (S - offset)/g + r^2.  With a 3000 ADU offset in the counts the
    # gain must still come out right (the offset is not photo-electrons).
    rng = np.random.default_rng(2)
    light, _, _ = _lamp_like(rng)
    counts, _ = read_out(light * 1.0, rng, gain=3.0, read_noise=6.0,
                         detector=Detector(offset=3000.0))
    t = find_lines(counts)
    assert t.meta["instrument"]["gain_e_per_adu"] == pytest.approx(3.0, rel=0.25)


def test_centroid_errors_are_honest_with_an_unknown_offset():
    # Pull spread of isolated lines ~1 over many lines, gain and offset not given.
    rng = np.random.default_rng(3)
    pulls = []
    for _ in range(4):
        light, centres, _ = _lamp_like(rng, flux=(1e3, 2e5))
        counts, _ = read_out(light, rng, gain=2.0, read_noise=5.0,
                             detector=Detector(offset=2000.0))
        t = find_lines(counts)
        p = np.asarray(t["pixel"])
        j = np.argmin(np.abs(p[None, :] - centres[:, None]), axis=1)
        d = p[j] - centres
        ok = np.abs(d) < 1.0
        pulls.append(d[ok] / np.asarray(t["pixel_err"])[j][ok])
    pulls = np.concatenate(pulls)
    assert 0.8 < np.std(pulls) < 1.25


def test_significance_does_not_depend_on_the_count_scale():
    # A significance is a ratio of counts to their spread: scaling every count by a constant
    # (processed, averaged or calibrated-intensity files) changes no SNR and adds no line.
    rng = np.random.default_rng(4)
    light, _, _ = _lamp_like(rng)
    counts, _ = read_out(light, rng, gain=2.0, read_noise=5.0, detector=Detector(offset=500.0))
    raw = find_lines(counts)
    scaled = find_lines(counts * 1e-9)
    assert len(scaled) == len(raw)
    np.testing.assert_allclose(np.asarray(scaled["snr"]), np.asarray(raw["snr"]), rtol=1e-3)
    np.testing.assert_allclose(np.asarray(scaled["pixel"]), np.asarray(raw["pixel"]), atol=1e-6)
    assert "not_raw_adu" in scaled.meta["instrument"]["flags"]


def test_inverted_counts_give_no_lines_from_the_dips():
    # Inverted counts (a sign error upstream): the dips are not lines, and nothing found in
    # what is left reaches a significance that pure noise over 3000 px would not.
    rng = np.random.default_rng(5)
    light, centres, _ = _lamp_like(rng, n_lines=10)
    counts, _ = read_out(light, rng, gain=2.0, read_noise=5.0, detector=Detector(offset=500.0))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t = find_lines(-counts)
    p = np.asarray(t["pixel"])
    assert not np.any(np.abs(p[:, None] - centres[None, :]) < 10)
    assert np.all(np.asarray(t["snr"]) < 10)


def test_hot_pixels_and_spikes_are_rejected_at_every_amplitude():
    # A one-pixel event fits better as one pixel than as a line of the local width.
    rng = np.random.default_rng(6)
    light, centres, _ = _lamp_like(rng, n_lines=15)
    counts, _ = read_out(light, rng, gain=2.0, read_noise=5.0, detector=Detector(offset=800.0))
    hits = np.array([500, 1200, 2100, 2700])
    hits = hits[np.min(np.abs(hits[:, None] - centres[None, :]), axis=1) > 20]
    counts[hits] += np.array([300.0, 3e3, 3e4, 3e5])[: hits.size]
    t = find_lines(counts)
    p = np.asarray(t["pixel"])
    assert not np.any(np.min(np.abs(p[:, None] - hits[None, :]), axis=1) < 2)
    assert t.meta["rejected"]["spike"] >= hits.size


def test_skewed_lines_give_no_phantom_companions():
    # A red-tailed line profile (compact spectrometers) is one line: the measured skew goes
    # into the profile, and every true line is found once.
    rng = np.random.default_rng(7)
    shape = LineShape(fwhm=(3.5,), asymmetry=(0.3,))
    light, centres, _ = _lamp_like(rng, fwhm=3.5, shape=shape, flux=(2e4, 5e5))
    counts, _ = read_out(light, rng, gain=2.0, read_noise=5.0, detector=Detector(offset=800.0))
    t = find_lines(counts)
    p = np.asarray(t["pixel"])
    nearest = np.min(np.abs(p[:, None] - centres[None, :]), axis=1)
    assert np.all(nearest < 1.0), "a reported line with no true line under it"
    assert len(t) == centres.size
    assert t.meta["instrument"]["asymmetry_chebyshev"][0] > 0.1


def test_line_width_is_measured_as_a_function_of_pixel():
    rng = np.random.default_rng(8)
    shape = LineShape(fwhm=(3.0, 0.9))  # FWHM 2.1 px at the blue end, 3.9 px at the red end
    light, _, _ = _lamp_like(rng, shape=shape, fwhm=4.0, flux=(2e4, 5e5))
    counts, _ = read_out(light, rng, gain=2.0, read_noise=5.0, detector=Detector(offset=300.0))
    inst = Instrument.from_dict(find_lines(counts).meta["instrument"])
    ends = inst.fwhm_at([100, 2900])
    truth = shape.fwhm_at(np.array([100, 2900]), 3000)
    np.testing.assert_allclose(ends, truth, rtol=0.1)


def test_fluorescent_lamp_mercury_lines_keep_their_own_width():
    # Broad phosphor bands stay out of the line width: the mercury lines on top of them are
    # found with the instrument's width (Hg I 404.66, 435.83, 546.07 nm: NIST handbook).
    rng = np.random.default_rng(9)
    counts, truth = fluorescent_lamp_exposure(rng, phosphor_peaks=False)
    t = find_lines(counts)
    lines = truth.lines
    hg = [k for k, w in enumerate(lines["wavelength"])
          if any(abs(w - ref) < 0.05 for ref in (404.656, 435.833, 546.074))
          and not lines["saturated"][k]]
    assert hg
    p = np.asarray(t["pixel"])
    for k in hg:
        j = int(np.argmin(np.abs(p - lines["pixel"][k])))
        assert abs(p[j] - lines["pixel"][k]) < 0.5 * lines["fwhm"][k]
        assert t["fwhm_pixel"][j] == pytest.approx(lines["fwhm"][k], rel=0.25)


def test_a_given_instrument_is_used_as_it_is():
    rng = np.random.default_rng(10)
    light, centres, _ = _lamp_like(rng)
    counts, _ = read_out(light, rng, gain=2.0, read_noise=5.0, detector=Detector(offset=900.0))
    inst = measure_instrument(counts)
    t = find_lines(counts, instrument=inst)
    assert t.meta["noise_model"]["method"] == "gain from the instrument model"
    assert t.meta["instrument"] == inst.to_dict()
    assert len(t) >= 0.9 * centres.size


def test_a_width_that_rises_toward_both_ends_is_measured():
    # A curved focal plane: widths grow toward both ends with no linear trend (FWHM
    # 3 + 1.2 x^2 px); a weak first-order term must not stop the search for the curve.
    rng = np.random.default_rng(9)
    shape = LineShape(fwhm=(3.0, 0.0, 1.2))
    light, centres, _ = _lamp_like(rng, shape=shape, fwhm=4.2, flux=(2e4, 5e5))
    counts, _ = read_out(light, rng, gain=2.0, read_noise=5.0, detector=Detector(offset=300.0))
    inst = Instrument.from_dict(find_lines(counts).meta["instrument"])
    probe = np.array([centres.min(), 1500.0, centres.max()])
    np.testing.assert_allclose(inst.fwhm_at(probe), shape.fwhm_at(probe, 3000), rtol=0.1)
    # Beyond the measured lines the width holds its end values (no extrapolated polynomial).
    lo, hi = inst.shape_span
    assert inst.fwhm_at(0.0) == pytest.approx(float(inst.fwhm_at(lo)))
    assert inst.fwhm_at(2999.0) == pytest.approx(float(inst.fwhm_at(hi)))


def test_instrument_file_round_trip(tmp_path):
    inst = Instrument(n_pixels=2048, offset=1000.0, gain=2.5, read_noise=3.0,
                      fwhm=(2.5, 0.2), asymmetry=(0.1,), wing=0.03, shape_span=(40.0, 2000.0),
                      sources={"gain": "given"}, flags=("offset_unconstrained",))
    path = inst.save(tmp_path / "inst.json")
    assert Instrument.load(path) == inst
    # A solution file carrying the model is read the same way.
    sol = tmp_path / "solution.json"
    sol.write_text(json.dumps({"schema": "ritzline.solution/1", "instrument": inst.to_dict()}))
    assert Instrument.load(sol) == inst


@pytest.mark.parametrize("field, value", [("gain_e_per_adu", -1.0), ("read_noise_adu", -2.0),
                                          ("fwhm_chebyshev_px", [0.1]),
                                          ("lorentzian_fraction", 1.5),
                                          ("schema", "other/1")])
def test_an_invalid_instrument_is_refused(field, value):
    good = Instrument(n_pixels=100, offset=0.0, gain=1.0, read_noise=1.0).to_dict()
    with pytest.raises(SolutionFormatError):
        Instrument.from_dict({**good, field: value})


def test_variance_follows_photon_transfer():
    # var = max(S - offset, 0)/gain + read^2 (photon transfer; common practice).
    inst = Instrument(n_pixels=10, offset=100.0, gain=4.0, read_noise=3.0)
    np.testing.assert_allclose(inst.variance([100.0, 500.0, 50.0]), [9.0, 109.0, 9.0])


def test_an_instrument_is_not_applied_to_counts_it_does_not_describe():
    # The same spectrometer's frame scaled by 1e-9 (a normalised export): the model's gain
    # would make every line insignificant, so the noise is measured on the data instead.
    rng = np.random.default_rng(11)
    light, _, _ = _lamp_like(rng)
    counts, _ = read_out(light, rng, gain=2.0, read_noise=5.0, detector=Detector(offset=900.0))
    inst = measure_instrument(counts)
    assert inst.describes(counts)
    assert not inst.describes(counts * 1e-9)
    raw = find_lines(counts, instrument=inst)
    scaled = find_lines(counts * 1e-9, instrument=inst)
    assert scaled.meta["noise_model"]["method"] != "gain from the instrument model"
    assert abs(len(scaled) - len(raw)) <= 1


def _bloomed_pair(rng, sep, *, fwhm=2.4, n=400):
    """Two lines at about twice full well, ``sep`` px apart, on a detector that blooms."""
    centres = np.array([200.3, 200.3 + sep])
    light = line_profiles(n, centres, np.array([2.4e5, 2.0e5]), LineShape(fwhm=(fwhm,))) + 300.0
    det = Detector(offset=1000.0, full_well=40000.0, adc_bits=16)
    counts, truth = read_out(light, rng, gain=1.5, read_noise=6.0, detector=det)
    return counts, centres, truth


def test_two_clipped_lines_with_a_dip_between_are_two_lines():
    # Blooming fills the pixels between two clipped lines, but the pixel between them falls
    # well below full well: two clipped runs, not one (common practice: a clipped run is one
    # line only while it stays at the clip level).
    rng = np.random.default_rng(41)
    counts, centres, truth = _bloomed_pair(rng, 7.2)
    assert truth.bloomed.any()
    t = find_lines(counts)
    sat = np.asarray(["saturated" in f for f in t["flags"]])
    px = np.asarray(t["pixel"])[sat]
    assert px.size == 2
    assert np.all(np.abs(np.sort(px) - centres) < 1.0)


def test_line_beside_a_clipped_run_is_found_and_the_wings_make_no_lines():
    # A line two FWHM from a clipped line with Lorentzian wings: the line is found, the clipped
    # line's wings (rising monotonically into the run) make no line of their own.
    rng = np.random.default_rng(42)
    n, fwhm = 400, 4.0
    shape = LineShape(fwhm=(fwhm,), lorentz_fraction=0.03)
    centres = np.array([200.0, 209.0])
    light = line_profiles(n, centres, np.array([3e5, 6e4]), shape) + 300.0
    det = Detector(offset=1000.0, full_well=60000.0, adc_bits=16)
    counts, truth = read_out(light, rng, gain=2.0, read_noise=5.0, detector=det)
    assert truth.bloomed.any()
    t = find_lines(counts)
    px = np.asarray(t["pixel"])
    assert len(t) == 2
    assert np.abs(px - centres[1]).min() < 0.5
    assert np.abs(px - centres[0]).min() < 1.0


def test_a_spike_on_a_line_masks_a_pixel_not_the_line():
    # A cosmic-ray hit far brighter than the faint, wide line it lands on: the component first
    # fits as one pixel; that pixel is taken out and the line stays, centred within its error.
    rng = np.random.default_rng(43)
    n, fwhm = 500, 5.7
    centres = np.array([150.0, 250.4, 350.0])
    light = line_profiles(n, centres, np.array([5e4, 1300.0, 5e4]),
                          LineShape(fwhm=(fwhm,))) + 400.0
    counts, _ = read_out(light, rng, gain=1.0, read_noise=8.0,
                         detector=Detector(offset=800.0))
    counts[250] += 1500.0
    t = find_lines(counts)
    px = np.asarray(t["pixel"])
    assert len(t) == 3
    j = int(np.argmin(np.abs(px - centres[1])))
    assert abs(px[j] - centres[1]) < 4 * t["pixel_err"][j]
    assert t.meta["rejected"]["spike"] >= 1


def test_a_faint_flat_topped_line_on_a_large_offset_is_not_clipped():
    # Three top pixels within 0.3 % of 1133 ADU look like a plateau only if the 1000-ADU offset
    # is counted as signal: above the background they differ by several percent of the line.
    rng = np.random.default_rng(44)
    counts, _ = read_out(np.full(128, 50.0), rng, gain=1.0, read_noise=10.0,
                         detector=Detector(offset=1000.0))
    counts[58:63] += np.array([40.0, 75.0, 80.0, 78.0, 35.0])
    counts[59:62] = [1130.0, 1133.0, 1132.0]
    t = find_lines(counts, min_snr=3)
    assert t.meta["saturation"] is None
    assert len(t) >= 1 and np.abs(np.asarray(t["pixel"]) - 60.0).min() < 1.0


def test_no_bright_unclipped_line_reports_a_runaway_error():
    # The Cramer-Rao bound of a centroid is about sigma_LSF / SNR (textbook result for a
    # Gaussian profile): for SNR >= 50 a fiftieth of the width.  Even with a conservative
    # gain, an error bar beyond the line's own FWHM on a bright, unclipped line means a fit
    # went astray (a blended pair pushed into a degenerate configuration).
    rng = np.random.default_rng(45)
    from ritzline.synthetic import realistic_lamp_exposure

    for _ in range(6):
        counts, _ = realistic_lamp_exposure(rng)
        t = find_lines(counts)
        bright = (np.asarray(t["snr"]) > 50) & np.asarray(
            ["saturated" not in f for f in t["flags"]])
        assert np.all(np.asarray(t["pixel_err"])[bright] < np.asarray(t["fwhm_pixel"])[bright])


def test_hot_pixels_do_not_set_the_line_width():
    # Hot pixels brighter than every line are one pixel wide; the line-spread width is that of
    # the lines (5 px here), not of the hot pixels (common practice: a hot pixel is one pixel).
    rng = np.random.default_rng(46)
    light, centres, _ = _lamp_like(rng, fwhm=5.0, flux=(2e4, 4e4), n_lines=4)
    det = Detector(offset=500.0, n_hot=3, hot_level=(2e3, 3e3), pattern_seed=3)
    counts, _ = read_out(light, rng, gain=2.0, read_noise=5.0, detector=det)
    t = find_lines(counts)
    assert t.meta["lsf_fwhm_pixel"] == pytest.approx(5.0, rel=0.15)
    px = np.asarray(t["pixel"])
    assert all(np.abs(px - c).min() < 1.0 for c in centres)
