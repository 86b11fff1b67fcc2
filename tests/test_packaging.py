"""Packaging: shipped data reachable through one helper, in a checkout and in a built wheel."""

import shutil
import subprocess
import sys
import time
import zipfile
from pathlib import Path

import pytest

from ritzline._resources import data_path

ROOT = Path(__file__).resolve().parents[1]


def test_data_path_finds_the_line_lists_and_lamp_folders():
    assert data_path("line_lists").is_dir()
    assert data_path("calibration").is_dir()
    assert data_path("examples", "hgar_lamp.csv").is_file()


def test_data_path_rejects_unknown_folders():
    with pytest.raises(ValueError, match="unknown data folder"):
        data_path("secrets")


def test_import_is_fast_and_does_not_pull_in_heavy_libraries():
    code = (
        "import sys, time; t = time.perf_counter(); import ritzline; "
        "dt = time.perf_counter() - t; "
        "heavy = [m for m in ('matplotlib', 'specutils', 'dask', 'astropy', 'scipy') "
        "if m in sys.modules]; print(dt, heavy)"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    seconds, heavy = out.stdout.split(" ", 1)
    assert heavy.strip() == "[]"
    assert float(seconds) < 0.5


@pytest.mark.skipif(shutil.which("git") is None, reason="needs git to list tracked data files")
def test_built_wheel_contains_line_lists_and_calibration(tmp_path):
    pytest.importorskip("build")
    t0 = time.time()
    subprocess.run(
        [sys.executable, "-m", "build", "--wheel", "--no-isolation", "--outdir", str(tmp_path),
         str(ROOT)],
        check=True, capture_output=True,
    )
    wheel = next(tmp_path.glob("ritzline-*.whl"))
    names = zipfile.ZipFile(wheel).namelist()
    assert time.time() - t0 < 120
    shipped_lists = sorted(p.name for p in (ROOT / "line_lists").glob("*.ecsv"))
    shipped_lamps = sorted(p.name for p in (ROOT / "calibration" / "lamps").glob("*"))
    assert shipped_lists, "line_lists/ holds no ECSV tables"
    for name in shipped_lists:
        assert f"ritzline/_data/line_lists/{name}" in names
    for name in shipped_lamps:
        assert f"ritzline/_data/calibration/lamps/{name}" in names
    # the NIST ASD files that transitions() reads for spectra without shipped tables
    for path in (ROOT / "line_lists" / "asd").rglob("*"):
        if path.is_file():
            rel = path.relative_to(ROOT / "line_lists").as_posix()
            assert f"ritzline/_data/line_lists/{rel}" in names, rel
    for path in (ROOT / "examples" / "data").rglob("*.csv"):
        rel = path.relative_to(ROOT / "examples" / "data").as_posix()
        assert f"ritzline/_data/examples/{rel}" in names
    assert "ritzline/cli.py" in names


def test_public_names_stay_functions_after_their_modules_are_imported():
    import types

    import ritzline.calibration  # importing a stage module must not shadow a public name
    from ritzline import calibrate, check_exposures, find_lines, identify_lines, transitions

    assert ritzline.calibration.calibrate is calibrate
    for func in (calibrate, check_exposures, find_lines, identify_lines, transitions):
        assert callable(func) and not isinstance(func, types.ModuleType)
