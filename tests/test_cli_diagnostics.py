"""The command line's promises (README "Commands" and "Troubleshooting"): one diagnostics
path, every written file read back through ritzline, figures in the format their suffix
names, tables that never cut a number, a quiet end on a closed pipe."""

import io
import json
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from ritzline import RitzlineError, read_spectrum
from ritzline._io import read_table
from ritzline.calibration import Solution
from ritzline.cli import main

ROOT = Path(__file__).parents[1]
DATA = ROOT / "examples" / "data"
CORPUS = Path(__file__).parent / "corpus"
README = (ROOT / "README.md").read_text(encoding="utf-8")


def run(*args):
    result = CliRunner().invoke(main, [str(a) for a in args])
    assert "Traceback" not in result.output + result.stderr
    return result


@pytest.fixture(scope="module")
def calibrated(tmp_path_factory):
    out = tmp_path_factory.mktemp("cal")
    result = run("calibrate", DATA / "hgar_lamp.csv", "--lamp", "Hg", "--lamp", "Ar",
                 "-o", out / "solution.json", "--plot", out / "residuals.svg",
                 "--write-calibrated", out / "calibrated.ecsv")
    assert result.exit_code == 0, result.stderr
    return out


# ---- every output reads back ---------------------------------------------------------


def test_solution_reads_back(calibrated):
    sol = Solution.load(calibrated / "solution.json")
    assert sol.n_pixels == 3648


@pytest.mark.parametrize("suffix", [".ecsv", ".csv"])
def test_calibrated_exposure_reads_back_on_its_wavelength_axis(calibrated, tmp_path, suffix):
    path = calibrated / "calibrated.ecsv"
    if suffix == ".csv":
        path = tmp_path / "calibrated.csv"
        assert run("calibrate", DATA / "hgar_lamp.csv", "--lamp", "Hg", "--lamp", "Ar",
                   "-o", tmp_path / "s.json", "--write-calibrated", path).exit_code == 0
    spec = read_spectrum(path)
    lamp = read_spectrum(DATA / "hgar_lamp.csv")
    sol = Solution.load(calibrated / "solution.json")
    assert spec.meta["axis_kind"] == "wavelength"
    assert spec.meta["column"] == "counts"
    np.testing.assert_allclose(spec.flux.value, lamp.flux.value)
    np.testing.assert_allclose(spec.spectral_axis.value, sol.wavelength(np.arange(3648)),
                               rtol=1e-12)


@pytest.mark.parametrize("suffix", [".ecsv", ".csv", ".fits"])
def test_peaks_table_reads_back_in_each_format(calibrated, tmp_path, suffix):
    out = tmp_path / f"lines{suffix}"
    result = run("peaks", DATA / "hgar_lamp.csv", "--solution", calibrated / "solution.json",
                 "-o", out)
    assert result.exit_code == 0, result.stderr
    table = read_table(out)
    assert {"pixel", "wavelength", "flags", "snr"} <= set(table.colnames)
    assert len(table) > 20


@pytest.mark.parametrize("suffix", [".ecsv", ".csv"])
def test_transitions_table_reads_back(tmp_path, suffix):
    out = tmp_path / f"t{suffix}"
    assert run("transitions", "Hg", "--range", "250:580", "-o", out).exit_code == 0
    table = read_table(out)
    assert len(table) > 5 and "wavelength" in table.colnames


def test_match_tables_and_figures_read_back(calibrated, tmp_path):
    result = run("match", DATA / "helium_glow.csv", "--solution", calibrated / "solution.json",
                 "--response", DATA / "lr1_response.csv", "-o", tmp_path / "ids.csv",
                 "--levels", tmp_path / "levels.ecsv", "--species-table",
                 tmp_path / "species.fits", "--plot", tmp_path / "spectrum.pdf",
                 "--diagram", tmp_path / "levels.svg", "--boltzmann", tmp_path / "b.png")
    assert result.exit_code == 0, result.stderr
    assert "0/0" not in result.output
    ids = read_table(tmp_path / "ids.csv")
    assert len(ids) >= 20 and len(read_table(tmp_path / "levels.ecsv")) >= 10
    assert "unresolved_blend" in " ".join(map(str, ids["flags"]))
    assert len(read_table(tmp_path / "species.fits")) >= 3
    assert (tmp_path / "spectrum.pdf").read_bytes().startswith(b"%PDF")
    assert b"<svg" in (tmp_path / "levels.svg").read_bytes()[:400]
    assert (tmp_path / "b.png").read_bytes().startswith(b"\x89PNG")


def test_check_outputs_read_back(calibrated, tmp_path):
    frames = sorted((DATA / "series").glob("frame_0[0-2].csv"))
    result = run("check", *frames, "--solution", calibrated / "solution.json",
                 "-o", tmp_path / "chk", "--workers", "1")
    assert result.exit_code == 0, result.stderr
    assert len(read_table(tmp_path / "chk" / "summary.ecsv")) == 3
    assert json.loads((tmp_path / "chk" / "summary.json").read_text())["totals"]["pass"] >= 1


def test_check_accepts_a_solution_that_does_not_know_its_line_width(calibrated, tmp_path):
    doc = json.loads((calibrated / "solution.json").read_text())
    doc["fwhm_pixel"] = None  # documented as valid
    (tmp_path / "s.json").write_text(json.dumps(doc))
    result = run("check", DATA / "series" / "frame_00.csv", "--solution", tmp_path / "s.json",
                 "-o", tmp_path / "chk", "--workers", "1")
    assert result.exit_code == 0, result.stderr
    assert json.loads((tmp_path / "chk" / "summary.json").read_text())["reference"][
        "reference_fwhm_px"] is None


# ---- the solution is applied only where it was made -----------------------------------


def _crop(tmp_path, first, last):
    rows = (DATA / "hgar_lamp.csv").read_text().splitlines()
    start = rows.index("pixel,counts")
    path = tmp_path / "cropped.csv"
    path.write_text("\n".join(rows[: start + 1] + rows[start + 1 + first: start + 2 + last])
                    + "\n")
    return path


def test_peaks_on_a_cropped_export_gives_the_same_wavelengths(calibrated, tmp_path):
    full = tmp_path / "full.ecsv"
    crop = tmp_path / "crop.ecsv"
    sol = calibrated / "solution.json"
    assert run("peaks", DATA / "hgar_lamp.csv", "--solution", sol, "-o", full).exit_code == 0
    assert run("peaks", _crop(tmp_path, 1000, 3499), "--solution", sol, "-o", crop
               ).exit_code == 0
    a, b = read_table(full), read_table(crop)
    # the Hg I 546.07 nm line, the brightest of the lamp in both (Sansonetti & Martin 2005)
    wa = a["wavelength"][np.argmin(np.abs(a["wavelength"] - 546.07))]
    wb = b["wavelength"][np.argmin(np.abs(b["wavelength"] - 546.07))]
    assert abs(wa - wb) < 0.002 and abs(wb - 546.0735) < 0.01


def test_match_on_counts_of_another_length_is_refused_naming_both_sizes(calibrated, tmp_path):
    rows = [r.split(",")[1] for r in (DATA / "hgar_lamp.csv").read_text().splitlines()
            if r[:1].isdigit()][:2500]
    (tmp_path / "short.txt").write_text("\n".join(rows) + "\n")
    result = run("match", tmp_path / "short.txt", "--solution", calibrated / "solution.json")
    assert result.exit_code == 2
    assert "2500 samples" in result.stderr and "3648 pixels" in result.stderr


# ---- diagnostics -----------------------------------------------------------------------


def test_unknown_figure_suffix_is_refused_before_any_work(tmp_path):
    result = run("peaks", DATA / "hgar_lamp.csv", "--plot", tmp_path / "lines.jpg")
    assert result.exit_code == 2
    assert result.stderr.startswith("error: ") and ".png, .pdf or .svg" in result.stderr
    assert not (tmp_path / "lines.jpg").exists()


def test_unknown_table_suffix_is_refused(tmp_path):
    result = run("transitions", "Ne", "-o", tmp_path / "t.xlsx")
    assert result.exit_code == 2 and ".ecsv, .csv or .fits" in result.stderr


def test_usage_errors_are_one_error_line():
    result = run("peaks", "no-such-file.csv")
    assert result.exit_code == 2
    assert result.stderr.count("\n") == 1 and result.stderr.startswith("error: ")


def test_an_unexpected_failure_is_one_line_without_debug_and_a_traceback_with_it(
        monkeypatch, tmp_path):
    import ritzline.spectrum

    def broken(*args, **kwargs):
        raise ZeroDivisionError("simulated")

    monkeypatch.setattr(ritzline.spectrum, "read_spectrum", broken)
    result = run("info", CORPUS / "ok_pixel_counts.csv")
    assert result.exit_code == 2
    assert result.stderr.startswith("error: internal error: ZeroDivisionError: simulated")
    debug = CliRunner().invoke(main, ["--debug", "info", str(CORPUS / "ok_pixel_counts.csv")])
    assert isinstance(debug.exception, ZeroDivisionError)


def test_errors_without_a_file_name_get_the_input_file(tmp_path):
    result = run("calibrate", CORPUS / "ok_lamp_off_noise.csv", "--lamp", "Ne",
                 "-o", tmp_path / "s.json")
    assert result.exit_code == 2
    assert result.stderr.startswith(f"error: {CORPUS / 'ok_lamp_off_noise.csv'}: too few lines")


@pytest.mark.parametrize("name", ["ok_lamp_off_noise.csv", "ok_constant_frame.csv",
                                  "ok_all_zero_frame.csv"])
def test_frames_without_lines_are_a_normal_no_lines_result(name):
    result = run("peaks", CORPUS / name)
    assert result.exit_code == 0
    assert "no lines found" in result.output and result.stderr == ""


def test_closed_output_pipe_ends_quietly():
    code = "from ritzline.cli import main; main()"
    proc = subprocess.Popen([sys.executable, "-c", code, "transitions", "Ne", "Ar", "Kr",
                             "Xe", "Hg", "He"], stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    proc.stdout.readline()
    proc.stdout.close()
    _, err = proc.communicate(timeout=120)
    assert proc.returncode == 0
    assert err == b""


@pytest.mark.parametrize("width", [80, 100])
def test_transitions_never_cut_a_wavelength_at_terminal_widths(width):
    from rich.console import Console

    from ritzline.cli import _transitions_print
    from ritzline.levels import transitions

    table = transitions(["Hg"], wavelength_range=(250, 580))
    out = io.StringIO()
    _transitions_print(table, "air", {}, console=Console(file=out, width=width))
    text = out.getvalue()
    assert "…" not in text
    for wl in table["wavelength"]:
        assert f"{wl:.4f}" in text  # every wavelength printed whole
    assert max(len(line) for line in text.splitlines()) <= width


# ---- the README's troubleshooting table is what ritzline says --------------------------


def _readme_rows(heading):
    block = README.split(heading, 1)[1].split("\n\n**", 1)[0]
    cells = re.findall(r"^\| (.+?) \| .+ \|$", block, flags=re.M)
    return [c for c in cells if c not in ("message says", "---")]


def _fragments(cell):
    """The literal pieces of a README message pattern (placeholders cut out)."""
    pieces = []
    for quoted in re.findall(r"`([^`]+)`", cell):
        parts = re.split(r"\.\.\.|'\.\.\.'|\b[NKMCkAB]\b|\b0-N\b", quoted)
        pieces.append([p.strip(" ,:;()'") for p in parts if len(p.strip(" ,:;()'")) >= 4])
    return pieces


def _corpus_messages():
    messages = []
    manifest = json.loads((CORPUS / "manifest.json").read_text())
    for entry in manifest:
        if entry["expect"] == "ok":
            continue
        options = [part for key, value in entry.get("read", {}).items()
                   for part in (f"--{key.replace('_', '-')}", str(value))]
        result = CliRunner().invoke(main, ["info", str(CORPUS / entry["file"]), *options])
        messages.append(result.stderr)
    return "\n".join(messages)


def test_every_spectrum_message_in_the_troubleshooting_tables_is_produced(tmp_path):
    said = _corpus_messages()
    said += run("info", tmp_path / "missing.csv").stderr
    said += run("info", tmp_path).stderr
    cropped = CORPUS / "ok_cropped_pixel_axis.csv"
    doc = json.loads((CORPUS / "sol_ok.json").read_text())
    said += run("peaks", cropped, "--solution", CORPUS / "sol_ok.json").stderr
    said += run("peaks", CORPUS / "ok_single_column.txt", "--solution",
                CORPUS / "sol_ok.json").stderr.replace(str(doc["n_pixels"]), "N")
    short = tmp_path / "short.txt"
    short.write_text("\n".join(str(v) for v in range(150, 250)) + "\n")
    said += run("peaks", short, "--solution", CORPUS / "sol_ok.json").stderr
    (tmp_path / "multi.csv").write_text("pixel,a\n" + "\n".join(f"{i},{i % 7 + 100}"
                                                                 for i in range(40)))
    said += run("info", tmp_path / "multi.csv", "--column", "0").stderr
    rows = _readme_rows("**SpectrumFormatError**") + _readme_rows("**Warnings**")
    assert len(rows) >= 25
    # a row is kept true when at least one of its alternatives is said
    rows_missing = [cell for cell in rows if _fragments(cell) and all(
        not all(p in said for p in pieces) for pieces in _fragments(cell) if pieces)]
    assert not rows_missing, rows_missing


def test_readme_promises_one_line_errors_and_warnings():
    assert "never produces a traceback" in README
    assert "`warning: <file>: <where>: <what>`" in README


def test_read_table_refuses_what_it_cannot_read(tmp_path):
    (tmp_path / "x.ecsv").write_text("not a table")
    with pytest.raises(RitzlineError, match=r"x\.ecsv"):
        read_table(tmp_path / "x.ecsv")


def test_check_records_what_the_reader_doubted_in_the_row(calibrated, tmp_path):
    rows = (DATA / "series" / "frame_00.csv").read_text().splitlines()
    start = rows.index("pixel,counts")
    scaled = [f"{r.split(',')[0]},{float(r.split(',')[1]) * 1e-9:.6e}"
              for r in rows[start + 1:]]
    (tmp_path / "in").mkdir()
    (tmp_path / "in" / "scaled.csv").write_text("\n".join(rows[: start + 1] + scaled) + "\n")
    result = run("check", tmp_path / "in", "--solution", calibrated / "solution.json",
                 "-o", tmp_path / "chk", "--workers", "2")
    table = read_table(tmp_path / "chk" / "summary.ecsv")
    assert table["status"][0] == "warn"
    assert "look scaled or normalised" in table["reasons"][0]
    assert "warning:" not in result.stderr or "scaled.csv" in result.stderr
