"""The `ritzline transitions` command."""

import numpy as np
import pytest
from astropy.table import Table
from click.testing import CliRunner

from ritzline.cli import main


@pytest.fixture
def run():
    runner = CliRunner()

    def invoke(*args):
        return runner.invoke(main, list(args))

    return invoke


def test_prints_a_table_with_the_requested_lines(run):
    result = run("transitions", "Hg", "--range", "400:450", "--observed-only")
    assert result.exit_code == 0, result.output
    # Hg I 404.66 and 435.83 nm (air), common practice
    assert "404.65" in result.output and "435.83" in result.output
    assert "546.07" not in result.output


def test_writes_ecsv_that_reads_back_with_units_and_medium(run, tmp_path):
    out = tmp_path / "ne.ecsv"
    result = run("transitions", "Ne", "--range", "580:650", "--medium", "vacuum", "-o", str(out))
    assert result.exit_code == 0, result.output
    table = Table.read(out)
    assert table.meta["medium"] == "vacuum" and str(table["wavelength"].unit) == "nm"
    # Ne I 585.24878 nm air = 585.4110 nm vacuum (Peck & Reeder conversion, common practice)
    assert np.min(np.abs(np.asarray(table["wavelength"]) - 585.4110)) < 0.001


def test_several_species_and_name_forms(run):
    result = run("transitions", "NeI", "Ar I", "--range", "810:812", "--observed-only")
    assert result.exit_code == 0, result.output
    assert "Ar I" in result.output and "811.53" in result.output  # Ar I 811.531 nm


def test_fwhm_marks_blended_lines(run, tmp_path):
    out = tmp_path / "hg.ecsv"
    result = run(
        "transitions",
        "Hg",
        "--range",
        "313:314",
        "--observed-only",
        "--fwhm",
        "0.5",
        "-o",
        str(out),
    )
    assert result.exit_code == 0, result.output
    # Hg I 313.155 / 313.184 nm are 0.03 nm apart (line list)
    assert list(Table.read(out)["blend"]) == ["B1", "B1"]


def test_no_intercombination_leaves_out_hg_253p65(run):
    result = run("transitions", "Hg", "--range", "253.6:253.7", "--no-intercombination")
    assert result.exit_code == 0 and "253.65" not in result.output


def test_min_intensity_filters(run, tmp_path):
    out = tmp_path / "ar.ecsv"
    assert run("transitions", "Ar", "--min-intensity", "25000", "-o", str(out)).exit_code == 0
    assert np.all(np.asarray(Table.read(out)["intensity"]) >= 25000)


def test_unknown_species_exits_2_with_one_error_line(run):
    result = run("transitions", "Unobtainium")
    assert result.exit_code == 2 and "error:" in result.output


@pytest.mark.parametrize("bad", ["400", "700:400", "a:b"])
def test_bad_range_exits_2(run, bad):
    assert run("transitions", "Ne", "--range", bad).exit_code == 2
