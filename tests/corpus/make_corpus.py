"""Write the corpus of bad and unusual input files and its manifest (manifest.json).

Run from the project root: ``python tests/corpus/make_corpus.py``.  Each entry names a file,
what reading it must give (``ok``, ``warning`` or ``error``), a piece of the message that
must appear, and for readable files a few facts to check.  The spectra are a small
synthetic lamp-like frame (two lines on a flat background, seeded noise); they exercise the
reader, not the physics.
"""

import json
import shutil
from pathlib import Path

import numpy as np
from astropy.io import fits
from astropy.table import Table

HERE = Path(__file__).parent
N = 200
MANIFEST: list[dict] = []


def frame(seed=1, n=N):
    rng = np.random.default_rng(seed)
    x = np.arange(n)
    model = 150 + 4000 * np.exp(-0.5 * ((x - 60) / 1.2) ** 2) + 900 * np.exp(
        -0.5 * ((x - 140) / 1.2) ** 2)
    return rng.poisson(model).astype(float)


COUNTS = frame()
WL = np.round(500.0 + 0.1 * np.arange(N), 4)


def entry(name, expect, message="", **facts):
    MANIFEST.append({"file": name, "expect": expect, "message": message, **facts})


def text(name, body, expect, message="", encoding="utf-8", **facts):
    (HERE / name).write_bytes(body.encode(encoding) if isinstance(body, str) else body)
    entry(name, expect, message, **facts)


def rows(axis, counts, sep=",", fmt="{}"):
    return "\n".join(f"{fmt.format(a)}{sep}{c:g}" for a, c in zip(axis, counts, strict=True))


PIX = np.arange(N)


def spectra_text():
    text("ok_pixel_counts.csv", "pixel,counts\n" + rows(PIX, COUNTS) + "\n", "ok",
         axis_kind="pixel", samples=N)
    text("ok_wavelength_nm.csv", "wavelength (nm),counts\n" + rows(WL, COUNTS) + "\n", "ok",
         axis_kind="wavelength", axis_first=500.0)
    text("ok_angstrom_header.txt", "lambda [A]\tcounts\n"
         + rows(WL * 10, COUNTS, "\t") + "\n", "ok", axis_kind="wavelength", axis_first=500.0)
    text("ok_tab_separated.tsv", "pixel\tcounts\n" + rows(PIX, COUNTS, "\t") + "\n", "ok")
    text("ok_semicolon_decimal_comma.csv", "Wellenlaenge [nm];Zaehlrate\n"
         + rows(WL, COUNTS, ";").replace(".", ",") + "\n", "ok", axis_first=500.0)
    text("ok_whitespace.dat", rows(PIX, COUNTS, "   ") + "\n", "ok", axis_kind="pixel")
    text("ok_single_column.txt", "\n".join(f"{c:g}" for c in COUNTS) + "\n", "ok",
         axis_kind="pixel", samples=N)
    preamble = ("Acquisition export of the bench spectrometer\nIntegration Time (usec): 150000\n"
                "Date: 2026-11-30 14:05:09\n>>>>>Begin Spectral Data<<<<<\n")
    text("ok_preamble_and_closing_marker.txt", preamble + rows(PIX, COUNTS, "\t")
         + "\n>>>>>End Spectral Data<<<<<\n", "ok", exposure_time=0.15, samples=N)
    text("ok_footer_several_lines.txt", preamble + rows(PIX, COUNTS, "\t")
         + "\n[EndOfData]\nchecksum ok\n\n", "ok", samples=N)
    text("ok_footer_with_numbers.txt", rows(PIX, COUNTS, " ")
         + "\nEnd of data\nTotal pixels: 200\nScans to average: 3\n", "ok", samples=N)
    text("ok_crlf_line_ends.csv", ("pixel,counts\n" + rows(PIX, COUNTS) + "\n")
         .replace("\n", "\r\n"), "ok", samples=N)
    text("ok_utf8_bom.csv", "\ufeffpixel,counts\n" + rows(PIX, COUNTS) + "\n", "ok")
    text("ok_latin1_preamble.txt", "Integration time (µs): 20000\npixel;counts\n"
         + rows(PIX, COUNTS, ";") + "\n", "ok", encoding="latin-1", exposure_time=0.02)
    c = COUNTS.copy().astype(object)
    c[10] = "NaN"
    c[11] = "inf"
    text("ok_nan_and_inf_samples.csv", "pixel,counts\n"
         + "\n".join(f"{i},{v}" for i, v in enumerate(c)) + "\n", "ok", n_masked=2)
    body = "pixel,a,b\n" + "\n".join(
        f"{i},{'' if i == 50 else f'{v:g}'},{v:g}" for i, v in enumerate(COUNTS)) + "\n"
    text("ok_empty_cell_is_missing.csv", body, "ok", n_masked=1)
    text("ok_descending_wavelength.csv", "wavelength (nm),counts\n"
         + rows(WL[::-1], COUNTS) + "\n", "ok", axis_kind="wavelength")
    text("ok_cropped_pixel_axis.csv", "pixel,counts\n" + rows(PIX + 1000, COUNTS) + "\n",
         "ok", pixel_range=[1000, 1000 + N - 1], pixel_gaps=0)
    keep = np.r_[0:80, 100:N]
    text("ok_gapped_pixel_axis.csv", "pixel,counts\n" + rows(PIX[keep], COUNTS[keep]) + "\n",
         "ok", pixel_range=[0, N - 1], pixel_gaps=20)
    text("ok_one_based_pixels.csv", "pixel,counts\n" + rows(PIX + 1, COUNTS) + "\n", "ok",
         pixel_range=[1, N])
    text("ok_one_based_pixels_with_origin.csv", "pixel,counts\n" + rows(PIX + 1, COUNTS)
         + "\n", "ok", read={"pixel_origin": 1}, pixel_range=[0, N - 1])
    text("ok_several_counts_columns.csv", "pixel,exp_001,exp_002\n" + "\n".join(
        f"{i},{v:g},{2 * v:g}" for i, v in enumerate(COUNTS)) + "\n", "ok",
         read={"column": "exp_002"}, column="exp_002")
    text("warn_scaled_counts.csv", "pixel,counts\n" + "\n".join(
        f"{i},{v * 1e-9:.6e}" for i, v in enumerate(COUNTS)) + "\n", "warning",
         "look scaled or normalised")
    text("ok_constant_frame.csv", "pixel,counts\n" + rows(PIX, np.full(N, 200.0)) + "\n",
         "ok")
    text("ok_all_zero_frame.csv", "pixel,counts\n" + rows(PIX, np.zeros(N)) + "\n", "ok")
    rng = np.random.default_rng(3)
    text("ok_lamp_off_noise.csv", "pixel,counts\n" + rows(PIX, rng.poisson(150, N)) + "\n",
         "ok")
    text("ok_dark_subtracted_negative_values.csv", "pixel,counts\n"
         + rows(PIX, COUNTS - 150) + "\n", "ok")
    text("ok_saturation_in_preamble.txt", "saturation level: 65535\npixel,counts\n"
         + rows(PIX, COUNTS) + "\n", "ok", saturation=65535.0)
    text("warn_negative_saturation_in_preamble.txt", "saturation level: -1\npixel,counts\n"
         + rows(PIX, COUNTS) + "\n", "warning", "not a saturation level", saturation=None)
    text("warn_zero_exposure_time.txt", "Exposure time: 0 s\npixel,counts\n"
         + rows(PIX, COUNTS) + "\n", "warning", "not an exposure time", exposure_time=None)
    text("warn_saturation_below_the_data.txt", "saturation level: 5\npixel,counts\n"
         + rows(PIX, COUNTS) + "\n", "warning", "reached by most samples", saturation=None)
    # refused
    text("err_empty.csv", "", "error", "file is empty")
    text("err_whitespace_only.txt", "  \n\n\t\n", "error", "file is empty")
    text("err_header_only.csv", "pixel,counts\n", "error", "no numeric data rows")
    body = "pixel,counts\n" + rows(PIX, COUNTS) + "\n"
    text("err_truncated_last_row.csv", body[: body.rindex(",") + 1], "error", "truncated")
    text("err_truncated_last_row_one_field.csv", body[: body.rindex(",")], "error",
         "truncated")
    cut_body = "pixel,counts\n" + rows(PIX, COUNTS + 10000)
    text("warn_cut_inside_the_last_number.csv", cut_body[:-2], "warning", "cut off")
    text("err_nul_bytes_at_the_end.csv", body[:-40].encode() + b"\x00" * 30, "error",
         "NUL bytes")
    text("err_binary_file.bin", bytes(range(256)) * 8, "error", "binary data")
    text("err_header_two_names_rows_of_three.csv", "pixel,counts\n" + "\n".join(
        f"{i},{v:g},{v:g}" for i, v in enumerate(COUNTS)) + "\n", "error",
         "header names 2 columns")
    text("err_comma_decimal_and_separator.csv", "\n".join(
        f"{w:.1f},{v:g}".replace(".", ",") for w, v in zip(WL, COUNTS, strict=True)) + "\n",
         "error", "both the decimal mark and the column separator")
    text("err_comma_decimal_with_header.csv", "wavelength (nm),counts\n" + "\n".join(
        f"{w:.1f},{v:.1f}".replace(".", ",") for w, v in zip(WL, COUNTS, strict=True))
         + "\n", "error", "decimal mark")
    fractions = np.random.default_rng(4).integers(0, 100, N)
    text("err_comma_decimal_counts_on_pixel_axis.csv", "\n".join(
        f"{i},{c:.0f},{f:02d}" for i, c, f in zip(PIX, COUNTS, fractions, strict=True))
         + "\n", "error", "leading zero")
    text("err_whitespace_header_two_names_rows_of_three.txt", "pixel counts\n" + "\n".join(
        f"{i} {v:g} {v:g}" for i, v in enumerate(COUNTS)) + "\n", "error",
         "header names 2 columns")
    text("ok_free_text_line_above_whitespace_data.txt", "Begin Spectral Data\n"
         + rows(PIX, COUNTS, " ") + "\n", "ok", samples=N)
    lines = ("pixel,counts\n" + rows(PIX, COUNTS) + "\n").splitlines()
    lines[100] = "99"
    text("err_short_row_in_the_middle.csv", "\n".join(lines) + "\n", "error",
         "inconsistent column count")
    lines = ("pixel,counts\n" + rows(PIX, COUNTS) + "\n").splitlines()
    lines[50] = "49,12 ADU"
    text("err_unit_in_a_data_cell.csv", "\n".join(lines) + "\n", "error", "non-numeric")
    text("err_too_few_samples.csv", "pixel,counts\n" + rows(PIX[:10], COUNTS[:10]) + "\n",
         "error", "only 10 samples")
    ax = PIX.copy()
    ax[30] = 29
    text("err_duplicated_axis_value.csv", "pixel,counts\n" + rows(ax, COUNTS) + "\n", "error",
         "duplicated axis value")
    ax = WL.copy()
    ax[[40, 41]] = ax[[41, 40]]
    text("err_axis_not_monotonic.csv", "wavelength (nm),counts\n" + rows(ax, COUNTS) + "\n",
         "error", "not monotonic")
    text("err_negative_wavelengths.csv", "wavelength (nm),counts\n"
         + rows(np.round(-10 + 0.1 * PIX, 3), COUNTS) + "\n", "error", "must be positive")
    text("err_fractional_pixel_axis.csv", "pixel,counts\n" + rows(PIX * 0.5, COUNTS) + "\n",
         "error", "not a whole pixel number")
    text("err_negative_pixel_numbers.csv", "pixel,counts\n" + rows(PIX - 10, COUNTS) + "\n",
         "error", "before the first pixel")
    text("err_all_nan.csv", "pixel,counts\n" + "\n".join(f"{i},nan" for i in PIX) + "\n",
         "error", "no finite values")
    text("err_axis_unit_unknown.csv", rows(np.round(3000 + 0.37 * PIX, 2), COUNTS) + "\n",
         "error", "cannot tell the unit")
    text("err_axis_unit_not_understood.csv", "wavelength (furlong),counts\n"
         + rows(WL, COUNTS) + "\n", "error", "not understood")
    text("err_sign_flipped_counts.csv", "pixel,counts\n" + rows(PIX, -COUNTS) + "\n",
         "error", "sign-flipped")
    text("err_column_not_found.csv", "pixel,exp_001\n" + rows(PIX, COUNTS) + "\n", "error",
         "no column named", read={"column": "exp_009"})
    ax = WL.astype(object)
    ax[5] = "inf"
    text("err_infinite_axis_value.csv", "wavelength (nm),counts\n" + "\n".join(
        f"{a},{c:g}" for a, c in zip(ax, COUNTS, strict=True)) + "\n", "error", "not a finite")
    text("err_hdu_given_for_text.csv", "pixel,counts\n" + rows(PIX, COUNTS) + "\n", "error",
         "not a FITS file", read={"hdu": 1})


def fits_file(name, header=None, expect="ok", message="", *, data=COUNTS, extra=(), **facts):
    hdu = fits.PrimaryHDU(np.asarray(data, float) if data is not None else None)
    for k, v in (header or {}).items():
        hdu.header[k] = v
    fits.HDUList([hdu, *extra]).writeto(HERE / name, overwrite=True)
    entry(name, expect, message, **facts)


def spectra_fits():
    lin = {"CTYPE1": "AWAV", "CUNIT1": "nm", "CRVAL1": 500.0, "CRPIX1": 1.0, "CDELT1": 0.1}
    fits_file("ok_fits_linear_wavelength.fits", lin, axis_first=500.0, axis_last=519.9,
              medium="air")
    cd = {k: v for k, v in lin.items() if k != "CDELT1"} | {"CD1_1": 0.1}
    fits_file("ok_fits_cd_matrix.fits", cd, axis_last=519.9)
    both = lin | {"CD1_1": 0.2}
    fits_file("warn_fits_cd_and_cdelt_disagree.fits", both, "warning", "CD1_1 is used",
              axis_last=500.0 + 0.2 * (N - 1))
    fits_file("ok_fits_pc_times_cdelt.fits", lin | {"PC1_1": 2.0},
              axis_last=500.0 + 0.2 * (N - 1))
    log = lin | {"CTYPE1": "WAVE-LOG"}
    fits_file("ok_fits_log_axis.fits", log, medium="vacuum",
              axis_last=500.0 * np.exp(0.1 * (N - 1) / 500.0))
    neg = lin | {"CRPIX1": float(N), "CDELT1": -0.1}
    fits_file("ok_fits_negative_step.fits", neg, axis_first=500.0 + 0.1 * (N - 1),
              axis_last=500.0)
    fits_file("err_fits_negative_wavelengths.fits", lin | {"CRVAL1": 5.0, "CDELT1": -0.1},
              "error", "must be positive")
    fits_file("err_fits_frequency_axis.fits", lin | {"CTYPE1": "FREQ", "CUNIT1": "Hz"},
              "error", "not supported")
    fits_file("err_fits_tabulated_axis.fits", lin | {"CTYPE1": "WAVE-TAB"}, "error",
              "not supported")
    fits_file("err_fits_dc_flag_log10.fits", lin | {"CRVAL1": 2.7, "CDELT1": 1e-4,
                                                    "DC-FLAG": 1}, "error", "DC-FLAG")
    fits_file("err_fits_zero_step.fits", lin | {"CDELT1": 0.0}, "error", "zero")
    fits_file("err_fits_no_step.fits", {"CRVAL1": 500.0, "CUNIT1": "nm"}, "error",
              "no CDELT1")
    fits_file("warn_fits_saturate_minus_one.fits", lin | {"SATURATE": -1}, "warning",
              "SATURATE", saturation=None)
    fits_file("warn_fits_exptime_negative.fits", lin | {"EXPTIME": -5.0}, "warning",
              "EXPTIME", exposure_time=None)
    fits_file("ok_fits_no_wcs_is_pixels.fits", {}, axis_kind="pixel")
    two = fits.ImageHDU(COUNTS * 2, name="SKY")
    fits_file("warn_fits_two_data_hdus.fits", lin, "warning", "also hold data", extra=[two])
    fits_file("ok_fits_hdu_chosen_by_name.fits", lin, extra=[fits.ImageHDU(COUNTS * 2,
              name="SKY")], read={"hdu": "SKY"}, column="SKY")
    fits_file("ok_fits_hdu_chosen_by_number.fits", lin, extra=[fits.ImageHDU(COUNTS * 2,
              name="SKY")], read={"hdu": 1}, column="SKY")
    fits_file("err_fits_no_such_hdu.fits", lin, "error", "no HDU 5", read={"hdu": 5})
    fits_file("err_fits_no_hdu_with_that_name.fits", lin, "error", "no HDU named",
              read={"hdu": "FLUX"})
    fits_file("err_fits_column_given_for_image.fits", lin, "error", "has no columns",
              read={"column": "flux"})
    fits_file("err_fits_2d_image.fits", None, data=np.ones((20, 30)), expect="error",
              message="not a 1-D spectrum")
    fits_file("err_fits_no_data.fits", None, data=None, expect="error",
              message="no HDU holds data")
    good = HERE / "ok_fits_linear_wavelength.fits"
    (HERE / "err_fits_truncated.fits").write_bytes(good.read_bytes()[:3000])
    entry("err_fits_truncated.fits", "error", "truncated")
    table = Table({"wavelength": WL, "flux": COUNTS})
    table["wavelength"].unit = "nm"
    table.write(HERE / "ok_fits_binary_table.fits", format="fits", overwrite=True)
    entry("ok_fits_binary_table.fits", "ok", axis_kind="wavelength", axis_first=500.0)


def spectra_ecsv():
    import sys

    sys.path.insert(0, str(HERE.parents[1] / "src"))
    import astropy.units as u
    from specutils import Spectrum

    from ritzline.spectrum import write_spectrum

    spec = Spectrum(spectral_axis=WL * u.nm, flux=COUNTS * u.ct, meta={"exposure_time": 1.5})
    write_spectrum(spec, HERE / "ok_written_by_ritzline.ecsv")
    entry("ok_written_by_ritzline.ecsv", "ok", axis_first=500.0, exposure_time=1.5)
    cal = Table()
    cal["pixel"] = PIX.astype(float) * u.pix
    cal["wavelength"] = WL * u.nm
    cal["wavelength_err"] = np.full(N, 0.002) * u.nm
    cal["counts"] = COUNTS * u.ct
    cal["mask"] = np.zeros(N, bool)
    cal.write(HERE / "ok_calibrated_exposure.ecsv", format="ascii.ecsv", overwrite=True)
    entry("ok_calibrated_exposure.ecsv", "ok", axis_kind="wavelength", axis_first=500.0,
          column="counts")
    cal["mask"] = cal["mask"].astype("u1")
    cal.write(HERE / "ok_calibrated_exposure.csv", format="ascii.csv", overwrite=True)
    entry("ok_calibrated_exposure.csv", "ok", axis_kind="wavelength", axis_first=500.0,
          column="counts")
    good = (HERE / "ok_written_by_ritzline.ecsv").read_text()
    (HERE / "err_malformed_ecsv.ecsv").write_text(good.replace("# datatype:", "# datatype: [", 1))
    entry("err_malformed_ecsv.ecsv", "error", "ECSV")


def solutions():
    import sys

    sys.path.insert(0, str(HERE.parents[1] / "src"))
    from ritzline.calibration import Solution

    coef = np.array([510.0, 10.0, 0.05, -0.01])
    n = N
    pix = np.array([20.0, 60.0, 100.0, 140.0, 180.0])
    x = 2 * pix / (n - 1) - 1
    fit = np.polynomial.chebyshev.chebval(x, coef)
    ref = np.round(fit + np.array([0.001, -0.002, 0.0005, 0.0015, -0.001]), 4)
    resid = fit - ref
    lines = {
        "pixel": pix, "pixel_err": np.full(5, 0.02), "wavelength_ref": ref,
        "wavelength_ref_err": np.full(5, 1e-4), "species": np.array(["Ne I"] * 5),
        "designation": np.array([""] * 5), "flux": np.full(5, 1e4), "snr": np.full(5, 100.0),
        "residual_nm": resid, "used": np.ones(5, bool), "reason": np.array([""] * 5),
    }
    sol = Solution(coefficients=coef, covariance=np.diag([1e-6, 2e-6, 3e-6, 4e-6]),
                   n_pixels=n, medium="air", lamps=("Ne",), lines=lines,
                   rms_nm=float(np.sqrt(np.mean(resid ** 2))), rms_pixel=0.01,
                   confidence=0.999, verdict="confident", fwhm_pixel=2.8,
                   model_spread=np.zeros(4), meta={"created": "2026-12-01T00:00:00Z"})
    doc = sol.to_dict()

    def write(name, d, expect, message=""):
        body = d if isinstance(d, str) else json.dumps(d, indent=1)
        (HERE / name).write_text(body)
        entry(name, expect, message, kind="solution")

    def edited(fn):
        d = json.loads(json.dumps(doc))
        fn(d)
        return d

    write("sol_ok.json", doc, "ok")
    write("sol_fwhm_null.json", edited(lambda d: d.update(fwhm_pixel=None)), "ok")
    write("sol_edited_coefficient.json", edited(
        lambda d: d["polynomial"]["coefficients"].__setitem__(1, 10.5)), "error",
        "do not reproduce the stored residual")
    write("sol_edited_rms.json", edited(lambda d: d.update(rms_nm=1e-5)), "error",
          "rms_nm")
    write("sol_negative_variance.json", edited(
        lambda d: d["polynomial"]["covariance"][0].__setitem__(0, -1e-6)), "error",
        "negative variance")

    def asym(d):
        d["polynomial"]["covariance"][0][1] = 1e-7
    write("sol_asymmetric_covariance.json", edited(asym), "error", "not symmetric")

    def not_psd(d):
        d["polynomial"]["covariance"][0][1] = 5e-6
        d["polynomial"]["covariance"][1][0] = 5e-6
    write("sol_covariance_not_positive.json", edited(not_psd), "error",
          "positive semi-definite")
    write("sol_wrong_schema.json", edited(lambda d: d.update(schema="other")), "error",
          "'schema'")
    write("sol_future_version.json", edited(lambda d: d.update(schema_version=2)), "error",
          "not supported")
    write("sol_not_json.json", "this is not JSON\n", "error", "not a JSON")
    write("sol_nan_literal.json", json.dumps(doc).replace('"rms_pixel": 0.01',
                                                          '"rms_pixel": NaN'), "error",
          "non-finite")
    write("sol_missing_coefficients.json", edited(
        lambda d: d["polynomial"].pop("coefficients")), "error", "missing field")
    write("sol_bad_domain.json", edited(
        lambda d: d["polynomial"].update(domain=[0, 10])), "error", "domain")
    write("sol_truncated.json", json.dumps(doc)[:500], "error", "not a JSON")
    write("sol_medium_unknown.json", edited(lambda d: d.update(medium="water")), "error",
          "medium")


def main():
    for old in HERE.iterdir():
        if old.name not in ("make_corpus.py", "README.md") and old.is_file():
            old.unlink()
        elif old.is_dir() and old.name == "__pycache__":
            shutil.rmtree(old)
    spectra_text()
    spectra_fits()
    spectra_ecsv()
    solutions()
    MANIFEST.sort(key=lambda e: e["file"])
    (HERE / "manifest.json").write_text(json.dumps(MANIFEST, indent=1) + "\n")
    print(f"{len(MANIFEST)} files")


if __name__ == "__main__":
    main()
