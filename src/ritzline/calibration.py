"""Wavelength calibration against a reference lamp with no initial guess, and the
:class:`Solution` it produces (a frozen pixel -> wavelength map with covariance, saved as
versioned JSON).

How a lamp exposure is solved
-----------------------------
1. Lines are found (``peaks.find_lines``) and every listed line of the lamps is taken from
   ``levels.lamp_lines`` inside the allowed range: all of them take part in the matching
   (a real lamp emits them all), only those the list calls usable are fitted.
2. *Invariants.*  For every detected line and three of its next few neighbours, the two
   ratios ``(p_j - p_i)/(p_l - p_i)`` and ``(p_k - p_i)/(p_l - p_i)`` do not depend on the
   (locally linear) dispersion, its offset or its sign.  The same ratios are computed for
   reference-line quadruplets (with wider gaps, because many listed lines are not seen); a
   k-d tree finds every pair of quadruplets whose ratios agree within the centroid noise.
3. *Votes.*  Each agreeing pair implies a direction, a dispersion and a central wavelength;
   these are histogrammed, and the strongest few cells (the true one collects votes from all
   over the detector) give candidate sets of line correspondences.  A cell's dispersion
   times the measured LSF width gives the resolution in nm, so reference lines blended at
   that resolution (``levels.blends``, closer than one FWHM) are no longer fitted, except
   multiplets spanning less than ``_MERGE_FRACTION`` of the FWHM and 1.5 FWHM clear of other
   listed lines: whichever members shine, such a group is one line at that resolution,
   fitted at the middle of its extent with half the extent as its reference uncertainty.
4. *Grow.*  A candidate starts from its most voted one-to-one pairs or, when those do not
   grow to ``MIN_LINES_BLIND`` lines, also from the pairs closest to the cell's linear map
   (look-alike quadruplets can outvote the true pairs; both count as tested candidates).
   From it, a robust low-degree Chebyshev fit predicts where every other reference line
   should fall; a detection joins when its nearest listed line lies inside the prediction
   window, no other listed line does, the window is small against the local line spacing,
   and the centroid is known to better than an eighth of the line width.  Windows use
   leave-one-out bands (a line that alone pins the fit somewhere does not vouch for
   itself) and, beyond the outermost lines, a curvature prior.
   The fit is repeated until nothing changes: the solution widens to the whole detector.
5. *Fit and trust.*  The final weighted Chebyshev fit (degree by BIC, capped by the number and
   spread of lines) rejects outliers on leave-one-out residuals, with a reason per line.
   When its windows reject lines, a lower degree that fits no significantly worse (F-test)
   and accepts them all is preferred to dropping them: a lone end line is rejected by a
   degree high enough to bend to it, not by the curve the other lines define.  Conversely,
   an outermost line that pins the fit on its own (leverage above a half) stays only when
   the fit of the other lines, with its band and the curvature prior beyond them, puts its
   listed wavelength within ``_VOUCH_NSIGMA`` sigma (stricter than joining: it sets the
   extrapolation alone): a fit bent to a line predicts that line wherever it sits, so only
   the others can vouch for it.
   Its covariance is the chi-square-scaled formal one plus the jackknife one; the band adds
   the spread to the next degree and, beyond the lines, the curvature prior.  The confidence
   is one minus the chance that a list of lines at the same local density fits the
   detections this well by accident (a Gamma-distributed sum of log distances), times the
   number of distinct candidate solutions tested.  Too few lines, residuals far above the
   centroid errors, or a chance above ``CONFIDENT_P`` raise
   :class:`~ritzline.errors.CalibrationError`, saying what was tried and what is missing.

With ``guess=`` (an earlier Solution) the search is a vote over the shift only, with windows
widened by the earlier solution's own band; the fit is the earlier shape moved by a shift
and a small stretch when few lines are found, a free refit of those lines otherwise.

The solution file (schema ``ritzline.wavelength-solution``, version 1)
-----------------------------------------------------------------------
A UTF-8 JSON object, written atomically by :meth:`Solution.save`:

``schema``, ``schema_version``
    ``"ritzline.wavelength-solution"`` and the integer ``1``; any other value is refused.
``polynomial``
    ``kind`` ``"chebyshev"``; ``variable`` (text: ``x = 2*pixel/(n_pixels-1) - 1``);
    ``domain`` ``[0, n_pixels-1]`` (pixel 0 is the centre of the first pixel);
    ``coefficients`` (nm, lowest order first); ``covariance`` (nm^2, square, one row per
    coefficient: chi-square-scaled formal plus jackknife covariance); ``model_spread``
    (Chebyshev coefficients, nm: next-degree fit minus this one, part of the band).
``wavelength_unit``
    ``"nm"``.
``medium``
    ``"air"`` (standard air) or ``"vacuum"``.
``lamps``
    Lamp names used, e.g. ``["Hg", "Ar"]``.
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
    was not fitted: "blend_suspect", "edge", "outlier 5.3 sigma", "reference: ...", or "").
``meta``
    Provenance: ``created`` (ISO 8601 UTC), ``ritzline_version``, ``input`` and
    ``input_sha256`` (the lamp exposure, when calibrated from a file), ``wavelength_range``,
    ``method``, ``p_chance``, ``log10_p_chance``, ``n_hypotheses``, ``chi2_reduced``,
    ``n_detected``, ``n_reference``, ``solve_seconds``.

The band reported by :meth:`Solution.wavelength_err` is computed from ``covariance``,
``model_spread`` (its running maximum beyond the outermost used line) and, beyond the
outermost used lines, a curvature prior of ``NONLINEARITY_PRIOR`` x half-span x distance^2.
"""

from __future__ import annotations

import json
import math
import os
import time
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import Any

import numpy as np
from numpy.polynomial import chebyshev as _cheb

from ._io import atomic_write, file_sha256, write_table
from .errors import CalibrationError, SolutionFormatError

__all__ = [
    "SCHEMA_NAME",
    "SCHEMA_VERSION",
    "Solution",
    "calibrate",
    "calibrated_spectrum",
    "with_input",
    "write_calibrated",
]

SCHEMA_NAME = "ritzline.wavelength-solution"
SCHEMA_VERSION = 1
DEFAULT_RANGE_NM = (200.0, 1100.0)
# Plausible dispersions of a grating spectrometer, nm per pixel (common practice: from
# ~0.005 nm/px echelle-like to ~2 nm/px survey instruments).
DISPERSION_LIMITS = (0.003, 3.0)
CONFIDENT_P = 1e-3  # largest look-elsewhere-corrected chance probability accepted
MAX_DEGREE = 5
# Grating spectrometers depart from a linear pixel -> wavelength map by at most a few per
# cent of the half-span (common practice); beyond the outermost lines the band includes a
# 1-sigma curvature of this fraction of the half-span per squared normalised distance.
NONLINEARITY_PRIOR = 0.01
MAX_CHI2 = 25.0  # a solution whose residuals exceed 5x the centroid errors is not returned
MIN_LINES_BLIND = 6  # fewer fitted lines than this never make a solution without a guess
_MATCH_NSIGMA = 4.0  # a detection belongs to a reference line within this many sigma
# an outermost line that pins the fit alone must lie within this many sigma of the fit of
# the other lines (it sets the extrapolation on its own: a stricter test than joining)
_VOUCH_NSIGMA = 3.0
_ISOLATED = 0.5  # an end line further than this (normalised pixel) from the next is alone
_WINDOW_FRACTION_INSIDE = 0.3  # the same between fitted lines
_WINDOW_FRACTION = 0.2  # a match window must be smaller than this x the line spacing
_CLIP_NSIGMA = 4.0  # rejection threshold of the final fit
# reference lines closer than one FWHM whose whole extent is below this fraction of it are
# fitted as one line (their centroid is known to half the extent whatever members shine)
_MERGE_FRACTION = 0.25


# ---- the Solution ---------------------------------------------------------------------


@dataclass(frozen=True)
class Solution:
    """A pixel -> wavelength map: Chebyshev series in normalised pixel, with covariance.

    ``x = 2 p / (n_pixels - 1) - 1`` (the domain ``[0, n_pixels - 1]`` maps to ``[-1, 1]``) and
    ``wavelength(p) = sum_k coefficients[k] T_k(x)`` in nm in ``medium``.

    Attributes
    ----------
    coefficients, covariance : ndarray
        Chebyshev coefficients (nm) and their covariance (nm^2), already scaled by the
        reduced chi-square when that exceeds 1.
    n_pixels : int
        Detector length the map was made for.
    medium : str
        "air" or "vacuum".
    lamps : tuple of str
        Lamp names used.
    lines : dict of ndarray
        One entry per detection associated with a reference line: ``pixel, pixel_err,
        wavelength_ref, wavelength_ref_err, species, designation, flux, snr, residual_nm,
        used, reason``; :attr:`matches` is the same as an astropy Table (built on first use,
        so that loading a solution does not import astropy).
    rms_nm, rms_pixel : float
        Unweighted RMS of the residuals of the used lines.
    confidence : float
        One minus the look-elsewhere-corrected chance of a match this good by accident.
    verdict : str
        "confident" (the only verdict a returned solution carries without a guess),
        "confident (from guess)" for re-calibrations.
    fwhm_pixel : float
        Median FWHM (pixels) of the used lamp lines (NaN when unknown).
    model_spread : ndarray
        Coefficients of the difference to the next-higher-degree fit; its absolute value is
        added in quadrature to the covariance band, so the band stays honest where the
        lines give no constraint (beyond the outermost lines).
    meta : dict
        Provenance: ``created``, ``ritzline_version``, ``input``, ``input_sha256``,
        ``method``, ``p_chance``, ``n_hypotheses``, ``chi2_reduced``, ``wavelength_range``...
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
        """1-sigma uncertainty (nm) of :meth:`wavelength`: fit covariance plus the spread to
        the next-higher-degree model.  Beyond the outermost used lines (where that spread
        dominates) its running maximum from the last line outwards is used, so the band
        never pinches where the two models happen to cross."""
        x = self._x(pixels)
        xr = np.atleast_1d(x).ravel()
        v = _cheb.chebvander(xr, self.degree)
        var = np.einsum("ij,jk,ik->i", v, self.covariance, v)
        spread = np.abs(_cheb.chebval(xr, self.model_spread))
        used = np.asarray(self.lines["used"], bool)
        if used.any():
            px = np.asarray(self.lines["pixel"], float)[used]
            lo, hi = self._x(px.min()), self._x(px.max())
            edge = np.clip(xr, lo, hi)
            t = np.linspace(0.0, 1.0, 33)
            path = edge[:, None] + (xr - edge)[:, None] * t[None, :]
            spread = np.maximum(spread, np.abs(_cheb.chebval(path, self.model_spread)).max(1))
            spread = np.hypot(spread, _prior_band(xr, self.coefficients, (lo, hi)))
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
            }
            for i in range(len(m["pixel"]))
        ]
        return {
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
        solution = cls(
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
        )
        return solution

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
    cols: dict[str, list] = {k: [] for k in (*_LINE_FIELDS, "flux", "snr")}
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
    return _line_columns(**cols)


def _line_columns(**cols) -> dict:
    """The matched-line columns as numpy arrays (the one layout Solution keeps)."""
    out = {}
    for key in ("pixel", "pixel_err", "wavelength_ref", "wavelength_ref_err", "flux", "snr",
                "residual_nm"):
        out[key] = np.asarray(cols[key], float).reshape(-1)
    for key in ("species", "designation", "reason"):
        out[key] = np.asarray(cols[key], dtype=str).reshape(-1)
    out["used"] = np.asarray(cols["used"], bool).reshape(-1)
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


# ---- inputs ---------------------------------------------------------------------------


@dataclass(frozen=True)
class _Lines:
    """Detected lamp lines, sorted by pixel."""

    pixel: np.ndarray
    pixel_err: np.ndarray
    flux: np.ndarray
    snr: np.ndarray
    fwhm: np.ndarray
    bad: np.ndarray  # suspected blend / edge: matched but not fitted
    reason: np.ndarray  # why a line is not fitted ("" when clean)
    n_pixels: int


@dataclass(frozen=True)
class _Refs:
    """Reference lamp lines, sorted by wavelength."""

    wavelength: np.ndarray
    wavelength_err: np.ndarray
    intensity: np.ndarray
    species: np.ndarray
    designation: np.ndarray
    usable: np.ndarray | None = None  # may be fitted (not only matched)
    reason: np.ndarray | None = None  # why not, when not

    def fit_ok(self, ri) -> np.ndarray:
        return np.ones(np.size(ri), bool) if self.usable is None else self.usable[ri]

    @property
    def n_usable(self) -> int:
        return self.wavelength.size if self.usable is None else int(self.usable.sum())


def _detections(spectrum, n_pixels: int | None) -> tuple[_Lines, dict]:
    """Lines of a lamp exposure: run ``find_lines`` on a spectrum, or take a line table."""
    from astropy.table import Table

    info: dict = {}
    if isinstance(spectrum, Table):
        table = spectrum
        n = n_pixels or table.meta.get("n_pixels")
        if n is None:
            raise CalibrationError(
                "a line table was given without the detector length: pass n_pixels= or put "
                "'n_pixels' in the table meta"
            )
    else:
        from .peaks import find_lines
        from .spectrum import spectrum_arrays

        arrays = spectrum_arrays(spectrum)
        n = arrays.counts.size
        info = {k: arrays.meta.get(k) for k in ("source", "sha256") if arrays.meta.get(k)}
        table = find_lines(spectrum)
    if "pixel" not in table.colnames:
        raise CalibrationError("the line table has no 'pixel' column")
    p = np.asarray(table["pixel"], float)
    m = p.size

    def col(name, default):
        return np.asarray(table[name], float) if name in table.colnames else np.full(m, default)

    perr = col("pixel_err", 0.05)
    perr = np.where(np.isfinite(perr) & (perr > 0), perr, 0.05)
    flags = (
        np.asarray(table["flags"], dtype=str) if "flags" in table.colnames else np.full(m, "")
    )
    reason = np.full(m, "", dtype=object)
    # Saturated lines are fitted: the line finder measures them from the unclipped wings and
    # gives them their (larger) errors; so are lines it fitted jointly with a neighbour
    # ("blended"), whose errors hold down to one FWHM of separation.  Suspected unresolved
    # blends and lines cut by the detector edge are matched, not fitted.
    for word in ("blend_suspect", "edge"):
        has = np.char.find(flags.astype(str), word) >= 0
        reason[has & (reason == "")] = word
    order = np.argsort(p)
    lines = _Lines(
        pixel=p[order],
        pixel_err=perr[order],
        flux=col("flux", np.nan)[order],
        snr=col("snr", np.nan)[order],
        fwhm=col("fwhm_pixel", np.nan)[order],
        bad=(reason != "")[order],
        reason=reason[order].astype(str),
        n_pixels=int(n),
    )
    return lines, info


def _references(lamps, wavelength_range, medium: str, fwhm_nm: float | None = None) -> _Refs:
    """The lamps' listed lines, sorted by wavelength.  Every listed line takes part in the
    matching (a real lamp emits them all, so knowing where they are protects the usable
    ones); only lines the list calls usable are fitted, and with ``fwhm_nm`` not those with
    another listed line of any of the lamps within one FWHM (``levels.blends``)."""
    from . import levels

    tables = [levels.lamp_lines(name, wavelength_range=wavelength_range, medium=medium)
              for name in lamps]

    def cat(name, default, dtype):
        vals = [np.asarray(t[name], dtype=dtype) if name in t.colnames
                else np.full(len(t), default, dtype=dtype) for t in tables]
        return np.concatenate(vals) if vals else np.zeros(0, dtype)

    wl = cat("wavelength", np.nan, float)
    werr = cat("wavelength_err", 0.001, float)
    werr = np.where(np.isfinite(werr) & (werr >= 0), werr, 0.001)
    inten = cat("intensity", np.nan, float)
    species = cat("species", "", str)
    usable = cat("usable", True, bool)
    reason = cat("reason", "", object)
    designation = cat("designation", "", str).astype(object)
    keep = np.ones(wl.size, bool)
    if fwhm_nm is not None and wl.size:
        from astropy.table import Table

        probe = Table({"wavelength": wl, "intensity": inten, "species": species})
        groups = levels.blends(probe, fwhm_nm, fraction=1.0)
        for n_members, rows in zip(groups["n_members"], groups["member_rows"], strict=True):
            if n_members > 1:
                idx = np.array([int(r) for r in str(rows).split(",")])
                lo, hi = wl[idx].min(), wl[idx].max()
                # ... and clear of other listed lines by 1.5 FWHM: its uncertainty is spent
                # on the extent, a neighbour's pull on the centroid would come on top
                others = np.delete(wl, idx)
                clear = others.size == 0 or np.min(np.abs(others - 0.5 * (lo + hi))) > (
                    0.5 * (hi - lo) + 1.5 * fwhm_nm)
                if hi - lo <= _MERGE_FRACTION * fwhm_nm and usable[idx].any() and clear:
                    # a multiplet this tight is one line at this resolution: whichever of
                    # its members shine, the centroid lies inside their extent, so it is
                    # fitted at the middle with half the extent as its uncertainty
                    head = idx[0]
                    wl[head] = 0.5 * (lo + hi)
                    werr[head] = math.hypot(float(werr[idx].max()), 0.5 * (hi - lo))
                    known = np.isfinite(inten[idx])
                    inten[head] = np.sum(inten[idx][known]) if known.any() else np.nan
                    members = np.asarray(probe["wavelength"], float)[idx]
                    designation[head] = "unresolved: " + " + ".join(
                        f"{species[i]} {w:.4f}" for i, w in zip(idx, members, strict=True))
                    usable[head], reason[head] = True, ""
                    keep[idx[1:]] = False
                    continue
                fresh = idx[usable[idx]]
                usable[idx] = False
                reason[fresh] = f"unresolved reference blend at FWHM {fwhm_nm:.3g} nm"
    order = np.argsort(wl, kind="stable")
    order = order[keep[order]]
    return _Refs(
        wavelength=wl[order],
        wavelength_err=werr[order],
        intensity=inten[order],
        species=species[order],
        designation=designation[order].astype(str),
        usable=usable[order],
        reason=reason[order].astype(str),
    )


# ---- fitting ----------------------------------------------------------------------------


def _xnorm(p, n):
    return 2.0 * np.asarray(p, float) / (n - 1) - 1.0


def _wls(x, y, sig, deg):
    """Weighted least squares Chebyshev fit: coefficients and (unscaled) covariance."""
    v = _cheb.chebvander(x, deg)
    a = v / sig[:, None]
    b = y / sig
    q, r = np.linalg.qr(a)
    coef = np.linalg.solve(r, q.T @ b)
    rinv = np.linalg.inv(r)
    return coef, rinv @ rinv.T


def _deleted_z(x, y, sig, coef, cov, use):
    """Residuals in units of their leave-one-out sigma: a fitted line's residual is divided
    by sqrt(1 - leverage), a line left out by sqrt(1 + leverage), so a wrong line at the
    end of the range (high leverage, small plain residual) still stands out."""
    v = _cheb.chebvander(x, len(coef) - 1)
    lev = np.einsum("ij,jk,ik->i", v, cov, v) / sig**2
    r = (y - _cheb.chebval(x, coef)) / sig
    factor = np.where(use, np.clip(1.0 - lev, 1e-3, None), 1.0 + lev)
    return r / np.sqrt(factor)


def _fit_clip(x, y, sig, deg, *, nsigma=_CLIP_NSIGMA, keep=None, max_iter=8):
    """Fit with iterative rejection on leave-one-out residuals (robust scale); returns
    coef, covariance (scaled by the reduced chi-square when above 1), used mask, chi2r."""
    use = np.ones(x.size, bool) if keep is None else keep.copy()
    for _ in range(max_iter):
        coef, cov = _wls(x[use], y[use], sig[use], deg)
        z = _deleted_z(x, y, sig, coef, cov, use)
        scale = max(1.0, 1.4826 * float(np.median(np.abs(z[use]))))
        new = np.abs(z) < nsigma * scale
        if keep is not None:
            new &= keep
        if new.sum() < deg + 2:
            break
        if np.array_equal(new, use):
            break
        use = new
    coef, cov = _wls(x[use], y[use], sig[use], deg)
    z = (y - _cheb.chebval(x, coef)) / sig
    dof = max(1, int(use.sum()) - deg - 1)
    chi2r = float(np.sum(z[use] ** 2) / dof)
    return coef, cov * max(1.0, chi2r), use, chi2r


def _band(x, coef, cov, spread=None, covered=None):
    """1-sigma band of the fit at normalised pixels ``x``: covariance, plus the spread to
    the next degree (only outside ``covered`` = (xmin, xmax) of the fitted lines, if given:
    between lines that spread is noise, beyond them it is the model doubt)."""
    v = _cheb.chebvander(x, len(coef) - 1)
    var = np.einsum("ij,jk,ik->i", v, cov, v)
    if spread is not None:
        extra = _cheb.chebval(x, spread) ** 2
        if covered is not None:
            extra = np.where((x < covered[0]) | (x > covered[1]), extra, 0.0)
        var = var + extra
    return np.sqrt(np.clip(var, 0, None))


def _fwhm_px(det: _Lines) -> np.ndarray:
    """FWHM of each detection in pixels (the median width where a line has none)."""
    fw = det.fwhm
    med = np.nanmedian(fw) if np.isfinite(fw).any() else 2.5
    return np.where(np.isfinite(fw), fw, med)


def _prior_band(x, coef, covered) -> np.ndarray:
    """What the lines cannot say beyond the outermost of them: a curvature of up to
    ``NONLINEARITY_PRIOR`` of the half-span per squared normalised distance (1 sigma)."""
    out = np.clip(covered[0] - x, 0, None) + np.clip(x - covered[1], 0, None)
    return NONLINEARITY_PRIOR * abs(float(coef[1])) * out**2


def _loo_band(xall, coef, cov, spread, fitted, var_fitted):
    """Prediction band at every detection; for the fitted ones, the leave-one-out band (a
    line that alone pins the fit somewhere gets the wide band it would have without it, so
    its association there stays in doubt)."""
    covered = (xall[fitted].min(), xall[fitted].max()) if fitted.size else None
    band = _band(xall, coef, cov, spread, covered)
    if covered is not None:
        band = np.hypot(band, _prior_band(xall, coef, covered))
    if fitted.size:
        var_cov = _band(xall[fitted], coef, cov) ** 2
        lev = np.clip(var_cov / var_fitted, 0.0, 1.0 - 1e-9)
        band = band.copy()
        band[fitted] = np.sqrt(band[fitted] ** 2 + var_cov * lev / (1.0 - lev))
    return band


def _degree_cap(n_lines: int, spread: float) -> int:
    """Highest degree allowed by the number of lines (the next degree must still leave one
    degree of freedom, for the model-spread band) and by their spread over the detector."""
    return int(max(1, min(MAX_DEGREE, n_lines - 3, 2 + math.floor(6 * spread))))


def _line_sigma(det: _Lines, ref: _Refs, di, ri, disp):
    return np.sqrt((det.pixel_err[di] * disp) ** 2 + ref.wavelength_err[ri] ** 2)


# ---- searching -------------------------------------------------------------------------


def _quads(pos: np.ndarray, ahead: int, min_gap: float):
    """Index quadruplets (anchor + 3 of its next ``ahead`` neighbours) and their two
    spacing-ratio invariants."""
    from itertools import combinations

    n = pos.size
    if n < 4:
        return np.zeros((0, 4), int), np.zeros((0, 2))
    combos = np.array(list(combinations(range(1, ahead + 1), 3)))
    i = np.arange(n)[:, None]
    idx = np.stack(
        [np.broadcast_to(i, (n, len(combos))), i + combos[:, 0], i + combos[:, 1],
         i + combos[:, 2]],
        axis=-1,
    ).reshape(-1, 4)
    idx = idx[idx[:, 3] < n]
    pq = pos[idx]
    gaps = np.diff(pq, axis=1)
    # near-coincident members (unresolved multiplets) make the ratios meaningless
    ok = (gaps.min(axis=1) >= min_gap) & (gaps.min(axis=1) >= 0.005 * (pq[:, 3] - pq[:, 0]))
    idx, pq = idx[ok], pq[ok]
    span = pq[:, 3] - pq[:, 0]
    inv = np.stack([(pq[:, 1] - pq[:, 0]) / span, (pq[:, 2] - pq[:, 0]) / span], axis=1)
    return idx, inv


def _seed_candidates(det: _Lines, ref: _Refs, wrange, *, max_lines=60, max_seeds=6):
    """Vote over (direction, dispersion, central wavelength) from matched quadruplets; return
    the best cells' correspondence sets and the number of hypotheses examined."""
    from scipy.spatial import cKDTree

    n = det.n_pixels
    pc = (n - 1) / 2.0
    strong = np.arange(det.pixel.size)
    if strong.size > max_lines:
        score = np.where(np.isfinite(det.flux), det.flux, 0.0)
        strong = np.sort(np.argsort(score)[::-1][:max_lines])
    pos = det.pixel[strong]
    dq, dinv = _quads(pos, 5, 1.0)
    rq, rinv = _quads(ref.wavelength, 8, 0.0)
    if len(dq) == 0 or len(rq) == 0:
        return [], 0
    rtree = cKDTree(rinv)
    votes = []
    for direction in (1, -1):
        q_inv = dinv if direction == 1 else np.stack([1 - dinv[:, 1], 1 - dinv[:, 0]], 1)
        span_px = pos[dq[:, 3]] - pos[dq[:, 0]]
        tol = np.clip(4.0 * np.sqrt(2) * 0.1 / span_px + 0.004, 0.004, 0.03)
        dtree = cKDTree(q_inv)
        pairs = dtree.sparse_distance_matrix(rtree, 0.03, output_type="ndarray")
        if pairs.size == 0:
            continue
        qi, rj, dist = pairs["i"], pairs["j"], pairs["v"]
        keep = dist < tol[qi]
        qi, rj = qi[keep], rj[keep]
        dquad = dq[qi]
        rquad = rq[rj]
        d = (ref.wavelength[rquad[:, 3]] - ref.wavelength[rquad[:, 0]]) / (
            pos[dquad[:, 3]] - pos[dquad[:, 0]]
        )
        if direction == 1:
            lc = ref.wavelength[rquad[:, 0]] + d * (pc - pos[dquad[:, 0]])
            det_order = dquad
        else:
            lc = ref.wavelength[rquad[:, 0]] - d * (pc - pos[dquad[:, 3]])
            det_order = dquad[:, ::-1]
        lo = lc - d * pc
        hi = lc + d * pc
        width = hi - lo
        ok = (
            (d > DISPERSION_LIMITS[0])
            & (d < DISPERSION_LIMITS[1])
            & (lo > wrange[0] - 0.1 * width)
            & (hi < wrange[1] + 0.1 * width)
        )
        votes.append((direction, d[ok], lc[ok], strong[det_order[ok]], rquad[ok]))
    n_hyp = int(sum(v[1].size for v in votes))
    if n_hyp == 0:
        return [], 0
    cells = []
    bw_ld, bw_lc = 0.04, 0.02
    for direction, d, lc, dpairs, rpairs in votes:
        ld = np.log(d)
        for off_a in (0.0, 0.5):
            a = np.floor(ld / bw_ld + off_a).astype(np.int64)
            d_cell = np.exp((a - off_a + 0.5) * bw_ld)
            for off_b in (0.0, 0.5):
                b = np.floor(lc / (bw_lc * d_cell * n) + off_b).astype(np.int64)
                key = a * 10_000_000 + b
                _, inverse, counts = np.unique(key, return_inverse=True, return_counts=True)
                top = np.argsort(counts)[::-1][:max_seeds]
                for t in top:
                    if counts[t] < 2:
                        continue
                    sel = inverse == t
                    cells.append((int(counts[t]), direction, dpairs[sel], rpairs[sel],
                                  float(np.median(d[sel]))))
    cells.sort(key=lambda c: -c[0])
    seeds, seen = [], []
    for count, direction, dp, rp, d_cell in cells:
        pairs = np.unique(np.stack([dp.ravel(), rp.ravel()], 1), axis=0)
        sig = (direction, pairs.shape[0], int(pairs[:, 0].sum()), int(pairs[:, 1].sum()))
        if sig in seen:
            continue
        seen.append(sig)
        seeds.append((count, direction, pairs, d_cell))
        if len(seeds) >= max_seeds:
            break
    return seeds, n_hyp


def _initial_pairs(pairs: np.ndarray):
    """One reference per detection and one detection per reference, by vote count."""
    key, counts = np.unique(pairs, axis=0, return_counts=True)
    order = np.argsort(-counts, kind="stable")
    key = key[order]
    _, first_d = np.unique(key[:, 0], return_index=True)
    key = key[np.sort(first_d)]
    _, first_r = np.unique(key[:, 1], return_index=True)
    key = key[np.sort(first_r)]
    return key[:, 0], key[:, 1]


def _pairs_along_cell(det: _Lines, ref: _Refs, pairs: np.ndarray, dispersion: float):
    """One-to-one pairs closest to a linear map of the given dispersion (nm/px) through
    the median offset of all the pairs; those further than twice the median distance are
    left out."""
    offset = ref.wavelength[pairs[:, 1]] - dispersion * det.pixel[pairs[:, 0]]
    dist = np.abs(offset - np.median(offset))
    order = np.argsort(dist, kind="stable")
    key, dist = pairs[order], dist[order]
    _, first_d = np.unique(key[:, 0], return_index=True)
    first_d = np.sort(first_d)
    key, dist = key[first_d], dist[first_d]
    _, first_r = np.unique(key[:, 1], return_index=True)
    first_r = np.sort(first_r)
    key, dist = key[first_r], dist[first_r]
    close = dist <= 2.0 * np.median(dist)
    key = key[close]
    key = key[np.argsort(key[:, 0])]
    return key[:, 0], key[:, 1]


def _associate(det: _Lines, ref: _Refs, pred, tol, inside=None):
    """Nearest reference line to each predicted wavelength inside ``tol``; one-to-one.
    ``inside`` marks detections between fitted lines (interpolation), which may use a
    window up to ``_WINDOW_FRACTION_INSIDE`` of the spacing instead of ``_WINDOW_FRACTION``."""
    w = ref.wavelength
    j = np.clip(np.searchsorted(w, pred), 1, w.size - 1)
    left, right = w[j - 1], w[j]
    near = np.where(np.abs(pred - left) < np.abs(pred - right), j - 1, j)
    dist = np.abs(pred - w[near])
    # ambiguous when another listed line, on either side of the nearest one, is inside the
    # window too: leave such lines out (when the prediction falls almost on a listed line,
    # its closest rival may be on the same side as the prediction)
    below = w[np.clip(near - 1, 0, w.size - 1)]
    above = w[np.clip(near + 1, 0, w.size - 1)]
    rival = np.where(near == 0, np.inf, np.abs(pred - below))
    rival = np.minimum(rival, np.where(near == w.size - 1, np.inf, np.abs(pred - above)))
    # and when the window is not small against the local spacing: an unlisted line would
    # fall into it too often
    gap = (above - below) / 2
    frac = _WINDOW_FRACTION if inside is None else np.where(
        inside, _WINDOW_FRACTION_INSIDE, _WINDOW_FRACTION
    )
    ok = (dist < tol) & (rival >= tol) & (tol < frac * gap)
    # a line whose centroid is known to worse than an eighth of its width cannot be
    # identified on its own: its window would admit a noise bump or a neighbour half a
    # width away from the listed line
    ok &= _MATCH_NSIGMA * det.pixel_err < 0.5 * _fwhm_px(det)
    di = np.flatnonzero(ok)
    ri = near[ok]
    score = dist[ok] / tol[ok]
    order = np.argsort(score)
    di, ri = di[order], ri[order]
    _, first = np.unique(ri, return_index=True)
    di, ri = di[first], ri[first]
    order = np.argsort(di)
    return di[order], ri[order]


def _grow(det: _Lines, ref: _Refs, di, ri, *, max_iter=25, max_degree=3):
    """Widen a set of correspondences to the whole detector by match-and-refit."""
    n = det.n_pixels
    xall = _xnorm(det.pixel, n)
    for it in range(max_iter):
        if di.size < 3:
            return None
        x = xall[di]
        y = ref.wavelength[ri]
        spread = (x.max() - x.min()) / 2.0
        deg = int(max(1, min(max_degree, di.size - 3, 1 + math.floor(3 * spread))))
        coef0, _ = _wls(x, y, np.ones_like(x), 1)
        disp = np.abs(_cheb.chebval(x, _cheb.chebder(coef0))) * 2 / (n - 1)
        sig = np.sqrt(_line_sigma(det, ref, di, ri, disp) ** 2 + (0.02 * disp) ** 2)
        # fit only what may be fitted (blended references and suspected blends would bend
        # the curve); the others are carried along as matched
        clean = ~det.bad[di] & ref.fit_ok(ri)
        coef, cov, use, chi2r = _fit_clip(x, y, sig, deg, nsigma=5.0,
                                          keep=clean if clean.sum() >= deg + 2 else None)
        spread_c = None
        if use.sum() >= deg + 4:
            c_hi, _, _, _ = _fit_clip(x, y, sig, deg + 1, keep=use, max_iter=1)
            spread_c = c_hi - np.pad(coef, (0, 1))
        pred = _cheb.chebval(xall, coef)
        dall = np.abs(_cheb.chebval(xall, _cheb.chebder(coef))) * 2 / (n - 1)
        band = _loo_band(xall, coef, cov, spread_c, di[use], sig[use] ** 2 * max(1.0, chi2r))
        meas = np.sqrt((det.pixel_err * dall) ** 2 + (np.sqrt(chi2r) * 0.05 * dall) ** 2)
        tol = _MATCH_NSIGMA * np.sqrt(band**2 + meas**2 + np.median(ref.wavelength_err) ** 2)
        xf = x[use]
        new_di, new_ri = _associate(det, ref, pred, tol, (xall >= xf.min()) & (xall <= xf.max()))
        if it > 0 and np.array_equal(new_di, di) and np.array_equal(new_ri, ri):
            break
        di, ri = new_di, new_ri
    return di, ri


# ---- final fit and trust ---------------------------------------------------------------


@dataclass
class _Fit:
    di: np.ndarray
    ri: np.ndarray
    coef: np.ndarray
    cov: np.ndarray
    spread: np.ndarray
    used: np.ndarray
    reason: np.ndarray
    chi2r: float
    sig: np.ndarray
    log10_p: float = 0.0
    n_hyp: int = 1
    n_votes: int = 0
    cov_jackknife: np.ndarray | None = None
    method: str = "search"


def _final_fit(det: _Lines, ref: _Refs, di, ri, degree: int | None) -> _Fit | None:
    """Weighted Chebyshev fit with degree selection, rejection with reasons, model spread."""
    n = det.n_pixels
    x = _xnorm(det.pixel[di], n)
    y = ref.wavelength[ri]
    fit_ok = ~det.bad[di] & ref.fit_ok(ri)
    if fit_ok.sum() < 3:
        return None
    c1, _ = _wls(x[fit_ok], y[fit_ok], np.ones(fit_ok.sum()), 1)
    disp = np.abs(_cheb.chebval(x, _cheb.chebder(c1))) * 2 / (n - 1)
    sig = _line_sigma(det, ref, di, ri, disp)
    spread = (x[fit_ok].max() - x[fit_ok].min()) / 2.0
    cap = _degree_cap(int(fit_ok.sum()), spread)
    if degree is not None:
        if degree + 2 > fit_ok.sum():
            raise CalibrationError(
                f"degree {degree} needs at least {degree + 2} clean matched lines, found "
                f"{int(fit_ok.sum())}; lower --degree"
            )
        deg = int(degree)
        coef, cov, use, chi2r = _fit_clip(x, y, sig, deg, keep=fit_ok)
    else:
        coef, cov, use, chi2r = _fit_clip(x, y, sig, min(cap, 3), keep=fit_ok)
        cap = _degree_cap(int(use.sum()), spread)
        best = None
        m = int(use.sum())
        for deg_try in range(1, cap + 1):
            c, _ = _wls(x[use], y[use], sig[use], deg_try)
            chi2 = float(np.sum(((y[use] - _cheb.chebval(x[use], c)) / sig[use]) ** 2))
            bic = chi2 + (deg_try + 1) * math.log(m)
            if best is None or bic < best[0]:
                best = (bic, deg_try)
        deg = best[1]
        coef, cov, use, chi2r = _fit_clip(x, y, sig, deg, keep=fit_ok)
    spread_c = np.zeros(deg + 2)
    if use.sum() >= deg + 3:
        c_hi, _, _, _ = _fit_clip(x, y, sig, deg + 1, keep=use, max_iter=1)
        spread_c = c_hi - np.pad(coef, (0, 1))
    z = (y - _cheb.chebval(x, coef)) / (sig * math.sqrt(max(1.0, chi2r)))
    reason = _not_fitted_reasons(det, ref, di, ri)
    outlier = fit_ok & ~use
    reason[outlier] = [f"outlier {abs(v):.1f} sigma" for v in z[outlier]]
    fit = _Fit(di, ri, coef, cov, spread_c, use, reason.astype(str), chi2r, sig)
    fit.cov_jackknife = _jackknife_cov(x[use], y[use], sig[use], coef)
    return fit


def _not_fitted_reasons(det: _Lines, ref: _Refs, di, ri) -> np.ndarray:
    """Why each matched line is left out of the fit ("" for fitted lines)."""
    reason = det.reason[di].astype(object)
    if ref.reason is not None:
        unusable = ~ref.fit_ok(ri) & (reason == "")
        reason[unusable] = [f"reference: {r or 'not usable'}" for r in ref.reason[ri][unusable]]
    return reason


def _jackknife_cov(x, y, sig, coef) -> np.ndarray:
    """Jackknife covariance of the coefficients (leave one line out at a time, in closed
    form through the hat matrix).  It sees what the formal covariance cannot: a fit pinned
    somewhere by a single line whose centroid or identification is off."""
    deg = len(coef) - 1
    a = _cheb.chebvander(x, deg) / sig[:, None]
    r = (y - _cheb.chebval(x, coef)) / sig
    cu = np.linalg.pinv(a.T @ a)
    h = np.einsum("ij,jk,ik->i", a, cu, a)
    g = (a * (r / np.clip(1.0 - h, 1e-6, None))[:, None]) @ cu
    n = x.size
    g = g - g.mean(axis=0)
    return (n - 1) / n * (g.T @ g)


def _refine(det: _Lines, ref: _Refs, fit: _Fit, degree, *, force=False) -> _Fit | None:
    """Re-associate every detection with the fitted model and refit, until stable
    (``force``: the reference list changed, so always refit at least once).  The result
    keeps only lines its own leave-one-out windows accept, so a pair of lines pinning the
    fit at a far end cannot vouch for each other."""
    for it in range(4):
        di, ri = _associate_with(det, ref, fit)
        # (with ``force`` the first fit indexes the previous reference list)
        fresh = force and it == 0
        if degree is None and not fresh and not (np.isin(fit.di, di)
                                                 & np.isin(fit.ri, ri)).all():
            lower = _lower_degree_keeping_all(det, ref, fit)
            if lower is not None:
                fit, degree = lower, len(lower.coef) - 1
                di, ri = _associate_with(det, ref, fit)
        if np.array_equal(di, fit.di) and np.array_equal(ri, fit.ri) and not fresh:
            break
        new = _final_fit(det, ref, di, ri, degree)
        if new is None:
            break
        fit = new
    fit = _prune(det, ref, fit, degree)
    return None if fit is None else _vouched_ends(det, ref, fit, degree)


def _vouched_ends(det: _Lines, ref: _Refs, fit: _Fit, degree) -> _Fit:
    """Drop an outermost fitted line that pins the fit on its own (leverage above a half)
    unless the fit of the other lines puts its listed wavelength within ``_VOUCH_NSIGMA``
    sigma of its prediction (band and curvature prior beyond the lines).  Only the
    distance is tested: the others' window may well be too wide to identify the line,
    which is no evidence that it is wrong."""
    for _ in range(2):
        u = np.flatnonzero(fit.used)
        if u.size < 5:
            return fit
        x = _xnorm(det.pixel[fit.di], det.n_pixels)
        scale = fit.sig**2 * max(1.0, fit.chi2r)
        lev = _band(x, fit.coef, fit.cov) ** 2 / scale
        ends = [k for k in (u[np.argmin(x[u])], u[np.argmax(x[u])]) if lev[k] > 0.5]
        dropped = False
        for k in ends:
            rest = np.arange(fit.di.size) != k
            other = _final_fit(det, ref, fit.di[rest], fit.ri[rest], degree)
            if other is None:
                continue
            pred, tol, _ = _windows(det, ref, other)
            d = fit.di[k]
            if abs(pred[d] - ref.wavelength[fit.ri[k]]) >= _VOUCH_NSIGMA / _MATCH_NSIGMA * tol[d]:
                fit, dropped = other, True
                break
        if not dropped:
            return fit
    return fit


def _prune(det: _Lines, ref: _Refs, fit: _Fit, degree) -> _Fit | None:
    """Drop, and refit without, the lines the fit's own leave-one-out windows reject.  With
    the degree free, a lower degree that the lines do not call inadequate and whose windows
    accept every line is preferred to dropping: a lone end line is rejected by a degree
    high enough to bend to it, not by the curve the other lines define."""
    for _ in range(4):
        di, ri = _associate_with(det, ref, fit)
        keep = np.isin(fit.di, di) & np.isin(fit.ri, ri)
        if keep.all():
            break
        if degree is None:
            lower = _lower_degree_keeping_all(det, ref, fit)
            if lower is not None:
                fit, degree = lower, len(lower.coef) - 1
                continue
        new = _final_fit(det, ref, fit.di[keep], fit.ri[keep], degree)
        if new is None:
            return None
        fit = new
    return fit


def _lower_degree_keeping_all(det: _Lines, ref: _Refs, fit: _Fit) -> _Fit | None:
    """The highest degree below the fit's whose own windows accept all its lines and
    whose chi-square is not significantly worse on the fitted lines (F-test, 1 %)."""
    from scipy.stats import f as f_dist

    deg = len(fit.coef) - 1
    x = _xnorm(det.pixel[fit.di], det.n_pixels)
    y = ref.wavelength[fit.ri]
    u = fit.used
    m = int(u.sum())
    chi2_h = float(np.sum(((y[u] - _cheb.chebval(x[u], fit.coef)) / fit.sig[u]) ** 2))
    dof_h = m - deg - 1
    if dof_h < 1:
        return None
    for d in range(deg - 1, 0, -1):
        new = _final_fit(det, ref, fit.di, fit.ri, d)
        if new is None or new.used.sum() < u.sum():
            return None
        chi2_d = float(np.sum(((y[u] - _cheb.chebval(x[u], new.coef)) / fit.sig[u]) ** 2))
        stat = (chi2_d - chi2_h) / (deg - d) / max(chi2_h / dof_h, 1e-12)
        if stat > f_dist.ppf(0.99, deg - d, dof_h):
            return None
        di, ri = _associate_with(det, ref, new)
        if (np.isin(new.di, di) & np.isin(new.ri, ri)).all():
            return new
    return None


def _associate_with(det: _Lines, ref: _Refs, fit: _Fit):
    """The associations a fit's own prediction windows accept."""
    return _associate(det, ref, *_windows(det, ref, fit))


def _windows(det: _Lines, ref: _Refs, fit: _Fit):
    """A fit's predicted wavelength and match window at every detection, and which
    detections lie between its fitted lines (see :func:`_associate`)."""
    n = det.n_pixels
    xall = _xnorm(det.pixel, n)
    pred = _cheb.chebval(xall, fit.coef)
    dall = np.abs(_cheb.chebval(xall, _cheb.chebder(fit.coef))) * 2 / (n - 1)
    band = _loo_band(xall, fit.coef, fit.cov, fit.spread, fit.di[fit.used],
                     fit.sig[fit.used] ** 2 * max(1.0, fit.chi2r))
    tol = _MATCH_NSIGMA * np.sqrt(
        band**2 + max(1.0, fit.chi2r) * ((det.pixel_err * dall) ** 2
                                         + np.median(ref.wavelength_err) ** 2)
    )
    xf = np.sort(_xnorm(det.pixel[fit.di[fit.used]], n))
    lo, hi = xf[0], xf[-1]
    # an outermost line far from all the others has nothing beyond it and nothing near it
    # to vouch for it: it must pass the stricter test of the lines beyond the fit
    if xf.size > 2 and xf[1] - xf[0] > _ISOLATED:
        lo = xf[1]
    if xf.size > 2 and xf[-1] - xf[-2] > _ISOLATED:
        hi = xf[-2]
    return pred, tol, (xall >= lo) & (xall <= hi)


def _log10_chance(det: _Lines, ref: _Refs, fit: _Fit, n_hyp: int, n_free: int) -> float:
    """log10 of the chance that a line list of the same local density fits the detections
    this well by accident, corrected for the number of hypotheses searched.

    Under that null hypothesis the distance from each predicted wavelength to the nearest
    listed line is exponential with rate 2 x density, so ``u = 1 - exp(-2 rho d)`` is uniform
    and ``sum(-ln u)`` over the clean detections is Gamma(n, 1) distributed.  Distances are
    floored at each line's own uncertainty (a match cannot be better than its error bar), the
    ``n_free`` most significant terms are dropped (the fit's parameters can place that many
    lines exactly), and the result is multiplied by ``n_hyp``.
    """
    from scipy.stats import gamma

    n = det.n_pixels
    clean = ~det.bad
    if clean.sum() <= n_free:
        return 0.0
    xall = _xnorm(det.pixel[clean], n)
    pred = _cheb.chebval(xall, fit.coef)
    dall = np.abs(_cheb.chebval(xall, _cheb.chebder(fit.coef))) * 2 / (n - 1)
    scale = math.sqrt(max(1.0, fit.chi2r))
    floor = scale * np.sqrt(
        (det.pixel_err[clean] * dall) ** 2 + np.median(ref.wavelength_err) ** 2
    ) + _band(xall, fit.coef, fit.cov)
    w = ref.wavelength
    j = np.clip(np.searchsorted(w, pred), 1, w.size - 1)
    dist = np.minimum(np.abs(pred - w[j - 1]), np.abs(pred - w[j]))
    span = abs(pred.max() - pred.min()) + abs(float(np.median(dall))) * n * 0.1
    half = 0.05 * span
    local = np.searchsorted(w, pred + half) - np.searchsorted(w, pred - half)
    density = np.maximum(local, 1) / (2 * half)
    u = -np.expm1(-2.0 * density * np.maximum(dist, floor))
    terms = np.sort(-np.log(np.clip(u, 1e-300, 1.0)))[::-1][n_free:]
    if terms.size == 0:
        return 0.0
    log10_single = float(gamma.logsf(terms.sum(), terms.size)) / math.log(10)
    return min(0.0, math.log10(max(n_hyp, 1)) + log10_single)


def _solution_from_fit(det, ref, fit: _Fit, lamps, medium, meta, verdict) -> Solution:
    n = det.n_pixels
    x = _xnorm(det.pixel[fit.di], n)
    wfit = _cheb.chebval(x, fit.coef)
    disp = _cheb.chebval(x, _cheb.chebder(fit.coef)) * 2 / (n - 1)
    resid = wfit - ref.wavelength[fit.ri]
    used = fit.used
    rms_nm = float(np.sqrt(np.mean(resid[used] ** 2)))
    rms_px = float(np.sqrt(np.mean((resid[used] / disp[used]) ** 2)))
    line_cols = _line_columns(
        pixel=det.pixel[fit.di],
        pixel_err=det.pixel_err[fit.di],
        wavelength_ref=ref.wavelength[fit.ri],
        wavelength_ref_err=ref.wavelength_err[fit.ri],
        species=ref.species[fit.ri],
        designation=ref.designation[fit.ri],
        flux=det.flux[fit.di],
        snr=det.snr[fit.di],
        residual_nm=resid,
        used=used,
        reason=fit.reason,
    )
    fw = det.fwhm[fit.di][used]
    fw = fw[np.isfinite(fw)]
    p_chance = 10.0**fit.log10_p
    return Solution(
        coefficients=np.asarray(fit.coef, float),
        # formal (chi-square scaled) plus jackknife covariance: honest where one line rules
        covariance=np.asarray(
            fit.cov if fit.cov_jackknife is None else fit.cov + fit.cov_jackknife, float
        ),
        n_pixels=n,
        medium=medium,
        lamps=tuple(lamps),
        lines=line_cols,
        rms_nm=rms_nm,
        rms_pixel=rms_px,
        confidence=float(1.0 - p_chance),
        verdict=verdict,
        fwhm_pixel=float(np.median(fw)) if fw.size else float("nan"),
        model_spread=np.asarray(fit.spread, float),
        meta=dict(
            meta,
            p_chance=p_chance,
            log10_p_chance=fit.log10_p,
            n_hypotheses=fit.n_hyp,
            n_quadruplet_matches=fit.n_votes,
            chi2_reduced=fit.chi2r,
            method=fit.method,
        ),
    )


# ---- the guess path --------------------------------------------------------------------


def _guess_fit(det: _Lines, ref: _Refs, guess: Solution, max_shift: float):
    """Shift + stretch of an earlier solution: vote for the shift, fit both, keep the shape."""
    n = det.n_pixels
    c = (n - 1) / 2.0
    p_old = guess.pixel(ref.wavelength)
    inside = (p_old > -max_shift) & (p_old < n - 1 + max_shift)
    ref_idx = np.flatnonzero(inside)
    if ref_idx.size < 2:
        return None
    delta = det.pixel[:, None] - p_old[None, ref_idx]
    near = np.abs(delta) < max_shift
    if not near.any():
        return None
    bins = np.arange(-max_shift, max_shift + 0.5, 0.5)
    hist, _ = np.histogram(delta[near], bins=bins)
    hist = hist + np.r_[0, hist[:-1]] + np.r_[hist[1:], 0]
    shift0 = float(bins[np.argmax(hist)] + 0.25)
    # each (detection, reference) pair inside the search range defines one shift hypothesis
    n_hyp = int(near.sum())
    shift, stretch = shift0, 0.0
    tol_px = 2.0
    # where the earlier solution itself was extrapolating, its own band widens the window
    # (and the ambiguity test then keeps doubtful lines out)
    old_band_px = guess.wavelength_err(det.pixel) / np.abs(guess.dispersion(det.pixel))
    for _ in range(6):
        pred_new = p_old[ref_idx] + shift + stretch * (p_old[ref_idx] - c)
        # nearest prediction to each detection (one-to-one via _associate on pixels)
        order = np.argsort(pred_new)
        fake = _Refs(pred_new[order], np.zeros(order.size), np.zeros(order.size),
                     np.zeros(order.size, str), np.zeros(order.size, str))
        tol = np.hypot(tol_px, _MATCH_NSIGMA * old_band_px)
        di, k = _associate(det, fake, det.pixel, tol)
        ri = ref_idx[order][k]
        ok = ~det.bad[di] & ref.fit_ok(ri)
        if ok.sum() < 3:
            return None
        a = np.stack([np.ones(ok.sum()), p_old[ri][ok] - c], 1) / det.pixel_err[di][ok, None]
        b = (det.pixel[di][ok] - p_old[ri][ok]) / det.pixel_err[di][ok]
        sol, *_ = np.linalg.lstsq(a, b, rcond=None)
        resid = b - a @ sol
        scale = max(1.0, 1.4826 * float(np.median(np.abs(resid))))
        shift, stretch = float(sol[0]), float(sol[1])
        tol_px = max(_MATCH_NSIGMA * scale * float(np.median(det.pixel_err[di])), 0.3)
    return di, ri, shift, stretch, n_hyp


def _compose_guess(guess: Solution, shift: float, stretch: float, cov_affine: np.ndarray):
    """Chebyshev coefficients (and covariance) of guess.wavelength(p_old(p))."""
    n = guess.n_pixels
    c = (n - 1) / 2.0
    deg = guess.degree
    nodes = np.cos(np.pi * (np.arange(deg + 1) + 0.5) / (deg + 1))
    p_new = (nodes + 1) * (n - 1) / 2

    def transform(sh, st, coef):
        p_old = c + (p_new - sh - c) / (1 + st)
        vals = _cheb.chebval(_xnorm(p_old, n), coef)
        return _cheb.chebfit(nodes, vals, deg)

    coef = transform(shift, stretch, guess.coefficients)
    m = np.stack([transform(shift, stretch, e) for e in np.eye(deg + 1)], axis=1)
    eps = (1e-3, 1e-6)
    ja = np.stack(
        [
            (transform(shift + eps[0], stretch, guess.coefficients) - coef) / eps[0],
            (transform(shift, stretch + eps[1], guess.coefficients) - coef) / eps[1],
        ],
        axis=1,
    )
    cov = m @ guess.covariance @ m.T + ja @ cov_affine @ ja.T
    spread = guess.model_spread
    if spread.size:
        ds = spread.size - 1
        nodes_s = np.cos(np.pi * (np.arange(ds + 1) + 0.5) / (ds + 1))
        p_s = (nodes_s + 1) * (n - 1) / 2
        p_old = c + (p_s - shift - c) / (1 + stretch)
        spread = _cheb.chebfit(nodes_s, _cheb.chebval(_xnorm(p_old, n), spread), ds)
    return coef, cov, spread


# ---- the public function ---------------------------------------------------------------


def _as_nm_range(wavelength_range) -> tuple[float, float]:
    if wavelength_range is None:
        return DEFAULT_RANGE_NM
    lo, hi = wavelength_range
    vals = []
    for v in (lo, hi):
        if hasattr(v, "unit"):
            import astropy.units as u

            v = v.to_value(u.nm, equivalencies=u.spectral())
        vals.append(float(v))
    lo, hi = sorted(vals)
    if not (math.isfinite(lo) and math.isfinite(hi)) or hi - lo <= 0:
        raise CalibrationError(f"wavelength_range {wavelength_range!r} is empty or not finite")
    return lo, hi


def calibrate(
    spectrum,
    lamps: str | tuple[str, ...] | list[str] = ("Ne",),
    *,
    wavelength_range=None,
    degree: int | None = None,
    guess: Solution | None = None,
    medium: str = "air",
    n_pixels: int | None = None,
    max_shift: float = 40.0,
) -> Solution:
    """Solve the pixel -> wavelength map of a reference-lamp exposure without a starting guess.

    Parameters
    ----------
    spectrum : specutils.Spectrum, 1-D array of counts, or astropy Table of lines
        The lamp exposure on a pixel axis (lines are found with ``peaks.find_lines``), or a
        line table with at least a ``pixel`` column (``pixel_err``, ``flux``, ``snr``,
        ``fwhm_pixel``, ``flags`` used when present) and ``n_pixels`` in its meta.
    lamps : str or sequence of str
        Lamp names known to ``levels.lamp_lines`` (e.g. "Ne", or ("Hg", "Ar")).
    wavelength_range : (low, high), nm or Quantity, optional
        Coarse range the detector lies in; default 200-1100 nm.
    degree : int, optional
        Chebyshev degree; by default chosen by BIC, capped by the number and spread of lines.
    guess : Solution, optional
        An earlier solution of the same detector: only a shift (up to ``max_shift`` pixels)
        and a small stretch are searched, and fewer lines are needed.
    medium : {"air", "vacuum"}
        Medium of the reference wavelengths and of the solution.
    n_pixels : int, optional
        Detector length, needed only when ``spectrum`` is a line table without it in meta.
    max_shift : float
        Largest drift (pixels) searched on the ``guess`` path.

    Returns
    -------
    Solution

    Raises
    ------
    CalibrationError
        When no trustworthy solution exists: too few lines, no consistent match (wrong lamp,
        wrong range, not a lamp spectrum), or a match that could be chance.  The message says
        what was tried and what is missing.
    """
    t0 = time.perf_counter()
    if medium not in ("air", "vacuum"):
        raise CalibrationError(f"medium must be 'air' or 'vacuum', got {medium!r}")
    lamps = (lamps,) if isinstance(lamps, str) else tuple(lamps)
    if not lamps:
        raise CalibrationError("no lamp given: name the lamp species, e.g. lamps=('Ne',)")
    wrange = _as_nm_range(wavelength_range)
    det, info = _detections(spectrum, n_pixels)
    if guess is not None:
        if guess.n_pixels != det.n_pixels:
            raise CalibrationError(
                f"the guess was made for {guess.n_pixels} pixels, this exposure has "
                f"{det.n_pixels}"
            )
        if guess.medium != medium:
            raise CalibrationError(
                f"the guess is in {guess.medium} wavelengths but medium={medium!r} was asked"
            )
        lo, hi = guess.wavelength_limits
        margin = (hi - lo) * 0.1
        wrange = (max(wrange[0], lo - margin), min(wrange[1], hi + margin))
    fwhm_guess = None
    if guess is not None and math.isfinite(guess.fwhm_pixel):
        fwhm_guess = guess.fwhm_pixel * float(np.median(np.abs(guess.dispersion(
            np.linspace(0, guess.n_pixels - 1, 16)))))
    ref = _references(lamps, wrange, medium, fwhm_guess)
    lamp_txt = "+".join(lamps)
    tried = (
        f"{det.pixel.size} lines detected, {ref.n_usable} usable "
        f"{lamp_txt} reference lines in {wrange[0]:.0f}-{wrange[1]:.0f} nm ({medium})"
    )
    if det.pixel.size < (3 if guess is not None else 5):
        raise CalibrationError(
            f"too few lines to calibrate: {tried}. Is this a lamp exposure? Check the "
            "exposure level (lines need SNR >= 5) and that the lamp was on."
        )
    if ref.n_usable < 4:
        raise CalibrationError(
            f"too few reference lines: {tried}. Widen the wavelength range or add a lamp."
        )
    meta = {
        "created": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
        "ritzline_version": _version(),
        "wavelength_range": list(wrange),
        "n_detected": int(det.pixel.size),
        "n_reference": int(ref.wavelength.size),
        "input": info.get("source"),
        "input_sha256": info.get("sha256"),
    }
    if guess is not None:
        fit = _calibrate_from_guess(det, ref, guess, degree, max_shift)
        verdict = "confident (from guess)"
        what = f"a shift of up to {max_shift:g} px and a small stretch of the guess"
    else:
        fit, ref = _calibrate_blind(
            det, ref, wrange, degree, lambda f: _references(lamps, wrange, medium, f)
        )
        verdict = "confident"
        what = "spacing-ratio matching of line quadruplets in both directions"
    if fit is None:
        raise CalibrationError(
            f"no consistent match found ({what}): {tried}. Wrong lamp, wrong wavelength "
            "range, or not a lamp exposure?"
        )
    n_used = int(fit.used.sum())
    if guess is None and n_used < max(MIN_LINES_BLIND, len(fit.coef) + 2):
        raise CalibrationError(
            f"only {n_used} lines matched for a degree-{len(fit.coef) - 1} fit (at least "
            f"{max(MIN_LINES_BLIND, len(fit.coef) + 2)} needed to check the model), after "
            f"{what}: {tried}. Add a lamp, expose longer, or give --guess."
        )
    if fit.chi2r > MAX_CHI2:
        raise CalibrationError(
            f"the best match ({int(fit.used.sum())} lines) leaves residuals "
            f"{math.sqrt(fit.chi2r):.1f}x larger than the centroid errors (reduced chi-square "
            f"{fit.chi2r:.0f} > {MAX_CHI2:g}): misidentified or blended lines, after {what}: "
            f"{tried}. Check the lamp and range, or give --degree/--guess."
        )
    if fit.log10_p > math.log10(CONFIDENT_P):
        raise CalibrationError(
            f"best match ({int(fit.used.sum())} lines, degree {len(fit.coef) - 1}) could be "
            f"chance (p = {10**fit.log10_p:.2g} > {CONFIDENT_P:g}) after {what}: {tried}. "
            "Wrong lamp or range, or too few lines: add a lamp, expose longer, or give "
            "--range/--guess."
        )
    meta["solve_seconds"] = time.perf_counter() - t0
    return _solution_from_fit(det, ref, fit, lamps, medium, meta, verdict)


def _calibrate_blind(det: _Lines, ref: _Refs, wrange, degree, blended_refs):
    """Search, grow and fit from each vote cell; keep the least likely to be chance.  Then,
    with the resolution now known, drop reference lines blended at it and refit."""
    seeds, n_votes = _seed_candidates(det, ref, wrange)
    # Look-elsewhere factor: the number of distinct candidate solutions grown and tested.
    # The vote that picks them is itself a search; on simulated wrong-lamp and random-line
    # exposures the uncorrected chance of the best candidate behaves like a uniform p-value
    # (see tests/benchmarks/bench_calibrate.py), so this factor is what remains to correct.
    distinct: set = set()
    fw = det.fwhm[np.isfinite(det.fwhm) & ~det.bad]
    fw_px = float(np.median(fw)) if fw.size else float("nan")
    lists: dict[int, _Refs] = {}
    best, best_ref = None, ref
    for _count, direction, pairs, d_cell in seeds:
        # the cell's dispersion gives the resolution in nm: grow against the list with the
        # lines blended at that resolution left out
        ref_s, pairs_s = ref, pairs
        if math.isfinite(fw_px):
            key = round(10 * math.log10(fw_px * d_cell))
            if key not in lists:
                lists[key] = blended_refs(10 ** (key / 10))
            ref_s = lists[key]
            pos = np.searchsorted(ref_s.wavelength, ref.wavelength[pairs[:, 1]])
            pos = np.clip(pos, 0, max(ref_s.wavelength.size - 1, 0))
            keep = ref_s.wavelength[pos] == ref.wavelength[pairs[:, 1]]
            pairs_s = np.stack([pairs[keep, 0], pos[keep]], 1)
            if ref_s.wavelength.size < 4 or pairs_s.shape[0] < 3:
                continue
        fit = _grown_fit(det, ref_s, *_initial_pairs(pairs_s), degree)
        if fit is None or fit.used.sum() < MIN_LINES_BLIND:
            # the most voted pairs can be wrong ones from look-alike quadruplets: start
            # again from the pairs that agree with the cell's linear map
            alt = _grown_fit(det, ref_s, *_pairs_along_cell(det, ref_s, pairs_s,
                                                             direction * d_cell), degree)
            if alt is not None:
                distinct.add(_signature(ref_s, alt))
                if fit is None or alt.used.sum() > fit.used.sum():
                    fit = alt
        if fit is None:
            continue
        fit.n_votes = n_votes
        fit.log10_p = _log10_chance(det, ref_s, fit, 1, len(fit.coef))
        distinct.add(_signature(ref_s, fit))
        if best is None or fit.log10_p < best.log10_p:
            best, best_ref = fit, ref_s
    if best is None:
        return None, ref
    ref = best_ref
    best.n_hyp = len(distinct)
    best.log10_p = _log10_chance(det, ref, best, best.n_hyp, len(best.coef))
    fwhm_nm = _fwhm_nm(det, best)
    if math.isfinite(fwhm_nm):
        ref2 = blended_refs(fwhm_nm)
        if ref2.wavelength.size >= 4:
            fit2 = _refine(det, ref2, best, degree, force=True)
            if fit2 is not None and fit2.used.sum() >= 4:
                fit2.n_hyp, fit2.n_votes = best.n_hyp, best.n_votes
                fit2.log10_p = _log10_chance(det, ref2, fit2, fit2.n_hyp, len(fit2.coef))
                return fit2, ref2
    return best, ref


def _signature(ref: _Refs, fit: _Fit) -> tuple:
    """What makes two candidate solutions the same: their fitted correspondences."""
    return tuple(zip(fit.di[fit.used].tolist(),
                     np.round(ref.wavelength[fit.ri[fit.used]], 4).tolist(), strict=True))


def _grown_fit(det: _Lines, ref: _Refs, di, ri, degree) -> _Fit | None:
    """Grow a start of correspondences, fit and refine it; None when under four lines."""
    if di.size < 3:
        return None
    grown = _grow(det, ref, di, ri)
    if grown is None or grown[0].size < 4:
        return None
    fit = _final_fit(det, ref, *grown, degree)
    if fit is None:
        return None
    fit = _refine(det, ref, fit, degree)
    return None if fit is None or fit.used.sum() < 4 else fit


def _fwhm_nm(det: _Lines, fit: _Fit) -> float:
    """Median LSF FWHM of the used lines converted to nm with the fitted dispersion."""
    n = det.n_pixels
    fw = det.fwhm[fit.di][fit.used]
    ok = np.isfinite(fw)
    if not ok.any():
        return float("nan")
    x = _xnorm(det.pixel[fit.di][fit.used][ok], n)
    disp = np.abs(_cheb.chebval(x, _cheb.chebder(fit.coef))) * 2 / (n - 1)
    return float(np.median(fw[ok] * disp))


def _calibrate_from_guess(det, ref, guess: Solution, degree, max_shift) -> _Fit | None:
    found = _guess_fit(det, ref, guess, max_shift)
    if found is None:
        return None
    di, ri, _shift, _stretch, n_hyp = found
    ok = ~det.bad[di] & ref.fit_ok(ri)
    free_needed = (degree if degree is not None else guess.degree) + 5
    if degree is not None or ok.sum() >= free_needed:
        # the lines are those the earlier solution predicts (its band sets the windows);
        # no re-association, which would forget what the earlier solution knew
        fit = _final_fit(det, ref, di, ri, degree)
        if fit is not None:
            fit = _prune(det, ref, fit, degree)
        if fit is not None:
            fit.n_hyp, fit.method = n_hyp, "guess, free refit"
            fit.log10_p = _log10_chance(det, ref, fit, n_hyp, 2)
            return fit
    # few lines: keep the earlier shape, fit shift and stretch with their covariance
    n = det.n_pixels
    c = (n - 1) / 2.0
    p_old = guess.pixel(ref.wavelength[ri])
    a = np.stack([np.ones(di.size), p_old - c], 1)
    w = 1.0 / det.pixel_err[di]
    use = ok.copy()
    for _ in range(4):
        sol, *_ = np.linalg.lstsq(a[use] * w[use, None], (det.pixel[di] - p_old)[use] * w[use],
                                  rcond=None)
        z = ((det.pixel[di] - p_old) - a @ sol) * w
        scale = max(1.0, 1.4826 * float(np.median(np.abs(z[use]))))
        new = ok & (np.abs(z) < _CLIP_NSIGMA * scale)
        if new.sum() < 3 or np.array_equal(new, use):
            break
        use = new
    aw = a[use] * w[use, None]
    cov_a = np.linalg.inv(aw.T @ aw)
    dof = max(1, int(use.sum()) - 2)
    chi2r = float(np.sum(z[use] ** 2) / dof)
    cov_a = cov_a * max(1.0, chi2r)
    coef, cov, spread = _compose_guess(guess, float(sol[0]), float(sol[1]), cov_a)
    reason = _not_fitted_reasons(det, ref, di, ri)
    out = ok & ~use
    reason[out] = [f"outlier {abs(v):.1f} sigma" for v in z[out]]
    x = _xnorm(det.pixel[di], n)
    disp = np.abs(_cheb.chebval(x, _cheb.chebder(coef))) * 2 / (n - 1)
    fit = _Fit(di, ri, coef, cov, spread, use, reason.astype(str), chi2r,
               _line_sigma(det, ref, di, ri, disp), n_hyp=n_hyp, method="guess, shift+stretch")
    # the stretch of a day-to-day drift is tiny: the shift is the one free parameter that
    # can place a line exactly
    fit.log10_p = _log10_chance(det, ref, fit, n_hyp, 1)
    return fit


def _version() -> str:
    from . import __version__

    return __version__


# ---- calibrated spectra ----------------------------------------------------------------


def calibrated_spectrum(spectrum, solution: Solution):
    """A table of the exposure on the solution's wavelength axis: ``pixel, wavelength,
    wavelength_err, counts, mask`` with units and provenance in meta."""
    import astropy.units as u
    from astropy.table import Table

    from .spectrum import spectrum_arrays

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


def with_input(solution: Solution, path: str | os.PathLike) -> Solution:
    """The solution with its input file's name and SHA-256 recorded in ``meta``."""
    from dataclasses import replace

    meta = dict(solution.meta, input=str(path), input_sha256=file_sha256(path))
    return replace(solution, meta=meta)
