"""Identify the atomic transitions behind measured emission lines, and what they say about
the excited levels: assignments with probabilities, species present, excited upper levels,
relative populations and a Boltzmann plot.

The wavelength axis is not taken as exact: its offset and tilt are found first, within a
stated uncertainty, and the candidates are matched on the corrected axis.  The model (see
:func:`identify_lines`, Notes) treats the measured lines as a marked Poisson process in
(wavelength, flux): every candidate transition of a present species contributes
its expected number of detections and a narrow density at its Ritz wavelength, unknown lines
contribute a flat density, and second-order images of present lines contribute at twice
their wavelength.  Assignment probabilities are the posterior shares of those densities at
each measured line; species are kept only when the lines they explain outweigh the lines they
predict but which are not there.
"""

from __future__ import annotations

import functools
import os
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy.special import log_ndtr, ndtr

from .errors import RitzlineError
from .levels import SPECIES as _SHIPPED
from .peaks import BAND_INCLUDED

__all__ = [
    "BoltzmannPlot",
    "Identification",
    "IdentifyOptions",
    "boltzmann_plot",
    "identify_lines",
    "read_response",
]

#: Every species shipped in ``line_lists/``: what :func:`identify_lines` considers by default.
SHIPPED_SPECIES = tuple(_SHIPPED)

#: Boltzmann constant in eV/K (CODATA 2018, exact by the 2019 SI definition).
K_B_EV = 8.617333262e-5

#: h c in eV cm (CODATA 2018, exact): converts cm-1 to eV.
HC_EV_CM = 1.239841984e-4

_LOG_SQRT_2PI = 0.5 * np.log(2.0 * np.pi)
_KIND_INTENSITY, _KIND_GA, _KIND_NONE = 0, 1, 2


@dataclass(frozen=True)
class IdentifyOptions:
    """Tuning knobs of the scoring model, grouped so :func:`identify_lines` stays short.

    Attributes
    ----------
    strength_scatter : float
        Natural-log scatter of an observed line flux about ``scale x published strength``
        (level populations in a discharge differ from the conditions of the published
        intensities; 1.0 = a factor of e).
    branch_scatter : float
        Natural-log scatter of one line relative to another line from the same upper level
        (branching ratios are fixed by the atom; only the tables and the response scatter).
    window_sigma : float
        Candidates farther than this many combined standard deviations are not considered
        (beyond the outlier width below).
    blend_fraction : float
        Candidate lines of one species closer than this fraction of the FWHM are one
        candidate group (an unresolved blend).
    species_threshold : float
        Log-likelihood ratio a species must reach to be declared present.
    max_line_evidence : float
        Most that one measured line can add to a species' log-likelihood ratio: a single
        coincidence cannot make a species present (below ``species_threshold``).
    energy_prior : float
        Prior factor on lines whose upper level lies above ``max_electron_energy``.
    unknown_fraction : float
        Starting guess of the fraction of measured lines that belong to no listed species.
    second_order : bool
        Consider second-order images of lines at twice their wavelength.
    min_probability : float
        Assignments below this posterior probability are reported as unidentified.
    systematic_nm : float
        Extra wavelength uncertainty (nm) added in quadrature to every line.
    observed_only : bool
        Use only transitions published as observed lines (not every allowed Ritz line).
    fit_shift : bool
        Correct the wavelength axis (offset + tilt, searched within the axis uncertainty)
        before the candidate search.
    position_floor : float
        Position uncertainty (fraction of the FWHM) added in quadrature to every line after
        the axis correction: line-shape asymmetry, unresolved neighbours, list errors.
    branch_outlier : float
        Probability that a sibling line (same upper level) says nothing about a candidate:
        missing from the spectrum, blended, or listed with an intensity that is no branching
        ratio.  Bounds how much one sibling can count against a candidate.
    flux_outlier : float
        Probability that the flux of a blend of listed lines is unrelated to their summed
        published strength (some members missing from the spectrum).
    outlier_fraction, outlier_width : float
        Heavy tail of the position likelihood: a fraction ``outlier_fraction`` of true
        assignments sits anywhere within ``outlier_width`` x FWHM of the listed line (pulled
        by a neighbour the finder did not separate).
    n_iter : int
        Iterations of the scale/assignment updates for each species set.
    """

    strength_scatter: float = 1.0
    branch_scatter: float = 0.5
    window_sigma: float = 5.0
    blend_fraction: float = 0.5
    species_threshold: float = 8.0
    max_line_evidence: float = 6.0
    energy_prior: float = 0.02
    unknown_fraction: float = 0.2
    second_order: bool = True
    min_probability: float = 0.5
    systematic_nm: float = 0.0
    observed_only: bool = True
    fit_shift: bool = True
    position_floor: float = 0.03
    outlier_fraction: float = 0.05
    branch_outlier: float = 0.2
    flux_outlier: float = 0.05
    outlier_width: float = 0.3
    n_iter: int = 6


@dataclass(frozen=True)
class BoltzmannPlot:
    """Points and fit of a Boltzmann plot, ln(I λ / (g A)) against upper-level energy.

    ``corrected`` says whether the intensities were divided by a relative spectral response;
    only then are ``temperature_k`` and ``temperature_err_k`` given (NaN otherwise), and
    ``message`` says why when they are not.
    """

    species: str
    energy_ev: np.ndarray
    y: np.ndarray
    y_err: np.ndarray
    wavelength: np.ndarray
    upper: tuple[str, ...]
    corrected: bool
    slope: float
    slope_err: float
    intercept: float
    temperature_k: float
    temperature_err_k: float
    message: str


@dataclass(frozen=True)
class Identification:
    """The result of :func:`identify_lines`.

    Attributes
    ----------
    lines : astropy.table.Table
        One row per measured line, in input order: measured ``wavelength``,
        ``wavelength_err`` (total: centroid, calibration, systematic), ``flux``, ``snr``; the
        assignment ``species``, ``ref_wavelength`` (listed wavelength of the transition; for a
        second-order image the first-order wavelength), ``order`` (1 or 2), ``lower``,
        ``upper``, ``upper_energy_ev``, ``residual_sigma``, ``blend_members``; the posterior
        ``probability`` of the best candidate transition (filled even when it is too low to
        claim), ``p_unidentified``, ``alternatives`` (other hypotheses with probabilities) and
        ``flags`` (``unidentified``, ``unresolved_blend`` (several listed transitions inside
        the one measured line, see ``blend_members``), ``second_order``,
        ``above_energy_limit``, ``ambiguous``, and the line finder's ``blended`` = fitted
        jointly with a neighbour line).  Rows flagged ``unidentified`` have an empty
        ``species``.
    levels : astropy.table.Table
        One row per excited upper level seen, in order of energy.
    species : astropy.table.Table
        Every species considered, with its evidence and a present/absent verdict.
    boltzmann : tuple of BoltzmannPlot
        One Boltzmann plot per present species with at least two upper levels that have
        transition probabilities (empty otherwise).
    meta : dict
        How the identification was made (inputs, thresholds, fitted scales).
    """

    lines: Any
    levels: Any
    species: Any
    boltzmann: tuple[BoltzmannPlot, ...] = ()
    meta: dict = field(default_factory=dict)

    @property
    def present(self) -> tuple[str, ...]:
        """Names of the species judged present."""
        t = self.species
        return tuple(str(s) for s, p in zip(t["species"], t["present"], strict=True) if p)


# ---- inputs ------------------------------------------------------------------------------


def read_response(path: str | os.PathLike) -> tuple[np.ndarray, np.ndarray]:
    """Read a relative spectral-response file: wavelength (nm) and response columns.

    Any table astropy reads (ECSV, CSV, whitespace text) with two numeric columns, or
    columns named ``wavelength`` and ``response``.  Returns arrays sorted by wavelength.
    """
    from astropy.table import Table

    try:
        if str(path).lower().endswith(".ecsv"):
            t = Table.read(path, format="ascii.ecsv")
        else:
            t = Table.read(path, format="ascii")
    except FileNotFoundError:
        raise
    except Exception as exc:  # astropy raises many kinds for unreadable text
        raise RitzlineError(
            f"{path}: cannot read the response file ({exc}); give two columns, "
            "wavelength in nm and relative response"
        ) from exc
    return _response_arrays(t, str(path))


def _response_arrays(table, source: str) -> tuple[np.ndarray, np.ndarray]:
    names = list(table.colnames)
    wl_name = "wavelength" if "wavelength" in names else names[0] if names else None
    r_name = "response" if "response" in names else names[1] if len(names) > 1 else None
    if wl_name is None or r_name is None:
        raise RitzlineError(f"{source}: a response needs a wavelength and a response column")
    wl = table[wl_name]
    unit = getattr(wl, "unit", None)
    if unit is not None and str(unit) not in ("", "nm"):
        import astropy.units as u

        wl = np.asarray((np.asarray(wl) * unit).to_value(u.nm, equivalencies=u.spectral()))
    wl = np.asarray(wl, float)
    resp = np.asarray(table[r_name], float)
    good = np.isfinite(wl) & np.isfinite(resp) & (resp > 0)
    if good.sum() < 2:
        raise RitzlineError(
            f"{source}: the response needs at least two rows with a positive response"
        )
    order = np.argsort(wl[good])
    return wl[good][order], resp[good][order]


def _response_function(response):
    """(wavelength, response) arrays from a path, a table, a pair of arrays, or None."""
    if response is None:
        return None
    if isinstance(response, (str, os.PathLike)):
        return read_response(response)
    if hasattr(response, "colnames"):
        return _response_arrays(response, "response table")
    try:
        wl, resp = response
    except (TypeError, ValueError) as exc:
        raise RitzlineError(
            "response must be a file, a table, or a (wavelength_nm, response) pair"
        ) from exc
    from astropy.table import Table

    return _response_arrays(Table({"wavelength": np.asarray(wl, float),
                                   "response": np.asarray(resp, float)}), "response arrays")


def _species_list(species, custom: bool = False) -> list[str]:
    """Canonical species labels ("Ne I"); names outside the shipped lists only when the
    caller brings its own candidate table (``custom``)."""
    if species is None:
        return list(SHIPPED_SPECIES)
    if isinstance(species, str):
        species = [s for s in species.replace(";", ",").split(",") if s.strip()]
    from .levels import species_label

    out = []
    for s in species:
        try:
            out.append(species_label(str(s).strip()))
        except RitzlineError:
            if not custom:
                raise
            name = " ".join(str(s).replace("_", " ").split())
            out.append(name if " " in name else f"{name} I")
    if not out:
        raise RitzlineError("no species given; name at least one, e.g. 'Ne I', or pass None")
    return list(dict.fromkeys(out))


def _measured_lines(spectrum, lines, solution, find_kw):
    """The measured line table, the spectral range of the axis (or None) and the wavelength
    axis of the spectrum when it has one (to read the dispersion from)."""
    axis_range = None
    nm_axis = None
    if lines is None:
        if spectrum is None:
            raise RitzlineError("identify_lines needs a spectrum or a line table (lines=)")
        from . import peaks
        from .spectrum import spectrum_arrays

        arrays = spectrum_arrays(spectrum)
        if solution is not None:
            from .spectrum import require_solution_pixels

            require_solution_pixels(arrays, solution)
        lines = peaks.find_lines(spectrum, **(find_kw or {}))
        if arrays.unit == "nm":
            axis_range = (float(np.nanmin(arrays.axis)), float(np.nanmax(arrays.axis)))
            nm_axis = np.asarray(arrays.axis, float)
        elif solution is not None:
            wl_ends = solution.wavelength(np.array([-0.5, arrays.axis.size - 0.5]))
            axis_range = (float(np.min(wl_ends)), float(np.max(wl_ends)))
    if "wavelength" not in lines.colnames:
        if solution is None:
            raise RitzlineError(
                "the lines have no wavelengths: the spectrum has a pixel axis; pass "
                "solution= (a wavelength solution from `ritzline calibrate`)"
            )
        from . import peaks

        lines = peaks.attach_wavelengths(lines, solution)
    return lines, axis_range, nm_axis


def _line_dispersion(table, solution, nm_axis):
    """Local dispersion (nm/px) at every measured line and each line's position across the
    detector (-1 .. 1), or (None, None) when the lines carry no pixel information."""
    n = len(table)
    pix = _column(table, "pixel") if "pixel" in table.colnames else None
    if pix is not None and np.all(np.isfinite(pix)):
        if nm_axis is not None and nm_axis.size > 1:
            grid = np.arange(nm_axis.size, dtype=float)
            disp = np.interp(pix, grid, np.abs(np.gradient(nm_axis)))
            return disp, 2.0 * pix / (nm_axis.size - 1) - 1.0
        if solution is not None:
            disp = np.abs(np.asarray(solution.dispersion(pix), float)) * np.ones(n)
            n_pix = getattr(solution, "n_pixels", None) or (np.nanmax(pix) + 1 if n else 1)
            return disp, 2.0 * pix / max(n_pix - 1, 1) - 1.0
    fw, fw_px = _column(table, "fwhm"), _column(table, "fwhm_pixel")
    ratio = fw / fw_px
    good = np.isfinite(ratio) & (ratio > 0)
    if good.any():
        return np.full(n, float(np.median(ratio[good]))), None
    return None, None


def _axis_told(axis_err, disp, fwhm_nm) -> tuple[float, str]:
    """How far off the axis may be, in px when the dispersion is known (else nm), and that
    unit.  A number is nm; a Quantity may be in px or any length; None = the default,
    half a pixel (a quarter of the FWHM without a dispersion)."""
    unit = "px" if disp is not None else "nm"
    scale = float(np.median(disp)) if disp is not None and disp.size else 1.0
    if axis_err is None:
        return (0.5, unit) if disp is not None else (0.25 * fwhm_nm, unit)
    if hasattr(axis_err, "unit"):
        import astropy.units as u

        if axis_err.unit.is_equivalent(u.pix):
            if disp is None:
                raise RitzlineError(
                    "axis_err is in pixels but the lines carry no dispersion (no pixel or "
                    "fwhm_pixel column); give it in nm"
                )
            value = float(axis_err.to_value(u.pix))
        else:
            value = float(axis_err.to(u.nm, equivalencies=u.spectral()).value) / scale
    else:
        value = float(axis_err) / scale
    if not np.isfinite(value) or value < 0:
        raise RitzlineError(f"axis_err must be a non-negative distance, not {axis_err!r}")
    return value, unit


# ---- candidate groups --------------------------------------------------------------------


def _column(table, name, default=np.nan, dtype=float):
    if name not in table.colnames:
        return np.full(len(table), default, dtype=dtype)
    col = table[name]
    if dtype is float:
        return np.asarray(np.ma.filled(np.ma.asarray(col, dtype=float), np.nan), float)
    if dtype is bool:
        return np.asarray(np.ma.filled(np.ma.asarray(col), False), bool)
    return np.asarray(np.ma.filled(np.ma.asarray(col).astype(str), ""), str)


@dataclass(frozen=True)
class _Groups:
    """Candidate hypotheses: first-order groups of listed lines, then second-order images."""

    species: np.ndarray  # species index
    wavelength: np.ndarray  # where the hypothesis puts the measured line (nm)
    sigma: np.ndarray  # reference uncertainty incl. blend spread (nm)
    strength: np.ndarray  # published strength (intensity or g*A), NaN if none
    kind: np.ndarray  # _KIND_*
    order: np.ndarray  # 1 or 2
    parent: np.ndarray  # for order 2: index of the first-order group, else -1
    in_range: np.ndarray  # bool: the hypothesis falls on the spectrum
    above_limit: np.ndarray  # bool: upper level above the electron-energy limit
    level: np.ndarray  # upper-level id (per species), -1 unknown
    primary: np.ndarray  # row in the candidate table of the strongest member
    members: tuple  # rows in the candidate table of every member


def _candidate_groups(cand, species_names, fwhm_nm, wl_range, max_energy, opts) -> _Groups:
    """Group candidate transitions into unresolved blends and add second-order images."""
    sp_of = {s: k for k, s in enumerate(species_names)}
    sp = np.array([sp_of.get(str(s), -1) for s in cand["species"]], int)
    wl = _column(cand, "wavelength")
    wl_err = np.nan_to_num(_column(cand, "wavelength_err"), nan=0.001)
    inten = _column(cand, "intensity")
    ga = _column(cand, "g_upper") * _column(cand, "aki")
    upper_cm1 = _column(cand, "upper_cm1")
    upper_ev = _column(cand, "upper_ev")
    keep = (sp >= 0) & np.isfinite(wl)
    rows = np.flatnonzero(keep)
    order = rows[np.lexsort((wl[rows], sp[rows]))]
    s_sorted, w_sorted = sp[order], wl[order]
    new = np.ones(order.size, bool)
    if order.size > 1:
        new[1:] = (s_sorted[1:] != s_sorted[:-1]) | (
            np.diff(w_sorted) >= opts.blend_fraction * fwhm_nm
        )
    gid = np.cumsum(new) - 1
    n_g = int(gid[-1]) + 1 if order.size else 0
    starts = np.flatnonzero(new)

    i_ok = np.isfinite(inten[order]) & (inten[order] > 0)
    a_ok = np.isfinite(ga[order]) & (ga[order] > 0)
    has_i = np.bincount(gid, i_ok, n_g) > 0
    has_a = np.bincount(gid, a_ok, n_g) > 0
    kind = np.where(has_i, _KIND_INTENSITY, np.where(has_a, _KIND_GA, _KIND_NONE))
    kind_m = kind[gid]
    weight = np.where(
        kind_m == _KIND_INTENSITY,
        np.where(i_ok, inten[order], 0.0),
        np.where(kind_m == _KIND_GA, np.where(a_ok, ga[order], 0.0), 1.0),
    )
    strength = np.bincount(gid, weight, n_g)
    strength = np.where(kind == _KIND_NONE, np.nan, strength)
    wsum = np.bincount(gid, weight, n_g)
    wsafe = np.where(wsum > 0, wsum, 1.0)
    centre = np.bincount(gid, weight * w_sorted, n_g) / wsafe
    lo_w = np.minimum.reduceat(w_sorted, starts) if n_g else np.zeros(0)
    hi_w = np.maximum.reduceat(w_sorted, starts) if n_g else np.zeros(0)
    centre = np.where(wsum > 0, centre, 0.5 * (lo_w + hi_w))
    # published relative strengths inside a blend are uncertain: spread of a uniform mix
    spread = (hi_w - lo_w) / np.sqrt(12.0)
    max_err = np.maximum.reduceat(wl_err[order], starts) if n_g else spread
    ref_err = np.sqrt(max_err**2 + spread**2)
    # strongest member = primary (first of the group on ties)
    key = np.lexsort((-weight, gid))
    first_of_group = np.r_[True, gid[key][1:] != gid[key][:-1]] if n_g else np.zeros(0, bool)
    primary = order[key[first_of_group]]
    members = tuple(np.split(order, starts[1:])) if n_g else ()

    sp_g = s_sorted[starts] if n_g else np.zeros(0, int)
    g_upper_ev = upper_ev[primary] if n_g else np.zeros(0)
    # the limit applies to the upper level the group is reported under (its strongest line)
    if max_energy is None:
        above = np.zeros(n_g, bool)
    else:
        above = np.isfinite(g_upper_ev) & (g_upper_ev > max_energy + 1e-9)
    # level ids for coherence: species + upper energy (rounded to 0.01 cm-1)
    up_key = np.round(upper_cm1[primary], 2) if n_g else np.zeros(0)
    level = np.full(n_g, -1, int)
    ok = np.isfinite(up_key)
    if ok.any():
        pairs = np.stack([sp_g[ok].astype(float), up_key[ok]], axis=1)
        _, inv = np.unique(pairs, axis=0, return_inverse=True)
        level[ok] = inv.ravel()
    lo, hi = wl_range
    in_range = (centre >= lo) & (centre <= hi)

    # second-order images: first-order groups whose doubled wavelength lands on the spectrum
    if opts.second_order and n_g:
        par = np.flatnonzero((2 * centre >= lo) & (2 * centre <= hi))
    else:
        par = np.zeros(0, int)
    cat = np.concatenate
    return _Groups(
        species=cat([sp_g, sp_g[par]]),
        wavelength=cat([centre, 2 * centre[par]]),
        sigma=cat([ref_err, 2 * ref_err[par]]),
        strength=cat([strength, strength[par]]),
        kind=cat([kind, kind[par]]),
        order=cat([np.ones(n_g, int), np.full(par.size, 2)]),
        parent=cat([np.full(n_g, -1), par]),
        in_range=cat([in_range, np.ones(par.size, bool)]),
        above_limit=cat([above, above[par]]),
        level=cat([level, np.full(par.size, -1)]),
        primary=cat([primary, primary[par]]),
        members=members + tuple(members[p] for p in par),
    )


def _pairs_within(lam, half_width, glam):
    """Index pairs (line, group) with ``|lam - glam| <= half_width`` (per line)."""
    if glam.size == 0 or lam.size == 0:
        e = np.zeros(0, int)
        return e, e
    order = np.argsort(glam)
    gl = glam[order]
    lo = np.searchsorted(gl, lam - half_width, "left")
    hi = np.searchsorted(gl, lam + half_width, "right")
    counts = hi - lo
    li = np.repeat(np.arange(lam.size), counts)
    offs = np.arange(int(counts.sum())) - np.repeat(np.cumsum(counts) - counts, counts)
    return li, order[np.repeat(lo, counts) + offs]


# ---- the wavelength axis -----------------------------------------------------------------


@dataclass(frozen=True)
class AxisCorrection:
    """Offset and tilt of the wavelength axis found before the candidate search.

    A line measured at ``λ`` (pixel position ``x`` across the detector, -1 .. 1, local
    dispersion ``d`` nm/px) sits on the corrected axis at ``λ - (offset + tilt x) d``.
    ``cov`` is the covariance of (offset, tilt) in px²; ``told`` is the axis uncertainty the
    search was given (px).  Without a known dispersion the unit is nm instead of px.
    """

    offset: float
    tilt: float
    cov: np.ndarray
    told: float
    unit: str

    def shift(self, x, disp):
        """Correction (nm) to subtract from measured wavelengths."""
        return (self.offset + self.tilt * np.asarray(x)) * np.asarray(disp)

    def error(self, x, disp):
        """1-sigma uncertainty (nm) of the correction."""
        x = np.asarray(x, float)
        c = self.cov
        var = c[0, 0] + 2 * c[0, 1] * x + c[1, 1] * x * x
        return np.sqrt(np.maximum(var, 0.0)) * np.abs(np.asarray(disp))


def _axis_scores(d, hp, xl, li, n, a, b, smooth, ln_rho, ln_norm):
    """Robust score of every trial correction (a[k], b[k]): sum over lines of
    ln(rho + sum over listed lines of a Gaussian density of the corrected residual)."""
    out = np.empty(a.size)
    s = np.sqrt(hp**2 + smooth**2)
    starts = np.flatnonzero(np.r_[True, li[1:] != li[:-1]]) if li.size else np.zeros(0, int)
    n_empty = n - starts.size
    for k0 in range(0, a.size, 128):  # blocks bound the memory of the (trial, pair) array
        aa, bb = a[k0:k0 + 128, None], b[k0:k0 + 128, None]
        r = (d[None, :] - aa - bb * xl[None, :]) / s[None, :]
        dens = np.exp(-0.5 * np.minimum(r * r, 80.0) + ln_norm[None, :] - np.log(s)[None, :])
        tot = np.add.reduceat(dens, starts, axis=1) if starts.size else np.zeros((aa.size, 0))
        out[k0:k0 + 128] = np.sum(np.logaddexp(ln_rho, np.log(tot + 1e-300)), axis=1) \
            + n_empty * ln_rho
    return out


def _fit_axis(lam, sig, disp, x, glam, gsig, rho, told, unit) -> AxisCorrection:
    """Search offset and tilt (px) of the axis within ``told`` px: a grid of trial
    corrections scored robustly against every listed line, refined by reweighted least
    squares; a second, separated solution of similar score widens the covariance."""
    prior = 0.5 * told
    reach = 1.2 * told
    n = lam.size
    li, gi = _pairs_within(lam, 2 * reach * disp + 5 * (sig + gsig.max(initial=0.0)), glam)
    if n == 0 or li.size == 0:
        return AxisCorrection(0.0, 0.0, np.diag([prior**2, prior**2]), told, unit)
    d = (lam[li] - glam[gi]) / disp[li]  # residual (px) before any correction
    hp = np.sqrt(sig[li] ** 2 + gsig[gi] ** 2) / disp[li]
    xl = x[li]
    ln_norm = -_LOG_SQRT_2PI - np.log(disp[li])  # densities per nm
    ln_rho = float(np.log(rho))

    def scores(a, b, smooth):
        sc = _axis_scores(d, hp, xl, li, n, a, b, smooth, ln_rho, ln_norm)
        return sc - 0.5 * (a**2 + b**2) / prior**2

    step = reach / 15.0
    grid = np.linspace(-reach, reach, 31)
    a0, b0 = (v.ravel() for v in np.meshgrid(grid, grid, indexing="ij"))
    s0 = scores(a0, b0, 0.5 * step)
    k = int(np.argmax(s0))
    fine = np.linspace(-step, step, 11)
    a1, b1 = (v.ravel() for v in np.meshgrid(a0[k] + fine, b0[k] + fine, indexing="ij"))
    s1 = scores(a1, b1, 0.05 * step)
    k1 = int(np.argmax(s1))
    off, tilt = float(a1[k1]), float(b1[k1])
    # reweighted least squares around the best trial
    for _ in range(8):
        r = d - off - tilt * xl
        dens = np.exp(-0.5 * np.minimum((r / hp) ** 2, 80.0) + ln_norm - np.log(hp))
        tot = np.bincount(li, dens, n)
        w = dens / (rho + tot[li]) / hp**2
        a11 = np.sum(w) + 1 / prior**2
        a12 = np.sum(w * xl)
        a22 = np.sum(w * xl * xl) + 1 / prior**2
        rhs = np.array([np.sum(w * d), np.sum(w * xl * d)])
        mat = np.array([[a11, a12], [a12, a22]])
        off, tilt = (float(v) for v in np.linalg.solve(mat, rhs))
    cov = np.linalg.inv(mat)
    # other modes of the coarse search (more than two steps away) widen the covariance
    post = np.exp(s0 - s0.max())
    far = np.hypot(a0 - off, b0 - tilt) > 2 * step
    p_far = float(post[far].sum() / post.sum())
    if p_far > 1e-3:
        w = post / post.sum()
        ma, mb = np.sum(w * a0), np.sum(w * b0)
        spread = np.array([[np.sum(w * (a0 - ma) ** 2), np.sum(w * (a0 - ma) * (b0 - mb))],
                           [np.sum(w * (a0 - ma) * (b0 - mb)), np.sum(w * (b0 - mb) ** 2)]])
        cov = cov + spread
    return AxisCorrection(off, tilt, cov, told, unit)


def _position_terms(lam_c, sig_c, lnf, groups: _Groups, fwhm_nm, opts) -> dict:
    """The (line, group) pairs close enough on the corrected axis, with their position log
    density: a Gaussian of the combined uncertainty, plus a flat tail of weight
    ``outlier_fraction`` within ``outlier_width`` x FWHM (a centroid pulled by a neighbour).
    Also, per group, how well the nearest measured line sits on it (0 .. 1, position only)
    and that line's ln flux, which the coherence term reads."""
    w_out = opts.outlier_width * fwhm_nm
    gsig_max = float(groups.sigma.max(initial=0.0))
    half = np.maximum(opts.window_sigma * np.sqrt(sig_c**2 + gsig_max**2), w_out)
    li, gi = _pairs_within(lam_c, half, groups.wavelength)
    s_pair = np.sqrt(sig_c[li] ** 2 + groups.sigma[gi] ** 2)
    dl = lam_c[li] - groups.wavelength[gi]
    keep = (np.abs(dl) < opts.window_sigma * s_pair) | (np.abs(dl) < w_out)
    li, gi, s_pair, dl = li[keep], gi[keep], s_pair[keep], dl[keep]
    z = dl / s_pair
    eps = opts.outlier_fraction
    ln_pos = np.logaddexp(np.log1p(-eps) + _lognorm(dl, 0.0, s_pair),
                          np.where(np.abs(dl) < w_out, np.log(eps / (2 * w_out)), -np.inf))
    n_g = groups.species.size
    near = np.zeros(n_g)
    near_lnf = np.full(n_g, np.nan)
    if li.size:
        closeness = np.exp(-0.5 * np.minimum(z * z, 50.0))
        o = np.lexsort((-closeness, gi))
        best = o[np.r_[True, gi[o][1:] != gi[o][:-1]]]
        near[gi[best]] = closeness[best]
        near_lnf[gi[best]] = lnf[li[best]]
    return {"li": li, "gi": gi, "z": z, "ln_pos": ln_pos, "near": near, "near_lnf": near_lnf}


# ---- the scoring model -------------------------------------------------------------------


def _lognorm(x, mu, sigma):
    return -0.5 * ((x - mu) / sigma) ** 2 - np.log(sigma) - _LOG_SQRT_2PI


@dataclass
class _Model:
    """Working state of the marked-Poisson model for one spectrum (private, mutable)."""

    groups: _Groups
    n_species: int
    lnf: np.ndarray  # ln flux of the measured lines
    lnf_err: np.ndarray
    ln_lim: float  # ln of the detection-limit flux
    width: float  # spectral span (nm)
    li: np.ndarray
    gi: np.ndarray
    z: np.ndarray  # corrected residual / combined sigma, per pair
    ln_pos: np.ndarray  # log position density per pair (heavy-tailed), per nm
    near: np.ndarray  # per group: how well some measured line sits on it (0 .. 1)
    near_lnf: np.ndarray  # per group: ln flux of that line
    capacity: np.ndarray  # per group: measured lines it can take (listed members)
    generic: np.ndarray  # log density of each line's flux under "unknown line"
    flux_known: np.ndarray  # per line: the flux is measured (else it counts for nothing)
    opts: IdentifyOptions
    siblings: tuple  # CSR (ptr, idx) of same-level first-order groups
    active: np.ndarray = None  # bool per species
    second_active: bool = True
    lnk: np.ndarray = None  # (n_species, 2) ln scale for intensity / gA strengths
    lnq: np.ndarray = None  # (n_species,) ln detection probability of strength-less lines
    ln_eta: float = np.log(0.05)  # second-order efficiency relative to first order
    lnq2: float = np.log(0.1)  # detection probability of images of unrated, unseen parents
    ln_rho: float = 0.0  # ln density of unknown lines per nm
    observed: np.ndarray = None  # per group: expected number of measured lines assigned
    resp: np.ndarray = None  # responsibilities per pair
    resp_u: np.ndarray = None  # per line: P(unknown)

    @property
    def n_lines(self) -> int:
        return self.lnf.size

    def log_prior_group(self) -> np.ndarray:
        g = self.groups
        return np.where(g.above_limit, np.log(self.opts.energy_prior), 0.0)

    def parent_lnmu(self) -> np.ndarray:
        """ln of the expected first-order flux of every group (observed flux where seen)."""
        g = self.groups
        base = np.full(g.species.size, np.nan)
        known = g.kind != _KIND_NONE
        k = np.where(g.kind == _KIND_GA, 1, 0)
        base[known] = self.lnk[g.species[known], k[known]] + np.log(g.strength[known])
        if self.resp is not None:
            w = np.bincount(self.gi, self.resp, g.species.size)
            m = np.bincount(self.gi, self.resp * self.lnf[self.li], g.species.size)
            seen = w > 0.5
            base = np.where(seen, m / np.where(seen, w, 1.0), base)
        return base

    def group_terms(self):
        """Per group: ln mean flux (NaN if none), flux scatter, expected detections."""
        g, o = self.groups, self.opts
        n_g = g.species.size
        lnmu = np.full(n_g, np.nan)
        sig = np.full(n_g, o.strength_scatter)
        first = g.order == 1
        known = first & (g.kind != _KIND_NONE)
        k = np.where(g.kind == _KIND_GA, 1, 0)
        lnmu[known] = self.lnk[g.species[known], k[known]] + np.log(g.strength[known])
        sec = g.order == 2
        if sec.any():
            par_mu = self.parent_lnmu()[g.parent[sec]]
            lnmu[sec] = self.ln_eta + par_mu
            seen = self.observed is not None
            if seen:
                sig[sec] = np.where(self.observed[g.parent[sec]] > 0.5, o.branch_scatter,
                                    o.strength_scatter)
        prior = self.log_prior_group()
        expected = np.where(
            np.isfinite(lnmu), ndtr((lnmu - self.ln_lim) / sig), 0.0
        )
        none = first & (g.kind == _KIND_NONE)
        expected[none] = np.exp(self.lnq[g.species[none]])
        expected[sec & ~np.isfinite(lnmu)] = np.exp(self.lnq2)
        expected *= np.exp(prior) * g.in_range
        act = self.active[g.species] & ((g.order == 1) | self.second_active)
        expected = np.where(act, expected, 0.0)
        return lnmu, sig, expected, act

    def coherence(self, lnmu):
        """Per pair: log likelihood ratio of what the other lines of the same upper level show.

        If line i is transition c, each sibling c' (same upper level) should have the flux
        ``F_i S_c'/S_c`` (branching, scatter ``branch_scatter``); otherwise it has the flux
        the species scale predicts (scatter ``strength_scatter``).  Whether a sibling is seen
        is judged from positions alone (a measured line sits on it), never from the current
        assignments, so two unassigned siblings cannot hold each other down.
        """
        ptr, idx = self.siblings
        g = self.groups
        out = np.zeros(self.li.size)
        if idx.size == 0 or self.li.size == 0:
            return out
        first = (g.order[self.gi] == 1) & (g.kind[self.gi] != _KIND_NONE)
        pp = np.flatnonzero(first)
        if pp.size == 0:
            return out
        gg = self.gi[pp]
        counts = ptr[gg + 1] - ptr[gg]
        rep = np.repeat(pp, counts)
        offs = np.arange(int(counts.sum())) - np.repeat(np.cumsum(counts) - counts, counts)
        sib = idx[np.repeat(ptr[gg], counts) + offs]
        ok = g.in_range[sib] & (g.kind[sib] == g.kind[self.gi[rep]])
        rep, sib = rep[ok], sib[ok]
        if rep.size == 0:
            return out
        s1 = self.opts.branch_scatter * np.sqrt(2.0)
        s0 = self.opts.strength_scatter
        # flux the sibling should have if this pair is right
        mu1 = self.lnf[self.li[rep]] + np.log(g.strength[sib] / g.strength[self.gi[rep]])
        p1 = np.clip(ndtr((mu1 - self.ln_lim) / s1), 1e-3, 1 - 1e-3)
        p0 = np.clip(ndtr((lnmu[sib] - self.ln_lim) / s0), 1e-3, 1 - 1e-3)
        seen = self.near[sib]
        x = np.nan_to_num(self.near_lnf[sib])
        # with probability ``eps`` the branching says nothing (a sibling missing from the
        # spectrum or blended, a table intensity that is no branching ratio)
        eps = self.opts.branch_outlier
        ln0 = _lognorm(x, np.nan_to_num(lnmu[sib]), s0)
        llr_seen = np.logaddexp(np.log1p(-eps) + _lognorm(x, mu1, s1), np.log(eps) + ln0) - ln0
        llr_seen = np.where(seen > 0, llr_seen, 0.0)
        llr_unseen = np.log((1 - eps) * (1 - p1) + eps * (1 - p0)) - np.log1p(-p0)
        llr = seen * llr_seen + (1 - seen) * llr_unseen
        np.add.at(out, rep, llr)
        return np.clip(out, -12.0, 12.0)

    def pair_logw(self, lnmu, sig):
        """Log weight of every (line, group) pair under the current parameters."""
        g = self.groups
        gi, li = self.gi, self.li
        lw = self.ln_pos.copy()
        has_mu = np.isfinite(lnmu[gi])
        tot = np.sqrt(sig[gi] ** 2 + self.lnf_err[li] ** 2)
        lnq = np.where(g.order[gi] == 1, self.lnq[g.species[gi]], self.lnq2)
        # the summed strength of a blend holds only when all its listed members shine: with
        # probability ``flux_outlier`` some are missing and the flux says nothing
        eps = np.where(self.capacity[gi] > 1, self.opts.flux_outlier, 0.0)
        with np.errstate(divide="ignore"):
            rated = np.logaddexp(
                np.log1p(-eps) + _lognorm(self.lnf[li], np.nan_to_num(lnmu[gi]), tot),
                np.log(eps) + self.generic[li])
        rated = np.where(self.flux_known[li], rated, 0.0)
        flux_term = np.where(has_mu, rated, self.generic[li] + lnq)
        lw = lw + flux_term + self.log_prior_group()[gi] + self.coherence(lnmu)
        act = self.active[g.species[gi]] & ((g.order[gi] == 1) | self.second_active)
        return np.where(act, lw, -np.inf)

    def e_step(self):
        lnmu, sig, expected, _ = self.group_terms()
        lw = self.pair_logw(lnmu, sig)
        lu = self.ln_rho + self.generic
        m = lu.copy()
        np.maximum.at(m, self.li, lw)
        w = np.exp(lw - m[self.li])
        wu = np.exp(lu - m)
        total = wu + np.bincount(self.li, w, self.n_lines)
        self.resp = w / total[self.li]
        self.resp_u = wu / total
        self.observed = np.bincount(self.gi, self.resp, self.groups.species.size)
        return lw, lu, m, w, wu, total, expected

    def m_step(self):
        g, o = self.groups, self.opts
        first = g.order[self.gi] == 1
        prior = np.exp(self.log_prior_group())
        grid = np.linspace(-4.0, 4.0, 81)
        for s in np.flatnonzero(self.active):
            for kind in (_KIND_INTENSITY, _KIND_GA):
                sel_g = (g.species == s) & (g.kind == kind) & (g.order == 1) & g.in_range
                if not sel_g.any():
                    continue
                sel_p = first & (g.species[self.gi] == s) & (g.kind[self.gi] == kind)
                r = self.resp[sel_p]
                x = self.lnf[self.li[sel_p]] - np.log(g.strength[self.gi[sel_p]])
                tot = np.sqrt(o.strength_scatter**2 + self.lnf_err[self.li[sel_p]] ** 2)
                centre = self.lnk[s, kind]
                if r.sum() > 0.5:
                    centre = float(np.sum(r * x) / r.sum())
                lns = np.log(g.strength[sel_g])
                # the whole plausible range as well as near the current value: a scale that
                # collapsed under a wrong assignment can come back
                wide = np.linspace(self.ln_lim - lns.max() - 3.0,
                                   self.lnf.max() - lns.min() + 3.0, 121)
                cand = np.concatenate([wide, centre + grid])
                ll = np.sum(r * _lognorm(x[None, :], cand[:, None], tot[None, :]), axis=1)
                pen = np.sum(
                    prior[sel_g] * ndtr((cand[:, None] + lns[None, :] - self.ln_lim)
                                        / o.strength_scatter),
                    axis=1,
                )
                # weak prior keeps an unconstrained scale from running away
                obj = ll - pen - 0.5 * ((cand - centre) / 6.0) ** 2
                self.lnk[s, kind] = float(cand[np.argmax(obj)])
            sel_g = (g.species == s) & (g.kind == _KIND_NONE) & (g.order == 1) & g.in_range
            if sel_g.any():
                sel_p = first & (g.species[self.gi] == s) & (g.kind[self.gi] == _KIND_NONE)
                q = (self.resp[sel_p].sum() + 0.1) / (prior[sel_g].sum() + 0.2)
                self.lnq[s] = float(np.log(np.clip(q, 1e-3, 0.95)))
        sec_p = ~first
        sec_g = g.order == 2
        if self.second_active and sec_g.any():
            par_mu = self.parent_lnmu()[g.parent]
            unrated_g = sec_g & self.active[g.species] & ~np.isfinite(par_mu)
            if unrated_g.any():
                sel_p = sec_p & unrated_g[self.gi]
                q = (self.resp[sel_p].sum() + 0.1) / (prior[unrated_g].sum() + 0.2)
                self.lnq2 = float(np.log(np.clip(q, 1e-3, 0.95)))
            seen = self.observed[g.parent] > 0.5
            sig = np.where(seen, o.branch_scatter, o.strength_scatter)
            act_g = sec_g & self.active[g.species] & np.isfinite(par_mu)
            if act_g.any():
                r = self.resp[sec_p]
                x = self.lnf[self.li[sec_p]] - par_mu[self.gi[sec_p]]
                okx = np.isfinite(x)
                r, x = r[okx], x[okx]
                sp_ = sig[self.gi[sec_p]][okx]
                centre = float(np.sum(r * x) / r.sum()) if r.sum() > 0.5 else self.ln_eta
                cand = np.clip(centre + np.linspace(-3, 3, 61), np.log(1e-4), np.log(0.5))
                ll = np.sum(r * _lognorm(x[None, :], cand[:, None], sp_[None, :]), axis=1)
                pen = np.sum(
                    prior[act_g] * ndtr((cand[:, None] + par_mu[act_g][None, :] - self.ln_lim)
                                        / sig[act_g][None, :]),
                    axis=1,
                )
                self.ln_eta = float(cand[np.argmax(ll - pen)])
        n_u = self.resp_u.sum()
        self.ln_rho = float(np.log((n_u + 0.5) / self.width))

    def fit(self, n_iter):
        for _ in range(n_iter):
            self.e_step()
            self.m_step()
        return self.e_step()

    def evidence(self):
        """Log-likelihood ratio of every active species, and of the second-order images.

        Each is the drop in the Poisson log-likelihood when that component's hypotheses are
        removed with the other parameters held: the lines it explains (better than the rest
        can) minus the detections it predicts.
        """
        g = self.groups
        _, _, _, w, wu, total, expected = self.e_step()
        llr = np.full(self.n_species, np.nan)
        pair_sp = g.species[self.gi]
        pair_first = g.order[self.gi] == 1
        for s in np.flatnonzero(self.active):
            own = pair_sp == s
            part = np.bincount(self.li[own], w[own], self.n_lines)
            rest = np.maximum(total - part, wu)
            gain = np.minimum(np.log(total) - np.log(rest), self.opts.max_line_evidence)
            llr[s] = np.sum(gain) - expected[g.species == s].sum()
        own = ~pair_first
        part = np.bincount(self.li[own], w[own], self.n_lines)
        rest = np.maximum(total - part, wu)
        llr2 = float(np.sum(np.log(total) - np.log(rest)) - expected[g.order == 2].sum())
        return llr, llr2, expected


def _siblings(groups: _Groups):
    """CSR lists of the other first-order groups from the same upper level, same species."""
    n_g = groups.species.size
    first = np.flatnonzero((groups.order == 1) & (groups.level >= 0))
    if first.size == 0:
        return np.zeros(n_g + 1, int), np.zeros(0, int)
    key = groups.level[first]
    order = first[np.argsort(key, kind="stable")]
    k_sorted = groups.level[order]
    starts = np.flatnonzero(np.r_[True, k_sorted[1:] != k_sorted[:-1]])
    sizes = np.diff(np.r_[starts, order.size])
    src, dst = [], []
    for st, n in zip(starts, sizes, strict=True):
        if n < 2:
            continue
        block = order[st:st + n]
        a, b = np.meshgrid(block, block, indexing="ij")
        off = a != b
        src.append(a[off])
        dst.append(b[off])
    if not src:
        return np.zeros(n_g + 1, int), np.zeros(0, int)
    src, dst = np.concatenate(src), np.concatenate(dst)
    o = np.argsort(src, kind="stable")
    src, dst = src[o], dst[o]
    ptr = np.zeros(n_g + 1, int)
    np.add.at(ptr, src + 1, 1)
    return np.cumsum(ptr), dst


@dataclass(frozen=True)
class _LineArrays:
    """The measured lines as float arrays, with their total wavelength uncertainty."""

    lam: np.ndarray
    sig: np.ndarray
    flux: np.ndarray
    flux_err: np.ndarray
    snr: np.ndarray
    flags: np.ndarray
    fwhm_nm: float
    wavelength_range: tuple[float, float]


def _line_arrays(table, solution, calibration_err, fwhm_nm, wavelength_range, opts):
    """Arrays of the measured line table; the total uncertainty per line combines centroid,
    calibration band, a systematic floor and, for flagged blends, a fraction of the FWHM."""
    n = len(table)
    lam = _column(table, "wavelength")
    if n and not np.all(np.isfinite(lam)):
        raise RitzlineError("some measured lines have no finite wavelength")
    lam_err = np.nan_to_num(_column(table, "wavelength_err"), nan=0.0)
    flux = _column(table, "flux")
    flux_err = _column(table, "flux_err")
    snr = _column(table, "snr")
    if not np.any(np.isfinite(flux_err)):
        flux_err = np.where(np.isfinite(snr) & (snr > 0), np.abs(flux) / snr, np.nan)
    flags = _column(table, "flags", "", str) if "flags" in table.colnames else np.full(n, "")
    if wavelength_range is None:
        if n == 0:
            raise RitzlineError("no lines to identify and no wavelength range given")
        pad = 0.02 * max(np.ptp(lam), 1.0)
        wavelength_range = (float(lam.min() - pad), float(lam.max() + pad))
    lo, hi = (float(min(wavelength_range)), float(max(wavelength_range)))
    blended = np.char.find(flags.astype(str), "blend") >= 0
    if fwhm_nm is None:
        fw = _column(table, "fwhm")
        finite = np.isfinite(fw) & (fw > 0)
        # the line finder's LSF width, else the solution's, through the dispersion
        lsf_px = (table.meta or {}).get("lsf_fwhm_pixel") or getattr(solution, "fwhm_pixel", None)
        if np.any(finite & ~blended):
            fwhm_nm = float(np.median(fw[finite & ~blended]))
        elif solution is not None and lsf_px:
            mid = np.nanmedian(_column(table, "pixel")) if "pixel" in table.colnames else 0.0
            fwhm_nm = float(lsf_px * abs(float(np.asarray(solution.dispersion(mid)))))
        elif finite.any():
            fwhm_nm = float(np.min(fw[finite]))
        elif n == 0:
            fwhm_nm = 1.0  # nothing to group; any value will do
        else:
            raise RitzlineError(
                "the instrument resolution is unknown: the line table has no fwhm column; "
                "pass fwhm_nm= (FWHM in nm)"
            )
    cal = np.zeros(n)
    # peaks.attach_wavelengths already folds the solution's band into wavelength_err
    band_included = bool((table.meta or {}).get(BAND_INCLUDED))
    if solution is not None and not band_included and "pixel" in table.colnames:
        cal = np.asarray(solution.wavelength_err(_column(table, "pixel")), float)
    elif callable(calibration_err):
        cal = np.asarray(calibration_err(lam), float) * np.ones(n)
    elif calibration_err is not None:
        cal = np.full(n, float(calibration_err))
    sig = np.sqrt(lam_err**2 + cal**2 + opts.systematic_nm**2 + (blended * 0.15 * fwhm_nm) ** 2)
    sig = np.maximum(sig, 1e-4 * fwhm_nm + 1e-6)
    return _LineArrays(lam=lam, sig=sig, flux=flux, flux_err=flux_err, snr=snr, flags=flags,
                       fwhm_nm=float(fwhm_nm), wavelength_range=(lo, hi))


def _flux_terms(m: _LineArrays, corr: np.ndarray):
    """ln flux and its error per line, the ln detection limit, the "unknown line" flux
    density (a broad fit to all lines, cut at the detection limit), and whether each flux is
    known at all (a relative error of 1 or more, or a clipped top, says nothing: such a
    line's flux counts for no hypothesis)."""
    n = m.lam.size
    fl = np.where(np.isfinite(m.flux) & (m.flux > 0), m.flux, np.nan) / corr
    fe = np.where(np.isfinite(m.flux_err) & (m.flux_err > 0), m.flux_err, np.nan) / corr
    good_f = np.isfinite(fl)
    floor = np.nanmin(fl) if good_f.any() else 1.0
    lnf = np.log(np.where(good_f, fl, floor))
    lnf_err = np.where(good_f & np.isfinite(fe), fe / np.where(good_f, fl, 1.0), 2.0)
    # a saturated line's flux is at best a bound from its clipped top: it counts for nothing
    saturated = np.char.find(m.flags.astype(str), "saturated") >= 0
    known = good_f & (lnf_err < 1.0) & ~saturated
    lnf_err = np.where(known, lnf_err, 10.0)  # keeps it out of the scale fits too
    if good_f.any() and np.isfinite(fe).any():
        noise = np.nanpercentile(fe, 10)
        snr_min = np.nanpercentile(m.snr, 2) if np.isfinite(m.snr).any() else 5.0
        ln_lim = float(np.log(max(noise * max(snr_min, 3.0), 1e-300)))
    else:
        ln_lim = float(np.min(lnf)) if n else 0.0
    ref = lnf[known] if known.any() else lnf
    mean_f = float(np.mean(ref)) if ref.size else 0.0
    sd_f = max(float(np.std(ref)) if ref.size > 1 else 1.0, 0.7)
    generic = _lognorm(lnf, mean_f, sd_f) - log_ndtr((mean_f - ln_lim) / sd_f)
    return lnf, lnf_err, ln_lim, np.where(known, generic, 0.0), known


def _select_species(model: _Model, opts: IdentifyOptions):
    """Backward elimination: drop the weakest component (a species, or the second-order
    images) while its log-likelihood ratio is below the threshold; refit after each drop."""
    n_sp = model.n_species
    llr_final = np.full(n_sp, np.nan)
    llr_second = np.nan
    while True:
        model.fit(opts.n_iter)
        llr, llr2, _ = model.evidence()
        comps = [(llr[k], k) for k in np.flatnonzero(model.active)]
        if model.second_active:
            comps.append((llr2, -1))
        if not comps:
            break
        worst, k = min(comps)
        if worst >= opts.species_threshold:
            llr_final[model.active] = llr[model.active]
            llr_second = llr2 if model.second_active else llr_second
            break
        if k == -1:
            model.second_active = False
            llr_second = llr2
        else:
            model.active[k] = False
            llr_final[k] = llr[k]
    model.fit(2)
    return llr_final, llr_second


# ---- public entry point ------------------------------------------------------------------


def identify_lines(
    spectrum=None,
    species=None,
    *,
    solution=None,
    medium: str = "air",
    max_electron_energy: float | None = None,
    response=None,
    lines=None,
    candidates=None,
    wavelength_range: tuple[float, float] | None = None,
    fwhm_nm: float | None = None,
    calibration_err=None,
    axis_err=None,
    options: IdentifyOptions | None = None,
    find_kw: dict | None = None,
) -> Identification:
    """Identify the transitions behind the emission lines of a spectrum.

    Parameters
    ----------
    spectrum : specutils.Spectrum or None
        A spectrum with a wavelength axis, or a pixel axis together with ``solution``.  Its
        lines are found with :func:`ritzline.peaks.find_lines`.  May be None when ``lines``
        is given.
    species : str, sequence of str, or None
        Species to consider ("Ne I", "Ar", "Ne,Ar"); None = detect among every shipped one.
    solution : ritzline.calibration.Solution, optional
        Wavelength solution: gives wavelengths to pixel-axis lines and the calibration
        uncertainty band ``solution.wavelength_err(pixel)``.
    medium : {"air", "vacuum"}
        Medium of the measured wavelengths; the candidate Ritz wavelengths are computed in it.
    max_electron_energy : float, optional
        Electron energy limit in eV (e.g. the accelerating voltage of an electron-impact
        cell).  Lines from upper levels above it get a small prior and are flagged.
    response : path, table, (wavelength_nm, response) pair, or None
        Relative spectral response of the instrument.  With it, fluxes are corrected before
        populations and the Boltzmann temperature are computed; without it no temperature
        is given.
    lines : astropy.table.Table, optional
        A measured line table (``wavelength``, ``wavelength_err``, ``flux``, ``flux_err``,
        ``snr``; optional ``fwhm``, ``flags``, ``pixel``) to identify instead of finding
        lines in ``spectrum``.
    candidates : astropy.table.Table, optional
        A precomputed :func:`ritzline.levels.transitions` table (for repeated calls).
    wavelength_range : (float, float), optional
        Spectral range covered (nm); default: the spectrum axis, else the lines' extent.
    fwhm_nm : float, optional
        Instrument resolution (FWHM, nm); default: the median FWHM of the unblended measured
        lines, else the solution's LSF width; required for a line table without ``fwhm``.
    calibration_err : float or callable, optional
        Calibration uncertainty (nm) for a ``lines`` table without a solution: a number, or
        a function of wavelength.
    axis_err : float or astropy Quantity, optional
        How far off the wavelength axis may be: a Quantity in px or a length, or a number in
        nm (a factory axis after years: a few pixels or ~0.5 nm).  Default: 0.5 px (a quarter
        of the FWHM when the lines carry no dispersion).  An offset and a tilt of the axis
        are searched within it before the candidates are matched; the correction and its
        uncertainty are reported (``meta["axis_correction"]``, column
        ``wavelength_corrected``).
    options : IdentifyOptions, optional
        Scoring-model knobs.
    find_kw : dict, optional
        Keyword arguments passed to ``find_lines``.

    Returns
    -------
    Identification

    Notes
    -----
    First the wavelength axis: an offset and a tilt (in px of the local dispersion) are
    searched on a grid within ``axis_err`` by a robust score against every listed line,
    refined by reweighted least squares; their covariance (widened when another, separated
    solution scores nearly as well) becomes a per-line uncertainty.  Matching then runs on
    the corrected axis, with ``σ`` = centroid ⊕ calibration band ⊕ correction uncertainty ⊕
    ``position_floor`` x FWHM.

    Measured lines are treated as a marked Poisson process in wavelength and flux.  A
    candidate group *c* (one listed line, or several closer than ``blend_fraction`` x FWHM)
    of a present species contributes ``P(λ; λ_c, σ) · LogNormal(F; k_s S_c, σ_S)``, where
    ``P`` is a Gaussian with a flat tail (``outlier_fraction`` within ``outlier_width`` x
    FWHM) and ``S_c`` the published intensity (or g·A, with its own scale); lines without
    any published strength contribute ``q_s · P · g(F)`` with a fitted detection fraction
    ``q_s``.  Unknown lines contribute ``ρ · g(F)`` (flat in wavelength); second-order
    images of present lines contribute at ``2 λ_c`` with a fitted efficiency.  The expected
    number of detections of each candidate, ``Φ((ln k_s S_c − ln F_lim)/σ_S)``, is
    subtracted in the likelihood, so a species is charged for every strong line it predicts
    but which is absent; one measured line adds at most ``max_line_evidence`` to a species,
    so a lone coincidence cannot make it present.  Coherence: a candidate's weight is
    multiplied by the likelihood ratio of what the other lines from the same upper level
    show (a line sitting on them or not, judged from positions only), predicted from this
    line's flux and the published branching, each sibling allowed to say nothing
    (``branch_outlier``).  Scales are searched over their whole plausible range by
    alternating updates; species are removed one at a time while the weakest has a
    log-likelihood ratio below ``species_threshold``.  Posterior shares give the
    probabilities, scaled by the chance that a line lies within half a FWHM of its measured
    centroid.  Assignment is one-to-one: a candidate group takes at most as many measured
    lines as it has listed members, and a blend is named after the member nearest the
    corrected centroid.

    Examples
    --------
    >>> from astropy.table import Table
    >>> wl = [633.443, 638.299, 640.225, 650.653, 653.288, 659.895]
    >>> lines = Table({"wavelength": wl, "wavelength_err": [0.002] * 6,
    ...                "flux": [4e4, 4e4, 8e4, 6e4, 4e4, 4e4], "flux_err": [250.0] * 6,
    ...                "snr": [160.0, 160.0, 320.0, 240.0, 160.0, 160.0]})
    >>> ids = identify_lines(lines=lines, species=["Ne", "Ar"],
    ...                      wavelength_range=(632.0, 661.0), fwhm_nm=0.1)
    >>> [f"{s} {w:.2f}" for s, w in ids.lines["species", "ref_wavelength"]][:2]
    ['Ne I 633.44', 'Ne I 638.30']
    >>> ids.present
    ('Ne I',)
    """

    opts = options or IdentifyOptions()
    if medium not in ("air", "vacuum"):
        raise RitzlineError(f"medium must be 'air' or 'vacuum', not {medium!r}")
    for what, known in (("wavelength solution", getattr(solution, "medium", None)),
                        ("spectrum", (getattr(spectrum, "meta", None) or {}).get("medium"))):
        if known is not None and known != medium:
            raise RitzlineError(
                f"the {what} is in {known}, but medium={medium!r} was asked; "
                f"pass medium={known!r}"
            )
    names = _species_list(species, custom=candidates is not None)
    table, axis_range, nm_axis = _measured_lines(spectrum, lines, solution, find_kw)
    n = len(table)
    resp = _response_function(response)
    if wavelength_range is None:
        wavelength_range = axis_range
    m = _line_arrays(table, solution, calibration_err, fwhm_nm, wavelength_range, opts)
    lam, sig, flux, snr, flags_in, fwhm_nm = m.lam, m.sig, m.flux, m.snr, m.flags, m.fwhm_nm
    lo, hi = m.wavelength_range

    if candidates is None:
        candidates = _shipped_transitions(tuple(names), medium, opts.observed_only)
    cw = _column(candidates, "wavelength")
    cand = candidates[(cw >= lo / 2 - 2 * fwhm_nm) & (cw <= hi + 2 * fwhm_nm)]
    groups = _candidate_groups(cand, names, fwhm_nm, (lo, hi), max_electron_energy, opts)

    corr = np.ones(n)
    if resp is not None:
        corr = np.interp(lam, resp[0], resp[1], left=np.nan, right=np.nan)
        if np.any(~np.isfinite(corr)):
            raise RitzlineError(
                "the response does not cover every measured line "
                f"({lo:.1f}–{hi:.1f} nm); extend it over the whole spectrum"
            )
    lnf, lnf_err, ln_lim, generic, flux_known = _flux_terms(m, corr)

    # the axis correction comes first; the candidate search then runs in the corrected frame
    disp, x_det = _line_dispersion(table, solution, nm_axis)
    told, axis_unit = _axis_told(axis_err, disp, fwhm_nm)
    d_line = disp if disp is not None else np.ones(n)
    x_line = x_det if x_det is not None else np.clip(
        2.0 * (lam - lo) / max(hi - lo, 1e-9) - 1.0, -1.0, 1.0)
    width = max(hi - lo, 1e-3)
    first_g = groups.order == 1
    if opts.fit_shift and told > 0:
        axis = _fit_axis(lam, sig, d_line, x_line, groups.wavelength[first_g],
                         groups.sigma[first_g], max(n, 1) / width, told, axis_unit)
    else:
        axis = AxisCorrection(0.0, 0.0, np.zeros((2, 2)), told, axis_unit)
    lam_c = lam - axis.shift(x_line, d_line)
    floor = opts.position_floor * fwhm_nm
    sig_c = np.sqrt(sig**2 + axis.error(x_line, d_line) ** 2 + floor**2)
    pos = _position_terms(lam_c, sig_c, lnf, groups, fwhm_nm, opts)
    n_sp = len(names)
    model = _Model(
        groups=groups, n_species=n_sp, lnf=lnf, lnf_err=lnf_err, ln_lim=ln_lim,
        width=width, **pos, generic=generic, flux_known=flux_known, opts=opts,
        siblings=_siblings(groups),
        capacity=np.array([len(mm) for mm in groups.members], float),
    )
    model.active = np.array([bool(np.any(groups.species == k)) for k in range(n_sp)])
    model.second_active = bool(np.any(groups.order == 2))
    model.lnk = _initial_scales(model)
    model.lnq = np.full(n_sp, np.log(0.3))
    model.ln_rho = float(np.log(max(opts.unknown_fraction * n, 0.5) / model.width))

    if n:
        llr_final, llr_second = _select_species(model, opts)
    else:
        model.active[:] = False
        llr_final, llr_second = np.full(n_sp, np.nan), np.nan

    lines_out = _line_table(table, model, cand, names, lam, sig_c, flux, snr, flags_in, opts,
                            lam_c, fwhm_nm)
    if resp is not None:
        lines_out["flux_corrected"] = flux / corr
    present = model.active.copy()
    lnmu = model.group_terms()[0] if n else None
    species_out = _species_table(model, names, present, llr_final, lnmu, lines_out)
    levels_out = _levels_table(lines_out, max_electron_energy, corr, resp is not None)
    plots = tuple(
        bp for sp_name in (names[k] for k in np.flatnonzero(present))
        if (bp := boltzmann_plot(lines_out, sp_name, corrected=resp is not None))
        is not None
    )
    from . import __version__

    meta = {
        "ritzline_version": __version__,
        "medium": medium,
        "species_considered": names,
        "species_present": [names[k] for k in np.flatnonzero(present)],
        "wavelength_range_nm": [lo, hi],
        "fwhm_nm": float(fwhm_nm),
        "max_electron_energy_ev": max_electron_energy,
        "response_corrected": resp is not None,
        "second_order_llr": None if not np.isfinite(llr_second) else float(llr_second),
        "second_order_efficiency": float(np.exp(model.ln_eta)) if model.second_active else None,
        "unknown_line_density_per_nm": float(np.exp(model.ln_rho)),
        "axis_correction": _axis_meta(axis, x_line, d_line),
        "options": {k: getattr(opts, k) for k in opts.__dataclass_fields__},
    }
    for t in (lines_out, levels_out, species_out):
        t.meta.update(meta)
    return Identification(
        lines=lines_out, levels=levels_out, species=species_out, boltzmann=plots, meta=meta
    )


def _axis_meta(axis: AxisCorrection, x, disp) -> dict:
    """The axis correction as reported in ``meta``: in its own unit, and in nm at the ends
    and the middle of the lines' span."""
    err = np.sqrt(np.diag(axis.cov))
    out = {"unit": axis.unit, "offset": float(axis.offset), "offset_err": float(err[0]),
           "tilt": float(axis.tilt), "tilt_err": float(err[1]), "axis_err_told": axis.told}
    if disp.size:
        xs = np.array([-1.0, 0.0, 1.0])
        d = np.interp(xs, np.sort(x), disp[np.argsort(x)])
        out["shift_nm"] = [float(v) for v in axis.shift(xs, d)]
        out["shift_err_nm"] = [float(v) for v in axis.error(xs, d)]
    out["note"] = ("measured wavelength - (offset + tilt x) x dispersion = corrected wavelength;"
                   " x = -1 .. 1 across the detector (across the range without pixels); "
                   "shift_nm at x = -1, 0, 1")
    return out


@functools.lru_cache(maxsize=16)
def _shipped_transitions(names: tuple[str, ...], medium: str, observed_only: bool):
    """The transition table of the shipped line lists (computed once per species set)."""
    from . import levels

    table = levels.transitions(list(names), medium=medium, observed_only=observed_only)
    table.meta["read_only"] = True
    return table


def _initial_scales(model: _Model) -> np.ndarray:
    """Starting ln scales: median of ln F - ln S over the close pairs of each species/kind."""
    g = model.groups
    lnk = np.zeros((model.n_species, 2))
    close = np.abs(model.z) < 2.0
    for s in range(model.n_species):
        for kind in (_KIND_INTENSITY, _KIND_GA):
            sel = close & (g.species[model.gi] == s) & (g.kind[model.gi] == kind) & (
                g.order[model.gi] == 1
            )
            if sel.any():
                x = model.lnf[model.li[sel]] - np.log(g.strength[model.gi[sel]])
                lnk[s, kind] = float(np.median(x))
            else:
                sg = (g.species == s) & (g.kind == kind)
                if sg.any():
                    lnk[s, kind] = model.ln_lim - float(np.median(np.log(g.strength[sg])))
    return lnk


# ---- result tables -----------------------------------------------------------------------


def _fmt_wl(x: float) -> str:
    return f"{x:.3f}"


def _line_table(table, model, cand, names, lam, sig, flux, snr, flags_in, opts, lam_c,
                fwhm):
    """The per-line result.  Assignment is one-to-one: lines are served in order of their
    best probability, and a candidate group takes at most as many measured lines as it has
    listed members; a line whose best group is taken falls back to its next hypothesis,
    its probability renormalised without the taken ones.  A blend is named after the
    listed member nearest the corrected measured centroid."""
    import astropy.units as u
    from astropy.table import Table

    n = lam.size
    g = model.groups
    c_wl = _column(cand, "wavelength")
    c_lower = _column(cand, "lower", "", str)
    c_upper = _column(cand, "upper", "", str)
    c_ev = _column(cand, "upper_ev")
    c_low_ev = _column(cand, "lower_cm1") * HC_EV_CM
    c_aki = _column(cand, "aki")
    c_g = _column(cand, "g_upper")
    out_sp = np.full(n, "", dtype=object)
    best_sp = np.full(n, "", dtype=object)
    best_ref = np.full(n, np.nan)
    best_order = np.zeros(n, int)
    out_row = np.full(n, -1)
    out_k = np.full(n, -1)
    out_order = np.zeros(n, int)
    out_p = np.zeros(n)
    out_res = np.full(n, np.nan)
    out_alt = np.full(n, "", dtype=object)
    out_flags = [[f for f in str(x).split(",") if f] for x in flags_in]
    p_unid = model.resp_u if model.resp_u is not None else np.ones(n)
    out_pu = np.ones(n)
    resp = model.resp if model.resp is not None else np.zeros(0)

    order = np.lexsort((-resp, model.li)) if resp.size else np.zeros(0, int)
    li_s = model.li[order]
    starts = np.searchsorted(li_s, np.arange(n))
    ends = np.searchsorted(li_s, np.arange(n), "right")
    top = np.array([resp[order[starts[i]]] if ends[i] > starts[i] else 0.0 for i in range(n)])
    room = model.capacity.copy()
    # naming a transition claims the feature lies within half a FWHM of the measured
    # centroid; a line whose position is uncertain by a large fraction of the FWHM (an
    # unresolved blend, a distorted profile) cannot support that claim with confidence.  A
    # saturated line is the exception: its error is wide because its top is clipped, not
    # because it may be several features
    placed = 2.0 * ndtr(0.5 * fwhm / np.maximum(sig, 1e-12)) - 1.0
    placed[np.char.find(flags_in.astype(str), "saturated") >= 0] = 1.0

    def member(k, i):
        mem = g.members[k]
        if len(mem) == 1 or g.order[k] == 2:
            return int(g.primary[k])
        return int(mem[np.argmin(np.abs(c_wl[mem] - lam_c[i] / g.order[k]))])

    def label(k, row):
        name = names[g.species[k]]
        return f"{name} {_fmt_wl(c_wl[row])}" + (" 2nd order" if g.order[k] == 2 else "")

    for i in np.argsort(-top, kind="stable"):  # formatting and the one-to-one bookkeeping
        idx = order[starts[i]:ends[i]]
        # hypotheses of species judged present whose group has room left
        free = [j for j in idx if room[model.gi[j]] >= 1 and resp[j] > 0]
        norm = p_unid[i] + sum(resp[j] for j in free)
        share = {j: placed[i] * resp[j] / norm for j in free} if norm > 0 else {}
        hyps = [(share[j], label(model.gi[j], member(model.gi[j], i)), j) for j in free]
        out_pu[i] = 1.0 - sum(share.values())
        hyps.append((out_pu[i], "unidentified", -1))
        hyps.sort(key=lambda t: -t[0])
        if free:
            j = free[0]
            k = model.gi[j]
            row = member(k, i)
            best_sp[i], best_ref[i], best_order[i] = names[g.species[k]], c_wl[row], g.order[k]
            out_p[i] = share[j]
            if share[j] >= opts.min_probability:
                room[k] -= 1
                out_sp[i], out_row[i], out_k[i], out_order[i] = best_sp[i], row, k, g.order[k]
                out_res[i] = model.z[j]
        reported = hyps[0][1] if out_sp[i] else "unidentified"
        if out_sp[i] == "":
            out_flags[i].append("unidentified")
        # ambiguous: a second transition holds a fifth or more of the transitions' share
        ps = [h[0] for h in hyps if h[1] != "unidentified"]
        if len(ps) > 1 and ps[1] >= max(0.2 * sum(ps), 0.05):
            out_flags[i].append("ambiguous")
        out_alt[i] = "; ".join(f"{lab} ({p:.2f})" for p, lab, _ in hyps
                               if lab != reported and p >= 0.01)

    got = out_row >= 0
    rows = np.where(got, out_row, 0)

    def pick(values, fill):
        return np.where(got, values[rows] if len(values) else fill, fill)

    members = np.full(n, "", dtype=object)
    parent = np.full(n, np.nan)
    for i in np.flatnonzero(got):
        k = out_k[i]
        if len(g.members[k]) > 1:
            members[i] = ",".join(_fmt_wl(c_wl[m]) for m in g.members[k])
            out_flags[i].append("unresolved_blend")
        if g.order[k] == 2:
            parent[i] = c_wl[out_row[i]]
            out_flags[i].append("second_order")
        if g.above_limit[k]:
            out_flags[i].append("above_energy_limit")

    def text(values):
        return np.array(values, dtype=str) if n else np.zeros(0, str)

    t = Table()
    t["wavelength"] = u.Quantity(lam, u.nm)
    t["wavelength_err"] = u.Quantity(sig, u.nm)
    t["wavelength_corrected"] = u.Quantity(lam_c, u.nm)
    t["flux"] = u.Quantity(flux, u.ct)
    t["snr"] = snr
    if "pixel" in table.colnames:
        t["pixel"] = u.Quantity(_column(table, "pixel"), u.pix)
    t["species"] = text(out_sp)
    t["ref_wavelength"] = u.Quantity(pick(c_wl, np.nan), u.nm)
    t["order"] = out_order
    t["lower"] = text(pick(c_lower, ""))
    t["upper"] = text(pick(c_upper, ""))
    t["upper_energy_ev"] = u.Quantity(pick(c_ev, np.nan), u.eV)
    t["lower_energy_ev"] = u.Quantity(pick(c_low_ev, np.nan), u.eV)
    t["aki"] = u.Quantity(pick(c_aki, np.nan), 1 / u.s)
    t["g_upper"] = pick(c_g, np.nan)
    t["residual_sigma"] = out_res
    t["probability"] = out_p
    t["p_unidentified"] = out_pu
    t["best_species"] = text(best_sp)
    t["best_ref_wavelength"] = u.Quantity(best_ref, u.nm)
    t["best_order"] = best_order
    t["parent_wavelength"] = u.Quantity(parent, u.nm)
    t["blend_members"] = text(members)
    t["alternatives"] = text(out_alt)
    t["flags"] = text([",".join(dict.fromkeys(f)) for f in out_flags])
    return t


def _species_table(model, names, present, llr, lnmu, lines_out):
    from astropy.table import Table

    g = model.groups
    n_sp = len(names)
    first_in = (g.order == 1) & g.in_range
    strong_exp = np.zeros(n_sp, int)
    strong_found = np.zeros(n_sp, int)
    expected_lines = np.zeros(n_sp)
    n_cand = np.zeros(n_sp, int)
    if lnmu is not None:
        z_det = (lnmu - model.ln_lim) / model.opts.strength_scatter
        pdet = np.where(np.isfinite(lnmu), ndtr(z_det), 0.0)
        seen = model.observed if model.observed is not None else np.zeros(g.species.size)
        for k in range(n_sp):
            sel = first_in & (g.species == k)
            n_cand[k] = int(sel.sum())
            strong = sel & (pdet >= 0.9)
            strong_exp[k] = int(strong.sum())
            strong_found[k] = int(np.sum(seen[strong] > 0.5))
            expected_lines[k] = float(np.sum(pdet[sel]))
    n_assigned = np.array([int(np.sum(lines_out["species"] == s)) for s in names])
    t = Table()
    t["species"] = np.array(names, dtype=str)
    t["present"] = present
    t["n_candidates"] = n_cand
    t["n_assigned"] = n_assigned
    t["strong_expected"] = strong_exp
    t["strong_found"] = strong_found
    t["strong_missed"] = strong_exp - strong_found
    t["expected_lines"] = expected_lines
    t["log_likelihood_ratio"] = llr
    t["scale_intensity"] = np.exp(model.lnk[:, 0]) if model.lnk is not None else np.nan
    t["scale_ga"] = np.exp(model.lnk[:, 1]) if model.lnk is not None else np.nan
    t["detected_fraction_unrated"] = np.exp(model.lnq) if model.lnq is not None else np.nan
    t["note"] = np.array(["no listed line in the range" if c == 0 else "" for c in n_cand],
                         dtype=str)
    t.meta["threshold"] = model.opts.species_threshold
    return t


def _levels_table(lines_out, max_energy, corr, corrected):
    import astropy.units as u
    from astropy.table import Table

    ok = (lines_out["species"] != "") & (lines_out["order"] == 1)
    ok &= np.isfinite(np.asarray(lines_out["upper_energy_ev"], float))
    sp = np.asarray(lines_out["species"])[ok]
    up = np.asarray(lines_out["upper"])[ok]
    ev = np.asarray(lines_out["upper_energy_ev"], float)[ok]
    wl = np.asarray(lines_out["wavelength"], float)[ok]
    fl = np.asarray(lines_out["flux"], float)[ok]
    fc = fl / corr[ok]
    # N_u ∝ I λ / A for an energy intensity I (the response turns counts into one)
    single = np.char.find(np.asarray(lines_out["flags"], str)[ok], "blend") < 0
    aki = np.asarray(lines_out["aki"], float)[ok]
    snr = np.asarray(lines_out["snr"], float)[ok]
    pop_line = np.where(single & np.isfinite(aki) & (aki > 0), fc * wl / aki, np.nan)
    g_up = np.asarray(lines_out["g_upper"], float)[ok]
    keys = [f"{a}|{b}|{round(e, 5)}" for a, b, e in zip(sp, up, ev, strict=True)]
    uniq, inv = np.unique(np.array(keys, dtype=str), return_inverse=True) if keys else ([], [])
    m = len(uniq)
    inv = np.asarray(inv).ravel()
    t = Table()
    first = np.array([np.flatnonzero(inv == k)[0] for k in range(m)], int)
    t["species"] = sp[first] if m else np.zeros(0, str)
    t["upper"] = up[first] if m else np.zeros(0, str)
    e_ev = ev[first] if m else np.zeros(0)
    t["energy_cm1"] = u.Quantity(e_ev / HC_EV_CM, u.Unit("cm-1"))
    t["energy_ev"] = u.Quantity(e_ev, u.eV)
    # from the ground state an electron must bring at least the level energy
    t["min_electron_energy_ev"] = u.Quantity(e_ev, u.eV)
    t["n_lines"] = np.bincount(inv, minlength=m) if m else np.zeros(0, int)
    t["wavelengths"] = np.array(
        [",".join(_fmt_wl(x) for x in np.sort(wl[inv == k])) for k in range(m)], dtype=str
    ) if m else np.zeros(0, str)
    t["flux"] = u.Quantity(np.bincount(inv, fl, m) if m else np.zeros(0), u.ct)
    t["flux_corrected"] = np.bincount(inv, fc, m) if (m and corrected) else np.full(m, np.nan)
    pop = np.full(m, np.nan)
    if m and corrected:
        w = np.where(np.isfinite(pop_line), np.nan_to_num(snr, nan=1.0) ** 2, 0.0)
        wsum = np.bincount(inv, w, m)
        num = np.bincount(inv, w * np.nan_to_num(pop_line), m)
        pop = np.where(wsum > 0, num / np.where(wsum > 0, wsum, 1.0), np.nan)
        if np.any(np.isfinite(pop)):
            pop = pop / np.nanmax(pop)
    t["population"] = pop
    t["population_per_g"] = pop / g_up[first] if m else np.zeros(0)
    if max_energy is None:
        above = np.zeros(m, bool)
    else:
        above = e_ev > max_energy + 1e-9
    t["above_limit"] = above
    t["note"] = np.array(
        ["needs stepwise excitation via a metastable level, or the identification is wrong"
         if a else "" for a in above], dtype=str) if m else np.zeros(0, str)
    if m:
        t.sort(["energy_ev", "species"])
    t.meta["max_electron_energy_ev"] = max_energy
    t.meta["intensities"] = "response-corrected" if corrected else "uncorrected"
    t.meta["population"] = (
        "relative upper-level population N_u ∝ I λ / A (max = 1), from unblended lines with "
        "published A" if corrected else
        "not given: intensities are uncorrected for the spectral response (pass response=)"
    )
    return t


# ---- Boltzmann plot ----------------------------------------------------------------------


def boltzmann_plot(lines, species: str, *, corrected: bool) -> BoltzmannPlot | None:
    """Boltzmann-plot points ln(I λ / (g A)) of one species' identified lines, and a fit.

    Uses the first-order, unblended assignments of ``lines`` (an ``Identification.lines``
    table) whose transition has a published A value.  ``I`` is ``flux_corrected`` when the
    table has it (flux divided by the relative response, i.e. an energy intensity), else the
    raw flux.  With ``corrected`` False no temperature is fitted, because uncorrected
    intensities carry the instrument's spectral response.  The fit is a weighted straight
    line, slope = -1/(k T); its error is scaled by the scatter when there are more than two
    points.  Returns None when fewer than two such lines are identified.
    """
    lam = np.asarray(lines["wavelength"], float)
    sel = (np.asarray(lines["species"]) == species) & (np.asarray(lines["order"]) == 1)
    sel &= np.char.find(np.asarray(lines["flags"], str), "blend") < 0
    ga = np.asarray(lines["aki"], float) * np.asarray(lines["g_upper"], float)
    name = "flux_corrected" if "flux_corrected" in lines.colnames else "flux"
    flux = np.asarray(lines[name], float)
    e = np.asarray(lines["upper_energy_ev"], float)
    sel &= np.isfinite(ga) & (ga > 0) & np.isfinite(flux) & (flux > 0) & np.isfinite(e)
    rows = np.flatnonzero(sel)
    if rows.size < 2:
        return None
    e = e[rows]
    snr = np.asarray(lines["snr"], float)[rows]
    y = np.log(flux[rows] * lam[rows] / ga[rows])
    y_err = 1.0 / np.where(np.isfinite(snr) & (snr > 0), snr, 1.0)
    upper = tuple(str(x) for x in np.asarray(lines["upper"])[rows])
    nan = float("nan")
    common = {"species": species, "energy_ev": e, "y": y, "y_err": y_err,
              "wavelength": lam[rows], "upper": upper, "corrected": corrected}
    if not corrected:
        return BoltzmannPlot(
            **common, slope=nan, slope_err=nan, intercept=nan, temperature_k=nan,
            temperature_err_k=nan,
            message="intensities are uncorrected for the spectral response: no temperature",
        )
    if np.unique(np.round(e, 4)).size < 2:
        return BoltzmannPlot(
            **common, slope=nan, slope_err=nan, intercept=nan, temperature_k=nan,
            temperature_err_k=nan, message="all lines share one upper level: no temperature",
        )
    slope, slope_err, intercept = _line_fit(e, y, y_err)
    if slope < 0:
        temp = -1.0 / (K_B_EV * slope)
        temp_err = abs(temp * slope_err / slope)
        msg = f"excitation temperature from {rows.size} lines"
        if rows.size == 2:
            msg += " (two points: error from the measurement noise only)"
    else:
        temp, temp_err = nan, nan
        msg = "non-negative slope: the levels are not in a Boltzmann distribution"
    return BoltzmannPlot(
        **common, slope=float(slope), slope_err=float(slope_err), intercept=float(intercept),
        temperature_k=float(temp), temperature_err_k=float(temp_err), message=msg,
    )


def _line_fit(x, y, y_err):
    """Weighted straight line; slope error scaled by the scatter when there are >2 points."""
    w = 1.0 / np.maximum(y_err, 1e-6) ** 2
    a = np.vstack([x, np.ones_like(x)]).T
    aw = a * np.sqrt(w)[:, None]
    coef, *_ = np.linalg.lstsq(aw, y * np.sqrt(w), rcond=None)
    cov = np.linalg.inv(aw.T @ aw)
    dof = x.size - 2
    if dof > 0:
        chi2 = float(np.sum(w * (y - a @ coef) ** 2))
        cov = cov * max(chi2 / dof, 1.0)
    return float(coef[0]), float(np.sqrt(cov[0, 0])), float(coef[1])
