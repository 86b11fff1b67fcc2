"""The wavelength-solution JSON file: round trip, atomic writes, and every malformed case
that ``Solution.load`` must refuse with a SolutionFormatError naming the file."""

import json

import numpy as np
import pytest

from ritzline.calibration import SCHEMA_VERSION, Solution, calibrate
from ritzline.errors import SolutionFormatError
from ritzline.synthetic import Instrument, lamp_exposure


@pytest.fixture(scope="module")
def solution() -> Solution:
    ins = Instrument(n_pixels=2048, coeffs=(640.0, 150.0, -0.6, 0.9), fwhm_px=2.5)
    counts, _ = lamp_exposure(ins, "Ne", np.random.default_rng(4), missing=(0.1, 0.1),
                              extra=(0.1, 0.1))
    return calibrate(counts, "Ne")


@pytest.fixture()
def doc(solution, tmp_path):
    path = solution.save(tmp_path / "s.json")
    return json.loads(path.read_text())


def _write(tmp_path, obj, name="bad.json") -> str:
    path = tmp_path / name
    path.write_text(obj if isinstance(obj, str) else json.dumps(obj))
    return str(path)


def test_round_trip_keeps_the_map_its_band_and_the_matches(solution, tmp_path):
    path = solution.save(tmp_path / "s.json")
    back = Solution.load(path)
    p = np.linspace(0, solution.n_pixels - 1, 77)
    np.testing.assert_array_equal(back.wavelength(p), solution.wavelength(p))
    np.testing.assert_allclose(back.wavelength_err(p), solution.wavelength_err(p), rtol=1e-12)
    assert back.degree == solution.degree
    assert back.medium == solution.medium and back.lamps == solution.lamps
    assert back.verdict == solution.verdict and back.confidence == solution.confidence
    assert len(back.matches) == len(solution.matches)
    np.testing.assert_array_equal(back.matches["used"], solution.matches["used"])
    np.testing.assert_allclose(back.matches["wavelength_ref"], solution.matches["wavelength_ref"])
    assert back.fwhm_pixel == pytest.approx(solution.fwhm_pixel)


def test_save_leaves_no_temporary_file(solution, tmp_path):
    solution.save(tmp_path / "s.json")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["s.json"]


def test_file_records_schema_and_provenance(doc):
    assert doc["schema_version"] == SCHEMA_VERSION
    assert doc["polynomial"]["kind"] == "chebyshev"
    assert doc["meta"]["ritzline_version"]
    assert doc["meta"]["created"].endswith("Z")


def test_missing_file(tmp_path):
    with pytest.raises(SolutionFormatError, match="not found"):
        Solution.load(tmp_path / "nope.json")


def test_not_json(tmp_path):
    path = _write(tmp_path, "this is { not json")
    with pytest.raises(SolutionFormatError, match=r"bad\.json.*not a JSON"):
        Solution.load(path)


def test_top_level_not_an_object(tmp_path):
    with pytest.raises(SolutionFormatError, match="not a JSON object"):
        Solution.load(_write(tmp_path, [1, 2, 3]))


@pytest.mark.parametrize(
    ("edit", "message"),
    [
        (lambda d: d.pop("schema"), "schema"),
        (lambda d: d.update(schema="something-else"), "schema"),
        (lambda d: d.pop("schema_version"), "schema_version"),
        (lambda d: d.update(schema_version=99), "not supported"),
        (lambda d: d.update(schema_version="1"), "integer"),
        (lambda d: d.pop("polynomial"), "polynomial"),
        (lambda d: d["polynomial"].update(kind="legendre"), "kind"),
        (lambda d: d["polynomial"].pop("coefficients"), "coefficients"),
        (lambda d: d["polynomial"].update(coefficients="abc"), "coefficients"),
        (lambda d: d["polynomial"]["coefficients"].__setitem__(0, "x"), "numbers"),
        (lambda d: d["polynomial"]["coefficients"].__setitem__(0, True), "numbers"),
        (lambda d: d["polynomial"].update(covariance=[[1.0]]), "shape"),
        (lambda d: d["polynomial"].update(domain=[0, 10]), "domain"),
        (lambda d: d.pop("n_pixels"), "n_pixels"),
        (lambda d: d.update(n_pixels=2048.5), "n_pixels"),
        (lambda d: d.update(medium="water"), "medium"),
        (lambda d: d.update(lamps="Ne"), "lamps"),
        (lambda d: d.update(confidence=1.5), "confidence"),
        (lambda d: d.pop("rms_nm"), "rms_nm"),
        (lambda d: d.update(lines={}), "lines"),
        (lambda d: d["lines"][0].pop("pixel"), r"lines\[0\]\.pixel"),
        (lambda d: d["lines"][0].update(used="yes"), r"lines\[0\]\.used"),
        (lambda d: d.update(meta=[1]), "meta"),
    ],
)
def test_malformed_fields_are_refused_with_the_field_named(doc, tmp_path, edit, message):
    edit(doc)
    path = _write(tmp_path, doc)
    with pytest.raises(SolutionFormatError, match=message) as info:
        Solution.load(path)
    assert "bad.json" in str(info.value)


def test_non_finite_coefficients_are_refused(doc, tmp_path):
    text = json.dumps(doc).replace(
        json.dumps(doc["polynomial"]["coefficients"][1]), "NaN", 1
    )
    with pytest.raises(SolutionFormatError, match="non-finite"):
        Solution.load(_write(tmp_path, text))


def test_non_finite_covariance_is_refused(doc, tmp_path):
    doc["polynomial"]["covariance"][0][0] = float("inf")
    with pytest.raises(SolutionFormatError, match="non-finite"):
        Solution.load(_write(tmp_path, json.dumps(doc)))


def test_the_instrument_model_travels_with_the_solution(solution, tmp_path):
    pytest.importorskip("ritzline.instrument")
    assert solution.instrument is not None  # find_lines measured it
    back = Solution.load(solution.save(tmp_path / "s.json"))
    assert back.instrument == solution.instrument
