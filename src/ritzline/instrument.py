"""The instrument model: detector offset, gain, read noise and the line shape along the detector.

An :class:`Instrument` is what the line finder needs to know about a spectrometer to give
honest errors: the variance of a sample at a given count level (electronic offset, gain, read
noise) and the line-spread function (FWHM, asymmetry and Lorentzian wing fraction as smooth
functions of pixel).  It is measured once, from a lamp exposure (:func:`measure_instrument`),
or given by the user, travels with a calibration :class:`~ritzline.calibration.Solution`, and
is reused for every exposure of a series.  What the data could not constrain is listed in
``flags``; a conservative value stands in for it.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np

from .errors import SolutionFormatError

__all__ = ["Instrument", "measure_instrument", "optical_black"]

_SCHEMA = "ritzline.instrument/1"
#: Offsets, gains and read noises outside these bounds are not from a spectrometer's ADC.
_GAIN_RANGE = (1e-6, 1e6)


def _cheb(coeffs, pixel, n_pixels):
    x = 2.0 * np.asarray(pixel, float) / max(n_pixels - 1, 1) - 1.0
    return np.polynomial.chebyshev.chebval(np.clip(x, -1.0, 1.0), np.asarray(coeffs, float))


@dataclass(frozen=True)
class Instrument:
    """Detector noise model and line shape of one spectrometer setting.

    Parameters
    ----------
    n_pixels : int
        Detector length the smooth functions are defined over.
    offset : float
        Electronic offset (bias, optical-black level) contained in the counts, ADU.  Counts at
        the offset carry read noise only.
    gain : float
        Effective electrons per ADU (for averaged scans, the gain times the number of scans).
    read_noise : float
        Read noise per sample, ADU rms (including any fixed-pattern scatter left in the data).
    fwhm : tuple of float
        Chebyshev coefficients of the line-spread FWHM in pixels against
        ``x = 2 p / (n_pixels - 1) - 1``.
    asymmetry : tuple of float
        Chebyshev coefficients of the line skew ``a`` (split-normal profile: the red half has
        sigma ``s (1 + a)``, the blue half ``s (1 - a)``).
    wing : float
        Lorentzian fraction of the line profile (pseudo-Voigt, same FWHM).
    shape_span : (float, float), optional
        Pixel range of the lines the shape was measured on: beyond it the FWHM and skew hold
        their end values (None: the whole detector).
    sources : dict
        For each quantity, how it was obtained.
    flags : tuple of str
        Quantities the data could not constrain (a conservative value was used), and warnings
        about the counts (``not_raw_adu``: scaled or averaged counts, ``dark_subtracted``).
    gain_rel_err : float
        Relative 1-sigma uncertainty of ``gain`` (0 when given).  Line errors are inflated by
        the matching Student-t factor where photon noise dominates.
    """

    n_pixels: int
    offset: float
    gain: float
    read_noise: float
    fwhm: tuple[float, ...] = (2.5,)
    asymmetry: tuple[float, ...] = (0.0,)
    wing: float = 0.0
    shape_span: tuple[float, float] | None = None
    sources: dict = field(default_factory=dict)
    flags: tuple[str, ...] = ()
    gain_rel_err: float = 0.0

    def __post_init__(self):
        problems = []
        if not (isinstance(self.n_pixels, int | np.integer) and self.n_pixels >= 2):
            problems.append(f"n_pixels must be an integer >= 2, got {self.n_pixels!r}")
        for name in ("offset", "gain", "read_noise", "wing", "gain_rel_err"):
            if not math.isfinite(float(getattr(self, name))):
                problems.append(f"{name} must be finite")
        if not _GAIN_RANGE[0] <= float(self.gain) <= _GAIN_RANGE[1]:
            problems.append(f"gain must lie in {_GAIN_RANGE} e-/ADU, got {self.gain!r}")
        if float(self.read_noise) < 0:
            problems.append(f"read_noise must be >= 0 ADU, got {self.read_noise!r}")
        if not 0.0 <= float(self.wing) < 1.0:
            problems.append(f"wing (Lorentzian fraction) must lie in [0, 1), got {self.wing!r}")
        if len(self.fwhm) == 0 or not np.all(np.isfinite(self.fwhm)):
            problems.append("fwhm needs at least one finite coefficient")
        elif np.any(_cheb(self.fwhm, np.linspace(0, self.n_pixels - 1, 33),
                          self.n_pixels) <= 0.3):
            problems.append("fwhm must stay above 0.3 px across the detector")
        if len(self.asymmetry) == 0 or not np.all(np.isfinite(self.asymmetry)):
            problems.append("asymmetry needs at least one finite coefficient")
        elif np.any(np.abs(_cheb(self.asymmetry, np.linspace(0, self.n_pixels - 1, 33),
                                 self.n_pixels)) >= 0.8):
            problems.append("asymmetry must stay within (-0.8, 0.8) across the detector")
        if self.shape_span is not None:
            lo, hi = (float(v) for v in self.shape_span)
            if not (math.isfinite(lo) and math.isfinite(hi) and lo <= hi):
                problems.append(f"shape_span must be two finite pixels, low to high, got "
                                f"{self.shape_span!r}")
            else:
                object.__setattr__(self, "shape_span", (lo, hi))
        if problems:
            raise SolutionFormatError("invalid instrument model: " + "; ".join(problems))
        object.__setattr__(self, "fwhm", tuple(float(c) for c in self.fwhm))
        object.__setattr__(self, "asymmetry", tuple(float(c) for c in self.asymmetry))
        object.__setattr__(self, "flags", tuple(self.flags))
        object.__setattr__(self, "sources", dict(self.sources))

    # -- the noise model -------------------------------------------------------------
    def variance(self, counts):
        """Variance (ADU^2) of a sample expected at ``counts`` (ADU, offset included)."""
        level = np.maximum(np.asarray(counts, float) - self.offset, 0.0)
        return self.read_noise**2 + level / self.gain

    # -- the line shape ---------------------------------------------------------------
    def _within_span(self, pixel):
        p = np.asarray(pixel, float)
        return p if self.shape_span is None else np.clip(p, *self.shape_span)

    def fwhm_at(self, pixel):
        """Line-spread FWHM (px) at ``pixel`` (held at its end values beyond ``shape_span``)."""
        return _cheb(self.fwhm, self._within_span(pixel), self.n_pixels)

    def asymmetry_at(self, pixel):
        """Line skew ``a`` at ``pixel`` (0 = symmetric; > 0 = red tail)."""
        return _cheb(self.asymmetry, self._within_span(pixel), self.n_pixels)

    @property
    def median_fwhm(self) -> float:
        """Median line-spread FWHM over the detector (px)."""
        return float(np.median(self.fwhm_at(np.linspace(0, self.n_pixels - 1, 65))))

    def describes(self, counts, mask=None, *, factor: float = 10.0) -> bool:
        """Whether these counts have the noise this model predicts (within ``factor`` in
        variance) at their median level: the white noise from second differences (median
        absolute deviation) against :meth:`variance`.  Scaled, normalised or differently
        processed counts of the same spectrometer do not, and must not be weighted by it.
        """
        y = np.asarray(counts, float)
        ok = np.isfinite(y) if mask is None else (~np.asarray(mask, bool) & np.isfinite(y))
        if np.count_nonzero(ok) < 16:
            return True
        d2 = y[1:-1] - 0.5 * (y[:-2] + y[2:])
        good = ok[1:-1] & ok[:-2] & ok[2:]
        if np.count_nonzero(good) < 8:
            return True
        d = d2[good]
        measured = (1.4826 * float(np.median(np.abs(d - np.median(d))))) ** 2 / 1.5
        predicted = float(self.variance(np.median(y[ok])))
        if not (measured > 0 and predicted > 0):
            return measured == predicted
        return 1.0 / factor <= measured / predicted <= factor

    def with_offset(self, offset: float, source: str) -> Instrument:
        """The same instrument with another electronic offset (e.g. re-measured per frame)."""
        return replace(self, offset=float(offset), sources={**self.sources, "offset": source})

    # -- files ------------------------------------------------------------------------
    def to_dict(self) -> dict:
        """Plain-JSON form (what a solution file stores under ``instrument``)."""
        return {
            "schema": _SCHEMA,
            "n_pixels": int(self.n_pixels),
            "offset_adu": float(self.offset),
            "gain_e_per_adu": float(self.gain),
            "gain_rel_err": float(self.gain_rel_err),
            "read_noise_adu": float(self.read_noise),
            "fwhm_chebyshev_px": list(self.fwhm),
            "asymmetry_chebyshev": list(self.asymmetry),
            "lorentzian_fraction": float(self.wing),
            **({} if self.shape_span is None
               else {"line_shape_span_px": [float(v) for v in self.shape_span]}),
            "sources": {str(k): str(v) for k, v in self.sources.items()},
            "flags": list(self.flags),
        }

    @classmethod
    def from_dict(cls, d: dict, *, where: str = "instrument") -> Instrument:
        """Inverse of :meth:`to_dict`; refuses missing, extra or out-of-range fields."""
        if not isinstance(d, dict):
            raise SolutionFormatError(f"{where}: expected a JSON object, got {type(d).__name__}")
        if d.get("schema") != _SCHEMA:
            raise SolutionFormatError(
                f"{where}: schema {d.get('schema')!r} is not {_SCHEMA!r}; write it with this "
                "version of ritzline")
        need = {"n_pixels", "offset_adu", "gain_e_per_adu", "read_noise_adu",
                "fwhm_chebyshev_px"}
        missing = need - set(d)
        if missing:
            raise SolutionFormatError(f"{where}: missing fields {sorted(missing)}")
        try:
            return cls(
                n_pixels=int(d["n_pixels"]),
                offset=float(d["offset_adu"]),
                gain=float(d["gain_e_per_adu"]),
                read_noise=float(d["read_noise_adu"]),
                fwhm=tuple(float(c) for c in d["fwhm_chebyshev_px"]),
                asymmetry=tuple(float(c) for c in d.get("asymmetry_chebyshev", [0.0])),
                wing=float(d.get("lorentzian_fraction", 0.0)),
                shape_span=(None if d.get("line_shape_span_px") is None
                            else tuple(float(v) for v in d["line_shape_span_px"])),
                sources=dict(d.get("sources", {})),
                flags=tuple(str(f) for f in d.get("flags", [])),
                gain_rel_err=float(d.get("gain_rel_err", 0.0)),
            )
        except (TypeError, ValueError) as exc:
            raise SolutionFormatError(f"{where}: {exc}") from None

    def save(self, path) -> Path:
        """Write the instrument model as JSON (atomically)."""
        from ._io import atomic_write

        with atomic_write(path) as fh:
            fh.write(json.dumps(self.to_dict(), indent=2) + "\n")
        return Path(path)

    @classmethod
    def load(cls, path) -> Instrument:
        """Read an instrument JSON file, or the ``instrument`` of a solution file."""
        path = Path(path)
        try:
            d = json.loads(path.read_text())
        except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
            raise SolutionFormatError(f"{path}: not a readable JSON file ({exc})") from None
        if isinstance(d, dict) and "instrument" in d and d.get("schema") != _SCHEMA:
            d = d["instrument"]
            if d is None:
                raise SolutionFormatError(f"{path}: the solution carries no instrument model")
        return cls.from_dict(d, where=str(path))


def optical_black(counts, mask=None, *, min_pixels: int = 6, max_pixels: int = 64):
    """Leading optical-black (masked, unilluminated) pixels of a detector readout.

    Returns ``(n, level, sigma)``: how many leading pixels read the electronic offset with no
    light, their mean level and their scatter (read noise, ADU), or ``(0, None, None)``.  A
    run qualifies when it is flat (its two halves agree within their noise) and the counts
    right after it step up by more than 5 sigma: light starts there.  (Many linear-array
    detectors read a few shielded pixels first; their level is the offset: common practice.)
    """
    y = np.asarray(counts, float)
    ok = np.ones(y.size, bool) if mask is None else ~np.asarray(mask, bool)
    if y.size < 4 * min_pixels or not ok[:max_pixels].all():
        return 0, None, None
    head = y[: max_pixels + 16]
    d1 = np.abs(np.diff(head))
    # Scatter of the first few pixels: from successive differences (robust to a slope).
    sig = 1.4826 * float(np.median(d1[: min_pixels])) / math.sqrt(2.0)
    if not sig > 0:
        sig = float(np.std(head[:min_pixels])) or 1e-9
    base = float(np.median(head[:min_pixels]))
    # The first pixel that leaves the run (5 sigma above its level, and staying there).
    above = head > base + 5.0 * sig
    stay = above[:-2] & above[1:-1] & above[2:]
    idx = np.flatnonzero(stay)
    if idx.size == 0:
        return 0, None, None
    k = int(idx[0])
    if not min_pixels <= k <= max_pixels:
        return 0, None, None
    run = head[:k]
    half = k // 2
    sd = float(np.std(run, ddof=1))
    if abs(run[:half].mean() - run[half:].mean()) > 4.0 * sd * math.sqrt(2.0 / half) + 1e-12:
        return 0, None, None
    # The rest of the detector must sit well above the run (light, or at least dark charge).
    rest = float(np.median(y[k:]))
    if rest < base + 5.0 * sd:
        return 0, None, None
    return k, float(run.mean()), sd


def measure_instrument(spectrum, *, dark=None, offset=None, gain=None, read_noise=None,
                       min_snr: float = 5.0) -> Instrument:
    """Measure the instrument model from one exposure (best: a lamp with many lines).

    Runs :func:`ritzline.find_lines` and returns the instrument it estimated (offset from
    optical-black pixels, a dark frame, file metadata or ``offset``; gain and read noise
    pooled over the fitted lines and the background; the line width and skew as smooth
    functions of pixel).  Quantities given here are taken as they are.
    """
    from .peaks import find_lines

    lines = find_lines(spectrum, min_snr=min_snr, dark=dark, offset=offset, gain=gain,
                       read_noise=read_noise)
    return Instrument.from_dict(lines.meta["instrument"])
