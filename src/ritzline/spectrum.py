"""Spectrum ingestion and validation: text, FITS and ECSV files -> ``specutils.Spectrum``.

(Reader under construction; :func:`spectrum_arrays` is the one way every stage turns its
input — a Spectrum or a plain array — into float arrays.)
"""

from dataclasses import dataclass

import numpy as np

from .errors import SpectrumFormatError

__all__ = ["SpectrumArrays", "read_spectrum", "spectrum_arrays"]


@dataclass(frozen=True)
class SpectrumArrays:
    """The plain arrays behind a spectrum, as the computing stages use them.

    ``axis`` is the pixel index (``unit == "pix"``) or the wavelength in nm (``unit == "nm"``);
    ``mask`` is True where a sample is bad (NaN/inf, or masked by the reader).
    """

    axis: np.ndarray
    counts: np.ndarray
    mask: np.ndarray
    unit: str
    meta: dict


def spectrum_arrays(spectrum) -> SpectrumArrays:
    """Return the arrays of a ``specutils.Spectrum`` or of a 1-D array of counts.

    A bare array is taken as counts on a pixel axis.  Non-finite counts are always masked.
    """
    if hasattr(spectrum, "spectral_axis") and hasattr(spectrum, "flux"):
        import astropy.units as u

        axis_q = spectrum.spectral_axis
        if axis_q.unit == u.pix or axis_q.unit.physical_type == "dimensionless":
            axis, unit = np.asarray(axis_q.value, float), "pix"
        else:
            axis = axis_q.to_value(u.nm, equivalencies=u.spectral())
            unit = "nm"
        counts = np.asarray(spectrum.flux.value, float)
        mask = np.zeros(counts.shape, bool) if spectrum.mask is None else np.asarray(spectrum.mask)
        meta = dict(spectrum.meta or {})
    else:
        counts = np.asarray(spectrum, float)
        if counts.ndim != 1:
            raise SpectrumFormatError(f"expected a 1-D array of counts, got shape {counts.shape}")
        axis, unit = np.arange(counts.size, dtype=float), "pix"
        mask = np.zeros(counts.shape, bool)
        meta = {}
    mask = mask | ~np.isfinite(counts)
    return SpectrumArrays(axis=axis, counts=counts, mask=mask, unit=unit, meta=meta)


def read_spectrum(path, *, column=None, axis_unit=None, saturation=None):
    raise NotImplementedError("read_spectrum is being written")
