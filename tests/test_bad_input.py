"""Nothing silently wrong: the reader's FITS axis agrees with the FITS WCS reference
implementation, detector pixel numbers survive cropped and gapped exports, a solution is
never applied where it was not made, and the reader and Solution.load give a result or
their own error for any input (property-based fuzz)."""

import json
import warnings

import astropy.units as u
import numpy as np
import pytest
from astropy.io import fits
from astropy.wcs import WCS
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from ritzline import RitzlineError, SolutionFormatError, SpectrumFormatError, read_spectrum
from ritzline.calibration import Solution
from ritzline.spectrum import require_solution_pixels, spectrum_arrays

N = 120


def _counts(n=N, seed=5):
    x = np.arange(n)
    model = 150 + 3000 * np.exp(-0.5 * ((x - 40) / 1.3) ** 2) + 800 * np.exp(
        -0.5 * ((x - 85) / 1.3) ** 2)
    return np.random.default_rng(seed).poisson(model).astype(float)


def _fits(path, header):
    hdu = fits.PrimaryHDU(_counts())
    for key, value in header.items():
        hdu.header[key] = value
    hdu.writeto(path)
    return path


def _wcslib_axis(header, n=N):
    """World coordinates of FITS axis 1 from wcslib (astropy.wcs), the reference
    implementation of Greisen & Calabretta (2002) and Greisen et al. (2006)."""
    h = fits.Header({"NAXIS": 1, "NAXIS1": n, **header})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        world = WCS(h).all_pix2world(np.arange(n), 0)[0]
    return world * 1e9  # wcslib works in SI: metres -> nm


# ---- FITS WCS against the reference implementation -----------------------------------

WCS_CASES = {
    "linear CDELT1": {"CTYPE1": "WAVE", "CUNIT1": "nm", "CRVAL1": 500.0, "CRPIX1": 1.0,
                      "CDELT1": 0.1},
    "CD1_1 over CDELT1": {"CTYPE1": "WAVE", "CUNIT1": "nm", "CRVAL1": 500.0, "CRPIX1": 1.0,
                          "CDELT1": 0.1, "CD1_1": 0.2},
    "PC1_1 times CDELT1": {"CTYPE1": "WAVE", "CUNIT1": "nm", "CRVAL1": 500.0, "CRPIX1": 3.5,
                           "CDELT1": 0.1, "PC1_1": 1.5},
    "negative step": {"CTYPE1": "AWAV", "CUNIT1": "nm", "CRVAL1": 600.0, "CRPIX1": 60.0,
                      "CDELT1": -0.25},
    "log axis": {"CTYPE1": "WAVE-LOG", "CUNIT1": "nm", "CRVAL1": 450.0, "CRPIX1": 1.0,
                 "CDELT1": 0.3},
    "angstrom": {"CTYPE1": "WAVE", "CUNIT1": "Angstrom", "CRVAL1": 5000.0, "CRPIX1": 1.0,
                 "CDELT1": 1.0},
}


@pytest.mark.parametrize("case", WCS_CASES)
def test_fits_wavelength_axis_matches_wcslib(tmp_path, case):
    header = WCS_CASES[case]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        spec = read_spectrum(_fits(tmp_path / "s.fits", header))
    np.testing.assert_allclose(spec.spectral_axis.to_value(u.nm), _wcslib_axis(header),
                               rtol=1e-12)


def test_fits_cd_and_cdelt_disagreeing_is_said_in_a_warning(tmp_path):
    with pytest.warns(UserWarning, match="CD1_1 is used"):
        read_spectrum(_fits(tmp_path / "s.fits", WCS_CASES["CD1_1 over CDELT1"]))


@pytest.mark.parametrize("ctype", ["FREQ", "VELO", "WAVE-TAB", "WAVE-F2W", "ENER"])
def test_fits_axes_other_than_linear_or_log_wavelength_are_refused(tmp_path, ctype):
    header = WCS_CASES["linear CDELT1"] | {"CTYPE1": ctype}
    with pytest.raises(SpectrumFormatError, match="not supported"):
        read_spectrum(_fits(tmp_path / "s.fits", header))


def test_fits_hdu_picked_by_name_and_number(tmp_path):
    path = tmp_path / "two.fits"
    fits.HDUList([fits.PrimaryHDU(_counts()), fits.ImageHDU(2 * _counts(), name="SKY")]
                 ).writeto(path)
    with pytest.warns(UserWarning, match="also hold data"):
        first = read_spectrum(path)
    np.testing.assert_array_equal(first.flux.value, _counts())
    np.testing.assert_array_equal(read_spectrum(path, hdu="sky").flux.value, 2 * _counts())
    np.testing.assert_array_equal(read_spectrum(path, hdu=1).flux.value, 2 * _counts())


# ---- detector pixel numbers ----------------------------------------------------------


def _pixel_file(path, pixels, counts):
    path.write_text("pixel,counts\n" + "\n".join(
        f"{p},{c:g}" for p, c in zip(pixels, counts, strict=True)) + "\n")
    return path


def test_cropped_export_keeps_its_detector_pixels(tmp_path):
    counts = _counts()
    spec = read_spectrum(_pixel_file(tmp_path / "c.csv", np.arange(N) + 300, counts))
    arr = spectrum_arrays(spec)
    assert (arr.first_pixel, arr.last_pixel) == (300, 300 + N - 1)
    np.testing.assert_array_equal(arr.counts[300:], counts)
    assert arr.mask[:300].all() and not arr.mask[300:].any()


def test_gapped_export_masks_the_missing_pixels_instead_of_closing_the_gap(tmp_path):
    keep = np.r_[0:50, 70:N]
    counts = _counts()
    spec = read_spectrum(_pixel_file(tmp_path / "g.csv", keep, counts[keep]))
    assert spec.meta["pixel_gaps"] == 20
    arr = spectrum_arrays(spec)
    assert arr.counts.size == N
    assert arr.mask[50:70].all() and not arr.mask[keep].any()
    np.testing.assert_array_equal(arr.counts[keep], counts[keep])


def test_one_based_export_read_with_pixel_origin_one(tmp_path):
    spec = read_spectrum(_pixel_file(tmp_path / "o.csv", np.arange(N) + 1, _counts()),
                         pixel_origin=1)
    arr = spectrum_arrays(spec)
    assert (arr.first_pixel, arr.last_pixel) == (0, N - 1)


def _solution(n_pixels):
    coef = np.array([500.0, 6.0])
    pix = np.array([10.0, 60.0, 110.0])
    wl = np.polynomial.chebyshev.chebval(2 * pix / (n_pixels - 1) - 1, coef)
    lines = {"pixel": pix, "pixel_err": np.full(3, 0.02), "wavelength_ref": wl,
             "wavelength_ref_err": np.full(3, 1e-4), "species": np.array(["Ne I"] * 3),
             "designation": np.array([""] * 3), "flux": np.full(3, 1e3),
             "snr": np.full(3, 50.0), "residual_nm": np.zeros(3), "used": np.ones(3, bool),
             "reason": np.array([""] * 3)}
    return Solution(coefficients=coef, covariance=np.eye(2) * 1e-8, n_pixels=n_pixels,
                    medium="air", lamps=("Ne",), lines=lines, rms_nm=0.0, rms_pixel=0.0,
                    confidence=0.999, verdict="confident", fwhm_pixel=2.5)


def test_solution_is_refused_beyond_its_pixels_with_the_way_out(tmp_path):
    spec = read_spectrum(_pixel_file(tmp_path / "o.csv", np.arange(N) + 1, _counts()))
    with pytest.raises(SpectrumFormatError, match="--pixel-origin 1"):
        require_solution_pixels(spec, _solution(N))


def test_counts_without_pixel_column_of_another_length_are_refused(tmp_path):
    with pytest.raises(SpectrumFormatError, match="nothing says which detector pixels"):
        require_solution_pixels(_counts(N - 20), _solution(N))


def test_cropped_export_inside_the_solution_is_accepted(tmp_path):
    spec = read_spectrum(_pixel_file(tmp_path / "c.csv", np.arange(N - 40) + 20,
                                     _counts(N - 40)))
    require_solution_pixels(spec, _solution(N))  # raises if refused


def test_attach_wavelengths_refuses_lines_outside_the_solution():
    from astropy.table import Table

    from ritzline.peaks import attach_wavelengths

    lines = Table({"pixel": [10.0, 500.0], "pixel_err": [0.1, 0.1], "fwhm_pixel": [2.0, 2.0]})
    with pytest.raises(SpectrumFormatError, match="outside the 120 pixels"):
        attach_wavelengths(lines, _solution(N))


# ---- no fake lines from frames that hold none -------------------------------------------


@pytest.mark.parametrize("frame", ["zero", "constant", "noise"])
def test_frames_without_lines_give_an_empty_line_table(frame):
    from ritzline import find_lines

    counts = {"zero": np.zeros(400), "constant": np.full(400, 200.0),
              "noise": np.random.default_rng(7).poisson(150, 400).astype(float)}[frame]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert len(find_lines(counts)) == 0


def test_sign_flipped_counts_are_refused(tmp_path):
    with pytest.raises(SpectrumFormatError, match="sign-flipped"):
        read_spectrum(_pixel_file(tmp_path / "i.csv", np.arange(N), -_counts()))


# ---- property-based fuzz -----------------------------------------------------------------

_FUZZ = settings(max_examples=120, deadline=None,
                 suppress_health_check=[HealthCheck.function_scoped_fixture])

_card_values = st.one_of(
    st.floats(allow_nan=False, allow_infinity=False, width=32),
    st.integers(-10, 10),
    st.sampled_from(["WAVE", "AWAV", "WAVE-LOG", "FREQ", "", "nm", "Angstrom", "m", "pix"]),
)


@_FUZZ
@given(
    cards=st.dictionaries(
        st.sampled_from(["CTYPE1", "CUNIT1", "CRVAL1", "CRPIX1", "CDELT1", "CD1_1", "PC1_1",
                         "SATURATE", "EXPTIME", "DC-FLAG"]),
        _card_values, max_size=8),
    n=st.integers(1, 60),
    cut=st.one_of(st.none(), st.integers(0, 8000)),
)
def test_fuzzed_fits_gives_a_spectrum_or_a_spectrum_format_error(tmp_path_factory, cards, n,
                                                                   cut):
    path = tmp_path_factory.mktemp("fits") / "f.fits"
    hdu = fits.PrimaryHDU(np.linspace(100.0, 900.0, n))
    for key, value in cards.items():
        try:
            hdu.header[key] = value
        except (ValueError, TypeError):
            pass
    hdu.writeto(path)
    if cut is not None:
        path.write_bytes(path.read_bytes()[:cut])
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            spec = read_spectrum(path)
    except SpectrumFormatError as exc:
        assert str(path) in str(exc)
        return
    axis = spec.spectral_axis.value
    assert spec.flux.size == n >= 16
    assert np.all(np.isfinite(axis))
    if spec.meta["axis_kind"] == "wavelength":
        assert np.all(axis > 0)
    sat = spec.meta["saturation"]
    assert sat is None or sat > 0


def _solution_doc():
    doc = _solution(N).to_dict()
    return json.loads(json.dumps(doc))


_json_leaf = st.one_of(st.none(), st.booleans(), st.integers(-5, 10**6),
                       st.floats(allow_nan=False, allow_infinity=False),
                       st.text(max_size=5))
_PATHS = [("polynomial", "coefficients", 0), ("polynomial", "coefficients", 1),
          ("polynomial", "covariance", 0, 0), ("polynomial", "covariance", 0, 1),
          ("polynomial", "domain", 1), ("n_pixels",), ("medium",), ("rms_nm",),
          ("confidence",), ("fwhm_pixel",), ("lines", 0, "pixel"),
          ("lines", 1, "residual_nm"), ("lines", 2, "used"), ("schema_version",), ("lamps",)]


@_FUZZ
@given(edits=st.lists(st.tuples(st.sampled_from(_PATHS), _json_leaf), max_size=4),
       cut=st.one_of(st.none(), st.integers(0, 3000)))
def test_fuzzed_solution_file_loads_or_is_refused(tmp_path_factory, edits, cut):
    doc = _solution_doc()
    for path_keys, value in edits:
        target = doc
        for key in path_keys[:-1]:
            target = target[key]
        target[path_keys[-1]] = value
    text = json.dumps(doc)
    if cut is not None:
        text = text[:cut]
    path = tmp_path_factory.mktemp("sol") / "s.json"
    path.write_text(text)
    try:
        sol = Solution.load(path)
    except SolutionFormatError as exc:
        assert str(path) in str(exc)
        return
    except RitzlineError:
        raise
    # what loads is self-consistent: the coefficients reproduce the stored residuals and
    # the band is a real number everywhere on the detector
    fit = sol.wavelength(sol.lines["pixel"]) - sol.lines["wavelength_ref"]
    np.testing.assert_allclose(fit, sol.lines["residual_nm"], atol=1e-6)
    band = sol.wavelength_err(np.linspace(0, sol.n_pixels - 1, 9))
    assert np.all(np.isfinite(band)) and np.all(band >= 0)
    assert np.all(np.linalg.eigvalsh(sol.covariance) > -1e-9 * np.abs(sol.covariance).max()
                  - 1e-300)


def _text_export(counts):
    return "pixel,counts\n" + "\n".join(f"{i},{c:.0f}" for i, c in enumerate(counts)) + "\n"


@_FUZZ
@given(cut=st.integers(14, 2000))
def test_a_text_file_cut_anywhere_is_refused_flagged_or_read_exactly(tmp_path_factory, cut):
    counts = _counts(150) + 10000  # five-digit values: a cut number is always shorter
    text = _text_export(counts)
    path = tmp_path_factory.mktemp("cut") / "c.csv"
    path.write_text(text[:cut])
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            spec = read_spectrum(path)
        except SpectrumFormatError as exc:
            assert str(path) in str(exc)
            return
    if any("cut off" in str(w.message) for w in caught):
        return
    # read without a word: every value read is the value written
    n = spec.flux.size
    np.testing.assert_array_equal(spec.flux.value, counts[:n])


_FOOTERS = ["", ">>>>>End Spectral Data<<<<<\n", "[EndOfData]\nnotes: lamp warm\n", "END\n"]
_PREAMBLES = ["", "Acquisition export\nIntegration Time (usec): 1000\n", "# comment\n"]


@_FUZZ
@given(pre=st.sampled_from(_PREAMBLES), foot=st.sampled_from(_FOOTERS),
       sep=st.sampled_from([",", "\t", ";", " "]), header=st.booleans())
def test_exports_with_preamble_and_closing_lines_read_every_value(tmp_path_factory, pre, foot,
                                                                  sep, header):
    counts = _counts(80)
    body = "\n".join(f"{i}{sep}{c:.0f}" for i, c in enumerate(counts)) + "\n"
    head = f"pixel{sep}counts\n" if header else ""
    path = tmp_path_factory.mktemp("exp") / "e.txt"
    path.write_text(pre + head + body + foot)
    spec = read_spectrum(path)
    np.testing.assert_array_equal(spec.flux.value, counts)
    assert spec.meta["axis_kind"] == "pixel"
