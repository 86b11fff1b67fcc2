"""The wavelength solution: a frozen pixel -> wavelength map with covariance, its versioned
JSON file, and the exposure written on its wavelength axis.

The solution file (schema ``ritzline.wavelength-solution``, version 1)
-----------------------------------------------------------------------
A UTF-8 JSON object, written atomically by :meth:`Solution.save`:

``schema``, ``schema_version``
    ``"ritzline.wavelength-solution"`` and the integer ``1``; any other value is refused.
``polynomial``
    ``kind`` ``"chebyshev"``; ``variable`` (text: ``x = 2*pixel/(n_pixels-1) - 1``);
    ``domain`` ``[0, n_pixels-1]`` (pixel 0 is the centre of the first pixel);
    ``coefficients`` (nm, lowest order first); ``covariance`` (nm^2, square, one row per
    coefficient: posterior covariance of the fit under the curvature prior, chi-square
    scaled, plus the jackknife covariance); ``model_spread`` (Chebyshev coefficients, nm,
    added in quadrature to the band; zeros when the covariance says it all).
``wavelength_unit``
    ``"nm"``.
``medium``
    ``"air"`` (standard air) or ``"vacuum"``.
``lamps``
    Lamp names used, e.g. ``["Hg", "Ar"]`` (all exposures together).
``n_pixels``
    Detector length (integer).
``fwhm_pixel``
    Median LSF FWHM of the fitted lines in pixels, or ``null``.
``rms_nm``, ``rms_pixel``
    RMS residual of the fitted lines.
``confidence``, ``verdict``
    One minus the corrected chance-match probability, and ``"confident"`` or
    ``"confident (from guess)"``.
``lines``
    One object per matched detection: ``pixel``, ``pixel_err``, ``wavelength_ref``,
    ``wavelength_ref_err``, ``species``, ``designation``, ``flux``, ``snr`` (``null`` when
    unknown), ``residual_nm`` (fit minus reference), ``used`` (bool), ``reason`` (why a line
    was not fitted, e.g. "outlier 5.3 sigma", or ""), and ``exposure`` (index of the lamp
    exposure it was found in; 0 when there was one).
``instrument``
    The instrument model the lines were measured with (``Instrument.to_dict()``), or absent.
``meta``
    Provenance: ``created`` (ISO 8601 UTC), ``ritzline_version``, ``input`` and
    ``input_sha256`` (the lamp exposure, when calibrated from a file), ``wavelength_range``,
    ``method``, ``p_chance``, ``log10_p_chance``, ``n_trials``, ``chi2_reduced``,
    ``n_detected``, ``n_reference``, ``degree_limited`` (text, when the number of lines and
    not the data limited the freedom of the map), ``solve_seconds``.
"""

from __future__ import annotations

import json
import math
import os
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import Any

import numpy as np
from numpy.polynomial import chebyshev as _cheb

from .._io import atomic_write, file_sha256, write_table
from ..errors import CalibrationError, SolutionFormatError

__all__ = ["SCHEMA_NAME", "SCHEMA_VERSION", "Solution", "calibrated_spectrum", "with_input",
           "write_calibrated"]

SCHEMA_NAME = "ritzline.wavelength-solution"
SCHEMA_VERSION = 1


@dataclass(frozen=True)
class Solution:
    """A pixel -> wavelength map: Chebyshev series in normalised pixel, with covariance.

    ``x = 2 p / (n_pixels - 1) - 1`` (the domain ``[0, n_pixels - 1]`` maps to ``[-1, 1]``) and
    ``wavelength(p) = sum_k coefficients[k] T_k(x)`` in nm in ``medium``.

    The fields are those of the JSON file (see the module docstring); ``lines`` holds its
    ``lines`` as columns (numpy arrays), :attr:`matches` the same as an astropy Table (built
    on first use, so that loading a solution does not import astropy), ``instrument`` the
    :class:`~ritzline.instrument.Instrument` the lines were measured with (or None).
    """

    coefficients: np.ndarray
    covariance: np.ndarray
    n_pixels: int
    medium: str
    lamps: tuple[str, ...]
    lines: dict
    rms_nm: float
    rms_pixel: float
    confidence: float
    verdict: str
    fwhm_pixel: float = float("nan")
    model_spread: np.ndarray = field(default_factory=lambda: np.zeros(1))
    meta: dict = field(default_factory=dict)
    instrument: Any = None

    # -- evaluation --------------------------------------------------------------------
    @cached_property
    def matches(self):
        """The matched lines as an astropy Table with units (plus ``wavelength_fit`` and
        ``residual_pixel``)."""
        return _matches_table(self.lines, self)

    @property
    def degree(self) -> int:
        """Degree of the Chebyshev series."""
        return len(self.coefficients) - 1

    @property
    def domain(self) -> tuple[float, float]:
        """Pixel range mapped to [-1, 1]."""
        return (0.0, float(self.n_pixels - 1))

    def _x(self, pixels) -> np.ndarray:
        return 2.0 * np.asarray(pixels, float) / (self.n_pixels - 1) - 1.0

    def wavelength(self, pixels) -> np.ndarray:
        """Wavelength (nm, in :attr:`medium`) at pixel positions."""
        return _cheb.chebval(self._x(pixels), self.coefficients)

    def wavelength_err(self, pixels) -> np.ndarray:
        """1-sigma uncertainty (nm) of :meth:`wavelength`: the coefficient covariance (which
        holds the curvature prior where no line constrains the map) plus the model spread."""
        x = self._x(pixels)
        xr = np.atleast_1d(x).ravel()
        v = _cheb.chebvander(xr, self.degree)
        var = np.einsum("ij,jk,ik->i", v, self.covariance, v)
        spread = _cheb.chebval(xr, self.model_spread)
        err = np.sqrt(np.clip(var, 0, None) + spread**2)
        return err.reshape(np.shape(x)) if np.ndim(x) else float(err[0])

    def dispersion(self, pixels) -> np.ndarray:
        """d(wavelength)/d(pixel), nm per pixel (negative when wavelength falls with pixel)."""
        dcoef = _cheb.chebder(self.coefficients)
        return _cheb.chebval(self._x(pixels), dcoef) * 2.0 / (self.n_pixels - 1)

    def pixel(self, wavelengths) -> np.ndarray:
        """Pixel position of wavelengths (nm): the inverse of :meth:`wavelength`."""
        wl = np.asarray(wavelengths, float)
        grid = np.linspace(-0.5, self.n_pixels - 0.5, 2 * self.n_pixels + 1)
        wgrid = self.wavelength(grid)
        order = np.argsort(wgrid)
        p = np.interp(wl, wgrid[order], grid[order], left=np.nan, right=np.nan)
        # beyond the detector, extrapolate linearly then polish with Newton steps
        lo, hi = wgrid[order][0], wgrid[order][-1]
        out = ~np.isfinite(p) & np.isfinite(wl)
        if np.any(out):
            end = np.where(wl < lo, grid[order][0], grid[order][-1])
            p = np.where(out, end + (wl - np.where(wl < lo, lo, hi)) / self.dispersion(end), p)
        for _ in range(3):
            p = p - (self.wavelength(p) - wl) / self.dispersion(p)
        return p

    @property
    def wavelength_limits(self) -> tuple[float, float]:
        """Wavelengths (nm) at the two ends of the detector, smaller first."""
        ends = self.wavelength([-0.5, self.n_pixels - 0.5])
        return float(ends.min()), float(ends.max())

    # -- file ----------------------------------------------------------------------------
    def to_dict(self) -> dict:
        """The JSON document (schema ``ritzline.wavelength-solution`` version 1)."""
        m = self.lines
        lines = [
            {
                "pixel": float(m["pixel"][i]),
                "pixel_err": float(m["pixel_err"][i]),
                "wavelength_ref": float(m["wavelength_ref"][i]),
                "wavelength_ref_err": float(m["wavelength_ref_err"][i]),
                "species": str(m["species"][i]),
                "designation": str(m["designation"][i]),
                "flux": _json_float(m["flux"][i]),
                "snr": _json_float(m["snr"][i]),
                "residual_nm": float(m["residual_nm"][i]),
                "used": bool(m["used"][i]),
                "reason": str(m["reason"][i]),
                "exposure": int(m["exposure"][i]) if "exposure" in m else 0,
            }
            for i in range(len(m["pixel"]))
        ]
        doc = {
            "schema": SCHEMA_NAME,
            "schema_version": SCHEMA_VERSION,
            "polynomial": {
                "kind": "chebyshev",
                "variable": "x = 2*pixel/(n_pixels-1) - 1",
                "domain": list(self.domain),
                "coefficients": [float(c) for c in self.coefficients],
                "covariance": [[float(c) for c in row] for row in self.covariance],
                "model_spread": [float(c) for c in self.model_spread],
            },
            "wavelength_unit": "nm",
            "medium": self.medium,
            "lamps": list(self.lamps),
            "n_pixels": int(self.n_pixels),
            "fwhm_pixel": _json_float(self.fwhm_pixel),
            "rms_nm": float(self.rms_nm),
            "rms_pixel": float(self.rms_pixel),
            "confidence": float(self.confidence),
            "verdict": self.verdict,
            "lines": lines,
            "meta": _jsonable(self.meta),
        }
        if self.instrument is not None:
            doc["instrument"] = self.instrument.to_dict()
        return doc

    def save(self, path: str | os.PathLike) -> Path:
        """Write the solution as JSON, atomically; returns the path."""
        path = Path(path)
        text = json.dumps(self.to_dict(), indent=1, allow_nan=False)
        with atomic_write(path, "w", encoding="utf-8") as fh:
            fh.write(text + "\n")
        return path

    @classmethod
    def load(cls, path: str | os.PathLike) -> Solution:
        """Read and validate a solution file.

        Raises
        ------
        SolutionFormatError
            Naming the file and the problem: missing, unreadable, not JSON, wrong schema or
            version, a missing or wrong-typed field, a covariance of the wrong shape, not
            symmetric or not positive semi-definite, non-finite numbers, or coefficients
            that do not reproduce the residuals and RMS stored with the matched lines (an
            edited file).
        """
        path = Path(path)
        try:
            text = path.read_text(encoding="utf-8")
        except FileNotFoundError:
            raise SolutionFormatError(f"{path}: solution file not found") from None
        except (OSError, UnicodeDecodeError) as exc:
            raise SolutionFormatError(f"{path}: cannot read solution file ({exc})") from None
        try:
            doc = json.loads(text)
        except json.JSONDecodeError as exc:
            raise SolutionFormatError(
                f"{path}: not a JSON solution file ({exc.msg} at line {exc.lineno})"
            ) from None
        solution = cls.from_dict(doc, source=str(path))
        # a file carries its own checks: the stored residuals and RMS of the matched lines
        _check_stored_residuals(solution, lambda problem: SolutionFormatError(
            f"{path}: {problem}; re-create it with ritzline calibrate"))
        return solution

    @classmethod
    def from_dict(cls, doc: Any, *, source: str = "solution") -> Solution:
        """Build a Solution from its JSON document, validating every field."""

        def bad(problem: str) -> SolutionFormatError:
            return SolutionFormatError(f"{source}: {problem}; re-create it with ritzline calibrate")

        if not isinstance(doc, dict):
            raise bad("top level is not a JSON object")
        if doc.get("schema") != SCHEMA_NAME:
            raise bad(f"'schema' is {doc.get('schema')!r}, expected {SCHEMA_NAME!r}")
        version = doc.get("schema_version")
        if "schema_version" not in doc:
            raise bad("missing field 'schema_version'")
        if not isinstance(version, int) or isinstance(version, bool):
            raise bad(f"'schema_version' must be an integer, got {version!r}")
        if version != SCHEMA_VERSION:
            raise bad(
                f"schema_version {version} is not supported (this ritzline reads {SCHEMA_VERSION})"
            )

        def get(obj: dict, key: str, kind, where: str = ""):
            name = f"{where}{key}"
            if key not in obj:
                raise bad(f"missing field '{name}'")
            value = obj[key]
            ok = isinstance(value, kind) and not (
                isinstance(value, bool) and bool not in np.atleast_1d(kind)
            )
            if not ok:
                raise bad(f"field '{name}' has type {type(value).__name__}")
            return value

        poly = get(doc, "polynomial", dict)
        kind = get(poly, "kind", str, "polynomial.")
        if kind != "chebyshev":
            raise bad(f"polynomial kind {kind!r} is not supported (expected 'chebyshev')")
        n_pixels = get(doc, "n_pixels", int)
        if n_pixels < 2:
            raise bad(f"n_pixels must be >= 2, got {n_pixels}")
        domain = _numbers(get(poly, "domain", list, "polynomial."), "polynomial.domain", bad)
        if domain.shape != (2,) or domain[0] != 0 or domain[1] != n_pixels - 1:
            raise bad(f"polynomial.domain must be [0, {n_pixels - 1}], got {domain.tolist()}")
        coef = _numbers(get(poly, "coefficients", list, "polynomial."), "coefficients", bad)
        if coef.ndim != 1 or coef.size < 2:
            raise bad("polynomial.coefficients must be a list of at least 2 numbers")
        cov = _numbers(get(poly, "covariance", list, "polynomial."), "covariance", bad)
        if cov.shape != (coef.size, coef.size):
            raise bad(
                f"polynomial.covariance has shape {cov.shape}, expected "
                f"{(coef.size, coef.size)} for {coef.size} coefficients"
            )
        spread = _numbers(poly.get("model_spread", [0.0]), "model_spread", bad)
        if spread.ndim != 1 or spread.size < 1:
            raise bad("polynomial.model_spread must be a list of numbers")
        medium = get(doc, "medium", str)
        if medium not in ("air", "vacuum"):
            raise bad(f"medium must be 'air' or 'vacuum', got {medium!r}")
        if doc.get("wavelength_unit", "nm") != "nm":
            raise bad(f"wavelength_unit must be 'nm', got {doc.get('wavelength_unit')!r}")
        lamps = get(doc, "lamps", list)
        if not all(isinstance(s, str) for s in lamps):
            raise bad("lamps must be a list of strings")
        rms_nm = float(_numbers([get(doc, "rms_nm", (int, float))], "rms_nm", bad)[0])
        rms_px = float(_numbers([get(doc, "rms_pixel", (int, float))], "rms_pixel", bad)[0])
        conf = float(_numbers([get(doc, "confidence", (int, float))], "confidence", bad)[0])
        if not 0.0 <= conf <= 1.0:
            raise bad(f"confidence must lie in [0, 1], got {conf}")
        verdict = get(doc, "verdict", str)
        fwhm = doc.get("fwhm_pixel")
        if fwhm is not None and (not isinstance(fwhm, (int, float)) or isinstance(fwhm, bool)):
            raise bad(f"field 'fwhm_pixel' has type {type(fwhm).__name__}")
        lines = get(doc, "lines", list)
        meta = doc.get("meta", {})
        if not isinstance(meta, dict):
            raise bad("field 'meta' must be an object")
        line_cols = _lines_columns(lines, bad)
        _check_covariance(cov, bad)
        instrument = None
        if doc.get("instrument") is not None:
            instrument = _instrument_from_dict(doc["instrument"], bad)
        return cls(
            coefficients=coef,
            covariance=cov,
            n_pixels=n_pixels,
            medium=medium,
            lamps=tuple(lamps),
            lines=line_cols,
            rms_nm=rms_nm,
            rms_pixel=rms_px,
            confidence=conf,
            verdict=verdict,
            fwhm_pixel=float("nan") if fwhm is None else float(fwhm),
            model_spread=spread,
            meta=dict(meta, loaded_from=source),
            instrument=instrument,
        )

    def summary(self) -> dict:
        """The figures a person reads first (used by the CLI report)."""
        used = np.asarray(self.lines["used"], bool)
        disp = np.abs(self.dispersion(np.linspace(0, self.n_pixels - 1, 64)))
        return {
            "lines_used": int(used.sum()),
            "lines_rejected": int((~used).sum()),
            "rms_nm": self.rms_nm,
            "rms_pixel": self.rms_pixel,
            "degree": self.degree,
            "dispersion_nm_per_px": (float(disp.min()), float(disp.max())),
            "wavelength_limits_nm": self.wavelength_limits,
            "direction": "increasing" if self.dispersion(self.n_pixels / 2) > 0 else "decreasing",
            "confidence": self.confidence,
            "p_chance": float(self.meta.get("p_chance", 1.0 - self.confidence)),
            "verdict": self.verdict,
            "medium": self.medium,
            "lamps": list(self.lamps),
            "degree_limited": self.meta.get("degree_limited", ""),
        }


_LINE_FIELDS = {
    "pixel": (int, float),
    "pixel_err": (int, float),
    "wavelength_ref": (int, float),
    "wavelength_ref_err": (int, float),
    "species": str,
    "designation": str,
    "residual_nm": (int, float),
    "used": bool,
    "reason": str,
}


def _check_covariance(cov: np.ndarray, bad) -> None:
    """A covariance matrix is symmetric with no negative variance (positive semi-definite)."""
    scale = float(np.max(np.abs(cov))) if cov.size else 0.0
    if not np.allclose(cov, cov.T, rtol=1e-9, atol=1e-12 * scale):
        raise bad("polynomial.covariance is not symmetric")
    if np.any(np.diag(cov) < 0):
        raise bad("polynomial.covariance has a negative variance on its diagonal")
    if scale > 0 and np.linalg.eigvalsh(0.5 * (cov + cov.T)).min() < -1e-9 * scale:
        raise bad("polynomial.covariance is not positive semi-definite (an impossible "
                  "covariance: edited or damaged)")


def _check_stored_residuals(solution: Solution, bad) -> None:
    """The file stores, per matched line, ``residual_nm`` = fit minus reference and the RMS
    of the used ones: the coefficients must reproduce them, or the file was edited."""
    m = solution.lines
    if not len(m["pixel"]):
        return
    fit = solution.wavelength(m["pixel"]) - m["wavelength_ref"]
    tol = 1e-7 + 1e-9 * np.abs(m["wavelength_ref"])
    off = np.abs(fit - m["residual_nm"])
    if np.any(off > tol):
        k = int(np.argmax(off - tol))
        raise bad(
            f"polynomial.coefficients do not reproduce the stored residual of the line at "
            f"pixel {m['pixel'][k]:.2f} ({m['residual_nm'][k]:.6f} nm stored, "
            f"{fit[k]:.6f} nm from the coefficients): the file was edited or damaged"
        )
    used = np.asarray(m["used"], bool)
    if used.any():
        rms = float(np.sqrt(np.mean(np.asarray(m["residual_nm"])[used] ** 2)))
        if not math.isclose(rms, solution.rms_nm, rel_tol=1e-6, abs_tol=1e-9):
            raise bad(f"rms_nm {solution.rms_nm:g} does not match the RMS of the used lines' "
                      f"residuals ({rms:g} nm): the file was edited or damaged")


def _numbers(value, name: str, bad) -> np.ndarray:
    try:
        arr = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise bad(f"{name} must contain only numbers") from None
    if any(isinstance(v, bool) for v in np.ravel(np.asarray(value, dtype=object))):
        raise bad(f"{name} must contain only numbers")
    if not np.all(np.isfinite(arr)):
        raise bad(f"{name} contains non-finite values")
    return arr


def _lines_columns(lines: list, bad) -> dict:
    cols: dict[str, list] = {k: [] for k in (*_LINE_FIELDS, "flux", "snr", "exposure")}
    for i, item in enumerate(lines):
        if not isinstance(item, dict):
            raise bad(f"lines[{i}] is not an object")
        for key, kind in _LINE_FIELDS.items():
            if key not in item:
                raise bad(f"missing field 'lines[{i}].{key}'")
            value = item[key]
            if not isinstance(value, kind) or (kind is not bool and isinstance(value, bool)):
                raise bad(f"field 'lines[{i}].{key}' has type {type(value).__name__}")
            if kind is not str and kind is not bool and not math.isfinite(value):
                raise bad(f"field 'lines[{i}].{key}' is not finite")
            cols[key].append(value)
        for key in ("flux", "snr"):
            value = item.get(key)
            cols[key].append(float("nan") if value is None else float(value))
        exposure = item.get("exposure", 0)
        if not isinstance(exposure, int) or isinstance(exposure, bool) or exposure < 0:
            raise bad(f"field 'lines[{i}].exposure' must be a non-negative integer")
        cols["exposure"].append(exposure)
    return _line_columns(**cols)


def _instrument_from_dict(doc, bad):
    """The stored instrument model (needs ``ritzline.instrument``; refused without it)."""
    try:
        from ..instrument import Instrument
    except ImportError:
        raise bad("the file carries an instrument model this ritzline cannot read") from None
    if not isinstance(doc, dict):
        raise bad("field 'instrument' must be an object")
    return Instrument.from_dict(doc)


def _line_columns(**cols) -> dict:
    """The matched-line columns as numpy arrays (the one layout Solution keeps)."""
    out = {}
    for key in ("pixel", "pixel_err", "wavelength_ref", "wavelength_ref_err", "flux", "snr",
                "residual_nm"):
        out[key] = np.asarray(cols[key], float).reshape(-1)
    for key in ("species", "designation", "reason"):
        out[key] = np.asarray(cols[key], dtype=str).reshape(-1)
    out["used"] = np.asarray(cols["used"], bool).reshape(-1)
    exposure = cols.get("exposure")
    out["exposure"] = (np.zeros(out["used"].size, int) if exposure is None
                       else np.asarray(exposure, int).reshape(-1))
    return out


def _matches_table(lines: dict, solution: Solution):
    import astropy.units as u
    from astropy.table import Table

    t = Table()
    t["pixel"] = lines["pixel"] * u.pix
    t["pixel_err"] = lines["pixel_err"] * u.pix
    t["wavelength_ref"] = lines["wavelength_ref"] * u.nm
    t["wavelength_ref_err"] = lines["wavelength_ref_err"] * u.nm
    t["species"] = lines["species"]
    t["designation"] = lines["designation"]
    t["flux"] = lines["flux"] * u.ct
    t["snr"] = lines["snr"]
    t["wavelength_fit"] = solution.wavelength(lines["pixel"]) * u.nm
    t["residual_nm"] = lines["residual_nm"] * u.nm
    disp = solution.dispersion(lines["pixel"]) if len(lines["pixel"]) else np.zeros(0)
    t["residual_pixel"] = lines["residual_nm"] / np.where(disp == 0, np.nan, disp) * u.pix
    t["used"] = lines["used"]
    t["reason"] = lines["reason"]
    t["exposure"] = lines["exposure"] if "exposure" in lines else np.zeros(len(t), int)
    t.meta.update(medium=solution.medium, lamps=list(solution.lamps))
    return t


def _json_float(value) -> float | None:
    v = float(value)
    return v if math.isfinite(v) else None


def _jsonable(obj):
    if isinstance(obj, dict):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        return _json_float(obj)
    if isinstance(obj, (str, int, bool)) or obj is None:
        return obj
    return str(obj)

def _version() -> str:
    from .. import __version__

    return __version__


def calibrated_spectrum(spectrum, solution: Solution):
    """A table of the exposure on the solution's wavelength axis: ``pixel, wavelength,
    wavelength_err, counts, mask`` with units and provenance in meta."""
    import astropy.units as u
    from astropy.table import Table

    from ..spectrum import spectrum_arrays

    arrays = spectrum_arrays(spectrum)
    if arrays.counts.size != solution.n_pixels:
        raise CalibrationError(
            f"the spectrum has {arrays.counts.size} pixels, the solution {solution.n_pixels}"
        )
    pix = np.arange(solution.n_pixels, dtype=float)
    t = Table()
    t["pixel"] = pix * u.pix
    t["wavelength"] = solution.wavelength(pix) * u.nm
    t["wavelength_err"] = solution.wavelength_err(pix) * u.nm
    t["counts"] = arrays.counts * u.ct
    t["mask"] = arrays.mask
    t.meta.update(
        medium=solution.medium,
        lamps=list(solution.lamps),
        solution_degree=solution.degree,
        solution_rms_nm=solution.rms_nm,
        solution_confidence=solution.confidence,
        ritzline_version=_version(),
        source=arrays.meta.get("source"),
    )
    return t


def write_calibrated(spectrum, solution: Solution, path: str | os.PathLike) -> Path:
    """Write :func:`calibrated_spectrum` as ECSV (atomically); returns the path."""
    path = Path(path)
    write_table(calibrated_spectrum(spectrum, solution), path)
    return path


def with_input(solution: Solution, *paths: str | os.PathLike) -> Solution:
    """The solution with its input files' names and SHA-256 recorded in ``meta`` (one
    string each for one file, lists for several)."""
    from dataclasses import replace

    names = [str(p) for p in paths]
    sums = [file_sha256(p) for p in paths]
    one = len(names) == 1
    meta = dict(solution.meta, input=names[0] if one else names,
                input_sha256=sums[0] if one else sums)
    return replace(solution, meta=meta)
