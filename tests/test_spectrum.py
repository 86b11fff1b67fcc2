"""Ingestion: every supported format reads back to identical values; every bad input is a
SpectrumFormatError naming the file; the reader never changes its input."""

import os

import astropy.units as u
import numpy as np
import pytest
from astropy.io import fits
from astropy.table import Table
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from ritzline import RitzlineError, SpectrumFormatError, read_spectrum
from ritzline.spectrum import spectrum_arrays, write_spectrum


def _write(path, text, encoding="utf-8"):
    path.write_bytes(text.encode(encoding))
    return path


def _wl(n=256):
    return np.round(400.0 + 0.05 * np.arange(n), 4)


# ---- round trips -----------------------------------------------------------------------


@pytest.mark.parametrize("delim", [",", "\t", ";", " "])
def test_text_with_header_round_trips_each_delimiter(tmp_path, counts, delim):
    wl = _wl()
    rows = "\n".join(f"{a}{delim}{b}" for a, b in zip(wl, counts, strict=True))
    path = _write(tmp_path / "s.txt", f"wavelength (nm){delim}counts\n{rows}\n")
    spec = read_spectrum(path)
    assert spec.spectral_axis.unit == u.nm
    np.testing.assert_array_equal(spec.spectral_axis.value, wl)
    np.testing.assert_array_equal(spec.flux.value, counts)


def test_text_without_header_of_pixel_and_counts_is_a_pixel_axis(tmp_path, counts):
    rows = "\n".join(f"{i} {c}" for i, c in enumerate(counts))
    spec = read_spectrum(_write(tmp_path / "s.dat", rows))
    assert spec.spectral_axis.unit == u.pix
    assert spec.meta["axis_kind"] == "pixel"
    np.testing.assert_array_equal(spec.flux.value, counts)


def test_single_column_is_counts_on_a_pixel_axis(tmp_path, counts):
    spec = read_spectrum(_write(tmp_path / "s.txt", "\n".join(map(str, counts))))
    np.testing.assert_array_equal(spec.spectral_axis.value, np.arange(counts.size))
    np.testing.assert_array_equal(spec.flux.value, counts)


def test_preamble_lines_are_skipped_and_exposure_time_and_timestamp_kept(tmp_path, counts):
    preamble = (
        "Bench spectrometer export\nOperator notes: lamp warmed up 10 min\n"
        "Integration Time (usec): 150000\nDate: 2026-11-30 14:05:09\n"
        ">>>>>Begin Spectral Data<<<<<\n"
    )
    rows = "\n".join(f"{a}\t{b}" for a, b in zip(_wl(), counts, strict=True))
    spec = read_spectrum(_write(tmp_path / "s.txt", preamble + rows))
    assert spec.meta["exposure_time"] == pytest.approx(0.15)
    assert spec.meta["timestamp"] == "2026-11-30T14:05:09"
    np.testing.assert_array_equal(spec.flux.value, counts)


def test_semicolon_file_with_decimal_commas(tmp_path, counts):
    rows = "\n".join(
        f"{a};{b}".replace(".", ",") for a, b in zip(_wl(), counts, strict=True)
    )
    spec = read_spectrum(_write(tmp_path / "s.csv", "Wellenlaenge [nm];Zaehlrate\n" + rows))
    np.testing.assert_allclose(spec.spectral_axis.value, _wl(), rtol=0, atol=0)
    np.testing.assert_array_equal(spec.flux.value, counts)


def test_column_chosen_by_name_or_index(tmp_path, counts):
    rows = "\n".join(f"{i},{c},{2 * c}" for i, c in enumerate(counts))
    path = _write(tmp_path / "s.csv", "pixel,exp_001,exp_002\n" + rows)
    assert read_spectrum(path).meta["columns"] == ["exp_001", "exp_002"]
    np.testing.assert_array_equal(read_spectrum(path, column="EXP_002").flux.value, 2 * counts)
    np.testing.assert_array_equal(read_spectrum(path, column=2).flux.value, 2 * counts)
    with pytest.raises(SpectrumFormatError, match="exp_001, exp_002"):
        read_spectrum(path, column="exp_003")
    with pytest.raises(SpectrumFormatError, match="not a counts column"):
        read_spectrum(path, column=0)


@pytest.mark.parametrize(
    ("header", "scale"),
    [("wavelength (nm)", 1.0), ("Wavelength [Å]", 0.1), ("lambda/A", 0.1), ("wl (um)", 1000.0)],
)
def test_axis_unit_from_header_is_converted_to_nm(tmp_path, counts, header, scale):
    axis = _wl() / scale
    rows = "\n".join(f"{float(a)!r},{c}" for a, c in zip(axis, counts, strict=True))
    spec = read_spectrum(_write(tmp_path / "s.csv", f"{header},counts\n{rows}"))
    np.testing.assert_allclose(spec.spectral_axis.to_value(u.nm), _wl(), rtol=1e-12)


def test_axis_unit_override(tmp_path, counts):
    rows = "\n".join(f"{float(a) * 10!r},{c}" for a, c in zip(_wl(), counts, strict=True))
    spec = read_spectrum(_write(tmp_path / "s.csv", rows), axis_unit="angstrom")
    np.testing.assert_allclose(spec.spectral_axis.value, _wl(), rtol=1e-12)


def test_fits_image_with_linear_wcs_round_trips(tmp_path, counts):
    hdu = fits.PrimaryHDU(counts)
    hdu.header.update(CRVAL1=4000.0, CDELT1=0.5, CRPIX1=1.0, CUNIT1="Angstrom", CTYPE1="AWAV")
    hdu.header["EXPTIME"] = 2.5
    hdu.writeto(tmp_path / "s.fits")
    spec = read_spectrum(tmp_path / "s.fits")
    np.testing.assert_allclose(spec.spectral_axis.value, 400.0 + 0.05 * np.arange(counts.size))
    np.testing.assert_array_equal(spec.flux.value, counts)
    assert spec.meta["exposure_time"] == 2.5
    assert spec.meta["medium"] == "air"


def test_fits_image_with_cd_matrix_keyword(tmp_path, counts):
    hdu = fits.PrimaryHDU(counts)
    hdu.header.update(CRVAL1=500.0, CD1_1=0.1, CRPIX1=11.0, CUNIT1="nm")
    hdu.writeto(tmp_path / "s.fits")
    axis = read_spectrum(tmp_path / "s.fits").spectral_axis.value
    assert axis[10] == pytest.approx(500.0)
    assert axis[11] - axis[10] == pytest.approx(0.1)


def test_fits_image_without_wcs_is_a_pixel_axis(tmp_path, counts):
    fits.PrimaryHDU(counts).writeto(tmp_path / "s.fits")
    spec = read_spectrum(tmp_path / "s.fits")
    assert spec.spectral_axis.unit == u.pix


def test_fits_binary_table_round_trips(tmp_path, counts):
    table = Table({"WAVELENGTH": _wl() * u.nm, "FLUX": counts})
    table.write(tmp_path / "s.fits")
    spec = read_spectrum(tmp_path / "s.fits")
    np.testing.assert_array_equal(spec.spectral_axis.value, _wl())
    np.testing.assert_array_equal(spec.flux.value, counts)


def test_ecsv_written_by_ritzline_round_trips_with_mask_and_meta(tmp_path, counts):
    counts = counts.copy()
    counts[7] = np.nan
    rows = "\n".join(f"{a},{c}" for a, c in zip(_wl(), counts, strict=True))
    spec = read_spectrum(_write(tmp_path / "s.csv", "wavelength (nm),counts\n" + rows))
    write_spectrum(spec, tmp_path / "s.ecsv")
    back = read_spectrum(tmp_path / "s.ecsv")
    np.testing.assert_array_equal(back.spectral_axis.value, spec.spectral_axis.value)
    np.testing.assert_array_equal(back.flux.value, spec.flux.value)
    np.testing.assert_array_equal(back.mask, spec.mask)
    assert back.meta["n_masked"] == 1


# ---- metadata, masking, saturation -----------------------------------------------------


def test_isolated_nan_and_inf_samples_are_masked_and_counted(tmp_path, counts):
    values = [str(c) for c in counts]
    values[10], values[20], values[30] = "nan", "inf", ""
    spec = read_spectrum(_write(tmp_path / "s.txt", "\n".join(f"{i},{v}" for i, v in
                                                             enumerate(values))))
    assert spec.flux.size == counts.size  # nothing dropped
    assert spec.meta["n_masked"] == 3
    assert set(np.flatnonzero(spec.mask)) == {10, 20, 30}


def test_saturation_argument_is_kept_and_counted(tmp_path, counts):
    path = _write(tmp_path / "s.txt", "\n".join(map(str, counts)))
    spec = read_spectrum(path, saturation=3000)
    assert spec.meta["saturation"] == 3000
    assert spec.meta["n_saturated"] == int(np.count_nonzero(counts >= 3000))


def test_full_scale_plateau_is_detected_as_saturation(tmp_path, counts):
    counts = counts.copy()
    counts[78:83] = 65535  # a 16-bit ADC's full scale (common practice)
    spec = read_spectrum(_write(tmp_path / "s.txt", "\n".join(map(str, counts))))
    assert spec.meta["saturation"] == 65535
    assert spec.meta["saturation_source"] == "detected"
    assert spec.meta["n_saturated"] == 5


def test_saturation_level_from_preamble(tmp_path, counts):
    text = "# saturation level: 16383\n" + "\n".join(map(str, counts))
    assert read_spectrum(_write(tmp_path / "s.txt", text)).meta["saturation"] == 16383


def test_reader_does_not_modify_the_input_file(tmp_path, counts):
    path = _write(tmp_path / "s.txt", "\n".join(map(str, counts)))
    before = (path.read_bytes(), os.stat(path).st_mtime_ns)
    read_spectrum(path)
    assert (path.read_bytes(), os.stat(path).st_mtime_ns) == before
    os.remove(path)  # no handle left open (would fail on systems that lock open files)


def test_spectrum_arrays_accepts_a_plain_array(counts):
    arr = spectrum_arrays(counts)
    assert arr.unit == "pix"
    np.testing.assert_array_equal(arr.counts, counts)


# ---- bad input -------------------------------------------------------------------------

BAD_TEXT = {
    "empty": ("", "empty"),
    "blank": ("\n \n\t\n", "empty"),
    "binary": ("\x00\x01\x02\x03garbage\x00" * 20, "binary"),
    "non_numeric": ("\n".join(f"{i},{i}" for i in range(20)) + "\n20,abc\n", "line 21"),
    "column_count": ("\n".join(f"{i},{i}" for i in range(20)) + "\n20,1,2\n", "line 21"),
    "too_short": ("\n".join(f"{i},{i}" for i in range(10)), "at least 16"),
    "non_monotonic": ("\n".join(f"{i if i != 9 else 3},{i}" for i in range(20)), "monotonic"),
    "duplicated": ("\n".join(f"{min(i, 12)},{i}" for i in range(20)), "duplicated"),
    "all_nan": ("\n".join(f"{i},nan" for i in range(20)), "no finite"),
    "no_numbers": ("just some words\nand more words\n", "no numeric"),
}


@pytest.mark.parametrize("case", sorted(BAD_TEXT))
def test_bad_text_input_raises_spectrum_format_error_naming_the_file(tmp_path, case):
    text, reason = BAD_TEXT[case]
    path = tmp_path / f"bad_{case}.txt"
    path.write_bytes(text.encode("latin-1"))
    with pytest.raises(SpectrumFormatError, match=reason) as err:
        read_spectrum(path)
    assert str(path) in str(err.value)
    assert isinstance(err.value, RitzlineError)


def test_missing_file_raises_spectrum_format_error(tmp_path):
    with pytest.raises(SpectrumFormatError, match="no such file"):
        read_spectrum(tmp_path / "absent.csv")


def test_damaged_fits_names_the_file(tmp_path):
    path = tmp_path / "bad.fits"
    path.write_bytes(b"SIMPLE  =                    T" + b"\x00" * 50)
    with pytest.raises(SpectrumFormatError, match=r"bad\.fits"):
        read_spectrum(path)


def test_two_dimensional_fits_image_names_the_hdu(tmp_path):
    fits.PrimaryHDU(np.ones((20, 30))).writeto(tmp_path / "img.fits")
    with pytest.raises(SpectrumFormatError, match="HDU 0"):
        read_spectrum(tmp_path / "img.fits")


def test_ambiguous_axis_unit_asks_for_axis_unit(tmp_path, counts):
    rows = "\n".join(f"{0.001 * i + 5},{c}" for i, c in enumerate(counts))
    with pytest.raises(SpectrumFormatError, match="axis_unit"):
        read_spectrum(_write(tmp_path / "s.csv", rows))


# ---- fuzz ------------------------------------------------------------------------------


@settings(
    max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(data=st.one_of(
    st.binary(max_size=600),
    st.lists(
        st.one_of(
            st.floats(allow_nan=True, allow_infinity=True).map(repr),
            st.integers(-10, 5000).map(str),
            st.sampled_from(["", "nan", "x", "#", "1e999", "wavelength (nm)", "-", "1,5"]),
        ),
        min_size=0,
        max_size=120,
    ).map(lambda cells: "\n".join(
        ",".join(cells[i:i + 2]) for i in range(0, len(cells), 2)
    ).encode()),
))
def test_fuzzed_text_gives_a_spectrum_or_a_spectrum_format_error(tmp_path_factory, data):
    path = tmp_path_factory.mktemp("fuzz") / "f.txt"
    path.write_bytes(data)
    try:
        spec = read_spectrum(path)
    except SpectrumFormatError:
        return
    assert spec.flux.size >= 16
    assert np.isfinite(spec.flux.value[~spec.mask]).all()
    assert spec.meta["n_masked"] == int(spec.mask.sum())
