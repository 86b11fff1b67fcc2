"""The demo runs end to end offline and every file it writes exists and parses; the
example scripts run."""

import json
import subprocess
import sys
from pathlib import Path

import pytest
from astropy.table import Table
from click.testing import CliRunner

from ritzline import Solution
from ritzline.cli import main

EXAMPLES = Path(__file__).resolve().parents[1] / "examples"
PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


@pytest.fixture(scope="module")
def demo_dir(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo") / "ritzline-demo"
    result = CliRunner().invoke(main, ["demo", "-o", str(out), "--workers", "1"])
    assert result.exit_code == 0, result.output
    return out, result.output


def test_demo_prints_what_it_found_and_where(demo_dir):
    _, text = demo_dir
    assert "1. calibration" in text and "2. identification" in text and "3. batch check" in text
    assert "He I" in text  # the glow tube's species was found
    assert "report.html" in text


def test_demo_solution_loads_and_is_confident(demo_dir):
    out, _ = demo_dir
    solution = Solution.load(out / "calibration" / "solution.json")
    assert solution.verdict.startswith("confident")
    assert solution.lamps


def test_demo_tables_parse_with_the_expected_columns(demo_dir):
    out, _ = demo_dir
    lines = Table.read(out / "identification" / "lines.ecsv")
    assert {"wavelength", "species", "upper", "probability"} <= set(lines.colnames)
    levels = Table.read(out / "identification" / "levels.ecsv")
    assert len(levels) > 0
    summary = Table.read(out / "check" / "summary.ecsv")
    assert len(summary) == 12
    assert "error" in set(summary["status"])  # the damaged frame


def test_demo_figures_are_png_files(demo_dir):
    out, _ = demo_dir
    for name in ("calibration/residuals.png", "identification/spectrum.png",
                 "identification/level_diagram.png", "check/drift.png"):
        assert (out / name).read_bytes()[:8] == PNG_MAGIC, name


def test_demo_summary_json_and_report_page(demo_dir):
    out, _ = demo_dir
    totals = json.loads((out / "check" / "summary.json").read_text())
    assert totals
    html = (out / "check" / "report.html").read_text(encoding="utf-8")
    assert "<table" in html and "frame_07.csv" in html


@pytest.mark.parametrize("script", ["calibrate_lamp.py", "identify_discharge.py",
                                    "check_series.py"])
def test_example_script_runs(tmp_path, script):
    done = subprocess.run([sys.executable, str(EXAMPLES / script), str(tmp_path)],
                          capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip()


def test_demo_data_script_regenerates_the_bundled_data_identically(tmp_path):
    subprocess.run([sys.executable, str(EXAMPLES / "make_demo_data.py"), str(tmp_path)],
                   check=True, capture_output=True, timeout=300)
    for made in sorted(tmp_path.rglob("*.csv")):
        shipped = EXAMPLES / "data" / made.relative_to(tmp_path)
        assert made.read_bytes() == shipped.read_bytes(), made.name
