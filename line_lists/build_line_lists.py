"""Build ritzline's ECSV line lists from the compiled reference CSV files.

Usage::

    python line_lists/build_line_lists.py REFERENCE_FOLDER [--out line_lists]

REFERENCE_FOLDER holds ``<El>_I.levels.csv`` and ``<El>_I.lines.csv`` (commented header
lines starting with ``#`` carry the source and provenance).  For each species this writes
``<El>_I.levels.ecsv`` (except hydrogen, whose levels ritzline computes from physics) and
``<El>_I.lines.ecsv``, keeping every ``memory`` mark and the source in the metadata.

Uncertainties (documented defaults; the reference files give none):

* level energy: one unit in the last quoted digit, at least 0.01 cm⁻¹ for recalled values
  and at least 0.05 cm⁻¹ for levels that are derived from wavelengths, taken from a
  secondary listing, or noted as doubtful/uncertain/low precision; the ground level is 0.
* published wavelength: one unit in the last quoted digit, at least 0.0005 nm for values
  from memory and at least 0.0001 nm otherwise.
"""

import argparse
import csv
import re
import sys
from pathlib import Path

import numpy as np
from astropy import units as u
from astropy.table import Table

from ritzline._io import write_table
from ritzline.levels import j_value

SPECIES = ("H", "He", "Ne", "Ar", "Kr", "Xe", "Hg", "Na")
COMPILED = "2026-12-01"
SOURCE = (
    "J. E. Sansonetti and W. C. Martin, Handbook of Basic Atomic Spectroscopic Data, "
    "J. Phys. Chem. Ref. Data 34, 1559 (2005), NIST SRD 108 (intended source; see provenance)"
)
MEMORY_CAVEAT = (
    "Almost every value was written from memory (column memory=True) because the Handbook "
    "table pages could not be read when the data were compiled; wavelengths and level "
    "energies were recalled separately and agree through the Ritz principle, which is what "
    "supports them.  Intensities are approximate; level tables are subsets; the lists hold "
    "strong lines only."
)

_WEAK_LEVEL = re.compile(r"derived|secondary|doubtful|uncertain|low precision", re.I)
_UNCERTAIN_LINE = re.compile(r"uncertain|inferred|doubtful|\?", re.I)
_LOW_PRECISION = re.compile(r"2-decimal|2 decimals|low precision", re.I)


def _read_csv(path: Path) -> tuple[list[str], list[dict[str, str]]]:
    """Header comment lines (without '# ') and the data rows of one reference file."""
    text = path.read_text(encoding="utf-8").splitlines()
    header = [line[1:].strip() for line in text if line.startswith("#")]
    body = [line for line in text if line.strip() and not line.startswith("#")]
    return header, list(csv.DictReader(body))


def _about_levels(note: str) -> str:
    """The parts of a line note that are not about the intensity (whose doubts are separate)."""
    return "; ".join(p for p in note.split(";") if "intensit" not in p)


def _decimals(text: str) -> int:
    return len(text.split(".")[1]) if "." in text else 0


def _float(text: str) -> float:
    return float(text) if text.strip() else np.nan


def _meta(species: str, kind: str, header: list[str]) -> dict:
    return {
        "species": f"{species} I",
        "table": kind,
        "source": SOURCE,
        "compiled": COMPILED,
        "memory_caveat": MEMORY_CAVEAT,
        "provenance": header,
        "built_by": "line_lists/build_line_lists.py from the project's compiled reference files",
    }


def build_levels(species: str, path: Path) -> Table:
    """The level table of one species, with the ionization limit moved to ``meta``."""
    header, rows = _read_csv(path)
    levels = [r for r in rows if r["config"] != "limit"]
    limit = [r for r in rows if r["config"] == "limit"]
    energy = np.array([float(r["energy_cm1"]) for r in levels])
    err = []
    for r, e in zip(levels, energy, strict=True):
        unit = 10.0 ** -_decimals(r["energy_cm1"])
        floor = 0.05 if _WEAK_LEVEL.search(r["note"]) else 0.01
        err.append(0.0 if e == 0.0 else max(unit, floor))
    table = Table(
        {
            "energy": energy * u.cm**-1,
            "energy_err": np.array(err) * u.cm**-1,
            "config": [r["config"] for r in levels],
            "term": [r["term"] for r in levels],
            "j": [r["j"] for r in levels],
            "j_value": [j_value(r["j"]) for r in levels],
            "parity": [r["parity"] for r in levels],
            "memory": ["memory" in r["note"] for r in levels],
            "derived": ["derived" in r["note"] for r in levels],
            "note": [r["note"] for r in levels],
        }
    )
    table.meta = _meta(species, "levels", header)
    if limit:
        table.meta["ionization_limit_cm1"] = float(limit[0]["energy_cm1"])
        table.meta["ionization_limit_note"] = limit[0]["note"]
    return table


def build_lines(species: str, path: Path) -> Table:
    """The observed-line table of one species (published wavelengths, air or vacuum)."""
    header, rows = _read_csv(path)
    wl = np.array([float(r["wavelength_nm"]) for r in rows])
    memory = np.array(["memory" in r["note"] for r in rows])
    err = np.array(
        [
            max(10.0 ** -_decimals(r["wavelength_nm"]), 0.0005 if m else 0.0001)
            for r, m in zip(rows, memory, strict=True)
        ]
    )
    medium = ["vacuum" if r["medium"].startswith("vac") else "air" for r in rows]
    table = Table(
        {
            "wavelength": wl * u.nm,
            "wavelength_err": err * u.nm,
            "medium": medium,
            "intensity": [_float(r["intensity"]) for r in rows],
            "intensity_flags": [r["intensity_flags"] for r in rows],
            "aki": np.array([_float(r["aki_s"]) for r in rows]) / u.s,
            "lower_cm1": np.array([_float(r["lower_cm1"]) for r in rows]) * u.cm**-1,
            "upper_cm1": np.array([_float(r["upper_cm1"]) for r in rows]) * u.cm**-1,
            "lower_config": [r["lower_config"] for r in rows],
            "lower_term": [r["lower_term"] for r in rows],
            "lower_j": [r["lower_j"] for r in rows],
            "upper_config": [r["upper_config"] for r in rows],
            "upper_term": [r["upper_term"] for r in rows],
            "upper_j": [r["upper_j"] for r in rows],
            "memory": memory,
            "uncertain": [bool(_UNCERTAIN_LINE.search(_about_levels(r["note"]))) for r in rows],
            "low_precision": [bool(_LOW_PRECISION.search(r["note"])) for r in rows],
            "confirmed": ["confirmed" in r["note"] for r in rows],
            "note": [r["note"] for r in rows],
        }
    )
    table.meta = _meta(species, "observed lines", header)
    table.meta["wavelength_medium"] = (
        "standard air from 200 to 2000 nm, vacuum below 200 nm (column medium)"
    )
    return table


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("reference", type=Path, help="folder with the reference CSV files")
    parser.add_argument(
        "--out", type=Path, default=Path(__file__).resolve().parent, help="output folder"
    )
    args = parser.parse_args(argv)
    for species in SPECIES:
        stem = f"{species}_I"
        if species != "H":
            levels = build_levels(species, args.reference / f"{stem}.levels.csv")
            write_table(levels, args.out / f"{stem}.levels.ecsv")
        lines = build_lines(species, args.reference / f"{stem}.lines.csv")
        write_table(lines, args.out / f"{stem}.lines.ecsv")
        print(f"{stem}: {0 if species == 'H' else len(levels)} levels, {len(lines)} lines")
    return 0


if __name__ == "__main__":
    sys.exit(main())
