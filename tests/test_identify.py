"""Tests of line identification: published lines get their published upper levels, the
electron-energy limit, unidentified and ambiguous lines, second-order images, species
detection, the level report and the Boltzmann plot.

Reference wavelengths and level energies: NIST Handbook of Basic Atomic Spectroscopic
Data (J. E. Sansonetti and W. C. Martin, J. Phys. Chem. Ref. Data 34, 1559 (2005)), values
as carried in line_lists/ — from memory, as the line_lists README says.
"""

import sys
from pathlib import Path

import numpy as np
import pytest
from astropy.table import Table

from ritzline import identify_lines
from ritzline.identify import K_B_EV, IdentifyOptions

sys.path.insert(0, str(Path(__file__).parent / "benchmarks"))
import bench_identify

# Strong Hg I lines of a low-pressure mercury lamp, air nm (NIST Handbook, Sansonetti &
# Martin 2005; memory): 253.6517, 296.7280, 302.1498, 313.1548, 334.1474, 365.0153,
# 404.6563, 407.7837, 435.8328, 546.0735, 576.9598, 579.0663
HG_LINES = [253.6517, 296.7280, 302.1498, 313.1548, 334.1474, 365.0153, 404.6563, 407.7837,
            435.8328, 546.0735, 576.9598, 579.0663]
HG_FLUX = [50000, 3000, 1500, 6000, 800, 12000, 9000, 800, 25000, 20000, 3000, 3200]
# Strong Ne I lines, air nm (NIST Handbook, Sansonetti & Martin 2005; memory)
NE_LINES = [585.2488, 588.1895, 594.4834, 597.5534, 602.9997, 607.4338, 609.6163, 614.3063,
            616.3594, 621.7281, 626.6495, 633.4428, 638.2992, 640.2248, 650.6528, 659.8953,
            667.8276, 671.7043, 692.9467, 703.2413]


def measured(wavelengths, fluxes, *, sigma=0.003, fwhm=0.1, noise=30.0):
    """A measured line table at given wavelengths: centroid sigma, flux noise, SNR."""
    wl = np.asarray(wavelengths, float)
    f = np.asarray(fluxes, float)
    fe = np.sqrt(noise**2 + f)
    return Table({
        "wavelength": wl, "wavelength_err": np.full(wl.size, sigma), "flux": f,
        "flux_err": fe, "snr": f / fe, "fwhm": np.full(wl.size, fwhm),
        "flags": np.full(wl.size, ""),
    })


def row_at(result, wavelength):
    t = result.lines
    return t[int(np.argmin(np.abs(np.asarray(t["wavelength"]) - wavelength)))]


@pytest.fixture(scope="module")
def hg_lamp():
    return identify_lines(lines=measured(HG_LINES, HG_FLUX), species=None,
                          wavelength_range=(240.0, 600.0))


def test_hg_253_nm_comes_from_6s6p_3P1_at_4_89_ev(hg_lamp):
    row = row_at(hg_lamp, 253.6517)
    assert row["species"] == "Hg I"
    assert "6s6p" in row["upper"] and "3P°" in row["upper"] and "J=1" in row["upper"]
    # 6s6p 3P°1 = 39412.300 cm-1 = 4.887 eV (NIST Handbook, Sansonetti & Martin 2005; memory)
    assert row["upper_energy_ev"] == pytest.approx(4.887, abs=0.005)
    assert row["probability"] > 0.9


def test_hg_546_nm_comes_from_7s_3S1(hg_lamp):
    row = row_at(hg_lamp, 546.0735)
    assert row["species"] == "Hg I"
    assert "6s7s" in row["upper"] and "3S" in row["upper"] and "J=1" in row["upper"]
    # 6s7s 3S1 = 62350.456 cm-1 = 7.730 eV (NIST Handbook, Sansonetti & Martin 2005; memory)
    assert row["upper_energy_ev"] == pytest.approx(7.730, abs=0.005)


def test_mercury_lamp_is_found_to_contain_mercury_only(hg_lamp):
    assert hg_lamp.present == ("Hg I",)


def test_ne_585_and_640_nm_get_their_3p_upper_levels():
    res = identify_lines(lines=measured(NE_LINES, np.full(len(NE_LINES), 20000.0)),
                         species=["Ne I", "Ar I"], wavelength_range=(580.0, 710.0))
    r585, r640 = row_at(res, 585.2488), row_at(res, 640.2248)
    assert r585["species"] == "Ne I" and r640["species"] == "Ne I"
    # 585.25 nm: 2p5(2P°1/2)3p 2[1/2]0 (Paschen 2p1) at 152970.733 cm-1 = 18.966 eV;
    # 640.22 nm: 2p5(2P°3/2)3p 2[5/2]3 (Paschen 2p9) at 149657.039 cm-1 = 18.555 eV
    # (NIST Handbook, Sansonetti & Martin 2005; memory)
    assert "2[1/2]" in r585["upper"] and "J=0" in r585["upper"]
    assert r585["upper_energy_ev"] == pytest.approx(18.966, abs=0.005)
    assert "2[5/2]" in r640["upper"] and "J=3" in r640["upper"]
    assert r640["upper_energy_ev"] == pytest.approx(18.555, abs=0.005)
    assert res.present == ("Ne I",)


def test_ar_811_nm_comes_from_4p_2p9():
    # Ar I air nm (NIST Handbook, Sansonetti & Martin 2005; memory)
    ar = [696.5431, 706.7218, 738.3980, 750.3869, 763.5106, 772.3761, 794.8176, 800.6157,
          801.4786, 810.3693, 811.5311, 826.4522, 840.8210, 842.4648, 852.1442]
    res = identify_lines(lines=measured(ar, np.full(len(ar), 30000.0)), species=None,
                         wavelength_range=(690.0, 860.0))
    row = row_at(res, 811.5311)
    assert row["species"] == "Ar I"
    # 3p5(2P°3/2)4p 2[5/2]3 (Paschen 2p9) at 105462.760 cm-1 = 13.076 eV
    # (NIST Handbook, Sansonetti & Martin 2005; memory)
    assert "2[5/2]" in row["upper"] and "J=3" in row["upper"]
    assert row["upper_energy_ev"] == pytest.approx(13.076, abs=0.005)
    assert "Ar I" in res.present


def test_he_587_and_h_alpha_in_a_helium_tube_with_hydrogen():
    # He I and H I air nm (NIST Handbook, Sansonetti & Martin 2005; memory)
    lines = [388.8648, 447.1479, 471.3146, 492.1931, 501.5678, 587.5621, 667.8152, 706.5190,
             486.1350, 656.2800, 434.0462]
    flux = [20000, 30000, 5000, 8000, 15000, 90000, 30000, 20000, 10000, 40000, 4000]
    res = identify_lines(lines=measured(lines, flux, sigma=0.01, fwhm=0.3), species=None,
                         wavelength_range=(380.0, 720.0))
    he = row_at(res, 587.5621)
    assert he["species"] == "He I"
    # 587.56 nm: 1s2p 3P° - 1s3d 3D at 186101.5 cm-1 = 23.07 eV (NIST Handbook; memory)
    assert "1s3d" in he["upper"] and "3D" in he["upper"]
    assert he["upper_energy_ev"] == pytest.approx(23.07, abs=0.01)
    assert "blend" in he["flags"]  # the 3D fine structure is unresolved at 0.3 nm
    ha = row_at(res, 656.2800)
    assert ha["species"] == "H I"
    # H-alpha, n = 3 -> 2, upper level n = 3 at 97492 cm-1 = 12.09 eV (NIST Handbook; memory)
    assert str(ha["upper"]).startswith("3")
    assert ha["upper_energy_ev"] == pytest.approx(12.09, abs=0.01)
    assert set(res.present) == {"He I", "H I"}


def test_253_nm_needs_about_4_9_ev_electrons():
    # common practice (electron-impact threshold experiment): in mercury vapour the
    # 253.65 nm line appears once the electrons reach about 4.9 eV
    lines = measured(HG_LINES, HG_FLUX)
    above = identify_lines(lines=lines, species=["Hg I"], max_electron_energy=5.0,
                           wavelength_range=(240.0, 600.0))
    below = identify_lines(lines=lines, species=["Hg I"], max_electron_energy=4.7,
                           wavelength_range=(240.0, 600.0))
    assert "above_energy_limit" not in row_at(above, 253.6517)["flags"]
    assert "above_energy_limit" in row_at(below, 253.6517)["flags"]
    lv = above.levels
    first = lv[0]
    assert "6s6p" in first["upper"] and not first["above_limit"]
    assert first["min_electron_energy_ev"] == pytest.approx(4.887, abs=0.005)


def test_lines_from_levels_above_the_electron_energy_are_flagged():
    res = identify_lines(lines=measured(HG_LINES, HG_FLUX), species=["Hg I"],
                         max_electron_energy=5.0, wavelength_range=(240.0, 600.0))
    row = row_at(res, 546.0735)
    assert row["species"] == "Hg I"
    assert "above_energy_limit" in row["flags"]
    lv = res.levels[np.char.find(np.asarray(res.levels["upper"], str), "6s7s 3S") >= 0]
    assert len(lv) == 1 and lv["above_limit"][0]
    assert "stepwise" in lv["note"][0]
    energies = np.asarray(res.levels["energy_ev"], float)
    assert np.all(np.diff(energies) >= 0)


def test_a_line_far_from_every_candidate_is_unidentified():
    wl = [*HG_LINES, 520.0000]  # nothing listed within 1 nm of 520.000 nm (line_lists)
    res = identify_lines(lines=measured(wl, [*HG_FLUX, 8000.0]), species=None,
                         wavelength_range=(240.0, 600.0))
    row = row_at(res, 520.0)
    assert row["species"] == ""
    assert "unidentified" in row["flags"]
    assert row["p_unidentified"] > 0.9


def test_a_line_between_two_close_candidates_is_ambiguous():
    # Hg I 313.1555 and 313.1844 nm (NIST ASD, line_lists/asd/lines.csv) are 0.029 nm apart;
    # a line measured half-way with 0.02 nm uncertainty cannot tell them apart by position.
    # The other lines of their upper levels (6s6d 3D1, 1D2: 296.73, 366.29, 366.33, 579.07
    # nm) would decide by their presence or absence, so they are left out of the candidates.
    from ritzline.levels import transitions

    wl = [w for w in HG_LINES if abs(w - 313.1548) > 0.01] + [313.16995]
    flux = [f for w, f in zip(HG_LINES, HG_FLUX, strict=True) if abs(w - 313.1548) > 0.01]
    t = measured(wl, [*flux, 6000.0], fwhm=0.02)
    t["wavelength_err"][-1] = 0.02
    cand = transitions("Hg", observed_only=True)
    pair = np.abs(np.asarray(cand["wavelength"]) - 313.17) < 0.02
    siblings = np.isin(np.asarray(cand["upper"]), np.asarray(cand["upper"])[pair]) & ~pair
    res = identify_lines(lines=t, species=["Hg I"], wavelength_range=(240.0, 600.0),
                         candidates=cand[~siblings])
    row = row_at(res, 313.16995)
    assert row["probability"] < 0.8
    assert "ambiguous" in row["flags"]
    assert "313.155" in row["alternatives"] or "313.184" in row["alternatives"]


def test_second_order_images_of_ultraviolet_lines_are_labelled_with_their_parent():
    # first order: Hg I visible lines; second order: 253.65, 296.73, 313.15 and 365.02 nm
    # reappearing at twice their wavelength (NIST Handbook wavelengths; memory)
    vis = [404.6563, 407.7837, 435.8328, 546.0735, 576.9598, 579.0663]
    vis_flux = [9000, 800, 25000, 20000, 3000, 3200]
    uv = [253.6517, 296.7280, 313.1548, 365.0153]
    uv_flux = [3000, 300, 600, 1200]  # 6 % of the first-order fluxes
    t = measured([*vis, *(2 * np.array(uv))], [*vis_flux, *uv_flux])
    res = identify_lines(lines=t, species=None, wavelength_range=(400.0, 750.0))
    row = row_at(res, 2 * 253.6517)
    assert row["species"] == "Hg I"
    assert row["order"] == 2 and "second_order" in row["flags"]
    assert row["parent_wavelength"] == pytest.approx(253.6517, abs=0.002)
    assert row_at(res, 546.0735)["order"] == 1


def test_line_rich_species_are_not_claimed_from_chance_coincidences():
    # a neon discharge; argon, krypton and xenon have many listed lines, a few of which
    # fall near neon lines by chance
    rng = np.random.default_rng(7)
    wl = np.asarray(NE_LINES) + rng.normal(0, 0.003, len(NE_LINES))
    res = identify_lines(lines=measured(wl, np.full(wl.size, 20000.0), fwhm=0.5),
                         species=None, wavelength_range=(580.0, 710.0))
    assert res.present == ("Ne I",)
    sp = res.species
    for name in ("Ar I", "Kr I", "Xe I"):
        assert not sp["present"][list(sp["species"]).index(name)]


def test_synthetic_discharges_recover_assignments_and_species():
    # truth-recovery of our own algorithm on synthetic discharges (tests/benchmarks)
    from ritzline import levels
    from ritzline.identify import SHIPPED_SPECIES

    cand = levels.transitions(list(SHIPPED_SPECIES), observed_only=True)
    rng = np.random.default_rng(3)
    claims = right = pairs = pairs_ok = 0
    for _ in range(8):
        d = bench_identify.synthetic_discharge(rng, cand, list(SHIPPED_SPECIES))
        res = identify_lines(lines=d.lines, candidates=cand, wavelength_range=d.wavelength_range,
                             calibration_err=d.calibration_err)
        eligible, claimed, correct, _ = bench_identify.score(res, d)
        claims += int(np.sum(eligible & claimed))
        right += int(np.sum(eligible & claimed & correct))
        for s in SHIPPED_SPECIES:
            pairs += 1
            pairs_ok += (s in res.present) == (s in d.species)
    assert claims > 50
    assert right / claims >= 0.97
    assert pairs_ok / pairs >= 0.95


def _ar_boltzmann_lines(temperature_k, response=None):
    """Ar I 4p -> 4s lines with published A values, fluxes from a Boltzmann population."""
    from ritzline import levels

    t = levels.transitions(["Ar I"], wavelength_range=(690.0, 930.0), observed_only=True)
    ga = np.asarray(t["g_upper"], float) * np.asarray(np.ma.filled(t["aki"], np.nan), float)
    t = t[np.isfinite(ga)]
    ga = ga[np.isfinite(ga)]
    wl = np.asarray(t["wavelength"], float)
    e = np.asarray(t["upper_ev"], float)
    # photon counts: I ∝ g A exp(-E / kT) / λ-independent photon rate; energy flux I λ/(gA)
    # convention of the plot (textbook Boltzmann relation): F ∝ g A exp(-E/kT) / λ
    flux = ga * np.exp(-e / (K_B_EV * temperature_k)) / wl
    flux = 1e6 * flux / flux.max()
    if response is not None:
        flux = flux * np.interp(wl, *response)
    # keep lines resolved from each other at 0.1 nm
    keep = np.r_[True, np.diff(wl) > 0.3]
    return measured(wl[keep], flux[keep], sigma=0.002, noise=5.0)


def test_boltzmann_temperature_is_recovered_with_a_response():
    response = (np.array([650.0, 950.0]), np.array([1.0, 0.3]))
    t = _ar_boltzmann_lines(5000.0, response)
    res = identify_lines(lines=t, species=["Ar I"], response=response,
                         wavelength_range=(690.0, 930.0))
    (bp,) = res.boltzmann
    assert bp.corrected
    assert bp.temperature_k == pytest.approx(5000.0, rel=0.05)
    assert np.isfinite(bp.temperature_err_k) and bp.temperature_err_k < 500


def test_level_populations_per_g_follow_the_boltzmann_factor_with_a_response():
    response = (np.array([650.0, 950.0]), np.array([1.0, 0.3]))
    t = _ar_boltzmann_lines(5000.0, response)
    res = identify_lines(lines=t, species=["Ar I"], response=response,
                         wavelength_range=(690.0, 930.0))
    lv = res.levels[np.isfinite(np.asarray(res.levels["population_per_g"], float))]
    assert len(lv) >= 4
    e = np.asarray(lv["energy_ev"], float)
    npg = np.asarray(lv["population_per_g"], float)
    # textbook Boltzmann relation: N_u / g_u ∝ exp(-E_u / kT)
    expected = np.exp(-(e - e[0]) / (K_B_EV * 5000.0))
    assert npg / npg[0] == pytest.approx(expected, rel=0.02)


def test_without_a_response_no_temperature_is_given():
    t = _ar_boltzmann_lines(5000.0)
    res = identify_lines(lines=t, species=["Ar I"], wavelength_range=(690.0, 930.0))
    (bp,) = res.boltzmann
    assert not bp.corrected
    assert np.isnan(bp.temperature_k)
    assert "uncorrected" in bp.message
    assert res.levels.meta["intensities"] == "uncorrected"
    assert np.all(np.isnan(np.asarray(res.levels["population"], float)))


def test_probabilities_are_between_zero_and_one_and_tables_carry_units(hg_lamp):
    t = hg_lamp.lines
    p = np.asarray(t["probability"], float)
    assert np.all((p >= 0) & (p <= 1))
    assert str(t["wavelength"].unit) == "nm"
    assert str(hg_lamp.levels["energy_ev"].unit) == "eV"
    assert t.meta["medium"] == "air"


def test_species_option_accepts_a_comma_list():
    res = identify_lines(lines=measured(HG_LINES, HG_FLUX), species="Hg,Ne",
                         wavelength_range=(240.0, 600.0))
    assert list(res.species["species"]) == ["Hg I", "Ne I"]


def test_options_change_the_species_threshold():
    strict = IdentifyOptions(species_threshold=1e6)
    res = identify_lines(lines=measured(HG_LINES, HG_FLUX), species=["Hg I"],
                         wavelength_range=(240.0, 600.0), options=strict)
    assert res.present == ()
    assert np.all(np.asarray(res.lines["species"]) == "")


# ---- constants, inputs, the whole pipeline and the command line ---------------------------


def test_physical_constants_match_astropy_codata():
    import astropy.constants as const
    import astropy.units as u

    from ritzline.identify import HC_EV_CM

    # reference: astropy.constants (CODATA 2018)
    assert K_B_EV == pytest.approx(const.k_B.to_value(u.eV / u.K), rel=1e-9)
    assert HC_EV_CM == pytest.approx((const.h * const.c).to_value(u.eV * u.cm), rel=1e-9)


def test_a_pixel_axis_spectrum_without_a_solution_is_refused():
    from ritzline.errors import RitzlineError

    rng = np.random.default_rng(0)
    counts = 100 + rng.normal(0, 3, 512)
    counts[200:205] += [50, 400, 900, 400, 50]
    with pytest.raises(RitzlineError, match="solution"):
        identify_lines(counts)


def test_a_response_that_does_not_cover_the_lines_is_refused():
    from ritzline.errors import RitzlineError

    with pytest.raises(RitzlineError, match="response"):
        identify_lines(lines=measured(HG_LINES, HG_FLUX), species=["Hg I"],
                       response=(np.array([400.0, 500.0]), np.array([1.0, 1.0])))


def test_response_file_is_read_from_csv(tmp_path):
    from ritzline.identify import read_response

    path = tmp_path / "resp.csv"
    path.write_text("wavelength,response\n300,0.5\n700,1.0\n900,0.2\n", encoding="utf-8")
    wl, resp = read_response(path)
    assert wl.tolist() == [300.0, 700.0, 900.0] and resp.tolist() == [0.5, 1.0, 0.2]


def test_a_wavelength_axis_spectrum_is_measured_and_identified():
    import astropy.units as u
    from specutils import Spectrum

    from ritzline.synthetic import Instrument

    inst = Instrument(n_pixels=3000, coeffs=(560.0, 60.0, 0.0, 0.0), fwhm_px=3.0)
    rng = np.random.default_rng(11)
    counts = inst.render(NE_LINES, np.full(len(NE_LINES), 2e5), rng)
    spec = Spectrum(flux=counts * u.ct, spectral_axis=inst.wavelength(np.arange(3000)) * u.nm)
    res = identify_lines(spec, None)
    assert res.present == ("Ne I",)
    assert row_at(res, 640.2248)["species"] == "Ne I"


@pytest.fixture(scope="module")
def demo_solution(tmp_path_factory):
    from ritzline import read_spectrum
    from ritzline._resources import data_path
    from ritzline.calibration import calibrate

    lamp_path = data_path("examples", "hgar_lamp.csv")
    sol = calibrate(read_spectrum(lamp_path), lamps=("Hg", "Ar"))
    path = tmp_path_factory.mktemp("sol") / "lr1.json"
    sol.save(path)
    return sol, path, lamp_path.parent


def test_demo_helium_glow_tube_gives_its_species_and_excitation_temperature(demo_solution):
    from ritzline import read_spectrum

    sol, _, data = demo_solution
    res = identify_lines(read_spectrum(data / "helium_glow.csv"), None, solution=sol,
                         response=data / "lr1_response.csv")
    # the invented demo tube holds He with H and Ne traces; its upper levels were given a
    # Boltzmann distribution at 6000 K (examples/make_demo_data.py): truth recovery
    assert set(res.present) == {"He I", "H I", "Ne I"}
    he = next(bp for bp in res.boltzmann if bp.species == "He I")
    assert he.temperature_k == pytest.approx(6000.0, rel=0.05)
    # the demo has He I 388.865 nm in second order at 777.73 nm
    row = row_at(res, 777.73)
    assert row["order"] == 2 and row["parent_wavelength"] == pytest.approx(388.865, abs=0.01)


def test_match_command_prints_assignments_and_writes_tables(demo_solution, tmp_path):
    from click.testing import CliRunner

    from ritzline.cli import main

    _, sol_path, data = demo_solution
    out, lv, fig, diag = (tmp_path / n for n in ("ids.ecsv", "lv.ecsv", "s.png", "d.png"))
    res = CliRunner().invoke(main, [
        "match", str(data / "helium_glow.csv"), "--solution", str(sol_path), "--species",
        "He,H,Ne", "--max-energy", "23.5", "-o", str(out), "--levels", str(lv), "--plot",
        str(fig), "--diagram", str(diag),
    ])
    assert res.exit_code == 0, res.output
    assert "587.56" in res.output and "He I" in res.output
    assert "ABOVE LIMIT" in res.output
    assert "uncorrected" in res.output
    assert Table.read(out, format="ascii.ecsv")["species"].tolist().count("He I") >= 10
    assert len(Table.read(lv, format="ascii.ecsv")) >= 10
    assert fig.stat().st_size > 10000 and diag.stat().st_size > 10000


def test_match_command_exits_2_on_a_pixel_file_without_solution(demo_solution):
    from click.testing import CliRunner

    from ritzline.cli import main

    _, _, data = demo_solution
    res = CliRunner().invoke(main, ["match", str(data / "helium_glow.csv")])
    assert res.exit_code == 2
    assert "error:" in res.output


def test_docstring_examples_run():
    import doctest

    import ritzline.identify

    result = doctest.testmod(ritzline.identify)
    assert result.attempted > 0 and result.failed == 0


def test_a_calibration_off_by_more_than_its_band_is_absorbed_by_the_axis_correction():
    # 0.03 nm = 6 times the stated 0.005 nm uncertainty; the user says up to 0.05 nm.
    # Hg I 312.57 and 365.48 nm share the upper level of 576.96 nm with larger gA (NIST
    # ASD): a lamp shows them beside it
    wl, flux = [*HG_LINES, 312.5674, 365.4842], [*HG_FLUX, 6000, 3000]
    shifted = measured(np.asarray(wl) + 0.03, flux, sigma=0.005)
    res = identify_lines(lines=shifted, species=["Hg I"], wavelength_range=(240.0, 600.0),
                         axis_err=0.05)
    assert np.all(np.asarray(res.lines["species"]) == "Hg I")
    corr = res.meta["axis_correction"]
    assert corr["unit"] == "nm"  # the lines carry no dispersion
    assert corr["offset"] == pytest.approx(0.03, abs=0.003)
    assert np.allclose(np.sort(np.asarray(res.lines["wavelength_corrected"])), np.sort(wl),
                       atol=0.004)
    rigid = identify_lines(lines=shifted, species=["Hg I"], wavelength_range=(240.0, 600.0),
                           options=IdentifyOptions(fit_shift=False))
    # Without the correction the lines sit 6 sigma off: fewer are claimed, less surely.
    assert np.count_nonzero(np.asarray(rigid.lines["species"]) == "Hg I") < len(wl)
    assert np.mean(rigid.lines["probability"]) < np.mean(res.lines["probability"])


def test_a_bright_line_on_a_weak_listed_line_is_not_claimed_when_its_branches_disagree():
    # Ar I 714.70 nm (intensity 1000) shares its upper level with 794.82 nm (20000) and
    # 852.14 nm (15000) (NIST Handbook, Sansonetti & Martin 2005; memory): a line at 714.70 nm
    # 30 times brighter than the branching allows, next to siblings of normal brightness,
    # is a coincidence, not that transition.
    from ritzline import levels

    t = levels.transitions("Ar I", wavelength_range=(690.0, 860.0), observed_only=True)
    wl = np.asarray(t["wavelength"], float)
    inten = np.asarray(np.ma.filled(t["intensity"], np.nan), float)
    keep = np.isfinite(inten) & (inten >= 1000)
    flux = 10 * inten[keep]
    normal = identify_lines(lines=measured(wl[keep], flux), species=["Ar I", "Ne I"],
                            wavelength_range=(690.0, 860.0))
    assert row_at(normal, 714.704)["species"] == "Ar I"
    boosted = np.where(np.abs(wl[keep] - 714.704) < 0.01, 30 * flux, flux)
    odd = identify_lines(lines=measured(wl[keep], boosted), species=["Ar I", "Ne I"],
                         wavelength_range=(690.0, 860.0))
    row = row_at(odd, 714.704)
    # each sibling may say nothing (IdentifyOptions.branch_outlier), so two of them make the
    # assignment unlikely rather than impossible
    assert row["species"] == "" and row["p_unidentified"] > 0.5
    assert row_at(normal, 714.704)["probability"] > 0.9


def _with_dispersion(table, nm_per_px):
    """Give a measured line table a dispersion: its FWHM also in pixels."""
    table["fwhm_pixel"] = np.asarray(table["fwhm"], float) / nm_per_px
    return table


def test_a_neon_spectrum_on_an_axis_off_by_2_px_is_identified_when_the_user_says_so():
    import astropy.units as u

    # 0.1 nm/px, FWHM 2.5 px; the written axis puts every line 2 px (0.2 nm) too far red
    # (NIST Handbook Ne I wavelengths, as in NE_LINES)
    wl = np.asarray(NE_LINES) + 0.2
    flux = np.full(wl.size, 20000.0)
    told = identify_lines(lines=_with_dispersion(measured(wl, flux, fwhm=0.25), 0.1),
                          species=None, wavelength_range=(580.0, 710.0), axis_err=2.5 * u.pix)
    assert told.present == ("Ne I",)
    assert np.all(np.asarray(told.lines["species"]) == "Ne I")
    assert np.allclose(np.asarray(told.lines["ref_wavelength"]), NE_LINES, atol=1e-3)
    corr = told.meta["axis_correction"]
    assert corr["unit"] == "px" and corr["offset"] == pytest.approx(2.0, abs=0.05)
    assert corr["offset_err"] < 0.05
    # not told: half a pixel of default uncertainty cannot reach 2 px
    untold = identify_lines(lines=_with_dispersion(measured(wl, flux, fwhm=0.25), 0.1),
                            species=None, wavelength_range=(580.0, 710.0))
    assert np.sum(np.asarray(untold.lines["species"]) == "Ne I") <= 2


def test_axis_err_in_nm_and_in_px_agree():
    import astropy.units as u

    wl = np.asarray(NE_LINES) - 0.15  # 1.5 px at 0.1 nm/px
    t = _with_dispersion(measured(wl, np.full(wl.size, 20000.0), fwhm=0.25), 0.1)
    a = identify_lines(lines=t, species=["Ne I"], wavelength_range=(580.0, 710.0),
                       axis_err=2.0 * u.pix)
    b = identify_lines(lines=t, species=["Ne I"], wavelength_range=(580.0, 710.0),
                       axis_err=0.2 * u.nm)
    assert a.meta["axis_correction"]["offset"] == pytest.approx(-1.5, abs=0.05)
    assert b.meta["axis_correction"]["offset"] == pytest.approx(-1.5, abs=0.05)


def test_a_lone_line_on_a_listed_line_of_an_absent_species_stays_unidentified():
    # a mercury lamp plus one line exactly at Na I 588.9951 nm (D2; shipped Ritz table, NIST
    # Handbook: 588.9950 nm); D1 (589.5924 nm) and every other sodium line are absent
    res = identify_lines(lines=measured([*HG_LINES, 588.9951], [*HG_FLUX, 5000.0]),
                         species=None, wavelength_range=(240.0, 600.0))
    assert res.present == ("Hg I",)
    row = row_at(res, 588.9951)
    assert row["species"] == "" and "unidentified" in row["flags"]


def test_two_measured_lines_do_not_claim_one_transition():
    # a line split in two by the line finder, 0.01 nm either side of Hg I 546.0750 nm
    # (NIST ASD, the shipped list): only one of them can be that transition
    wl = [w for w in HG_LINES if w != 546.0735] + [546.0650, 546.0850]
    fl = [f for w, f in zip(HG_LINES, HG_FLUX, strict=True) if w != 546.0735] + [10000, 10000]
    res = identify_lines(lines=measured(wl, fl, sigma=0.002), species=["Hg I"],
                         wavelength_range=(240.0, 600.0), axis_err=0.001)
    refs = np.asarray(res.lines["ref_wavelength"], float)
    assert np.sum(np.abs(refs - 546.0750) < 1e-3) == 1


def test_match_command_reports_the_axis_correction(demo_solution):
    from click.testing import CliRunner

    from ritzline.cli import main

    _, sol_path, data = demo_solution
    res = CliRunner().invoke(main, [
        "match", str(data / "helium_glow.csv"), "--solution", str(sol_path), "--species",
        "He,H", "--axis-err", "2px"])
    assert res.exit_code == 0, res.output
    assert "searched within ±2 px" in res.output
    assert "subtracted from the measured wavelengths" in res.output
    bad = CliRunner().invoke(main, ["match", str(data / "helium_glow.csv"), "--solution",
                                    str(sol_path), "--axis-err", "two"])
    assert bad.exit_code == 2


def test_a_saturated_line_is_identified_from_its_position_whatever_its_flux():
    # Hg I 435.8328 nm (NIST Handbook) clipped at full well: the fitted flux of a clipped top
    # can be wildly off, so it must not decide the assignment
    t = measured(HG_LINES, HG_FLUX)
    k = HG_LINES.index(435.8328)
    t["flux"][k] = 1e6 * HG_FLUX[k]
    t["flags"] = np.where(np.arange(len(t)) == k, "saturated", "")
    res = identify_lines(lines=t, species=None, wavelength_range=(240.0, 600.0))
    row = row_at(res, 435.8328)
    assert row["species"] == "Hg I" and row["probability"] > 0.9
