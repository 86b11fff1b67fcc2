"""Read the NIST ASD files shipped in ``line_lists/asd/`` into ritzline's level and line tables.

The level dump (``levels/<El>_<I|II>.levels.tsv``) and the line export (``lines.csv``) are
copies of published NIST Atomic Spectra Database data (Kramida, Ralchenko, Reader and NIST
ASD Team); see ``line_lists/asd/README.md``.  :func:`asd_levels` turns a level file into the
columns of a shipped ``*.levels.ecsv`` table and :func:`asd_lines` turns the export's rows of
one spectrum into the columns of a ``*.lines.ecsv`` table, each line tied to its two levels.
``line_lists/build_line_lists.py`` builds the shipped tables with these functions, and
:mod:`ritzline.levels` uses them directly for spectra without shipped tables.
"""

from __future__ import annotations

import csv
import functools
import re

import numpy as np
from astropy import units as u
from astropy.table import Table

from ._resources import data_path

__all__ = [
    "ASD_CITATION",
    "EV_TO_CM1",
    "asd_levels",
    "asd_lines",
    "asd_spectra",
    "config_parity",
    "config_text",
    "export_spectra",
    "j_values",
    "term_text",
]

ASD_CITATION = (
    "A. Kramida, Yu. Ralchenko, J. Reader and NIST ASD Team, NIST Atomic Spectra Database "
    "(NIST, Gaithersburg, MD): energy-level dump dated 2025-03-28 and a line export with an "
    "intensity cut, copied into line_lists/asd/"
)
#: cm⁻¹ per eV from hc = 1.239841984e-4 eV cm (CODATA 2018, exact in the 2019 SI), the
#: factor ASD uses between its eV and cm⁻¹ columns.
EV_TO_CM1 = 1.0 / 1.239841984e-4
#: Level uncertainty default (cm⁻¹): one unit in the last quoted digit, at least this.  The
#: dump gives no uncertainties; ASD's own observed Hg I wavelengths scatter about their
#: level-Ritz values by 0.07 cm⁻¹ (84th percentile, line_lists/asd/), Na I by 0.014, Ne I and
#: Ar I by 0.002: one conservative floor serves every spectrum (line_lists/README.md).
LEVEL_ERR_FLOOR = 0.05
#: Published wavelength uncertainty default: one unit in the last quoted digit, at least this.
WAVELENGTH_ERR_FLOOR = 0.0001

_SUBSHELL = re.compile(r"^(\d+)([spdfghik])(\d*)$")
_L_OF = {c: i for i, c in enumerate("spdfghik")}
_UNKNOWN_OFFSET = re.compile(r"\+[a-z]")


def _asd_dir():
    return data_path("line_lists", "asd")


@functools.cache
def asd_spectra() -> dict[str, str]:
    """Spectra with an ASD level file: canonical label ("Fe II") -> file name."""
    out = {}
    for path in sorted((_asd_dir() / "levels").glob("*.levels.tsv")):
        element, ion = path.name.split(".")[0].split("_")
        out[f"{element} {ion}"] = path.name
    return out


# ---- notation --------------------------------------------------------------------------


def term_text(term: str) -> str:
    """ASD term in ritzline's notation: the odd-parity star becomes "°" ("2[3/2]*" -> "2[3/2]°")."""
    return str(term).replace("*", "°")


def config_text(config: str) -> str:
    """ASD configuration in ritzline's notation.

    ASD separates subshells and parent terms with dots ("2s2.2p5.(2P*<3/2>).3s",
    "5d10.6s.6p"); ritzline writes closed or multi-electron subshells apart and runs a lone
    electron into the next one ("2s2 2p5(2P°3/2)3s", "5d10 6s6p"), as printed tables do.
    """
    parts = [p for p in str(config).split(".") if p]
    out = ""
    for k, part in enumerate(parts):
        text = part.replace("*", "°").replace("<", "").replace(">", "")
        if k == 0:
            out = text
            continue
        prev = parts[k - 1]
        glue = ""
        if not (part.startswith("(") or prev.endswith(")")):
            m_prev, m_this = _SUBSHELL.match(prev), _SUBSHELL.match(part)
            lone = m_prev and m_prev.group(3) in ("", "1")
            single = m_this and m_this.group(3) in ("", "1")
            glue = "" if (lone and single) else " "
        out += glue + text
    return out


def config_parity(config: str) -> str:
    """Parity ("odd"/"even") from the subshell occupancies of an ASD configuration; "" when
    no subshell can be read."""
    total, found = 0, False
    for part in str(config).split("."):
        m = _SUBSHELL.match(re.sub(r"<[^>]*>|\?|\s", "", part))
        if m:
            found = True
            total += _L_OF[m.group(2)] * (int(m.group(3)) if m.group(3) else 1)
    if not found:
        return ""
    return "odd" if total % 2 else "even"


def j_values(text: str) -> tuple[float, float, bool]:
    """(J min, J max, resolved) of an ASD J field: "3/2", "1,2", "3/2 or 5/2", "5/2?", "".

    ``resolved`` is True for a single value (tentative "?" included); an empty field gives
    (NaN, NaN, False).
    """
    raw = str(text).replace("?", "").strip()
    if not raw or raw == "---":
        return np.nan, np.nan, False
    values = []
    for piece in re.split(r",|\bor\b", raw):
        piece = piece.strip()
        if not piece:
            continue
        if "/" in piece:
            num, den = piece.split("/")
            values.append(float(num) / float(den))
        else:
            values.append(float(piece))
    return min(values), max(values), len(values) == 1


def _decimals(text: str) -> int:
    return len(text.split(".")[1]) if "." in text else 0


# ---- levels ----------------------------------------------------------------------------


@functools.cache
def _level_rows(label: str) -> tuple[list[list[str]], str]:
    name = asd_spectra().get(label)
    if name is None:
        raise KeyError(label)
    text = (_asd_dir() / "levels" / name).read_text(encoding="utf-8")
    rows = list(csv.reader(text.splitlines()[1:], delimiter="\t", quotechar='"'))
    return [r for r in rows if len(r) >= 6], name


def asd_levels(label: str) -> Table:
    """Every level of one spectrum in the ASD dump, as a ritzline level table.

    Rows left out: the ionisation limit (kept in ``meta["ionization_limit_cm1"]``), levels
    without a numeric energy, and levels given relative to an unknown offset (ASD suffix
    "+x", "+y", ...), which cannot be combined with the other levels.

    Columns: ``energy, energy_err`` (cm⁻¹), ``config, term`` (ritzline notation), ``j`` (as
    published), ``j_value`` (NaN unless one J), ``parity``, ``memory`` (False: published),
    ``derived`` (ASD brackets or parentheses: derived or theoretical), ``asd_config,
    asd_term, asd_level`` (the dump's fields; ``asd_level`` with ASD's prefix and suffix
    marks), ``note``.
    """
    rows, name = _level_rows(label)
    limit = None
    cols: dict[str, list] = {k: [] for k in (
        "energy", "energy_err", "config", "term", "j", "j_value", "parity", "memory",
        "derived", "asd_config", "asd_term", "asd_level", "note")}
    skipped = {"unknown offset": 0, "no energy": 0}
    for config, term, j, prefix, level, suffix, *_ in rows:
        if term == "Limit":  # the lowest of them is the ionisation limit
            try:
                limit = float(level) if limit is None else min(limit, float(level))
            except ValueError:
                pass
            continue
        try:
            energy = float(level)
        except ValueError:
            skipped["no energy"] += 1
            continue
        if _UNKNOWN_OFFSET.search(suffix):
            skipped["unknown offset"] += 1
            continue
        derived = "[" in prefix or "(" in prefix
        tentative = "?" in suffix or "?" in j
        err = 0.0 if energy == 0.0 else max(10.0 ** -_decimals(level), LEVEL_ERR_FLOOR)
        j_min, _, resolved = j_values(j)
        notes = []
        if derived:
            notes.append("ASD value in brackets/parentheses: derived or theoretical")
        if tentative:
            notes.append("tentative in ASD (?)")
        mark = suffix.replace("?", "").replace("]", "").replace(")", "")
        if mark:
            notes.append(f"ASD mark {mark!r}")
        parity = "odd" if "*" in term else ("even" if term else config_parity(config))
        cols["energy"].append(energy)
        cols["energy_err"].append(err)
        cols["config"].append(config_text(config))
        cols["term"].append(term_text(term))
        cols["j"].append(j.replace(" or ", "|"))
        cols["j_value"].append(j_min if resolved else np.nan)
        cols["parity"].append(parity)
        cols["memory"].append(False)
        cols["derived"].append(derived)
        cols["asd_config"].append(config)
        cols["asd_term"].append(term)
        cols["asd_level"].append(f"{prefix}{level}{suffix}")
        cols["note"].append("; ".join(notes))
    table = Table(
        {
            "energy": np.array(cols["energy"], dtype=float) * u.cm**-1,
            "energy_err": np.array(cols["energy_err"], dtype=float) * u.cm**-1,
            **{k: np.array(cols[k], dtype=str) for k in ("config", "term", "j")},
            "j_value": np.array(cols["j_value"], dtype=float),
            "parity": np.array(cols["parity"], dtype=str),
            "memory": np.array(cols["memory"], dtype=bool),
            "derived": np.array(cols["derived"], dtype=bool),
            **{k: np.array(cols[k], dtype=str) for k in
               ("asd_config", "asd_term", "asd_level", "note")},
        }
    )
    table.sort("energy", kind="stable")
    table.meta = {
        "species": label,
        "table": "levels",
        "source": ASD_CITATION,
        "asd_file": f"line_lists/asd/levels/{name}",
        "left_out": {k: v for k, v in skipped.items() if v},
    }
    if limit is not None:
        table.meta["ionization_limit_cm1"] = limit
    return table


# ---- lines -----------------------------------------------------------------------------


@functools.cache
def _export_rows() -> tuple[tuple[str, ...], tuple[dict[str, str], ...]]:
    text = (_asd_dir() / "lines.csv").read_text(encoding="utf-8").splitlines()
    header = tuple(line[1:].strip() for line in text if line.startswith("#"))
    body = [line for line in text if line.strip() and not line.startswith("#")]
    return header, tuple(csv.DictReader(body))


def export_spectra() -> tuple[str, ...]:
    """Spectra with lines in the shipped ASD export ("Ar II", ...)."""
    return tuple(dict.fromkeys(r["species"] for r in _export_rows()[1]))


def _match(levels: Table, energy_ev: str, g: float | None) -> np.ndarray:
    """Indices of the levels an export energy (eV text) can stand for."""
    e = float(energy_ev) * EV_TO_CM1
    tol = max(0.6 * 10.0 ** -_decimals(energy_ev) * EV_TO_CM1, 0.002)
    energy = np.asarray(levels["energy"], dtype=float)
    hit = np.abs(energy - e) <= tol
    if g is not None and np.isfinite(g):
        jv = np.asarray(levels["j_value"], dtype=float)
        hit &= ~np.isfinite(jv) | (2 * jv + 1 == g)
    return np.flatnonzero(hit)


def _best_pair(levels: Table, lowers, uppers, wl_vac: float) -> tuple[int, int]:
    """The lower/upper pair of opposite parity whose Ritz wavelength is closest."""
    energy = np.asarray(levels["energy"], dtype=float)
    parity = np.asarray(levels["parity"])
    best, pair = np.inf, (-1, -1)
    for lo in lowers:
        for up in uppers:
            if parity[lo] == parity[up] or energy[up] <= energy[lo]:
                continue
            off = abs(1e7 / (energy[up] - energy[lo]) - wl_vac)
            if off < best:
                best, pair = off, (int(lo), int(up))
    if pair == (-1, -1) and len(lowers) and len(uppers):  # e.g. a parity-forbidden line
        lo, up = int(lowers[0]), int(uppers[0])
        if energy[up] > energy[lo]:
            pair = (lo, up)
    return pair


def _export_in_vacuum(levels: Table, rows: list[dict[str, str]]) -> bool:
    """Whether the export quotes this spectrum's wavelengths above 200 nm in vacuum.

    The export is meant to give air wavelengths, but some spectra (Ar II) came with vacuum
    ones; the levels tell: the export energies (eV) must reproduce the wavelengths.
    """
    off_air, off_vac = [], []
    energy = np.asarray(levels["energy"], dtype=float)
    for r in rows:
        wl = float(r["wavelength_air_nm"])
        if wl < 200.0:
            continue
        lo = _match(levels, r["E_lower_eV"], None)
        up = _match(levels, r["E_upper_eV"], None)
        if not (lo.size and up.size):
            continue
        sigma = energy[up][:, None] - energy[lo][None, :]
        sigma = sigma[sigma > 0]
        if not sigma.size:
            continue
        from .airvac import air_to_vacuum

        off_air.append(np.min(np.abs(1e7 / sigma - float(air_to_vacuum(wl)))))
        off_vac.append(np.min(np.abs(1e7 / sigma - wl)))
    return bool(off_air) and float(np.median(off_vac)) < float(np.median(off_air))


def asd_lines(label: str, levels: Table | None = None) -> Table:
    """The export's lines of one spectrum as a ritzline observed-line table.

    Each line's lower and upper energies (eV in the export) are tied to levels of
    ``levels`` (default: :func:`asd_levels`): levels within the export's rounding, with the
    upper level's g = 2J + 1, and of the pair the one of opposite parity whose Ritz
    wavelength lies closest to the observed one.  Energies are then the levels' cm⁻¹
    values.  A line whose levels are not found keeps the converted eV energies and says so
    in ``note``.
    """
    from .airvac import air_to_vacuum

    if levels is None:
        levels = asd_levels(label)
    rows = [r for r in _export_rows()[1] if r["species"] == label]
    n = len(rows)
    vacuum_export = _export_in_vacuum(levels, rows)
    cols: dict[str, list] = {k: [] for k in (
        "wavelength", "wavelength_err", "medium", "intensity", "intensity_flags", "aki",
        "ga", "aki_accuracy", "g_upper", "lower_cm1", "upper_cm1", "lower_config", "lower_term",
        "lower_j", "upper_config", "upper_term", "upper_j", "memory", "uncertain",
        "low_precision", "confirmed", "source", "note")}
    for r in rows:
        text = r["wavelength_air_nm"]
        wl = float(text)
        medium = "vacuum" if (wl < 200.0 or vacuum_export) else "air"
        g = float(r["g_upper"]) if r["g_upper"].strip() else np.nan
        ga = float(r["gA_per_s"]) if r["gA_per_s"].strip() else 0.0
        wl_vac = wl if medium == "vacuum" else float(air_to_vacuum(wl))
        lo, up = _best_pair(levels, _match(levels, r["E_lower_eV"], None),
                            _match(levels, r["E_upper_eV"], g), wl_vac)
        notes = [f"ASD export ({r['selection']})"]
        if vacuum_export and wl >= 200.0:
            notes.append("vacuum wavelength in the export (its levels say so)")
        if lo >= 0:
            for side, k in (("lower", lo), ("upper", up)):
                cols[f"{side}_cm1"].append(float(levels["energy"][k]))
                cols[f"{side}_config"].append(str(levels["config"][k]))
                cols[f"{side}_term"].append(str(levels["term"][k]))
                cols[f"{side}_j"].append(str(levels["j"][k]))
        else:
            notes.append("levels not found in the ASD level table: energies converted from eV")
            for side, key in (("lower", "E_lower_eV"), ("upper", "E_upper_eV")):
                cols[f"{side}_cm1"].append(float(r[key]) * EV_TO_CM1)
                cols[f"{side}_config"].append("")
                cols[f"{side}_term"].append("")
                cols[f"{side}_j"].append("")
        intensity = r["rel_intensity"].strip()
        cols["wavelength"].append(wl)
        cols["wavelength_err"].append(max(10.0 ** -_decimals(text), WAVELENGTH_ERR_FLOOR))
        cols["medium"].append(medium)
        cols["intensity"].append(float(intensity) if intensity else np.nan)
        cols["intensity_flags"].append("")
        cols["aki"].append(ga / g if ga > 0 and g > 0 else np.nan)
        cols["ga"].append(ga if ga > 0 else np.nan)
        cols["aki_accuracy"].append(r["accuracy"].strip())
        cols["g_upper"].append(g)
        cols["memory"].append(False)
        cols["uncertain"].append(lo < 0)
        cols["low_precision"].append(_decimals(text) < 3)
        cols["confirmed"].append(True)
        cols["source"].append("ASD")
        cols["note"].append("; ".join(notes))
    table = _lines_table(cols, n)
    table.meta = {
        "species": label,
        "table": "observed lines",
        "source": ASD_CITATION,
        "asd_file": "line_lists/asd/lines.csv",
        "asd_selection": sorted({r["selection"] for r in rows}) or None,
        "wavelength_medium": (
            "vacuum (the export's wavelengths of this spectrum are vacuum ones)"
            if vacuum_export else "standard air from 200 to 2000 nm, vacuum below 200 nm"
        ),
    }
    return table


def _lines_table(cols: dict[str, list], n: int) -> Table:
    def arr(key, dtype):
        return np.array(cols[key], dtype=dtype) if n else np.zeros(0, dtype=dtype)

    text = ("medium", "intensity_flags", "aki_accuracy", "lower_config", "lower_term",
            "lower_j", "upper_config", "upper_term", "upper_j")
    return Table(
        {
            "wavelength": arr("wavelength", float) * u.nm,
            "wavelength_err": arr("wavelength_err", float) * u.nm,
            **{k: arr(k, str) for k in text[:2]},
            "intensity": arr("intensity", float),
            "aki": arr("aki", float) / u.s,
            "ga": arr("ga", float) / u.s,
            "aki_accuracy": arr("aki_accuracy", str),
            "g_upper": arr("g_upper", float),
            "lower_cm1": arr("lower_cm1", float) * u.cm**-1,
            "upper_cm1": arr("upper_cm1", float) * u.cm**-1,
            **{k: arr(k, str) for k in text[3:]},
            **{k: arr(k, bool) for k in ("memory", "uncertain", "low_precision", "confirmed")},
            "source": arr("source", str),
            "note": arr("note", str),
        }
    )
