"""Build ritzline's ECSV line lists from the NIST ASD files and the compiled lists in the project.

Usage::

    python line_lists/build_line_lists.py [--out line_lists]

Inputs (all inside ``line_lists/``, so the project needs nothing outside it):

* ``asd/levels/<El>_<I|II>.levels.tsv`` and ``asd/lines.csv``: NIST ASD energy levels and a
  line export with ASD intensities and gA (see ``asd/README.md``);
* ``compiled/<El>_I.levels.csv`` and ``compiled/<El>_I.lines.csv``: the project's first
  compilation, largely written from memory (see ``compiled/README.md``).

For each shipped species this writes ``<El>_I.levels.ecsv`` (every ASD level; hydrogen has
none: ritzline computes its levels from physics) and ``<El>_I.lines.ecsv``: every line of the
ASD export for the species, plus the compiled lines the export lacks (kept with their
``memory`` mark, their levels tied to the ASD levels).  A compiled line within
``SAME_LINE_NM`` of an export line of the same levels is that line: the ASD values replace
the recalled ones.  The uncertainty defaults are those of :mod:`ritzline._asd` (levels:
one unit in the last quoted digit, at least 0.01 cm⁻¹, 0.05 cm⁻¹ for values ASD marks as
derived or tentative; wavelengths: one unit in the last digit, at least 0.0001 nm, 0.0005 nm
for recalled values).
"""

import argparse
import csv
import re
import sys
from pathlib import Path

import numpy as np
from astropy.table import Table, vstack

from ritzline import _asd
from ritzline._io import write_table

HERE = Path(__file__).resolve().parent
SPECIES = ("H", "He", "Ne", "Ar", "Kr", "Xe", "Hg", "Na")
COMPILED = "2026-12-03"
#: A compiled line this close (nm) to an ASD export line of the same spectrum is that line.
SAME_LINE_NM = 0.002
#: A compiled level is the ASD level of the same parity, J and term within this (cm⁻¹); the
#: compiled Hg I levels sit up to 0.29 cm⁻¹ above ASD (an older compilation).
SAME_LEVEL_CM1 = 1.0
MEMORY_WAVELENGTH_ERR = 0.0005
#: A compiled line tied to two ASD levels must lie this close (nm) to their Ritz wavelength.
RITZ_TIE_NM = 0.01
HANDBOOK = (
    "J. E. Sansonetti and W. C. Martin, Handbook of Basic Atomic Spectroscopic Data, "
    "J. Phys. Chem. Ref. Data 34, 1559 (2005), NIST SRD 108 (intended source of the "
    "compiled list; its values were written from memory)"
)

_UNCERTAIN_LINE = re.compile(r"uncertain|inferred|doubtful|\?", re.I)
_LOW_PRECISION = re.compile(r"2-decimal|2 decimals|low precision", re.I)


def _read_csv(path: Path) -> tuple[list[str], list[dict[str, str]]]:
    """Header comment lines (without '# ') and the data rows of one compiled file."""
    text = path.read_text(encoding="utf-8").splitlines()
    header = [line[1:].strip() for line in text if line.startswith("#")]
    body = [line for line in text if line.strip() and not line.startswith("#")]
    return header, list(csv.DictReader(body))


def _decimals(text: str) -> int:
    return len(text.split(".")[1]) if "." in text else 0


def _float(text: str) -> float:
    return float(text) if text.strip() else np.nan


def _about_levels(note: str) -> str:
    """The parts of a line note that are not about the intensity (whose doubts are separate)."""
    return "; ".join(p for p in note.split(";") if "intensit" not in p)


def _multiplet_g(term: str) -> float:
    """(2S+1)(2L+1) of an LS term such as "3D" or "3P°"; NaN for other terms."""
    m = re.match(r"^(\d+)([SPDFGHIK])°?$", term.strip())
    return float(int(m.group(1)) * (2 * "SPDFGHIK".index(m.group(2)) + 1)) if m else np.nan


def _compiled_level_index(
    levels: Table, energy: float, term: str, j: str, parity: str, config: str = ""
) -> int:
    """Row of the ASD level a compiled level stands for, or -1.  A level the compiled list
    names without an energy is the one ASD level of that configuration, term and J."""
    if not np.isfinite(energy):
        if not (config and term and j.strip()):
            return -1
        same = (
            np.char.endswith(np.asarray(levels["config"], dtype=str), config)
            & (np.asarray(levels["term"]) == term)
            & (np.asarray(levels["j"]) == j.strip())
        )
        idx = np.flatnonzero(same)
        return int(idx[0]) if idx.size == 1 else -1
    e = np.asarray(levels["energy"], dtype=float)
    hit = np.abs(e - energy) < SAME_LEVEL_CM1
    if parity:
        hit &= np.asarray(levels["parity"]) == parity
    if term:
        hit &= np.asarray(levels["term"]) == term
    if j.strip():
        hit &= np.asarray(levels["j"]) == j.strip()
    idx = np.flatnonzero(hit)
    if not idx.size:
        return -1
    # an unresolved compiled multiplet stands for its nearest component
    return int(idx[np.argmin(np.abs(e[idx] - energy))])


def _level_parity(compiled_levels: list[dict[str, str]], energy: float) -> str:
    for r in compiled_levels:
        if r["config"] != "limit" and abs(float(r["energy_cm1"]) - energy) < 1e-6:
            return r["parity"]
    return ""


def build_levels(species: str, compiled: Path) -> Table:
    """Every ASD level of one species, with what the compiled list said about it."""
    label = f"{species} I"
    table = _asd.asd_levels(label)
    _, rows = _read_csv(compiled)
    notes = list(table["note"])
    for r in rows:
        if r["config"] == "limit":
            continue
        energy = float(r["energy_cm1"])
        k = _compiled_level_index(table, energy, r["term"], r["j"], r["parity"])
        if k < 0:
            continue
        off = energy - float(table["energy"][k])
        if abs(off) > 0.01:
            text = f"compiled list (memory) had {r['energy_cm1']} cm-1 ({off:+.3f}); ASD stands"
            notes[k] = "; ".join(p for p in (notes[k], text) if p)
    table["note"] = np.array(notes, dtype=str)
    table.meta.update(
        {
            "compiled": COMPILED,
            "built_by": "line_lists/build_line_lists.py from line_lists/asd/",
            "cross_check": (
                "the compiled list's levels (line_lists/compiled/, memory) were matched to "
                "these; differences above 0.01 cm-1 are in note"
            ),
        }
    )
    return table


def _compiled_lines(
    species: str, path: Path, levels: Table | None, compiled_levels: list[dict[str, str]]
) -> Table:
    """The compiled lines as a line table, their levels tied to ASD levels when given."""
    _, rows = _read_csv(path)
    cols: dict[str, list] = {k: [] for k in (
        "wavelength", "wavelength_err", "medium", "intensity", "intensity_flags", "aki", "ga",
        "aki_accuracy", "g_upper", "lower_cm1", "upper_cm1", "lower_config", "lower_term",
        "lower_j", "upper_config", "upper_term", "upper_j", "memory", "uncertain", "low_precision",
        "confirmed", "source", "note")}
    for r in rows:
        memory = "memory" in r["note"]
        note = r["note"]
        cols["wavelength"].append(float(r["wavelength_nm"]))
        cols["wavelength_err"].append(max(10.0 ** -_decimals(r["wavelength_nm"]),
                                          MEMORY_WAVELENGTH_ERR if memory else 0.0001))
        cols["medium"].append("vacuum" if r["medium"].startswith("vac") else "air")
        cols["intensity"].append(_float(r["intensity"]))
        cols["intensity_flags"].append(r["intensity_flags"])
        cols["aki"].append(_float(r["aki_s"]))
        cols["ga"].append(np.nan)
        cols["aki_accuracy"].append("")
        # a line whose upper J the compiled list leaves open stands for the whole multiplet
        cols["g_upper"].append(_multiplet_g(r["upper_term"]) if not r["upper_j"].strip()
                               else np.nan)
        tied = []
        for side in ("lower", "upper"):
            energy = _float(r[f"{side}_cm1"])
            k = -1
            if levels is not None:
                parity = _level_parity(compiled_levels, energy)
                k = _compiled_level_index(levels, energy, r[f"{side}_term"], r[f"{side}_j"],
                                          parity, r[f"{side}_config"])
            if k >= 0:
                tied.append(side)
                cols[f"{side}_cm1"].append(float(levels["energy"][k]))
                for key in ("config", "term", "j"):
                    cols[f"{side}_{key}"].append(str(levels[key][k]))
            else:
                cols[f"{side}_cm1"].append(energy)
                for key in ("config", "term", "j"):
                    cols[f"{side}_{key}"].append(r[f"{side}_{key}"])
        if len(tied) == 2 and not _ritz_agrees(cols, r):
            # an inferred designation the ASD levels do not bear out: keep it untied
            for side in ("lower", "upper"):
                cols[f"{side}_cm1"][-1] = _float(r[f"{side}_cm1"])
                for key in ("config", "term", "j"):
                    cols[f"{side}_{key}"][-1] = r[f"{side}_{key}"]
            note += "; its levels in ASD do not reproduce the wavelength: designation untied"
            tied = []
        if levels is not None and tied:
            note += f"; {' and '.join(tied)} level{'s' if len(tied) > 1 else ''} from ASD"
        cols["memory"].append(memory)
        cols["uncertain"].append(bool(_UNCERTAIN_LINE.search(_about_levels(r["note"]))))
        cols["low_precision"].append(bool(_LOW_PRECISION.search(r["note"])))
        cols["confirmed"].append("confirmed" in r["note"])
        cols["source"].append("compiled (memory)" if memory else "compiled")
        cols["note"].append(note)
    return _asd._lines_table(cols, len(rows))


def _ritz_agrees(cols: dict[str, list], row: dict[str, str]) -> bool:
    """Whether the last tied line's ASD levels give its compiled wavelength within
    RITZ_TIE_NM (a designation the compiled list inferred is checked this way)."""
    from ritzline.airvac import vacuum_to_air

    sigma = cols["upper_cm1"][-1] - cols["lower_cm1"][-1]
    if not sigma > 0:
        return False
    vac = 1e7 / sigma
    ritz = vac if cols["medium"][-1] == "vacuum" else float(vacuum_to_air(vac))
    return abs(ritz - float(row["wavelength_nm"])) <= RITZ_TIE_NM


def _same_line(asd: Table, compiled_row) -> int:
    """Row of the ASD line a compiled line is, or -1: same medium, within SAME_LINE_NM and,
    when both are known, the same upper level."""
    wl = np.asarray(asd["wavelength"], dtype=float)
    hit = (np.abs(wl - float(compiled_row["wavelength"])) <= SAME_LINE_NM) & (
        np.asarray(asd["medium"]) == compiled_row["medium"]
    )
    up = float(compiled_row["upper_cm1"])
    if np.isfinite(up):
        asd_up = np.asarray(asd["upper_cm1"], dtype=float)
        hit &= ~np.isfinite(asd_up) | (np.abs(asd_up - up) < SAME_LEVEL_CM1)
    idx = np.flatnonzero(hit)
    return int(idx[np.argmin(np.abs(wl[idx] - float(compiled_row["wavelength"])))]) if idx.size \
        else -1


def build_lines(species: str, compiled_dir: Path, levels: Table | None) -> Table:
    """The observed lines of one species: the ASD export and the compiled lines it lacks."""
    label = f"{species} I"
    level_file = compiled_dir / f"{species}_I.levels.csv"
    compiled_levels = _read_csv(level_file)[1] if level_file.exists() else []
    line_file = compiled_dir / f"{species}_I.lines.csv"
    compiled = _compiled_lines(species, line_file, levels, compiled_levels)
    asd = _asd.asd_lines(label, levels) if levels is not None else compiled[:0]
    notes = list(asd["note"])
    source = list(asd["source"])
    keep = []
    for i in range(len(compiled)):
        k = _same_line(asd, compiled[i])
        if k < 0:
            keep.append(i)
            continue
        off = float(compiled["wavelength"][i]) - float(asd["wavelength"][k])
        notes[k] += (f"; also in the compiled list at {compiled['wavelength'][i]:.5f} nm "
                     f"({off * 1e3:+.1f} pm): {compiled['note'][i]}")
        source[k] = "ASD; compiled"
    asd["note"] = np.array(notes, dtype=str)
    asd["source"] = np.array(source, dtype=str)
    table = vstack([asd, compiled[keep]], metadata_conflicts="silent") if len(asd) else \
        compiled[keep]
    table.sort(["wavelength", "upper_cm1"])
    table.meta = {
        "species": label,
        "table": "observed lines",
        "source": f"{_asd.ASD_CITATION}; compiled list: {HANDBOOK}",
        "compiled": COMPILED,
        "asd_selection": asd.meta.get("asd_selection"),
        "compiled_list_header": _read_csv(line_file)[0],
        "wavelength_medium": (
            "standard air from 200 to 2000 nm, vacuum below 200 nm (column medium)"
        ),
        "built_by": "line_lists/build_line_lists.py from line_lists/asd/ and line_lists/compiled/",
    }
    return table


def build_all(out: Path) -> list[str]:
    """Write every shipped table into ``out``; one summary line per species."""
    compiled_dir = HERE / "compiled"
    report = []
    for species in SPECIES:
        stem = f"{species}_I"
        levels = None
        if species != "H":
            levels = build_levels(species, compiled_dir / f"{stem}.levels.csv")
            write_table(levels, out / f"{stem}.levels.ecsv")
        lines = build_lines(species, compiled_dir, levels)
        write_table(lines, out / f"{stem}.lines.ecsv")
        n_asd = int(np.sum(np.char.startswith(np.asarray(lines["source"], dtype=str), "ASD")))
        report.append(f"{stem}: {0 if levels is None else len(levels)} levels, {len(lines)} "
                      f"lines ({n_asd} from the ASD export)")
    return report


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--out", type=Path, default=HERE, help="output folder")
    args = parser.parse_args(argv)
    for line in build_all(args.out):
        print(line)
    return 0


if __name__ == "__main__":
    sys.exit(main())
