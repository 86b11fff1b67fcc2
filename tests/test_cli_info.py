"""The CLI shell: --version, `info` (text and JSON), one-line errors with exit code 2."""

import json

import numpy as np
from click.testing import CliRunner

from ritzline import __version__
from ritzline.cli import main


def _csv(tmp_path, counts):
    rows = "\n".join(f"{400 + 0.05 * i:.2f},{c},{2 * c}" for i, c in enumerate(counts))
    path = tmp_path / "lamp.csv"
    path.write_text("# Exposure time: 0.5 s\nwavelength (nm),exp_a,exp_b\n" + rows)
    return path


def test_version_prints_the_package_version():
    result = CliRunner().invoke(main, ["--version"])
    assert result.exit_code == 0
    assert __version__ in result.output


def test_info_reports_samples_axis_counts_and_columns(tmp_path, counts):
    result = CliRunner().invoke(main, ["info", str(_csv(tmp_path, counts))])
    assert result.exit_code == 0, result.output
    assert f"samples     {counts.size}" in result.output
    assert "wavelength, 400 to" in result.output
    assert "exp_a, exp_b" in result.output
    assert "0.5 s" in result.output


def test_info_json_is_machine_readable(tmp_path, counts):
    result = CliRunner().invoke(main, ["info", "--json", str(_csv(tmp_path, counts))])
    data = json.loads(result.output)
    assert data["samples"] == counts.size
    assert data["counts_max"] == float(np.max(counts))
    assert data["columns"] == ["exp_a", "exp_b"]


def test_info_on_several_files_lists_each(tmp_path, counts):
    path = _csv(tmp_path, counts)
    result = CliRunner().invoke(main, ["info", "--json", str(path), str(path)])
    assert len(json.loads(result.output)) == 2


def test_bad_file_prints_one_error_line_and_exits_2(tmp_path):
    bad = tmp_path / "bad.csv"
    bad.write_text("\n".join(f"{i},{i}" for i in range(20)) + "\n20,oops\n")
    result = CliRunner().invoke(main, ["info", str(bad)])
    assert result.exit_code == 2
    lines = [line for line in result.output.splitlines() if line.strip()]
    assert len(lines) == 1
    assert lines[0].startswith("error: ") and "bad.csv" in lines[0] and "line 21" in lines[0]
    assert "Traceback" not in result.output


def test_missing_file_exits_2_without_traceback(tmp_path):
    result = CliRunner().invoke(main, ["info", str(tmp_path / "none.csv")])
    assert result.exit_code == 2
    assert "error:" in result.output and "no such file" in result.output
