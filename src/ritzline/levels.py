"""Energy levels → electric-dipole transitions (Ritz wavelengths), blends and lamp definitions.

Level and observed-line tables of the eight default species ship as ECSV in ``line_lists/``
(built from NIST ASD data, see ``line_lists/README.md``); hydrogen is computed from physics.
Any other neutral or singly ionised spectrum is read from the ASD level dump and line export
copied into ``line_lists/asd/``.  :func:`transitions` lists every E1-allowed level pair of
a species with its Ritz wavelength in an explicit medium, joined to the published (observed)
lines;
:func:`blends` groups lines an instrument of a given FWHM cannot resolve;
:func:`load_lamp` and :func:`lamp_lines` give a calibrator the reference lines of a lamp.

Notes
-----
Selection rules (electric dipole): parity changes, ΔJ = 0, ±1, J = 0 ↔ 0 excluded.  A level
whose J is not resolved in the table (a multiplet, e.g. He I 1s4p ³P°) is treated as the set
of its J values |L − S| … L + S, and a pair is kept when any component pair is allowed.

Intercombination (spin-changing) lines are defined between LS terms only (He, Hg, Na); the
jK-coupled levels of the noble gases are never flagged.

Uncertainties: a Ritz wavelength's error comes from the level energy errors in the tables
(documented defaults, see ``line_lists/README.md``: one unit in the last quoted digit, at
least 0.05 cm⁻¹, 0 for the ground level), added in quadrature and propagated as δλ = λ² δσ.

Hydrogen: levels from the Rydberg formula with the reduced-mass Rydberg constant and the
Dirac fine-structure term, CODATA constants from :mod:`astropy.constants`; the Lamb shift
is neglected and taken as the level uncertainty (0.27 cm⁻¹ / n³, the 1s value scaled).
Like the published lists, Lyman-α, Balmer-α and Balmer-β are resolved into fine-structure
components; every other (n, n′) pair is one line whose wavenumber is the difference of the
statistically weighted (2J + 1) centroids of the two shells (as the published unresolved
lines are).
"""

from __future__ import annotations

import functools
import itertools
import json
import re
from collections.abc import Iterable, Sequence
from dataclasses import dataclass

import numpy as np
from astropy import units as u
from astropy.table import Table, vstack

from . import _asd
from ._resources import data_path
from .airvac import air_to_vacuum, vacuum_to_air
from .errors import RitzlineError

__all__ = [
    "LAMP_NAMES",
    "RITZ_TOLERANCE_NM",
    "SPECIES",
    "Lamp",
    "UnreliableLine",
    "allowed_pairs",
    "available_species",
    "blends",
    "j_value",
    "lamp_lines",
    "load_lamp",
    "species_label",
    "transitions",
]

#: Species with shipped tables, canonical labels: the default candidate set of identification
#: (the gases and vapours of discharge and calibration lamps).  :func:`transitions` also
#: takes any other spectrum of the ASD level dump (:func:`available_species`).
SPECIES = ("H I", "He I", "Ne I", "Ar I", "Kr I", "Xe I", "Hg I", "Na I")
#: Lamp definitions shipped in ``calibration/lamps/``.
LAMP_NAMES = ("Hg", "Ne", "Ar", "Kr", "Xe", "He", "Hg+Ar", "Ne+Ar")
#: Largest |Ritz − published| (nm) accepted for an observed line of a calibration lamp.
#: Natural-isotope Hg I lines are broad and ASD's own observed Hg I wavelengths differ from
#: its level-Ritz values by up to 0.0074 nm (496.010 and 567.581 nm, line_lists/asd/), hence
#: the larger bound for Hg I.
RITZ_TOLERANCE_NM = {"default": 0.002, "Hg I": 0.008}
#: Principal quantum numbers computed for hydrogen.
HYDROGEN_N_MAX = 20
#: (n_lower, n_upper) pairs of hydrogen listed as fine-structure components.
HYDROGEN_RESOLVED = ((1, 2), (2, 3), (2, 4))
#: A blended line stays usable for calibration when the blend's weighted centroid lies
#: within this fraction of the FWHM of its own published wavelength.
BLEND_SHIFT_TOLERANCE = 0.02
SOURCE = (
    "NIST Atomic Spectra Database (Kramida, Ralchenko, Reader and NIST ASD Team): levels, "
    "line export with intensities and gA; lines the export lacks from the compiled list "
    "(J. E. Sansonetti and W. C. Martin, Handbook of Basic Atomic Spectroscopic Data, "
    "J. Phys. Chem. Ref. Data 34, 1559 (2005), intended source, values from memory where "
    "marked); see line_lists/README.md"
)
COMPILED = "2026-12-03"

_L_LETTERS = "SPDFGHIKLMNOQ"
_LS_TERM = re.compile(r"^(\d+)([SPDFGHIKLMNOQ])°?$")
_SPECIES_RE = re.compile(r"^\s*([A-Za-z]{1,2})\s*([Ii]*)\s*$")
_ROMAN = {"": "I", "I": "I", "II": "II"}
_LEVEL_MATCH_CM1 = 1e-3
_UNRELIABLE_MATCH_NM = 1e-4


# ---- species names ---------------------------------------------------------------------


def available_species() -> tuple[str, ...]:
    """Every spectrum :func:`transitions` can list: the shipped species, then each neutral
    and singly ionised spectrum of the ASD level dump ("Ag I", "Ag II", ...)."""
    return tuple(dict.fromkeys([*SPECIES, *_asd.asd_spectra()]))


def species_label(name: str) -> str:
    """Canonical label ("Ne I", "Ar II") of a spectrum written "Ne", "Ne I", "NeI", "ne",
    "Ne_I", "Ar II" or "ArII"; a bare element symbol means the neutral atom.

    Raises
    ------
    RitzlineError
        If no level data exist for the spectrum.
    """
    match = _SPECIES_RE.match(str(name).replace("_", " "))
    if match and match.group(2).upper() in _ROMAN:
        label = f"{match.group(1).capitalize()} {_ROMAN[match.group(2).upper()]}"
        if label in SPECIES or label in _asd.asd_spectra():
            return label
    raise RitzlineError(
        f"no line list for species {name!r}; the default species are {', '.join(SPECIES)}, "
        "and any neutral or singly ionised spectrum of the NIST ASD level dump can be named "
        "(write e.g. 'Ne', 'Ne I', 'NeI' or 'Ar II')"
    )


def _species_labels(species: str | Iterable[str]) -> tuple[str, ...]:
    names = [species] if isinstance(species, str) else list(species)
    if not names:
        raise RitzlineError("no species given; name at least one, e.g. 'Ne'")
    labels = []
    for name in names:
        label = species_label(name)
        if label not in labels:
            labels.append(label)
    return tuple(labels)


def _stem(label: str) -> str:
    return label.replace(" ", "_")


# ---- selection rules -------------------------------------------------------------------


def allowed_pairs(
    energy: np.ndarray, j_min: np.ndarray, j_max: np.ndarray, odd: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Index pairs (lower, upper) of E1-allowed transitions between levels.

    Parameters
    ----------
    energy : array of float
        Level energies (any unit); the upper level is the higher one, equal energies give
        no pair.
    j_min, j_max : array of float
        Smallest and largest J of each level (equal for a resolved level).
    odd : array of bool
        Parity of each level (True = odd).

    Returns
    -------
    lower, upper : numpy.ndarray of int
        Parity changes, some component pair has |ΔJ| ≤ 1, and not J = 0 ↔ 0.
    """
    e = np.asarray(energy, dtype=float)
    lo_j, hi_j = np.asarray(j_min, dtype=float), np.asarray(j_max, dtype=float)
    odd = np.asarray(odd, dtype=bool)
    # only odd-even pairs can combine: test that block alone (a quarter of all pairs)
    a, b = np.flatnonzero(odd), np.flatnonzero(~odd)
    gap = np.maximum(lo_j[None, b] - hi_j[a, None], lo_j[a, None] - hi_j[None, b])
    both_zero = (hi_j[a, None] == 0) & (hi_j[None, b] == 0)
    ok = (gap <= 1) & ~both_zero & (e[a, None] != e[None, b])
    ia, ib = np.nonzero(ok)
    first, second = a[ia], b[ib]
    up_first = e[first] > e[second]
    lower = np.where(up_first, second, first)
    upper = np.where(up_first, first, second)
    order = np.lexsort((upper, lower))  # by lower level, then upper level
    return lower[order], upper[order]


def j_value(text: str) -> float:
    """J as a number from its table text ("2", "3/2", tentative "3/2?"); NaN when blank or
    when the text lists several values ("1,2", "3/2|5/2")."""
    return _single_j(text)


def _single_j(text: str) -> float:
    j_min, _, resolved = _asd.j_values(str(text).replace("|", " or "))
    return j_min if resolved else np.nan


def _term_ls(term: str) -> tuple[int, int] | None:
    """(2S+1, L) of an LS term such as "3P°"; None for jK or empty terms."""
    match = _LS_TERM.match(str(term).strip())
    if not match:
        return None
    return int(match.group(1)), _L_LETTERS.index(match.group(2))


def _j_range(j: float, term: str, j_text: str = "") -> tuple[float, float]:
    if np.isfinite(j):
        return j, j
    j_min, j_max, _ = _asd.j_values(str(j_text).replace("|", " or "))
    if np.isfinite(j_min):  # a list ("1,2") or alternatives ("3/2|5/2") of J values
        return j_min, j_max
    ls = _term_ls(term)
    if ls is None:
        return 0.0, np.inf
    spin = (ls[0] - 1) / 2
    return abs(ls[1] - spin), ls[1] + spin


def _g_of(j: float, term: str) -> float:
    if np.isfinite(j):
        return 2 * j + 1
    if "," in str(term):  # not an LS term
        return np.nan
    ls = _term_ls(term)
    return float(ls[0] * (2 * ls[1] + 1)) if ls else np.nan


def _designation(config: str, term: str, j: str) -> str:
    parts = [p for p in (config, term) if p]
    if str(j).strip():
        parts.append(f"J={j}")
    return " ".join(parts)


def _read_only(*arrays: np.ndarray) -> None:
    for a in arrays:
        a.setflags(write=False)


# ---- level sets ------------------------------------------------------------------------


@dataclass(frozen=True)
class _Levels:
    """Arrays describing the levels of one species (read-only)."""

    energy: np.ndarray
    energy_err: np.ndarray
    j: np.ndarray
    j_min: np.ndarray
    j_max: np.ndarray
    odd: np.ndarray
    multiplicity: np.ndarray  # 2S+1 for LS terms, 0 otherwise
    g: np.ndarray
    config: np.ndarray
    term: np.ndarray
    j_text: np.ndarray
    designation: np.ndarray
    parity: np.ndarray
    kind: np.ndarray
    memory: np.ndarray


def _make_levels(energy, energy_err, config, term, j_text, parity, memory) -> _Levels:
    energy = np.asarray(energy, dtype=float)
    j = np.array([_single_j(x) for x in j_text], dtype=float)
    ranges = np.array(
        [_j_range(jv, t, jt) for jv, t, jt in zip(j, term, j_text, strict=True)]
    ).reshape(-1, 2)
    ls = [_term_ls(t) for t in term]
    odd = np.array([p == "odd" for p in parity])
    kinds = np.full(energy.size, "", dtype=object)
    _, upper = allowed_pairs(energy, ranges[:, 0], ranges[:, 1], odd)
    can_decay = np.zeros(energy.size, dtype=bool)
    can_decay[upper] = True
    ground = energy == energy.min()
    kinds[~can_decay] = "metastable"
    kinds[ground] = "ground"
    levels = _Levels(
        energy=energy,
        energy_err=np.asarray(energy_err, dtype=float),
        j=j,
        j_min=ranges[:, 0].copy(),
        j_max=ranges[:, 1].copy(),
        odd=odd,
        multiplicity=np.array([x[0] if x else 0 for x in ls], dtype=int),
        g=np.array([_g_of(jv, t) for jv, t in zip(j, term, strict=True)]),
        config=np.array(config, dtype=object),
        term=np.array(term, dtype=object),
        j_text=np.array(j_text, dtype=object),
        designation=np.array(
            [_designation(c, t, jt) for c, t, jt in zip(config, term, j_text, strict=True)],
            dtype=object,
        ),
        parity=np.array(parity, dtype=object),
        kind=kinds,
        memory=np.asarray(memory, dtype=bool),
    )
    _read_only(*(getattr(levels, f) for f in levels.__dataclass_fields__))
    return levels


_ECSV_TYPES = {"float64": float, "int64": int, "bool": None, "string": str}


def _read_ecsv(name: str) -> Table:
    """A shipped ECSV table with empty cells as "" (text) and NaN (numbers).

    The shipped files are simple ECSV (scalar columns of the types in ``_ECSV_TYPES``), so
    they are parsed here with the C YAML loader and the csv module: several times faster
    than the general astropy reader, which keeps loading every species within the speed
    target.  Anything else falls back to astropy's reader.
    """
    import csv

    import yaml

    path = data_path("line_lists", name)
    lines = path.read_text(encoding="utf-8").splitlines()
    header = [line[2:] for line in lines[1:] if line.startswith("#")]
    body = [line for line in lines if line and not line.startswith("#")]
    head = yaml.load("\n".join(header), Loader=getattr(yaml, "CSafeLoader", yaml.SafeLoader))
    columns = head["datatype"]
    if not lines[0].startswith("# %ECSV") or any(
        c["datatype"] not in _ECSV_TYPES or "subtype" in c for c in columns
    ):
        return _read_ecsv_astropy(path)
    rows = list(csv.reader(body, delimiter=" ", quotechar='"'))
    names = rows[0]
    cells = list(zip(*rows[1:], strict=True)) if len(rows) > 1 else [()] * len(names)
    table = Table()
    for spec, column_name, values in zip(columns, names, cells, strict=True):
        kind = spec["datatype"]
        if kind == "bool":
            data = np.array([v == "True" for v in values], dtype=bool)
        elif kind == "float64":
            data = np.array([float(v) if v != "" else np.nan for v in values], dtype=float)
        elif kind == "int64":
            data = np.array([int(v) for v in values], dtype=np.int64)
        else:
            data = np.array(values, dtype=str) if values else np.zeros(0, dtype=str)
        table[column_name] = data
        if "unit" in spec:
            table[column_name].unit = u.Unit(spec["unit"])
    table.meta = dict(head.get("meta", {}))  # an !!omap arrives as (key, value) pairs
    return table


def _read_ecsv_astropy(path) -> Table:
    table = Table.read(path, format="ascii.ecsv")
    for col in table.itercols():
        if hasattr(col, "mask"):
            fill = "" if col.dtype.kind in "US" else (np.nan if col.dtype.kind == "f" else 0)
            table[col.info.name] = col.filled(fill)
    return table


@functools.cache
def _level_table(label: str) -> Table:
    if label in SPECIES:
        return _read_ecsv(f"{_stem(label)}.levels.ecsv")
    table = _asd.asd_levels(label)
    # a level whose parity neither its term nor its configuration gives cannot be paired
    return table[np.asarray(table["parity"]) != ""]


@functools.cache
def _observed_table(label: str) -> Table:
    if label in SPECIES:
        return _read_ecsv(f"{_stem(label)}.lines.ecsv")
    return _asd.asd_lines(label, _level_table(label))


@functools.cache
def _levels(label: str) -> _Levels:
    t = _level_table(label)
    return _make_levels(
        t["energy"].value,
        t["energy_err"].value,
        list(t["config"]),
        list(t["term"]),
        list(t["j"]),
        list(t["parity"]),
        t["memory"],
    )


def _hydrogen_constants() -> tuple[float, float]:
    """Reduced-mass Rydberg constant of ¹H (cm⁻¹) and the fine-structure constant."""
    from astropy import constants as const

    r_inf = const.Ryd.to_value(u.cm**-1)
    ratio = (const.m_e / const.m_p).decompose().value
    return r_inf / (1.0 + ratio), float(const.alpha.value)


def _dirac_term(n: np.ndarray, j: np.ndarray) -> np.ndarray:
    """Binding energy (cm⁻¹, negative) of hydrogen level (n, j) to order α²."""
    r_m, alpha = _hydrogen_constants()
    n = np.asarray(n, dtype=float)
    j = np.asarray(j, dtype=float)
    return -r_m / n**2 * (1.0 + alpha**2 / n**2 * (n / (j + 0.5) - 0.75))


def _lamb_uncertainty(n) -> np.ndarray:
    return 0.27 / np.asarray(n, dtype=float) ** 3


@functools.cache
def _hydrogen_fine_levels() -> tuple[_Levels, np.ndarray]:
    """Fine-structure levels n ≤ 4 (energies above 1s), and their n."""
    ground = float(_dirac_term(1, 0.5))
    rows = []
    for n in range(1, 5):
        for ell in range(n):
            for j in (ell - 0.5, ell + 0.5):
                if j < 0:
                    continue
                rows.append((n, ell, j))
    n_arr = np.array([r[0] for r in rows])
    ell = np.array([r[1] for r in rows])
    j = np.array([r[2] for r in rows])
    energy = _dirac_term(n_arr, j) - ground
    letters = np.array(list(_L_LETTERS))[ell]
    config = [f"{n}{letter.lower()}" for n, letter in zip(n_arr, letters, strict=True)]
    odd = ell % 2 == 1
    term = [f"2{letter}{'°' if o else ''}" for letter, o in zip(letters, odd, strict=True)]
    j_text = [f"{int(2 * x)}/2" for x in j]
    parity = ["odd" if o else "even" for o in odd]
    err = np.where(n_arr == 1, 0.0, _lamb_uncertainty(n_arr))
    levels = _make_levels(energy, err, config, term, j_text, parity, np.zeros(len(rows), bool))
    _read_only(n_arr)
    return levels, n_arr


@functools.cache
def _hydrogen_centroids() -> np.ndarray:
    """Statistically weighted (2J+1) centroid energy of each shell n = 1..N above 1s, cm⁻¹."""
    ground = float(_dirac_term(1, 0.5))
    out = np.zeros(HYDROGEN_N_MAX + 1)
    for n in range(1, HYDROGEN_N_MAX + 1):
        j = np.arange(0.5, n, 1.0)
        # each j < n - 1/2 occurs for two l values, j = n - 1/2 once
        weight = (2 * j + 1) * np.where(j < n - 0.5, 2, 1)
        out[n] = np.sum(weight * _dirac_term(n, j)) / np.sum(weight) - ground
    out[1] = 0.0
    _read_only(out)
    return out


# ---- the transition table --------------------------------------------------------------


def _ev_per_cm1() -> float:
    from astropy import constants as const

    return float((const.h * const.c / u.cm).to_value(u.eV))


def _empty_columns(n: int) -> dict[str, np.ndarray]:
    nan = np.full(n, np.nan)
    return {
        "sigma": nan.copy(),
        "sigma_err": nan.copy(),
        "lower": np.full(n, "", dtype=object),
        "upper": np.full(n, "", dtype=object),
        "lower_cm1": nan.copy(),
        "upper_cm1": nan.copy(),
        "lower_j": nan.copy(),
        "upper_j": nan.copy(),
        "g_upper": nan.copy(),
        "lower_parity": np.full(n, "", dtype=object),
        "upper_parity": np.full(n, "", dtype=object),
        "intercombination": np.zeros(n, dtype=bool),
        "lower_kind": np.full(n, "", dtype=object),
        "memory": np.zeros(n, dtype=bool),
        "obs_index": np.full(n, -1, dtype=int),
    }


def _pairs_columns(levels: _Levels, lower: np.ndarray, upper: np.ndarray) -> dict:
    cols = _empty_columns(lower.size)
    cols["sigma"] = levels.energy[upper] - levels.energy[lower]
    cols["sigma_err"] = np.hypot(levels.energy_err[upper], levels.energy_err[lower])
    cols["lower"] = levels.designation[lower]
    cols["upper"] = levels.designation[upper]
    cols["lower_cm1"] = levels.energy[lower]
    cols["upper_cm1"] = levels.energy[upper]
    cols["lower_j"] = levels.j[lower]
    cols["upper_j"] = levels.j[upper]
    cols["g_upper"] = levels.g[upper]
    cols["lower_parity"] = levels.parity[lower]
    cols["upper_parity"] = levels.parity[upper]
    m_lo, m_up = levels.multiplicity[lower], levels.multiplicity[upper]
    cols["intercombination"] = (m_lo > 0) & (m_up > 0) & (m_lo != m_up)
    cols["lower_kind"] = levels.kind[lower]
    cols["memory"] = levels.memory[lower] | levels.memory[upper]
    return cols


def _concat(a: dict, b: dict) -> dict:
    return {k: np.concatenate([a[k], b[k]]) for k in a}


def _match_level(levels: _Levels, energy: float, j_text: str) -> int:
    """Index of the level with this energy (and J when given), or -1."""
    if not np.isfinite(energy):
        return -1
    hit = np.abs(levels.energy - energy) < _LEVEL_MATCH_CM1
    j = j_value(j_text)
    if np.isfinite(j):
        hit &= ~np.isfinite(levels.j) | (levels.j == j)
    idx = np.flatnonzero(hit)
    return int(idx[0]) if idx.size else -1


def _observed_vacuum(obs: Table) -> np.ndarray:
    wl = np.asarray(obs["wavelength"], dtype=float)
    air = np.asarray(obs["medium"]) == "air"
    return np.where(air, air_to_vacuum(wl), wl)


def _published_in(obs: Table, medium: str) -> np.ndarray:
    """Published wavelengths expressed in ``medium`` (unchanged where they already are)."""
    wl = np.asarray(obs["wavelength"], dtype=float)
    air = np.asarray(obs["medium"]) == "air"
    if medium == "air":
        return np.where(air, wl, vacuum_to_air(wl))
    return np.where(air, air_to_vacuum(wl), wl)


def _observed_only_columns(obs: Table, rows: list[int], levels: _Levels | None) -> dict:
    cols = _empty_columns(len(rows))
    for k, i in enumerate(rows):
        r = obs[i]
        cols["lower"][k] = _designation(r["lower_config"], r["lower_term"], r["lower_j"])
        cols["upper"][k] = _designation(r["upper_config"], r["upper_term"], r["upper_j"])
        cols["lower_cm1"][k] = r["lower_cm1"]
        cols["upper_cm1"][k] = r["upper_cm1"]
        cols["lower_j"][k] = j_value(r["lower_j"])
        cols["upper_j"][k] = j_value(r["upper_j"])
        cols["g_upper"][k] = _g_of(cols["upper_j"][k], r["upper_term"])
        lo_ls, up_ls = _term_ls(r["lower_term"]), _term_ls(r["upper_term"])
        cols["intercombination"][k] = bool(lo_ls and up_ls and lo_ls[0] != up_ls[0])
        if levels is not None:
            lo = _match_level(levels, float(r["lower_cm1"]), r["lower_j"])
            if lo >= 0:
                cols["lower_kind"][k] = levels.kind[lo]
                cols["lower_parity"][k] = levels.parity[lo]
            up = _match_level(levels, float(r["upper_cm1"]), r["upper_j"])
            if up >= 0:
                cols["upper_parity"][k] = levels.parity[up]
        cols["obs_index"][k] = i
    return cols


def _finish(
    label: str, cols: dict, obs: Table, medium: str, ritz: np.ndarray
) -> dict[str, np.ndarray]:
    """The transition columns of one species in ``medium``, sorted by wavelength."""
    n = cols["sigma"].size
    with np.errstate(divide="ignore", invalid="ignore"):
        vac = 1e7 / cols["sigma"]
        vac_err = vac**2 / 1e7 * cols["sigma_err"]
    oi = cols["obs_index"]
    has_obs = oi >= 0
    obs_vac = np.full(n, np.nan)
    obs_err = np.full(n, np.nan)
    intensity = np.full(n, np.nan)
    aki = np.full(n, np.nan)
    note = np.full(n, "", dtype=object)
    uncertain = np.zeros(n, dtype=bool)
    low_precision = np.zeros(n, dtype=bool)
    confirmed = np.zeros(n, dtype=bool)
    if obs is not None and len(obs):
        all_vac = _observed_vacuum(obs)
        sel = oi[has_obs]
        obs_vac[has_obs] = all_vac[sel]
        obs_err[has_obs] = np.asarray(obs["wavelength_err"], dtype=float)[sel]
        intensity[has_obs] = np.asarray(obs["intensity"], dtype=float)[sel]
        aki[has_obs] = np.asarray(obs["aki"], dtype=float)[sel]
        note[has_obs] = np.asarray(obs["note"], dtype=object)[sel]
        uncertain[has_obs] = np.asarray(obs["uncertain"])[sel]
        low_precision[has_obs] = np.asarray(obs["low_precision"])[sel]
        confirmed[has_obs] = np.asarray(obs["confirmed"])[sel]
        cols["memory"][has_obs] |= np.asarray(obs["memory"])[sel]
        if "g_upper" in obs.colnames:
            # the statistical weight the published intensity and A refer to: an unresolved
            # multiplet's when the published line stands for the whole multiplet
            g_obs = np.asarray(obs["g_upper"], dtype=float)[sel]
            g_rows = np.flatnonzero(has_obs)
            cols["g_upper"][g_rows] = np.where(
                np.isfinite(g_obs), g_obs, cols["g_upper"][g_rows]
            )
    use_obs = ~ritz
    vac = np.where(use_obs, obs_vac, vac)
    vac_err = np.where(use_obs, obs_err, vac_err)
    # the published value itself when it is already in the requested medium
    wl_obs = np.full(n, np.nan)
    if obs is not None and len(obs):
        wl_obs[has_obs] = _published_in(obs, medium)[oi[has_obs]]
    wl = vacuum_to_air(vac) if medium == "air" else vac
    wl = np.where(use_obs, wl_obs, wl)
    ev = _ev_per_cm1()
    columns = {
        "species": np.full(n, label),
        "wavelength": wl,
        "wavelength_err": vac_err,
        "wavelength_obs": wl_obs,
        "wavelength_obs_err": obs_err,
        "wavenumber": 1e7 / vac,
        "lower": cols["lower"],
        "upper": cols["upper"],
        "lower_cm1": cols["lower_cm1"],
        "upper_cm1": cols["upper_cm1"],
        "lower_ev": cols["lower_cm1"] * ev,
        "upper_ev": cols["upper_cm1"] * ev,
        "lower_j": cols["lower_j"],
        "upper_j": cols["upper_j"],
        "g_upper": cols["g_upper"],
        "intensity": intensity,
        "aki": aki,
        "observed": np.isfinite(obs_vac),
        "intercombination": cols["intercombination"],
        "lower_kind": cols["lower_kind"],
        "memory": cols["memory"],
        "ritz": ritz,
        "lower_parity": cols["lower_parity"],
        "upper_parity": cols["upper_parity"],
        "uncertain": uncertain,
        "low_precision": low_precision,
        "confirmed": confirmed,
        "note": note,
    }
    # rows stay in pair order (reordering every column costs more than the table itself);
    # ``_order`` lists them by wavelength for :func:`_table_rows`
    columns["_order"] = np.argsort(wl, kind="stable")
    _read_only(*columns.values())
    return columns


_UNITS = {
    "wavelength": u.nm,
    "wavelength_err": u.nm,
    "wavelength_obs": u.nm,
    "wavelength_obs_err": u.nm,
    "wavenumber": u.cm**-1,
    "lower_cm1": u.cm**-1,
    "upper_cm1": u.cm**-1,
    "lower_ev": u.eV,
    "upper_ev": u.eV,
    "aki": 1 / u.s,
}


def _table_rows(columns: dict[str, np.ndarray], keep: np.ndarray) -> Table:
    """The transition table of the kept rows, sorted by wavelength (text columns as str,
    units attached).

    The species' columns stay plain arrays until here so that a selection (a wavelength
    range, the observed lines) converts only the rows it keeps.
    """
    order = columns["_order"]
    rows = order[keep[order]]
    table = Table()
    for name, values in columns.items():
        if name == "_order":
            continue
        data = values[rows]
        if data.dtype == object:
            data = data.astype(str) if data.size else np.zeros(0, dtype=str)
        table[name] = data * _UNITS[name] if name in _UNITS else data
    return table


def _observed_pairs(levels: _Levels, obs: Table) -> tuple[np.ndarray, np.ndarray]:
    """The E1-allowed level pairs of the published lines, sorted by (lower, upper): the
    pairs an observed-only list needs, without testing every pair of a large table."""
    ends = [
        _match_level(levels, float(obs[f"{side}_cm1"][i]), obs[f"{side}_j"][i])
        for i in range(len(obs))
        for side in ("lower", "upper")
    ]
    sub = np.unique([k for k in ends if k >= 0]).astype(int)
    if sub.size < 2:
        return np.zeros(0, dtype=int), np.zeros(0, dtype=int)
    lo, up = allowed_pairs(levels.energy[sub], levels.j_min[sub], levels.j_max[sub],
                           levels.odd[sub])
    wanted = {(a, b) for a, b in zip(ends[0::2], ends[1::2], strict=True)}
    keep = np.array([(int(sub[a]), int(sub[b])) in wanted for a, b in zip(lo, up, strict=True)],
                    dtype=bool)
    return sub[lo[keep]], sub[up[keep]]


@functools.cache
def _species_pairs(label: str, observed_only: bool) -> tuple:
    """The level pairs of one species and which published line each one is: (lower, upper,
    obs_index, unmatched published rows).  Plain integer arrays, cheap to keep; the columns
    are built later only for the pairs a call asks for."""
    levels = _levels(label)
    obs = _observed_table(label)
    if observed_only:
        lower, upper = _observed_pairs(levels, obs)
    else:
        lower, upper = allowed_pairs(levels.energy, levels.j_min, levels.j_max, levels.odd)
    n_levels = levels.energy.size
    pair_key = lower.astype(np.int64) * n_levels + upper  # both give them sorted
    obs_index = np.full(lower.size, -1, dtype=int)
    unmatched = []
    for i in range(len(obs)):
        lo = _match_level(levels, float(obs["lower_cm1"][i]), obs["lower_j"][i])
        up = _match_level(levels, float(obs["upper_cm1"][i]), obs["upper_j"][i])
        k = -1
        if lo >= 0 and up >= 0:
            key = lo * n_levels + up
            pos = int(np.searchsorted(pair_key, key))
            k = pos if pos < pair_key.size and pair_key[pos] == key else -1
        if k >= 0 and obs_index[k] < 0:
            obs_index[k] = i
        else:
            unmatched.append(i)
    _read_only(lower, upper, obs_index)
    return lower, upper, obs_index, tuple(unmatched)


#: Margin (nm) around a requested range when pairs are preselected by vacuum wavelength
#: (the air-vacuum difference is below 0.3 nm from 200 to 1100 nm, common practice).
_PRESELECT_MARGIN_NM = 1.0


def _build_species(
    label: str, medium: str, observed_only: bool, limits: tuple[float, float] | None = None
) -> dict[str, np.ndarray]:
    if label == "H I":
        return _build_hydrogen(medium)
    levels = _levels(label)
    obs = _observed_table(label)
    lower, upper, obs_index, unmatched = _species_pairs(label, observed_only)
    if limits is not None:  # only pairs near the range (and every published line) are built
        with np.errstate(divide="ignore"):
            vac = 1e7 / (levels.energy[upper] - levels.energy[lower])
        near = (vac >= limits[0] - _PRESELECT_MARGIN_NM) & (vac <= limits[1] * 1.001
                                                           + _PRESELECT_MARGIN_NM)
        near |= obs_index >= 0
        lower, upper, obs_index = lower[near], upper[near], obs_index[near]
    cols = _pairs_columns(levels, lower, upper)
    cols["obs_index"] = obs_index.copy()
    ritz = np.ones(lower.size, dtype=bool)
    if unmatched:
        cols = _concat(cols, _observed_only_columns(obs, list(unmatched), levels))
        ritz = np.concatenate([ritz, np.zeros(len(unmatched), dtype=bool)])
    return _finish(label, cols, obs, medium, ritz)


def _shell(config: str) -> int:
    match = re.match(r"^\s*(\d+)", str(config))
    return int(match.group(1)) if match else -1


def _build_hydrogen(medium: str) -> dict[str, np.ndarray]:
    fine, fine_n = _hydrogen_fine_levels()
    lower, upper = allowed_pairs(fine.energy, fine.j_min, fine.j_max, fine.odd)
    shells = zip(fine_n[lower], fine_n[upper], strict=True)
    keep = np.array([(int(a), int(b)) in HYDROGEN_RESOLVED for a, b in shells], dtype=bool)
    cols = _pairs_columns(fine, lower[keep], upper[keep])
    fine_keys = [
        (fine.config[a], fine.j_text[a], fine.config[b], fine.j_text[b])
        for a, b in zip(lower[keep], upper[keep], strict=True)
    ]
    centroid = _hydrogen_centroids()
    pairs = [
        (a, b)
        for a in range(1, HYDROGEN_N_MAX)
        for b in range(a + 1, HYDROGEN_N_MAX + 1)
        if (a, b) not in HYDROGEN_RESOLVED
    ]
    na = np.array([p[0] for p in pairs])
    nb = np.array([p[1] for p in pairs])
    merged = _empty_columns(len(pairs))
    merged["sigma"] = centroid[nb] - centroid[na]
    merged["sigma_err"] = np.hypot(
        np.where(na == 1, 0.0, _lamb_uncertainty(na)), _lamb_uncertainty(nb)
    )
    merged["lower"] = np.array([f"n={a}" for a in na], dtype=object)
    merged["upper"] = np.array([f"n={b}" for b in nb], dtype=object)
    merged["lower_cm1"] = centroid[na]
    merged["upper_cm1"] = centroid[nb]
    merged["g_upper"] = 2.0 * nb**2
    merged["lower_kind"] = np.where(na == 1, "ground", "").astype(object)
    cols = _concat(cols, merged)
    n_rows = cols["sigma"].size
    obs = _observed_table("H I")
    key_index = {key: k for k, key in enumerate(fine_keys)}
    merged_index = {(a, b): len(fine_keys) + k for k, (a, b) in enumerate(pairs)}
    for i in range(len(obs)):
        r = obs[i]
        key = (r["lower_config"], r["lower_j"], r["upper_config"], r["upper_j"])
        shells = (_shell(r["lower_config"]), _shell(r["upper_config"]))
        if key in key_index:
            cols["obs_index"][key_index[key]] = i
        elif str(r["lower_config"]).isdigit() and shells in merged_index:
            cols["obs_index"][merged_index[shells]] = i
    ritz = np.ones(n_rows, dtype=bool)
    return _finish("H I", cols, obs, medium, ritz)


def _clear_caches() -> None:
    """Forget every loaded table (benchmarks use this to time a cold start)."""
    for loader in (
        _level_table,
        _observed_table,
        _levels,
        _hydrogen_fine_levels,
        _hydrogen_centroids,
        _species_transitions,
        _species_table,
        _species_pairs,
        _lamp_files,
        _lamp_lines,
    ):
        loader.cache_clear()
    for loader in (_asd.asd_spectra, _asd._level_rows, _asd._export_rows):
        loader.cache_clear()


@functools.lru_cache(maxsize=256)
def _species_transitions(
    label: str,
    medium: str,
    observed_only: bool = False,
    limits: tuple[float, float] | None = None,
) -> dict[str, np.ndarray]:
    """The transitions of one species as read-only column arrays (see :func:`_finish`):
    every allowed pair, or only those of published lines (calibration and identification
    need no more), and with ``limits`` only those near that range: a level table of several
    hundred levels has tens of thousands of pairs, most far outside any spectrum."""
    return _build_species(label, medium, observed_only, limits)


@functools.lru_cache(maxsize=256)
def _species_table(
    label: str, medium: str, observed_only: bool, limits: tuple[float, float] | None
) -> Table:
    """:func:`_species_transitions` as a table (sorted by wavelength); callers slice it."""
    columns = _species_transitions(label, medium, observed_only, limits)
    return _table_rows(columns, np.ones(columns["wavelength"].size, dtype=bool))


def _check_medium(medium: str) -> str:
    if medium not in ("air", "vacuum"):
        raise RitzlineError(f"medium must be 'air' or 'vacuum', not {medium!r}")
    return medium


def _range_nm(wavelength_range) -> tuple[float, float] | None:
    if wavelength_range is None:
        return None
    try:
        lo, hi = wavelength_range
    except (TypeError, ValueError):
        raise RitzlineError(
            f"wavelength_range must be a (min, max) pair in nm, not {wavelength_range!r}"
        ) from None
    vals = []
    for v in (lo, hi):
        if hasattr(v, "unit"):
            v = v.to_value(u.nm, equivalencies=u.spectral())
        vals.append(float(v))
    if not vals[0] < vals[1]:
        raise RitzlineError(f"wavelength_range min must be below max, got {vals[0]}–{vals[1]} nm")
    return vals[0], vals[1]


def transitions(
    species: str | Sequence[str],
    *,
    wavelength_range=None,
    medium: str = "air",
    observed_only: bool = False,
    intercombination: bool = True,
    min_intensity: float | None = None,
) -> Table:
    """Electric-dipole transitions of one or more species, with Ritz wavelengths.

    Parameters
    ----------
    species : str or sequence of str
        "Ne", "Ne I", "NeI", "Ar II" or a list of them: the shipped species
        (:data:`SPECIES`) or any spectrum of the ASD level dump (:func:`available_species`),
        whose observed lines are those of the ASD line export (none for most spectra;
        ``intensity`` is NaN, unknown, wherever ASD gives none).
    wavelength_range : (float, float) or (Quantity, Quantity), optional
        Keep lines with ``min <= wavelength <= max``, nm in ``medium``.
    medium : {"air", "vacuum"}
        Medium of the ``wavelength`` columns (air: standard air, Peck & Reeder 1972, with
        air = vacuum below 200 nm).
    observed_only : bool
        Keep only level pairs listed in the published observed-line table.
    intercombination : bool
        Keep spin-changing lines between LS terms (e.g. Hg I 253.65 nm).
    min_intensity : float, optional
        Keep only lines with a published relative intensity ≥ this value.

    Returns
    -------
    astropy.table.Table
        Sorted by wavelength.  Columns: ``species, wavelength, wavelength_err,
        wavelength_obs, wavelength_obs_err`` (nm), ``wavenumber`` (vacuum, cm⁻¹),
        ``lower, upper`` (designations), ``lower_cm1, upper_cm1``, ``lower_ev``, ``upper_ev``
        (level energies above the ground level; ``upper_ev`` is the least electron energy
        that excites the upper level directly from the ground),
        ``lower_j, upper_j, g_upper, intensity, aki`` (s⁻¹), flags ``observed,
        intercombination, lower_kind, memory``, and ``ritz`` (wavelength computed from
        levels; False for observed lines whose levels are not tabulated, where
        ``wavelength`` is the published value), ``lower_parity, upper_parity``,
        ``uncertain, low_precision, confirmed, note`` (from the source notes).

    Examples
    --------
    >>> t = transitions("Hg", wavelength_range=(253.6, 253.7), observed_only=True)
    >>> f"{t['wavelength'][0]:.4f} {t['upper'][0]}"
    '253.6521 5d10 6s6p 3P° J=1'
    >>> cu = transitions("Cu I", wavelength_range=(324.75, 324.76))  # no ASD export lines
    >>> f"{cu['wavelength'][0]:.3f} {cu['intensity'][0]}"
    '324.754 nan'
    """
    labels = _species_labels(species)
    medium = _check_medium(medium)
    limits = _range_nm(wavelength_range)
    parts = []
    for label in labels:
        t = _species_table(label, medium, bool(observed_only), limits)
        wl = np.asarray(t["wavelength"])
        keep = np.ones(wl.size, dtype=bool)
        if limits is not None:
            keep &= (wl >= limits[0]) & (wl <= limits[1])
        if observed_only:
            keep &= np.asarray(t["observed"])
        if not intercombination:
            keep &= ~np.asarray(t["intercombination"])
        if min_intensity is not None:
            with np.errstate(invalid="ignore"):
                keep &= np.asarray(t["intensity"]) >= float(min_intensity)
        parts.append(t[keep])
    table = parts[0] if len(parts) == 1 else vstack(parts, metadata_conflicts="silent")
    if len(parts) > 1:
        table.sort("wavelength")
    from . import __version__

    table.meta = {
        "species": list(labels),
        "medium": medium,
        "wavelength_range_nm": list(limits) if limits else None,
        "observed_only": observed_only,
        "intercombination": intercombination,
        "min_intensity": min_intensity,
        "source": SOURCE,
        "compiled": COMPILED,
        "ritzline_version": __version__,
        "selection_rules": "E1: parity change, dJ = 0, +-1, not J=0-0",
        "hydrogen": (
            "Rydberg (reduced mass) + Dirac fine structure, CODATA (astropy.constants); "
            "Lamb shift neglected; fine structure resolved for (1,2), (2,3), (2,4), other "
            "(n, n') merged at the (2J+1)-weighted shell centroids"
        ),
    }
    return table


# ---- blends ----------------------------------------------------------------------------


def _group_ids(wavelength_sorted: np.ndarray, separation: float) -> np.ndarray:
    """Group index of each sorted wavelength; a new group starts at a gap ≥ separation."""
    if wavelength_sorted.size == 0:
        return np.zeros(0, dtype=int)
    gaps = np.diff(wavelength_sorted)
    return np.concatenate([[0], np.cumsum(gaps >= separation)])


def _blend_weights(intensity: np.ndarray, group: np.ndarray, mixed: np.ndarray) -> np.ndarray:
    """Centroid weights: published intensity, unknown = 0 when a group member has one, equal
    weights in groups with no known intensity or with several species (scales differ)."""
    known = np.isfinite(intensity) & (intensity > 0)
    n_groups = int(group.max()) + 1 if group.size else 0
    any_known = np.bincount(group, weights=known, minlength=n_groups) > 0
    w = np.where(known, intensity, 0.0)
    equal = ~any_known[group] | mixed[group]
    return np.where(equal, 1.0, w)


def _blend_groups(table: Table, fwhm_nm: float, fraction: float):
    if not fwhm_nm > 0 or not fraction > 0:
        raise RitzlineError(f"fwhm_nm and fraction must be positive, got {fwhm_nm}, {fraction}")
    wl = np.asarray(table["wavelength"], dtype=float)
    order = np.argsort(wl, kind="stable")
    group_sorted = _group_ids(wl[order], fraction * fwhm_nm)
    group = np.empty_like(group_sorted)
    group[order] = group_sorted
    n_groups = int(group.max()) + 1 if group.size else 0
    species = (
        np.asarray(table["species"]).astype(str)
        if "species" in table.colnames
        else np.full(len(wl), "")
    )
    codes = np.unique(species, return_inverse=True)[1].ravel()
    s_min = np.full(n_groups, np.iinfo(int).max)
    s_max = np.full(n_groups, -1)
    np.minimum.at(s_min, group, codes)
    np.maximum.at(s_max, group, codes)
    mixed = s_min != s_max
    intensity = (
        np.asarray(table["intensity"], dtype=float)
        if "intensity" in table.colnames
        else np.full(len(wl), np.nan)
    )
    weight = _blend_weights(intensity, group, mixed)
    total = np.bincount(group, weights=weight, minlength=n_groups)
    centroid = np.bincount(group, weights=weight * wl, minlength=n_groups) / total
    return wl, group, n_groups, centroid, intensity, species, order


def blends(table: Table, fwhm_nm: float, *, fraction: float = 0.5) -> Table:
    """Group lines an instrument of resolution ``fwhm_nm`` cannot separate.

    Lines are sorted by wavelength and chained into one blend while consecutive lines are
    closer than ``fraction · fwhm_nm``.

    Parameters
    ----------
    table : astropy.table.Table
        Needs ``wavelength`` (nm); ``intensity`` and ``species`` are used when present
        (e.g. the output of :func:`transitions`).
    fwhm_nm : float
        Instrument FWHM, nm (same medium as the table).
    fraction : float
        Separation, as a fraction of the FWHM, below which lines blend.

    Returns
    -------
    astropy.table.Table
        One row per blend (single lines included, ``n_members = 1``), sorted by
        wavelength: ``wavelength`` (weighted centroid), ``wavelength_min``,
        ``wavelength_max``, ``n_members``, ``intensity`` (sum of published intensities,
        NaN if none), ``species``, ``members`` ("species wavelength" list) and
        ``member_rows`` (row indices into ``table``).  Centroid weights are the published
        intensities (a member without one weighs 0 if another member has one); groups with
        no intensities, or with several species (whose scales are not comparable), use equal
        weights.
    """
    if hasattr(fwhm_nm, "unit"):
        fwhm_nm = fwhm_nm.to_value(u.nm)
    wl, group, n_groups, centroid, intensity, species, order = _blend_groups(
        table, float(fwhm_nm), float(fraction)
    )
    n_members = np.bincount(group, minlength=n_groups)
    lo = np.full(n_groups, np.inf)
    hi = np.full(n_groups, -np.inf)
    np.minimum.at(lo, group, wl)
    np.maximum.at(hi, group, wl)
    known = np.isfinite(intensity)
    isum = np.bincount(group, weights=np.where(known, intensity, 0.0), minlength=n_groups)
    has_known = np.bincount(group, weights=known, minlength=n_groups) > 0
    sorted_groups = group[order]
    bounds = np.flatnonzero(np.diff(np.concatenate([[-1], sorted_groups, [n_groups]])))
    members, rows, spec = [], [], []
    for start, stop in itertools.pairwise(bounds):
        idx = order[start:stop]
        members.append("; ".join(f"{species[i]} {wl[i]:.5f}".strip() for i in idx))
        rows.append(",".join(str(i) for i in idx))
        spec.append(", ".join(dict.fromkeys(species[idx])))
    out = Table(
        {
            "wavelength": centroid * u.nm,
            "wavelength_min": lo * u.nm,
            "wavelength_max": hi * u.nm,
            "n_members": n_members,
            "intensity": np.where(has_known, isum, np.nan),
            "species": spec,
            "members": members,
            "member_rows": rows,
        }
    )
    out.meta = {
        "fwhm_nm": float(fwhm_nm),
        "fraction": float(fraction),
        "medium": table.meta.get("medium"),
    }
    return out


# ---- lamps -----------------------------------------------------------------------------


@dataclass(frozen=True)
class UnreliableLine:
    """A lamp line a calibrator should not use, and why."""

    species: str
    wavelength: float
    medium: str
    reason: str


@dataclass(frozen=True)
class Lamp:
    """A reference lamp: its emitting species, the lines known to be unreliable, and per
    species the least listed intensity of a line the lamp shows (``min_intensity``, pairs
    of species and value; lines of unknown intensity are kept)."""

    name: str
    species: tuple[str, ...]
    unreliable: tuple[UnreliableLine, ...] = ()
    description: str = ""
    safety: str = ""
    min_intensity: tuple[tuple[str, float], ...] = ()


def _lamp_key(species: Iterable[str]) -> frozenset[str]:
    return frozenset(species_label(s) for s in species)


@functools.cache
def _lamp_files() -> dict[frozenset[str], dict]:
    folder = data_path("calibration", "lamps")
    raw = {}
    for path in sorted(folder.glob("*.json")):
        data = json.loads(path.read_text(encoding="utf-8"))
        raw[data["name"].lower()] = data
    out = {}
    for data in raw.values():
        unreliable = list(data.get("unreliable", []))
        min_intensity = {}
        for inc in data.get("include", []):
            unreliable = list(raw[inc.lower()].get("unreliable", [])) + unreliable
            min_intensity.update(raw[inc.lower()].get("min_intensity", {}))
        min_intensity.update(data.get("min_intensity", {}))
        entry = dict(data, unreliable=unreliable, min_intensity=min_intensity)
        out[_lamp_key(data["species"])] = entry
    return out


def _lamp_from_entry(entry: dict) -> Lamp:
    return Lamp(
        name=entry["name"],
        species=tuple(species_label(s) for s in entry["species"]),
        unreliable=tuple(
            UnreliableLine(
                species=species_label(x["species"]),
                wavelength=float(x["wavelength_nm"]),
                medium=x.get("medium", "air"),
                reason=x["reason"],
            )
            for x in entry["unreliable"]
        ),
        description=entry.get("description", ""),
        safety=entry.get("safety", ""),
        min_intensity=tuple(
            (species_label(k), float(v)) for k, v in entry.get("min_intensity", {}).items()
        ),
    )


def load_lamp(name: str | Sequence[str] | Lamp) -> Lamp:
    """The lamp definition for a lamp name or a set of species.

    Parameters
    ----------
    name : str or sequence of str or Lamp
        "Hg", "Ne", "Ar", "Kr", "Xe", "He", "Hg+Ar", "Ne+Ar" (case-insensitive, any order
        of the "+"-joined parts), or species such as ``("Ne", "Ar")``.  A species set with
        no lamp file gives a lamp with the unreliable lines of the single-species lamps.

    Returns
    -------
    Lamp
    """
    if isinstance(name, Lamp):
        return name
    parts = re.split(r"[+,/ ]+", name.strip()) if isinstance(name, str) else list(name)
    parts = [p for p in parts if str(p).strip()]
    if not parts:
        raise RitzlineError(f"empty lamp name {name!r}; use one of {', '.join(LAMP_NAMES)}")
    try:
        key = _lamp_key(parts)
    except RitzlineError as exc:
        raise RitzlineError(
            f"unknown lamp {name!r}: {exc}; lamps: {', '.join(LAMP_NAMES)}"
        ) from None
    files = _lamp_files()
    if key in files:
        return _lamp_from_entry(files[key])
    unreliable, min_intensity = [], []
    order = available_species().index
    for label in sorted(key, key=order):
        single = files.get(frozenset([label]))
        if single:
            unreliable.extend(_lamp_from_entry(single).unreliable)
            min_intensity.extend(_lamp_from_entry(single).min_intensity)
    labels = tuple(sorted(key, key=order))
    return Lamp(
        name="+".join(s.split()[0] for s in labels),
        species=labels,
        unreliable=tuple(unreliable),
        description="species set without a lamp file",
        min_intensity=tuple(min_intensity),
    )


def _ritz_tolerance(label: str) -> float:
    return RITZ_TOLERANCE_NM.get(label, RITZ_TOLERANCE_NM["default"])


def lamp_lines(
    name: str | Sequence[str] | Lamp,
    *,
    wavelength_range=None,
    medium: str = "air",
    fwhm_nm: float | None = None,
    fraction: float = 0.5,
) -> Table:
    """Reference lines a calibrator should use for a lamp, with why some should not be used.

    Parameters
    ----------
    name : str or sequence of str or Lamp
        Lamp name or species set (see :func:`load_lamp`).
    wavelength_range : (float, float), optional
        nm in ``medium``.
    medium : {"air", "vacuum"}
    fwhm_nm : float, optional
        Instrument FWHM (nm); when given, lines in an unresolved blend whose weighted
        centroid lies more than ``BLEND_SHIFT_TOLERANCE · fwhm_nm`` from their own
        published wavelength are marked unusable.
    fraction : float
        Blend separation as a fraction of the FWHM (see :func:`blends`).

    Returns
    -------
    astropy.table.Table
        The observed lines of the lamp's species, sorted by wavelength: ``species,
        wavelength`` (published, nm in ``medium``), ``wavelength_err``, ``intensity`` (NaN
        where unknown), ``designation`` ("lower – upper", "" if unclassified), ``lower,
        upper, upper_ev, aki, ritz_wavelength`` (NaN without levels), ``memory``,
        ``usable`` and ``reason`` ("; "-separated, "" when usable), ``note``.
    """
    if fwhm_nm is not None and hasattr(fwhm_nm, "unit"):
        fwhm_nm = fwhm_nm.to_value(u.nm)
    return _lamp_lines(
        load_lamp(name),
        _range_nm(wavelength_range),
        _check_medium(medium),
        None if fwhm_nm is None else float(fwhm_nm),
        float(fraction),
    ).copy()


@functools.cache
def _lamp_lines(
    lamp: Lamp,
    limits: tuple[float, float] | None,
    medium: str,
    fwhm_nm: float | None,
    fraction: float,
) -> Table:
    t = transitions(lamp.species, medium=medium, observed_only=True)
    t = t[np.isfinite(np.asarray(t["wavelength_obs"], dtype=float))]
    if lamp.min_intensity:
        floor = dict(lamp.min_intensity)
        least = np.array([floor.get(s, -np.inf) for s in np.asarray(t["species"])])
        intensity = np.asarray(t["intensity"], dtype=float)
        with np.errstate(invalid="ignore"):
            t = t[~(intensity < least)]  # unknown intensities stay
    wl = np.asarray(t["wavelength_obs"], dtype=float)
    order = np.argsort(wl, kind="stable")
    t = t[order]
    wl = wl[order]
    n = len(t)
    species = np.asarray(t["species"]).astype(str)
    ritz = np.where(np.asarray(t["ritz"]), np.asarray(t["wavelength"], dtype=float), np.nan)
    reasons: list[list[str]] = [[] for _ in range(n)]

    air_wl = wl if medium == "air" else vacuum_to_air(wl)
    for bad in lamp.unreliable:
        bad_air = bad.wavelength if bad.medium == "air" else vacuum_to_air(bad.wavelength)
        hit = (species == bad.species) & (np.abs(air_wl - bad_air) < _UNRELIABLE_MATCH_NM)
        for i in np.flatnonzero(hit):
            reasons[i].append(bad.reason)

    uncertain = np.asarray(t["uncertain"])
    low_precision = np.asarray(t["low_precision"])
    memory = np.asarray(t["memory"])
    confirmed = np.asarray(t["confirmed"])
    has_ritz = np.isfinite(ritz)
    tol = np.array([_ritz_tolerance(s) for s in species])
    with np.errstate(invalid="ignore"):
        ritz_off = np.abs(ritz - wl)
    for i in range(n):
        if uncertain[i]:
            reasons[i].append("designation or level uncertain/inferred in the source notes")
        if low_precision[i]:
            reasons[i].append("low-precision published wavelength")
        if not has_ritz[i] and memory[i] and not confirmed[i]:
            reasons[i].append("from memory without level energies: no Ritz cross-check")
        if has_ritz[i] and ritz_off[i] > tol[i]:
            reasons[i].append(f"Ritz and published wavelengths differ by {ritz_off[i]:.4f} nm")

    if fwhm_nm is not None:
        probe = Table(
            {"wavelength": wl, "intensity": np.asarray(t["intensity"]), "species": species}
        )
        _, group, _, centroid, _, _, _ = _blend_groups(probe, fwhm_nm, fraction)
        size = np.bincount(group)
        shift = np.abs(centroid[group] - wl)
        for i in np.flatnonzero((size[group] > 1) & (shift > BLEND_SHIFT_TOLERANCE * fwhm_nm)):
            partners = [
                f"{species[k]} {wl[k]:.4f}" for k in np.flatnonzero(group == group[i]) if k != i
            ]
            reasons[i].append(f"unresolved blend at FWHM {fwhm_nm:g} nm with {', '.join(partners)}")

    designation = np.array(
        [f"{a} – {b}" if (a or b) else "" for a, b in zip(t["lower"], t["upper"], strict=True)],
        dtype=object,
    )
    reason = np.array(["; ".join(r) for r in reasons], dtype=object)
    out = Table(
        {
            "species": species,
            "wavelength": wl * u.nm,
            "wavelength_err": np.asarray(t["wavelength_obs_err"], dtype=float) * u.nm,
            "intensity": np.asarray(t["intensity"], dtype=float),
            "designation": designation.astype(str),
            "lower": np.asarray(t["lower"]).astype(str),
            "upper": np.asarray(t["upper"]).astype(str),
            "upper_ev": np.asarray(t["upper_ev"], dtype=float) * u.eV,
            "aki": np.asarray(t["aki"], dtype=float) / u.s,
            "ritz_wavelength": ritz * u.nm,
            "memory": memory,
            "usable": reason == "",
            "reason": reason.astype(str),
            "note": np.asarray(t["note"]).astype(str),
        }
    )
    if limits is not None:
        out = out[(wl >= limits[0]) & (wl <= limits[1])]
    from . import __version__

    out.meta = {
        "lamp": lamp.name,
        "species": list(lamp.species),
        "medium": medium,
        "fwhm_nm": fwhm_nm,
        "blend_fraction": fraction,
        "blend_shift_tolerance": BLEND_SHIFT_TOLERANCE,
        "wavelength_range_nm": list(limits) if limits else None,
        "source": SOURCE,
        "compiled": COMPILED,
        "ritzline_version": __version__,
        "safety": lamp.safety,
    }
    return out
