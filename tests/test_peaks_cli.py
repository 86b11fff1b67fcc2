"""The `ritzline peaks` command: table printed, ECSV and PNG written, bad input exits 2."""

import numpy as np
from astropy.table import Table
from click.testing import CliRunner

from ritzline.cli import main
from ritzline.synthetic import integrated_gaussians, observe


def _write(path, counts):
    np.savetxt(path, np.c_[np.arange(counts.size), counts], delimiter=",",
               header="pixel,counts", comments="")


def test_peaks_command_prints_and_writes_table_and_plot(tmp_path):
    rng = np.random.default_rng(40)
    centres = np.array([100.3, 250.8, 420.1])
    y = observe(integrated_gaussians(600, centres, [2e4, 8e3, 3e4], 2.6) + 150, rng)
    dark = np.full(600, 50.0)
    _write(tmp_path / "lamp.csv", y + dark)
    _write(tmp_path / "dark.csv", dark)
    out, png = tmp_path / "lines.ecsv", tmp_path / "lines.png"
    result = CliRunner().invoke(main, ["peaks", str(tmp_path / "lamp.csv"), "--dark",
                                       str(tmp_path / "dark.csv"), "-o", str(out),
                                       "--plot", str(png)])
    assert result.exit_code == 0, result.output
    assert "3 lines" in result.output
    table = Table.read(out, format="ascii.ecsv")
    np.testing.assert_allclose(np.sort(table["pixel"]), centres, atol=0.1)
    assert table.meta["dark_subtracted"]
    assert png.stat().st_size > 10_000


def test_peaks_command_exits_2_on_a_too_short_spectrum(tmp_path):
    _write(tmp_path / "short.csv", np.array([1.0, 5.0, 2.0, 1.0]))
    result = CliRunner().invoke(main, ["peaks", str(tmp_path / "short.csv"), "--fwhm", "3"])
    assert result.exit_code == 2
    assert "error:" in result.output
