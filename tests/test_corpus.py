"""The corpus of bad and unusual inputs (tests/corpus/manifest.json): every file gives the
outcome the manifest names — read, read with a warning, or refused with a message that
names the file and the cause — through the library and through the command line, where
every diagnostic is one ``error:``/``warning:`` line and never a traceback."""

import json
import warnings
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from ritzline import RitzlineError, RitzlineWarning, read_spectrum
from ritzline.calibration import Solution
from ritzline.cli import main

CORPUS = Path(__file__).parent / "corpus"
MANIFEST = json.loads((CORPUS / "manifest.json").read_text())
FACTS = ("axis_kind", "samples", "exposure_time", "saturation", "n_masked", "pixel_range",
         "pixel_gaps", "column", "medium")


def test_the_corpus_holds_at_least_sixty_files_each_in_the_manifest():
    listed = {e["file"] for e in MANIFEST}
    on_disk = {p.name for p in CORPUS.iterdir()} - {"manifest.json", "make_corpus.py"}
    assert listed == on_disk
    assert len(listed) >= 60
    assert {e["expect"] for e in MANIFEST} == {"ok", "warning", "error"}


def _load(entry):
    path = CORPUS / entry["file"]
    if entry.get("kind") == "solution":
        return Solution.load(path)
    return read_spectrum(path, **entry.get("read", {}))


@pytest.mark.parametrize("entry", MANIFEST, ids=[e["file"] for e in MANIFEST])
def test_corpus_file_gives_its_listed_outcome(entry):
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        if entry["expect"] == "error":
            with pytest.raises(RitzlineError) as err:
                _load(entry)
            message = str(err.value)
            assert entry["message"] in message
            assert entry["file"] in message  # the message names the file
            return
        result = _load(entry)
    ours = [w for w in caught if issubclass(w.category, RitzlineWarning)]
    if entry["expect"] == "warning":
        assert any(entry["message"] in str(w.message) for w in ours), [str(w.message)
                                                                     for w in ours]
        assert all(entry["file"] in str(w.message) for w in ours)
    else:
        assert not ours, [str(w.message) for w in ours]
    if entry.get("kind") == "solution":
        return
    meta = result.meta
    for key in FACTS:
        if key == "samples" and key in entry:
            assert result.flux.size == entry[key]
        elif key in entry:
            value = meta.get(key)
            if isinstance(entry[key], float):
                assert value == pytest.approx(entry[key])
            else:
                assert value == entry[key]
    axis = np.asarray(result.spectral_axis.value)
    if "axis_first" in entry:
        assert axis[0] == pytest.approx(entry["axis_first"], rel=1e-9)
    if "axis_last" in entry:
        assert axis[-1] == pytest.approx(entry["axis_last"], rel=1e-9)


def _cli_args(entry):
    path = str(CORPUS / entry["file"])
    if entry.get("kind") == "solution":
        return ["peaks", str(CORPUS / "ok_pixel_counts.csv"), "--solution", path]
    args = ["info", path]
    for key, value in entry.get("read", {}).items():
        args += [f"--{key.replace('_', '-')}", str(value)]
    return args


@pytest.mark.parametrize("entry", MANIFEST, ids=[e["file"] for e in MANIFEST])
def test_corpus_file_on_the_command_line_is_one_line_per_diagnostic(entry):
    result = CliRunner().invoke(main, _cli_args(entry))
    assert "Traceback" not in result.output + result.stderr
    assert result.exception is None or isinstance(result.exception, SystemExit)
    diagnostics = [line for line in result.stderr.splitlines() if line.strip()]
    assert all(line.startswith(("error: ", "warning: ")) for line in diagnostics), diagnostics
    if entry["expect"] == "error":
        assert result.exit_code == 2
        assert len(diagnostics) == 1 and diagnostics[0].startswith("error: ")
        assert entry["file"] in diagnostics[0]
    else:
        assert result.exit_code == 0, result.output + result.stderr
        if entry["expect"] == "warning":
            assert any(line.startswith("warning: ") and entry["file"] in line
                       for line in diagnostics)


READABLE = [e for e in MANIFEST if e["expect"] != "error" and e.get("kind") != "solution"]


@pytest.mark.parametrize("entry", READABLE, ids=[e["file"] for e in READABLE])
def test_every_readable_corpus_spectrum_goes_through_the_line_finder(entry):
    args = ["peaks", str(CORPUS / entry["file"])]
    for key, value in entry.get("read", {}).items():
        args += [f"--{key.replace('_', '-')}", str(value)]
    result = CliRunner().invoke(main, args)
    assert result.exit_code == 0, result.stderr
    assert "Traceback" not in result.output + result.stderr
    assert ("no lines found" in result.output) or (" lines" in result.output)
    assert all(line.startswith("warning: ") for line in result.stderr.splitlines() if line)
