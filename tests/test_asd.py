"""The line lists against the NIST Atomic Spectra Database files they are built from.

Reference: A. Kramida, Yu. Ralchenko, J. Reader and NIST ASD Team, NIST Atomic Spectra
Database (NIST, Gaithersburg, MD): the energy-level dump (line_lists/asd/levels/) and the line
export with intensities and gA (line_lists/asd/lines.csv), read here with the csv module
directly, apart from ritzline's own reader.
"""

import csv
import filecmp
import subprocess
import sys

import numpy as np
import pytest
from astropy.table import Table
from click.testing import CliRunner

from ritzline import identify_lines
from ritzline._resources import data_path
from ritzline.airvac import vacuum_to_air
from ritzline.levels import SPECIES, available_species, lamp_lines, species_label, transitions

ASD = data_path("line_lists", "asd")


def _export_rows(species: str) -> list[dict[str, str]]:
    text = (ASD / "lines.csv").read_text(encoding="utf-8").splitlines()
    body = [line for line in text if line.strip() and not line.startswith("#")]
    return [r for r in csv.DictReader(body) if r["species"] == species]


def _dump_levels(stem: str) -> list[tuple[float, str, str, str]]:
    """(energy cm⁻¹, configuration, term, J) of every numeric level of one ASD dump file."""
    text = (ASD / "levels" / f"{stem}.levels.tsv").read_text(encoding="utf-8").splitlines()
    out = []
    for row in csv.reader(text[1:], delimiter="\t", quotechar='"'):
        try:
            out.append((float(row[4]), row[0], row[1], row[2]))
        except (ValueError, IndexError):
            continue
    return out


def _one(table: Table, near_nm: float, tol: float) -> Table:
    distance = np.abs(np.asarray(table["wavelength"]) - near_nm)
    assert np.min(distance) < tol, f"no line near {near_nm} nm"
    return table[int(np.argmin(distance))]


# ---- the shipped tables are the builder's output ----------------------------------------


def test_shipped_tables_equal_the_builder_output(tmp_path):
    builder = data_path("line_lists", "build_line_lists.py")
    subprocess.run([sys.executable, str(builder), "--out", str(tmp_path)], check=True,
                   capture_output=True, text=True)
    built = sorted(p.name for p in tmp_path.glob("*.ecsv"))
    shipped = sorted(p.name for p in data_path("line_lists").glob("*.ecsv"))
    assert built == shipped and len(built) == 15  # 8 line tables, 7 level tables (H computed)
    _, mismatch, errors = filecmp.cmpfiles(tmp_path, data_path("line_lists"), built,
                                           shallow=False)
    assert not mismatch and not errors, mismatch + errors


# ---- lines and levels against ASD ---------------------------------------------------------


@pytest.mark.parametrize("label", SPECIES)
def test_every_asd_export_line_in_200_to_1100_nm_is_listed_within_2_pm(label):
    rows = [r for r in _export_rows(label) if 200.0 <= float(r["wavelength_air_nm"]) <= 1100.0]
    listed = np.asarray(transitions(label, observed_only=True, medium="air")["wavelength_obs"])
    missing = [r["wavelength_air_nm"] for r in rows
               if np.min(np.abs(listed - float(r["wavelength_air_nm"]))) > 0.002]
    assert not missing
    # the export holds Ne I, Ar I, Hg I and Na I lines; H, He, Kr, Xe have none there
    assert (len(rows) > 0) == (label in ("Ne I", "Ar I", "Hg I", "Na I"))


@pytest.mark.parametrize("label", SPECIES[1:])
def test_every_shipped_level_equals_asd_within_0p01_cm1_or_says_why(label):
    stem = label.replace(" ", "_")
    asd = _dump_levels(stem)
    energies = np.array([e for e, *_ in asd])
    shipped = Table.read(data_path("line_lists", f"{stem}.levels.ecsv"))
    off = []
    for row in shipped:
        gap = np.min(np.abs(energies - float(row["energy"])))
        if gap > 0.01 and not row["note"]:
            off.append((float(row["energy"]), gap))
    assert not off
    # every level of the dump is shipped; its ionisation limit is in the metadata
    limit = [e for e, _, term, _ in asd if term == "Limit"]
    assert len(shipped) == len(asd) - len(limit)
    assert shipped.meta["ionization_limit_cm1"] == min(limit)  # limits of excited cores too


def test_asd_intensity_and_ga_are_carried_into_the_transitions():
    # Ne I 640.22480 nm: ASD intensity 20000, gA 3.604e8 s⁻¹ with g = 7 (lines.csv)
    row = _one(transitions("Ne", observed_only=True), 640.2248, 1e-4)
    assert row["intensity"] == 20000
    assert row["aki"] * row["g_upper"] == pytest.approx(3.604e8, rel=1e-6)
    assert not row["memory"] and row["ritz"]


def test_compiled_hg_levels_that_differ_from_asd_say_so():
    # compiled 6s6p ³P°₁ 39412.300 cm⁻¹ (memory) against ASD 39412.237 cm⁻¹ (dump)
    levels = Table.read(data_path("line_lists", "Hg_I.levels.ecsv"))
    row = levels[np.argmin(np.abs(np.asarray(levels["energy"]) - 39412.237))]
    assert float(row["energy"]) == pytest.approx(39412.237, abs=1e-6)
    assert "39412.300" in row["note"] and "ASD stands" in row["note"]


def test_hydrogen_levels_from_physics_agree_with_asd_within_the_lamb_shift():
    # ASD H I levels (dump) include the Lamb shift that the Dirac formula leaves out: at most
    # 0.27 cm⁻¹/n³ (the 1s value, scaled; line_lists/README.md) plus the 1s shift itself
    from ritzline.levels import _hydrogen_fine_levels

    fine, _ = _hydrogen_fine_levels()
    asd = [(e, c, j) for e, c, _, j in _dump_levels("H_I")]
    checked = 0
    for energy, config, j_text in zip(fine.energy, fine.config, fine.j_text, strict=True):
        same = [e for e, c, j in asd if c == config and j == j_text]
        if not same:
            continue
        shell = int(config[:-1])
        assert abs(energy - same[0]) <= 0.27 + 0.27 / shell**3 + 0.02, (config, j_text)
        checked += 1
    assert checked >= 8


# ---- lamps gain the strong ASD lines ---------------------------------------------------


@pytest.mark.parametrize(
    ("lamp", "wavelength"),
    # the strong lines the compiled list lacked (ASD export, lines.csv)
    [("Ne", w) for w in (341.79031, 352.04714, 503.77512, 511.65032, 705.91079, 811.85495,
                         826.60769)]
    + [("Hg", w) for w in (237.8324, 265.3690, 567.581, 580.3782, 671.634, 690.746,
                           708.1901, 709.1860)],
)
def test_lamps_offer_the_strong_asd_lines(lamp, wavelength):
    row = _one(lamp_lines(lamp), wavelength, 1e-4)
    assert "ASD" in row["note"]


def test_hg_lamp_leaves_out_asd_lines_below_its_intensity_floor():
    # Hg I 257.6285 nm, ASD intensity 100: listed for identification, not a lamp line
    assert np.min(np.abs(np.asarray(lamp_lines("Hg")["wavelength"]) - 257.6285)) > 0.01
    row = _one(transitions("Hg", observed_only=True), 257.6285, 1e-3)
    assert row["intensity"] == 100
    assert np.min(np.abs(np.asarray(lamp_lines("Hg+Ar")["wavelength"]) - 257.6285)) > 0.01


# ---- any spectrum of the dump --------------------------------------------------------------


@pytest.mark.parametrize(("name", "label"), [("Ar II", "Ar II"), ("cuI", "Cu I"),
                                             ("Fe", "Fe I"), ("Na_II", "Na II")])
def test_any_spectrum_of_the_level_dump_can_be_named(name, label):
    assert species_label(name) == label
    assert label in available_species() and available_species()[:8] == SPECIES


def test_spectrum_without_export_lines_gives_ritz_lines_of_unknown_intensity():
    # Cu I resonance lines 324.754 and 327.396 nm (air; 4s ²S – 4p ²P°, common practice)
    t = transitions("Cu I", wavelength_range=(320, 330))
    assert np.all(np.isnan(np.asarray(t["intensity"]))) and not np.any(t["observed"])
    for wl in (324.754, 327.396):
        row = _one(t, wl, 0.002)
        assert row["lower_kind"] == "ground" and "4p" in row["upper"]


def test_ion_export_lines_are_ritz_checked_and_ar_ii_vacuum_values_converted():
    t = transitions("Ar II", observed_only=True, medium="air")
    rows = _export_rows("Ar II")
    assert len(t) == len(rows) and np.all(t["ritz"])
    # the export quotes Ar II in vacuum (434.9286 nm); in air that is the 434.806 nm line
    row = _one(t, float(vacuum_to_air(434.9286)), 1e-4)
    assert row["wavelength_obs"] == pytest.approx(434.806, abs=0.001)
    diff = np.abs(np.asarray(t["wavelength"]) - np.asarray(t["wavelength_obs"]))
    assert np.max(diff) < 0.002


def test_identification_accepts_a_species_beyond_the_default_eight():
    # the Ar II lines of the ASD export, measured in air with 3 pm centroid errors
    t = transitions("Ar II", observed_only=True, wavelength_range=(400, 500))
    wl = np.asarray(t["wavelength_obs"], float)
    flux = np.asarray(t["intensity"], float) * 10.0
    lines = Table({"wavelength": wl, "wavelength_err": np.full(wl.size, 0.003), "flux": flux,
                   "flux_err": np.sqrt(flux), "snr": np.sqrt(flux),
                   "fwhm": np.full(wl.size, 0.1), "flags": np.full(wl.size, "")})
    res = identify_lines(lines=lines, species=["Ar II", "Ar I"], wavelength_range=(400, 500))
    assert "Ar II" in res.present
    assert np.mean(np.asarray(res.lines["species"]) == "Ar II") >= 0.8


def test_transitions_command_lists_an_ion(tmp_path):
    from ritzline.cli import main

    result = CliRunner().invoke(main, ["transitions", "Ar II", "--range", "434:435",
                                       "--observed-only"])
    assert result.exit_code == 0, result.output
    assert "Ar II" in result.output and "434.80" in result.output


# ---- notation --------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("asd", "ours"),
    [
        ("2s2.2p5.(2P*<3/2>).3s", "2s2 2p5(2P°3/2)3s"),  # Racah notation (common practice)
        ("5d10.6s.6p", "5d10 6s6p"),
        ("2p6.3s", "2p6 3s"),
        ("1s.2p", "1s2p"),
        ("3d9.4s2.4p6.5p", "3d9 4s2 4p6 5p"),
    ],
)
def test_asd_configurations_are_written_as_printed_tables_write_them(asd, ours):
    from ritzline._asd import config_text

    assert config_text(asd) == ours


def test_parity_from_the_configuration_agrees_with_the_star_of_the_term():
    # ASD marks odd terms with "*"; (-1)^(sum of l) must agree wherever both can be read
    from ritzline._asd import asd_levels, config_parity

    for label in ("Ne I", "Hg I", "Fe I", "Fe II", "Na I"):
        levels = asd_levels(label)
        for config, term, parity in zip(levels["asd_config"], levels["asd_term"],
                                        levels["parity"], strict=True):
            if term and config_parity(config):
                assert config_parity(config) == parity, (label, config, term)
