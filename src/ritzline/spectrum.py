"""Spectrum ingestion and validation: text, FITS and ECSV files -> ``specutils.Spectrum``.

:func:`read_spectrum` is the only function in ritzline that reads spectrum files;
:func:`spectrum_arrays` is the one way every computing stage turns its input (a Spectrum
or a plain array of counts) into float arrays; :func:`write_spectrum` writes the ECSV form
that :func:`read_spectrum` reads back.
"""

from __future__ import annotations

import math
import os
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .errors import RitzlineWarning, SpectrumFormatError

__all__ = [
    "MIN_SAMPLES",
    "SpectrumArrays",
    "read_spectrum",
    "require_solution_pixels",
    "spectrum_arrays",
    "write_spectrum",
]

MIN_SAMPLES = 16
"""Fewer samples than this cannot hold a line with its background: refused."""

# Full-scale values of common ADCs (2**bits - 1); a maximum repeated at one of these is a
# saturation plateau.
_ADC_FULL_SCALE = {2**bits - 1 for bits in (10, 12, 14, 15, 16, 18, 20, 24)}

_UNIT_WORDS = {
    "nm": "nm",
    "nanometer": "nm",
    "nanometers": "nm",
    "nanometre": "nm",
    "nanometres": "nm",
    "a": "angstrom",
    "å": "angstrom",
    "aa": "angstrom",
    "ang": "angstrom",
    "angstrom": "angstrom",
    "angstroms": "angstrom",
    "um": "um",
    "µm": "um",
    "μm": "um",
    "micron": "um",
    "microns": "um",
    "micrometer": "um",
    "m": "m",
    "pix": "pix",
    "pixel": "pix",
    "pixels": "pix",
    "px": "pix",
}
_TO_NM = {"nm": 1.0, "angstrom": 0.1, "um": 1000.0, "m": 1e9}
_PIXEL_NAMES = re.compile(r"^(pix(el)?s?|px|index|idx|channel|ch|bin|sample|x)$")
_WAVE_NAMES = re.compile(r"(wave|lambda|wl$|^λ)")

_NUMBER = r"([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)"
_EXPOSURE_RE = re.compile(
    r"(?:exposure|integration|exp)[ _-]*(?:time)?\s*(?:[\(\[]\s*([a-zµμ]+)\s*[\)\]])?"
    r"\s*[:=]?\s*" + _NUMBER + r"\s*([a-zµμ]+)?",
    re.IGNORECASE,
)
_TIME_UNITS = {
    None: 1.0,
    "s": 1.0,
    "sec": 1.0,
    "secs": 1.0,
    "second": 1.0,
    "seconds": 1.0,
    "ms": 1e-3,
    "msec": 1e-3,
    "millisecond": 1e-3,
    "milliseconds": 1e-3,
    "us": 1e-6,
    "usec": 1e-6,
    "µs": 1e-6,
    "μs": 1e-6,
    "microsecond": 1e-6,
    "microseconds": 1e-6,
    "min": 60.0,
    "minute": 60.0,
    "minutes": 60.0,
}
_SATURATION_RE = re.compile(r"saturat\w*\s*(?:level)?\s*[:=]?\s*" + _NUMBER, re.IGNORECASE)
_TIMESTAMP_RE = re.compile(
    r"(\d{4}-\d{2}-\d{2}[T ]\d{2}:\d{2}(?::\d{2}(?:\.\d+)?)?(?:Z|[+-]\d{2}:?\d{2})?)"
)
_MEDIUM_RE = re.compile(r"\b(vacuum|vac|air)\b", re.IGNORECASE)


@dataclass(frozen=True)
class SpectrumArrays:
    """The plain arrays behind a spectrum, as the computing stages use them.

    ``axis`` is the detector pixel number (``unit == "pix"``) or the wavelength in nm
    (``unit == "nm"``); ``mask`` is True where a sample is bad (NaN/inf, masked by the
    reader, or absent from the file).  On a pixel axis the array index *is* the detector
    pixel: a cropped or gapped export is placed at its pixels, and the pixels it lacks are
    NaN and masked.  ``pixel`` is the detector pixel of every sample (the index on a
    wavelength axis); ``present`` is False for the samples added to fill a gap.
    """

    axis: np.ndarray
    counts: np.ndarray
    mask: np.ndarray
    unit: str
    meta: dict
    pixel: np.ndarray | None = None
    present: np.ndarray | None = None

    @property
    def first_pixel(self) -> int:
        """Detector pixel of the first sample the file holds."""
        held = np.flatnonzero(self.present) if self.present is not None else [0]
        return int(held[0]) if len(held) else 0

    @property
    def last_pixel(self) -> int:
        """Detector pixel of the last sample the file holds."""
        held = np.flatnonzero(self.present) if self.present is not None else [self.counts.size - 1]
        return int(held[-1]) if len(held) else self.counts.size - 1


def spectrum_arrays(spectrum) -> SpectrumArrays:
    """Return the arrays of a ``specutils.Spectrum`` or of a 1-D array of counts.

    A bare array is taken as counts on a pixel axis.  Non-finite counts are always masked.
    A pixel axis of whole numbers that does not run 0, 1, 2, ... (a cropped or gapped
    export) is laid out on the detector: sample at pixel p goes to index p, the missing
    pixels are NaN and masked, so every stage that takes the index as the pixel is right.
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
    present = np.ones(counts.shape, bool)
    if unit == "pix" and counts.size and not _is_index(axis):
        whole = np.all(axis == np.rint(axis)) and axis.min() >= 0
        if whole and axis.max() < _MAX_DETECTOR_PIXELS:
            at = np.rint(axis).astype(np.int64)
            n = int(at.max()) + 1
            full = np.full(n, np.nan)
            full[at] = counts
            full_mask = np.ones(n, bool)
            full_mask[at] = mask
            present = np.zeros(n, bool)
            present[at] = True
            counts, mask = full, full_mask
            axis = np.arange(n, dtype=float)
    pixel = axis if unit == "pix" else np.arange(counts.size, dtype=float)
    return SpectrumArrays(axis=axis, counts=counts, mask=mask, unit=unit, meta=meta,
                          pixel=pixel, present=present)


def _is_index(axis: np.ndarray) -> bool:
    return bool(axis[0] == 0 and np.all(np.diff(axis) == 1))


def require_solution_pixels(spectrum, solution, *, what: str = "the spectrum") -> None:
    """Refuse to apply ``solution`` where it was not made: the one check every stage runs
    before turning pixels into wavelengths with a Solution.

    ``spectrum`` is a Spectrum, an array, a :class:`SpectrumArrays` or a line table with a
    ``pixel`` column.  Detector pixels outside the solution's ``0 .. n_pixels - 1`` are
    refused with a message naming both files and the way out (another solution,
    ``--pixel-origin 1`` for a 1-based export).  A spectrum without a pixel column whose
    length differs from the solution's is refused too: nothing says where it lies on the
    detector.  A spectrum on a wavelength axis does not need the solution and passes.
    """
    n_sol = int(solution.n_pixels)
    sol_name = (getattr(solution, "meta", None) or {}).get("loaded_from") or "the solution"
    if hasattr(spectrum, "colnames"):  # a line table
        if "pixel" not in spectrum.colnames or not len(spectrum):
            return
        p = np.asarray(spectrum["pixel"], float)
        p = p[np.isfinite(p)]
        if p.size and (p.min() < -0.5 or p.max() > n_sol - 0.5):
            source = (spectrum.meta or {}).get("source") or (spectrum.meta or {}).get("input")
            raise SpectrumFormatError(
                f"{source or what}: lines at pixels {p.min():.1f} to {p.max():.1f} lie "
                f"outside the {n_sol} pixels of {sol_name}; use a solution made for this "
                "detector setting"
            )
        return
    arr = spectrum if isinstance(spectrum, SpectrumArrays) else spectrum_arrays(spectrum)
    if arr.unit != "pix":
        return
    source = arr.meta.get("source") or what
    first, last = arr.first_pixel, arr.last_pixel
    from_file = arr.meta.get("pixel_origin") is not None
    if not from_file and arr.counts.size != n_sol:
        raise SpectrumFormatError(
            f"{source}: {arr.counts.size} samples without a pixel column, but {sol_name} was "
            f"made for {n_sol} pixels: nothing says which detector pixels these are; give "
            "the full exposure, or a file with a pixel column"
        )
    if last > n_sol - 1:
        origin = arr.meta.get("pixel_origin") or 0
        hint = (" (the file may count pixels from 1: pass --pixel-origin 1)"
                if first == 1 and last == n_sol and origin == 0 else "")
        raise SpectrumFormatError(
            f"{source}: covers detector pixels {first}-{last} but {sol_name} was made for "
            f"pixels 0-{n_sol - 1}{hint}; use a solution made for this detector setting"
        )


# ---------------------------------------------------------------------------------------
# public reader


def read_spectrum(
    path: str | os.PathLike,
    *,
    column: str | int | None = None,
    axis_unit: str | None = None,
    saturation: float | None = None,
    hdu: int | str | None = None,
    pixel_origin: int | None = None,
):
    """Read a spectrum file into a ``specutils.Spectrum``.

    Parameters
    ----------
    path : str or path-like
        Delimited text (comma, tab, semicolon or white space; optional header row and
        free-text or ``#`` preamble), FITS (1-D image with a linear spectral WCS, or a
        binary table), or ECSV as written by :func:`write_spectrum`.
    column : str or int, optional
        Which counts column to read when a file holds several (one per exposure is common):
        a header name (case-insensitive) or a 0-based index into the file's columns, where
        column 0 is the axis when the file has one.  Default: the first counts column.
    axis_unit : str, optional
        Override the unit of the axis column: ``"nm"``, ``"angstrom"``, ``"um"`` or
        ``"pixel"``.  By default the unit comes from the header (``Wavelength (nm)``,
        ``lambda [Å]``, ``pixel``, FITS ``CUNIT1``/``TUNITn``); an axis of consecutive
        integers without a unit is a pixel axis.
    saturation : float, optional
        Saturation level in counts.  By default taken from the file (a ``saturation``
        header entry, FITS ``SATURATE``) or detected as a full-scale ADC value that the data
        reach in several samples.  A level in the file that is not a positive number is
        ignored with a warning.
    hdu : int or str, optional
        FITS only: the HDU to read, by 0-based number or ``EXTNAME``.  Default: the first
        HDU holding data (a warning names the others when several do).
    pixel_origin : int, optional
        The number the file gives the detector's first pixel (1 for 1-based exports);
        subtracted from a pixel axis so that pixel 0 is the first pixel.  Default 0: the
        pixel numbers are taken as written.  A pixel axis that starts later or has gaps
        (a cropped export) keeps its detector pixel numbers: :func:`spectrum_arrays`
        places each sample at its pixel and masks the pixels the file lacks.

    Returns
    -------
    specutils.Spectrum
        Flux in ``u.ct``; spectral axis in ``u.pix`` or ``u.nm``; ``mask`` True where a sample
        is NaN/inf (kept, counted, never dropped).  ``meta``: ``source``, ``column``,
        ``columns`` (all counts columns), ``exposure_time`` (s or None), ``saturation``,
        ``saturation_source``, ``n_masked``, ``n_saturated``, ``timestamp``, ``axis_kind``
        (``"pixel"`` or ``"wavelength"``), ``medium`` (``"air"``, ``"vacuum"`` or None),
        ``format``, ``pixel_origin``, ``pixel_range`` (first and last detector pixel of a
        pixel axis) and ``pixel_gaps`` (pixels missing inside that range).

    Raises
    ------
    SpectrumFormatError
        For a missing, empty, binary or malformed file, a truncated last row, a header that
        names another number of columns than the data hold, a comma that may be both the
        decimal mark and the separator, fewer than 16 samples, an axis that is not strictly
        monotonic, a pixel axis of fractional or negative numbers, non-positive
        wavelengths, a FITS axis that is not a linear or -LOG wavelength axis, or data
        that are all NaN.  The message names the file, the line or HDU, and the cause.
    """
    path = Path(path)
    if not path.exists():
        raise SpectrumFormatError(f"{path}: no such file")
    if path.is_dir():
        raise SpectrumFormatError(f"{path}: is a folder, not a spectrum file")
    try:
        with open(path, "rb") as fh:  # read once, close at once: never modify or lock
            raw = fh.read()
    except OSError as exc:
        raise SpectrumFormatError(f"{path}: cannot be read ({exc.strerror or exc})") from None
    if not raw.strip():
        raise SpectrumFormatError(f"{path}: file is empty")

    is_fits = raw.startswith(b"SIMPLE  =") or path.suffix.lower() in {".fits", ".fit", ".fts"}
    if hdu is not None and not is_fits:
        raise SpectrumFormatError(f"{path}: hdu={hdu!r} given but this is not a FITS file")
    if is_fits:
        parsed = _parse_fits(raw, path, column, hdu)
    else:
        text = _decode(raw, path)
        if text.lstrip().startswith("# %ECSV"):
            parsed = _parse_ecsv(text, path, column)
        else:
            parsed = _parse_text(text, path, column)

    return _build(parsed, path, axis_unit=axis_unit, saturation=saturation,
                  pixel_origin=pixel_origin)


def write_spectrum(spectrum, path: str | os.PathLike) -> Path:
    """Write a spectrum as ECSV (axis, counts, mask columns; metadata in the header).

    The file is written atomically and reads back with :func:`read_spectrum` to identical
    values.
    """
    from astropy.table import Table

    from ._io import write_table

    arr = spectrum_arrays(spectrum)
    name = "pixel" if arr.unit == "pix" else "wavelength"
    table = Table()
    table[name] = arr.axis
    table[name].unit = "pix" if arr.unit == "pix" else "nm"
    table["counts"] = arr.counts
    table["counts"].unit = "ct"
    table["mask"] = arr.mask
    keep = {k: v for k, v in arr.meta.items() if isinstance(v, str | int | float | bool | None)}
    keep.pop("columns", None)
    table.meta.update(keep)
    table.meta["writer"] = "ritzline"
    path = Path(path)
    write_table(table, path, format="ascii.ecsv")
    return path


# ---------------------------------------------------------------------------------------
# parsed form shared by the three formats


@dataclass
class _Parsed:
    axis: np.ndarray | None  # None: no axis column (pixel index implied)
    counts: np.ndarray
    axis_name: str | None
    axis_unit: str | None  # from the file: "nm", "angstrom", "um", "m", "pix" or None
    column: str
    columns: list[str]
    header_text: str  # preamble / header cards, searched for exposure time etc.
    fmt: str
    location: str  # "line 12" / "HDU 1" for messages about the data block
    saturation: float | None = None
    exposure_time: float | None = None
    timestamp: str | None = None
    medium: str | None = None
    mask: np.ndarray | None = None
    meta: dict | None = None


def _decode(raw: bytes, path: Path) -> str:
    head = raw[:4096]
    if b"\x00" in head:
        raise SpectrumFormatError(f"{path}: binary data (NUL bytes), not a text, FITS or ECSV file")
    nul = raw.find(b"\x00")
    if nul >= 0:
        line = raw.count(b"\n", 0, nul) + 1
        raise SpectrumFormatError(
            f"{path}: line {line}: binary data (NUL bytes) inside the text: the file is "
            "damaged (a full disk or an interrupted copy?); re-export it"
        )
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError:
        text = raw.decode("latin-1")  # instrument software often writes µ, ° in Latin-1
    controls = sum(1 for ch in text[:4096] if ord(ch) < 32 and ch not in "\t\n\r\f\v")
    if controls > max(2, len(text[:4096]) // 100):
        raise SpectrumFormatError(f"{path}: binary data (control bytes), not a text spectrum")
    return text


# ---------------------------------------------------------------------------------------
# delimited text


def _split(line: str, delim: str | None) -> list[str]:
    if delim is None:
        return line.split()
    return [f.strip() for f in line.split(delim)]


def _is_number(field: str) -> bool:
    try:
        float(field)
    except ValueError:
        return False
    return True


def _guess_delimiter(line: str) -> str | None:
    for delim in ("\t", ";", ","):
        if delim in line:
            fields = [f.strip() for f in line.split(delim)]
            numeric = (_is_number(f) or _is_number(f.replace(",", ".")) for f in fields)
            if all(fields) and all(numeric):
                return delim
    return None


def _numeric_fields(line: str) -> tuple[str | None, list[str], bool] | None:
    """If ``line`` is a data row, return (delimiter, fields, decimal_comma), else None."""
    stripped = line.strip()
    if not stripped or stripped[0] in "#%!;/":
        return None
    delim = _guess_delimiter(stripped)
    fields = _split(stripped, delim)
    if all(_is_number(f) for f in fields):
        return delim, fields, False
    if delim in (";", "\t", None) and all(_is_number(f.replace(",", ".")) for f in fields):
        return delim, fields, True
    return None


def _data_rows(lines: list[str], start: int, delim, decimal_comma) -> int:
    """Index one past the last data row of the block that starts at ``start``.

    Acquisition programs often close the data with a marker line (``>>>>>End Spectral
    Data<<<<<``, ``[EndOfData]``, ``END``) and sometimes more free text: everything after the
    last numeric row is that footer, provided no numeric row follows it.
    """
    end = len(lines)
    for k in range(len(lines) - 1, start - 1, -1):
        stripped = lines[k].strip()
        if not stripped or stripped.startswith("#"):
            continue
        fields = _split(stripped, delim)
        if decimal_comma:
            fields = [f.replace(",", ".") for f in fields]
        if all(_is_number(f) for f in fields if f) or not _is_footer(stripped):
            return k + 1
        end = k
    return end


def _is_footer(line: str) -> bool:
    """A closing marker or note after the data: printable text that does not start like a
    number (a row cut in the middle of a number is damage, not a footer)."""
    if line[0] in "0123456789+-.,":
        return False
    return all(ch.isprintable() or ch == "\t" for ch in line)


def _header_row(lines: list[str], start: int, delim, n_fields: int, path: Path):
    """Column names from the row just above the data, or None when that row is free text.

    A row split by the data's own delimiter (tab, comma or semicolon) into names is a
    header; when it names a different number of columns than the data rows hold, the file
    is refused rather than read with the names shifted.
    """
    for j in range(start - 1, -1, -1):
        candidate = lines[j].strip()
        if not candidate:
            continue
        body = candidate.lstrip("#%").strip()
        names = _split(body, delim)
        if delim is None:  # 'wavelength (nm) counts': a bracketed unit belongs to its name
            merged: list[str] = []
            for name in names:
                if merged and name[:1] in "([{":
                    merged[-1] += f" {name}"
                else:
                    merged.append(name)
            names = merged
        if any(_is_number(n) for n in names if n):
            return None
        if len(names) == n_fields:
            return names
        named = any(_COLUMN_WORDS.match(_bare_name(n)) for n in names)
        if len(names) >= 2 and all(names) and (
                (delim is not None and delim in body) or (delim is None and named)):
            hint = ""
            if delim == "," and len(names) < n_fields:
                hint = (
                    "; if the comma is also the decimal mark, re-export with a semicolon or "
                    "tab separator"
                )
            raise SpectrumFormatError(
                f"{path}: line {j + 1}: the header names {len(names)} columns "
                f"({', '.join(names)}) but the data rows have {n_fields}{hint}"
            )
        return None
    return None


_COLUMN_WORDS = re.compile(
    r"^(pix(el)?s?|px|index|channel|wave\w*|lambda|wl|counts?|intensity|flux|signal|"
    r"adu|dark|exp_?\d+)$"
)
_LEADING_ZERO = re.compile(r"(^|,)0\d")


def _check_decimal_comma_ambiguity(data, delim, header_names, path: Path, start: int,
                                   block=()):
    """Refuse comma-separated rows that read just as well as decimal-comma numbers.

    ``500,1,1234`` can be three values or 500.1 and 1234; when the comma-split axis repeats
    values that the decimal reading makes strictly monotonic, both readings are plausible
    and guessing would truncate every value silently.
    """
    if delim != "," or data.ndim != 2 or data.shape[1] < 2 or data.shape[0] < 3:
        return
    if header_names is not None:  # the header says how many columns there are
        return
    # '0,1234,05': a field with a leading zero is the fraction of a decimal-comma number
    sample = [line.strip() for line in block[:500]]
    if any(_LEADING_ZERO.search(line.split(",", 1)[1]) for line in sample if "," in line):
        raise SpectrumFormatError(
            f"{path}: line {start + 1}: a value with a leading zero ('05') after a comma: "
            "the comma seems to be both the decimal mark and the column separator, so the "
            "values cannot be read safely; re-export with a semicolon or tab separator, or "
            "with a decimal point"
        )
    first = data[:, 0]
    steps = np.diff(first)
    if np.mean(steps == 0) < 0.3:  # a decimal axis split at its comma repeats its integers
        return
    frac = data[:, 1]
    if not np.all((frac >= 0) & (frac == np.rint(frac))):
        return
    digits = np.array([len(str(int(v))) for v in frac[: min(frac.size, 200)]])
    joined = first + np.sign(first + (first == 0)) * frac / 10.0 ** np.max(digits)
    jsteps = np.diff(joined[: digits.size])
    if np.all(jsteps > 0) or np.all(jsteps < 0):
        raise SpectrumFormatError(
            f"{path}: line {start + 1}: the comma seems to be both the decimal mark and the "
            "column separator (e.g. '500,1,1234'), so the values cannot be read safely; "
            "re-export with a semicolon or tab separator, or with a decimal point"
        )


def _parse_text(text: str, path: Path, column) -> _Parsed:
    lines = text.splitlines()
    start = None
    for i, line in enumerate(lines):
        found = _numeric_fields(line)
        if found is not None:
            start = i
            delim, first_fields, decimal_comma = found
            break
    if start is None:
        raise SpectrumFormatError(f"{path}: no numeric data rows found")
    n_fields = len(first_fields)

    header_names = _header_row(lines, start, delim, n_fields, path)
    preamble = "\n".join(lines[:start])
    end = _data_rows(lines, start, delim, decimal_comma)
    footer = "\n".join(line.strip() for line in lines[end:] if line.strip())

    block = lines[start:end]
    _check_last_row(block, delim, n_fields, path, start, end, raw_ends_newline=text.endswith(
        ("\n", "\r")))
    data = _fast_block(block, delim, decimal_comma, n_fields)
    if data is None:
        data = _slow_block(block, delim, decimal_comma, n_fields, path, first_line=start + 1)
    _check_decimal_comma_ambiguity(data, delim, header_names, path, start, block)

    names = header_names or (
        ["counts"] if n_fields == 1 else ["axis"] + [f"counts_{k}" for k in range(1, n_fields)]
    )
    mask = None
    order = _calibrated_layout(names)
    if order is not None:  # a calibrated exposure written as CSV by ritzline
        if "mask" in names:
            mask = data[:, names.index("mask")] != 0
        data = data[:, order]
        names = [names[k] for k in order]
        n_fields = len(names)
    location = f"line {start + 1}"
    if n_fields == 1:
        axis, axis_name, axis_unit = None, None, None
        counts_names = names
        idx = _choose_column(column, names, offset=0, path=path)
    else:
        axis = data[:, 0]
        axis_name = names[0]
        axis_unit = _unit_from_name(axis_name)
        counts_names = names[1:]
        idx = _choose_column(column, names, offset=1, path=path)
    counts = data[:, idx] if data.ndim == 2 else data
    return _Parsed(
        axis=axis,
        counts=counts,
        axis_name=axis_name,
        axis_unit=axis_unit,
        column=names[idx],
        columns=counts_names,
        header_text=preamble,
        fmt="text",
        location=location,
        mask=mask,
        meta={"footer": footer} if footer else None,
    )


def _calibrated_layout(names: list[str]) -> list[int] | None:
    """Column order (axis first, counts next) of a calibrated exposure, else None.

    ``calibrate --write-calibrated`` writes ``pixel, wavelength, wavelength_err, counts,
    mask``: its axis is the wavelength and its counts the counts column, whatever comes
    first in the file.
    """
    bare = [_bare_name(n) for n in names]
    if "wavelength" not in bare or "counts" not in bare or bare[0] == "wavelength":
        return None
    axis = bare.index("wavelength")
    rest = [k for k, n in enumerate(bare)
            if k != axis and n not in ("pixel", "mask") and not n.endswith("_err")]
    rest.sort(key=lambda k: bare[k] != "counts")
    return [axis, *rest]


def _check_last_row(block, delim, n_fields, path, start, end, *, raw_ends_newline) -> None:
    """A last data row with fewer fields, or with an empty last field, is a cut-off file."""
    for k in range(len(block) - 1, -1, -1):
        stripped = block[k].strip()
        if not stripped or stripped.startswith("#"):
            continue
        fields = _split(stripped, delim)
        lineno = start + k + 1
        cut = len(fields) < n_fields or (n_fields > 1 and fields[-1] == "")
        if cut:
            tail = "" if raw_ends_newline or end < start + len(block) else " and no line end"
            raise SpectrumFormatError(
                f"{path}: line {lineno}: last data row has {sum(1 for f in fields if f)} of "
                f"{n_fields} values{tail}: the file looks truncated (cut off while being "
                "written or copied); re-export it, or delete that row"
            )
        if not raw_ends_newline and k == len(block) - 1:
            # no line end after the last row: a cut inside its last number leaves a shorter
            # number that parses; say so when it is shorter than every one before it
            before = [_split(b.strip(), delim) for b in block[max(0, k - 50):k]]
            widths = [len(f[-1]) for f in before if len(f) == n_fields and f[-1]]
            if widths and _is_number(fields[-1]) and len(fields[-1]) < min(widths):
                _warn(f"{path}: line {lineno}: the last row has no line end and its last "
                      f"value {fields[-1]!r} is shorter than all before it: the file may "
                      "have been cut off; check that value or re-export the file")
        return


def _fast_block(block, delim, decimal_comma, n_fields) -> np.ndarray | None:
    """Parse the data block with numpy's C reader; None when any row needs a closer look."""
    rows = "\n".join(block)
    if decimal_comma:
        rows = rows.replace(",", ".")
    import io

    try:
        data = np.loadtxt(
            io.StringIO(rows), delimiter=delim, comments="#", ndmin=2, dtype=float, encoding=None
        )
    except ValueError:
        return None
    if data.shape[1] != n_fields:
        return None
    return data if n_fields > 1 else data[:, 0]


def _slow_block(block, delim, decimal_comma, n_fields, path, first_line) -> np.ndarray:
    """Row by row, to name the exact line of a bad cell; empty cells are missing (NaN)."""
    values = []
    for k, line in enumerate(block):
        stripped = line.strip()
        if not stripped or stripped.startswith("#"):
            continue
        fields = _split(stripped, delim)
        lineno = first_line + k
        if len(fields) != n_fields:
            raise SpectrumFormatError(
                f"{path}: line {lineno}: {len(fields)} columns where the data have {n_fields}"
                " (inconsistent column count)"
                + ("; if the comma is also the decimal mark, re-export with a semicolon or tab"
                   " separator" if delim == "," else "")
            )
        row = []
        for c, field in enumerate(fields):
            if decimal_comma:
                field = field.replace(",", ".")
            if field == "":
                row.append(math.nan)
                continue
            try:
                row.append(float(field))
            except ValueError:
                shown = field if len(field) <= 30 else field[:27] + "..."
                raise SpectrumFormatError(
                    f"{path}: line {lineno}, column {c + 1}: non-numeric value {shown!r}"
                ) from None
        values.append(row)
    data = np.asarray(values, dtype=float)
    return data if n_fields > 1 else data[:, 0]


def _choose_column(column, names: list[str], offset: int, path: Path) -> int:
    """Index into ``names`` of the counts column to read (``offset`` = number of axis columns)."""
    if column is None:
        return offset
    if isinstance(column, int | np.integer) and not isinstance(column, bool):
        if offset <= column < len(names):
            return int(column)
        raise SpectrumFormatError(
            f"{path}: column {column} is not a counts column; this file has counts in columns "
            f"{offset}..{len(names) - 1} ({', '.join(names[offset:])})"
        )
    wanted = str(column).strip().lower()
    for k, name in enumerate(names):
        if k >= offset and (name.lower() == wanted or _bare_name(name) == wanted):
            return k
    raise SpectrumFormatError(
        f"{path}: no column named {column!r}; counts columns are: {', '.join(names[offset:])}"
    )


def _bare_name(name: str) -> str:
    return re.sub(r"\s*[\(\[].*?[\)\]]\s*$", "", name).strip().lower()


def _unit_from_name(name: str | None) -> str | None:
    """Unit named in a column header: ``Wavelength (nm)``, ``lambda[Å]``, ``wl_nm``, ``pixel``."""
    if not name:
        return None
    low = name.strip().lower()
    bracket = re.search(r"[\(\[\{]\s*([^\)\]\}]+?)\s*[\)\]\}]", low)
    if bracket and bracket.group(1) in _UNIT_WORDS:
        return _UNIT_WORDS[bracket.group(1)]
    if bracket and bracket.group(1) not in ("air", "vacuum", "vac", "in air", "in vacuum"):
        return bracket.group(1)  # a unit ritzline does not know: refused, not guessed
    for sep in ("/", "_", " ", "-"):
        if sep in low:
            tail = low.rsplit(sep, 1)[1].strip()
            if tail in _UNIT_WORDS and tail not in ("a", "m"):
                return _UNIT_WORDS[tail]
            if tail in ("a", "å") and sep == "/":
                return "angstrom"
    if _PIXEL_NAMES.match(_bare_name(low)):
        return "pix"
    return None


# ---------------------------------------------------------------------------------------
# ECSV written by ritzline


def _parse_ecsv(text: str, path: Path, column) -> _Parsed:
    from astropy.table import Table

    try:
        table = Table.read(text, format="ascii.ecsv")
    except Exception as exc:  # astropy raises many types for malformed ECSV
        raise SpectrumFormatError(f"{path}: malformed ECSV header or data ({exc})") from None
    names = [n for n in table.colnames if n != "mask"]
    if len(names) < 2:
        raise SpectrumFormatError(f"{path}: ECSV needs an axis column and a counts column")
    order = _calibrated_layout(names)
    if order is not None:
        names = [names[k] for k in order]
    idx = _choose_column(column, names, offset=1, path=path)
    axis_col = table[names[0]]
    unit = str(axis_col.unit) if axis_col.unit is not None else None
    mask = np.asarray(table["mask"], bool) if "mask" in table.colnames else None
    meta = dict(table.meta)
    return _Parsed(
        axis=np.asarray(axis_col, float),
        counts=np.asarray(table[names[idx]], float),
        axis_name=names[0],
        axis_unit=_UNIT_WORDS.get(unit.lower(), unit) if unit else _unit_from_name(names[0]),
        column=names[idx],
        columns=names[1:],
        header_text="",
        fmt="ecsv",
        location="data",
        saturation=_float_or_none(meta.get("saturation")),
        exposure_time=_float_or_none(meta.get("exposure_time")),
        timestamp=meta.get("timestamp"),
        medium=meta.get("medium"),
        mask=mask,
        meta={k: v for k, v in meta.items() if k not in _OWN_META},
    )


# ---------------------------------------------------------------------------------------
# FITS


def _parse_fits(raw: bytes, path: Path, column, hdu=None) -> _Parsed:
    import io
    import warnings

    from astropy.io import fits

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            hdul = fits.open(io.BytesIO(raw), memmap=False)
            hdul.verify("silentfix")
            hdus = list(hdul)
    except Exception as exc:  # astropy raises OSError/ValueError/... for damaged files
        raise SpectrumFormatError(f"{path}: not a readable FITS file ({exc})") from None
    primary = hdus[0].header if hdus else {}

    def describe(k, h):
        name = str(h.header.get("EXTNAME", "")).strip()
        return f"{k}" + (f" ({name})" if name else "")

    def data_of(k, h):
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                return h.data
        except Exception as exc:
            raise SpectrumFormatError(f"{path}: HDU {k}: data cannot be read ({exc}); the "
                                      "file may be truncated") from None

    usable = [(k, h) for k, h in enumerate(hdus)
              if isinstance(h, fits.BinTableHDU | fits.TableHDU | fits.PrimaryHDU
                            | fits.ImageHDU) and h.header.get("NAXIS", 0)]
    if hdu is not None:
        chosen = _choose_hdu(hdu, hdus, path, describe)
        k, h = chosen, hdus[chosen]
        if data_of(k, h) is None:
            raise SpectrumFormatError(f"{path}: HDU {describe(k, h)} holds no data")
    else:
        with_data = [(k, h) for k, h in usable if data_of(k, h) is not None]
        if not with_data:
            raise SpectrumFormatError(f"{path}: no HDU holds data")
        k, h = with_data[0]
        if len(with_data) > 1:
            others = ", ".join(describe(j, g) for j, g in with_data[1:])
            _warn(f"{path}: HDU {describe(k, h)}: read this HDU; HDU {others} also hold data "
                  "(choose one with --hdu / hdu=)")
    if isinstance(h, fits.BinTableHDU | fits.TableHDU):
        return _fits_table(h, k, primary, path, column)
    if column is not None:
        raise SpectrumFormatError(
            f"{path}: HDU {describe(k, h)} is an image, it has no columns; choose the HDU "
            "with --hdu / hdu= instead of --column"
        )
    return _fits_image(h, k, primary, path)


def _choose_hdu(hdu, hdus, path: Path, describe) -> int:
    listing = ", ".join(describe(k, h) for k, h in enumerate(hdus))
    if isinstance(hdu, str) and hdu.strip().lstrip("-").isdigit():
        hdu = int(hdu)
    if isinstance(hdu, int | np.integer) and not isinstance(hdu, bool):
        if 0 <= hdu < len(hdus):
            return int(hdu)
        raise SpectrumFormatError(f"{path}: no HDU {hdu}; this file has HDU {listing}")
    wanted = str(hdu).strip().upper()
    for k, h in enumerate(hdus):
        if str(h.header.get("EXTNAME", "")).strip().upper() == wanted:
            return k
    raise SpectrumFormatError(f"{path}: no HDU named {hdu!r}; this file has HDU {listing}")


def _fits_header_facts(header, primary, where: str) -> dict:
    def card(*keys):
        for key in keys:
            for hdr in (header, primary):
                if key in hdr and hdr[key] not in (None, ""):
                    return key, hdr[key]
        return None, None

    ctype = str(header.get("CTYPE1", "") or "").upper()
    medium = "air" if ctype.startswith("AWAV") else "vacuum" if ctype.startswith("WAVE") else None
    key, value = card("EXPTIME", "EXPOSURE", "ITIME")
    exposure = _in_range(value, key, where, low=0.0, what="an exposure time (s)")
    key, value = card("SATURATE", "SATLEVEL")
    saturation = _in_range(value, key, where, low=0.0, what="a saturation level (ADU)")
    _, stamp = card("DATE-OBS", "DATE-BEG")
    return {
        "exposure_time": exposure,
        "saturation": saturation,
        "timestamp": None if stamp is None else str(stamp),
        "medium": medium,
    }


# Spectral CTYPE1 values read as wavelength; the algorithm code after the type may be empty
# (linear) or LOG (FITS WCS Paper III, Greisen et al. 2006, table 2).
_FITS_WAVE_TYPES = {"WAVE", "AWAV", "LAMBDA", "WAVELENGTH", "LINEAR", ""}
_FITS_PIXEL_TYPES = {"PIXEL", "PIX"}


def _fits_spectral_axis(header, n: int, path: Path, where: str):
    """Pixel -> world of FITS axis 1, as the FITS WCS standard defines it.

    Greisen & Calabretta (2002, Paper I): world = CRVAL1 + w with the intermediate
    coordinate w = s (p - CRPIX1), p counted from 1; the scale s is CD1_1 when present
    (it takes precedence over CDELT1 and PC1_1), else CDELT1 x PC1_1 (PC1_1 defaults to 1).
    Greisen et al. (2006, Paper III): with CTYPE1 '<type>-LOG' the world coordinate is
    CRVAL1 exp(w / CRVAL1).  Returns (axis, unit or None, name) or (None, None, None)
    without a world axis.  Anything else (frequency or velocity axes, tabulated or
    non-linear algorithms, the IRAF DC-FLAG=1 log10 convention) is refused.
    """
    if "CRVAL1" not in header:
        return None, None, None
    ctype = str(header.get("CTYPE1", "") or "").strip().upper()
    kind, _, algorithm = ctype.partition("-")
    algorithm = algorithm.strip("-")
    if kind in _FITS_PIXEL_TYPES:
        return None, None, None
    if kind not in _FITS_WAVE_TYPES or algorithm not in ("", "LOG"):
        raise SpectrumFormatError(
            f"{where}: CTYPE1 = {ctype!r} is not supported; ritzline reads wavelength axes "
            "(WAVE, AWAV; linear or -LOG): convert the axis to wavelength first"
        )
    dc_flag = header.get("DC-FLAG")
    if dc_flag not in (None, 0, -1):
        raise SpectrumFormatError(
            f"{where}: DC-FLAG = {dc_flag} (log10 wavelength steps) is not supported; "
            "write the axis as CTYPE1 = 'WAVE-LOG' or as linear wavelengths"
        )
    crval = _float_or_none(header.get("CRVAL1"))
    crpix = _float_or_none(header.get("CRPIX1", 1.0))
    if crval is None or crpix is None:
        raise SpectrumFormatError(f"{where}: CRVAL1 or CRPIX1 is not a finite number")
    if "CD1_1" in header:
        if "CDELT1" in header:
            cd, cdelt = _float_or_none(header["CD1_1"]), _float_or_none(header["CDELT1"])
            if cd is not None and cdelt is not None and not math.isclose(cd, cdelt):
                _warn(f"{where}: CD1_1 = {cd:g} and CDELT1 = {cdelt:g} disagree; CD1_1 is "
                      "used (FITS WCS: CDi_j takes precedence)")
        step = _float_or_none(header["CD1_1"])
    elif "CDELT1" in header:
        step = _float_or_none(header["CDELT1"])
        pc = _float_or_none(header.get("PC1_1", 1.0))
        step = None if step is None or pc is None else step * pc
    else:
        raise SpectrumFormatError(f"{where}: CRVAL1 given but no CDELT1 or CD1_1 (the step)")
    if step is None or step == 0:
        raise SpectrumFormatError(f"{where}: the wavelength step (CD1_1/CDELT1) is zero or "
                                  "not a number")
    w = step * (np.arange(n, dtype=float) + 1.0 - crpix)
    if algorithm == "LOG":
        if crval <= 0:
            raise SpectrumFormatError(f"{where}: CTYPE1 -LOG needs CRVAL1 > 0, got {crval:g}")
        axis = crval * np.exp(w / crval)
    else:
        axis = crval + w
    cunit = str(header.get("CUNIT1", "") or "").strip().lower()
    unit = _UNIT_WORDS.get(cunit, cunit or None)
    if unit is None and kind in ("WAVE", "AWAV"):
        # the standard's default unit of WAVE/AWAV is the metre; files often omit CUNIT1
        # and write nm or Angstrom, so only metre-sized values are taken as metres
        if np.all(np.abs(axis) < 1e-4):
            unit = "m"
        else:
            _warn(f"{where}: CUNIT1 missing (the FITS default for {kind} is metres, which "
                  f"{axis[0]:g} cannot be); the unit is taken from the values' range")
    if np.any(axis <= 0):
        first_bad = int(np.flatnonzero(axis <= 0)[0])
        raise SpectrumFormatError(
            f"{where}: the WCS gives a wavelength of {axis[first_bad]:g} at pixel "
            f"{first_bad + 1} (CRVAL1 {crval:g}, CRPIX1 {crpix:g}, step {step:g}): "
            "wavelengths must be positive; check the sign of the step and CRPIX1"
        )
    name = kind.lower() if kind else "wavelength"
    return axis, unit, name


def _fits_image(hdu, k: int, primary, path: Path) -> _Parsed:
    data = np.asarray(hdu.data, dtype=float)
    if data.ndim != 1:
        squeezed = np.squeeze(data)
        if squeezed.ndim != 1:
            raise SpectrumFormatError(
                f"{path}: HDU {k}: image of shape {data.shape} is not a 1-D spectrum"
            )
        data = squeezed
    header = hdu.header
    where = f"{path}: HDU {k}"
    facts = _fits_header_facts(header, primary, where)
    axis, unit, name = _fits_spectral_axis(header, data.size, path, where)
    return _Parsed(
        axis=axis,
        counts=data,
        axis_name=name,
        axis_unit=unit,
        column=str(header.get("EXTNAME", f"HDU{k}")),
        columns=[str(header.get("EXTNAME", f"HDU{k}"))],
        header_text="",
        fmt="fits-image",
        location=f"HDU {k}",
        **facts,
    )


def _fits_table(hdu, k: int, primary, path: Path, column) -> _Parsed:
    names = list(hdu.columns.names)
    units = [(c.unit or "").strip().lower() for c in hdu.columns]
    if len(names) < 2:
        raise SpectrumFormatError(f"{path}: HDU {k}: table needs an axis and a counts column")
    axis_idx = 0
    for j, name in enumerate(names):
        low = name.lower()
        if _WAVE_NAMES.search(low) or _PIXEL_NAMES.match(low):
            axis_idx = j
            break
    ordered = [names[axis_idx]] + [n for j, n in enumerate(names) if j != axis_idx]
    if column is None:
        flux_like = re.compile(r"(flux|counts?|intensity)")
        preferred = [j for j, n in enumerate(ordered) if j and flux_like.match(n.lower())]
        idx = preferred[0] if preferred else 1
    else:
        idx = _choose_column(column, ordered, offset=1, path=path)
    data = hdu.data
    try:
        axis = np.asarray(data[ordered[0]], dtype=float).ravel()
        counts = np.asarray(data[ordered[idx]], dtype=float).ravel()
    except (TypeError, ValueError) as exc:
        raise SpectrumFormatError(f"{path}: HDU {k}: non-numeric table column ({exc})") from None
    unit = units[axis_idx]
    return _Parsed(
        axis=axis,
        counts=counts,
        axis_name=ordered[0],
        axis_unit=_UNIT_WORDS.get(unit, unit or None) or _unit_from_name(ordered[0]),
        column=ordered[idx],
        columns=ordered[1:],
        header_text="",
        fmt="fits-table",
        location=f"HDU {k}",
        **_fits_header_facts(hdu.header, primary, f"{path}: HDU {k}"),
    )


# ---------------------------------------------------------------------------------------
# validation and the Spectrum

_OWN_META = {
    "source",
    "column",
    "columns",
    "exposure_time",
    "saturation",
    "saturation_source",
    "n_masked",
    "n_saturated",
    "timestamp",
    "axis_kind",
    "medium",
    "format",
    "writer",
}


def _float_or_none(value) -> float | None:
    try:
        out = float(value)
    except (TypeError, ValueError):
        return None
    return out if math.isfinite(out) else None


def _warn(message: str) -> None:
    import warnings

    warnings.warn(RitzlineWarning(message), stacklevel=3)


def _in_range(value, key, where: str, *, low: float, what: str) -> float | None:
    """A metadata number, or None with a warning when it is not a number above ``low``."""
    if value is None:
        return None
    number = _float_or_none(value)
    if number is None or number <= low:
        _warn(f"{where}: {key} = {value!r} is not {what} above {low:g}; ignored")
        return None
    return number


def _resolve_axis_unit(parsed: _Parsed, override: str | None, path: Path) -> str:
    if override is not None:
        key = str(override).strip().lower()
        unit = _UNIT_WORDS.get(key, "angstrom" if key in ("angstroms", "aa") else None)
        if unit is None:
            raise SpectrumFormatError(
                f"{path}: axis_unit {override!r} not understood; use nm, angstrom, um or pixel"
            )
        return unit
    if parsed.axis_unit in _TO_NM or parsed.axis_unit == "pix":
        return parsed.axis_unit
    if parsed.axis_unit:
        raise SpectrumFormatError(
            f"{path}: axis unit {parsed.axis_unit!r} not understood; pass axis_unit= "
            "(nm, angstrom, um or pixel)"
        )
    axis = parsed.axis
    steps = np.diff(axis)
    if np.all(axis == np.rint(axis)) and np.all(np.abs(steps) == 1):
        return "pix"
    named_wave = bool(parsed.axis_name and _WAVE_NAMES.search(parsed.axis_name.lower()))
    lo, hi = float(np.nanmin(axis)), float(np.nanmax(axis))
    if 100.0 <= lo and hi <= 2600.0:
        return "nm"
    if named_wave and 1000.0 <= lo and hi <= 26000.0:
        return "angstrom"
    raise SpectrumFormatError(
        f"{path}: cannot tell the unit of the axis column ({lo:g} to {hi:g}); name it in the "
        "header, e.g. 'wavelength (nm)', or pass axis_unit="
    )


def _header_facts(text: str, path: Path) -> dict:
    facts: dict = {}
    if not text:
        return facts
    m = _EXPOSURE_RE.search(text)
    if m:
        unit = (m.group(1) or m.group(3) or "").lower() or None
        scale = _TIME_UNITS.get(unit)
        if scale is not None:
            value = _in_range(m.group(2), "exposure time", f"{path}: preamble", low=0.0,
                              what="an exposure time")
            facts["exposure_time"] = None if value is None else value * scale
    m = _SATURATION_RE.search(text)
    if m:
        facts["saturation"] = _in_range(m.group(1), "saturation", f"{path}: preamble",
                                        low=0.0, what="a saturation level (ADU)")
    m = _TIMESTAMP_RE.search(text)
    if m:
        facts["timestamp"] = m.group(1).replace(" ", "T", 1)
    m = _MEDIUM_RE.search(text)
    if m and re.search(r"wave|medium|lambda", text, re.IGNORECASE):
        facts["medium"] = "vacuum" if m.group(1).lower().startswith("vac") else "air"
    return facts


def _counts_look(finite: np.ndarray, where: str) -> str | None:
    """Refuse sign-flipped counts, warn about counts that cannot be raw detector counts.

    ritzline finds emission lines as upward peaks over a noise model in ADU: a spectrum
    whose values are mostly negative with its strong features pointing down (a flipped
    sign, an absorption-style export) would give fake lines at the edges of every dip, so
    it is refused.  Counts spanning less than one ADU are scaled or normalised: lines can
    still be found, their significance comes from the scatter, but gain, read noise and
    saturation levels do not apply; recorded in ``meta["counts_note"]`` with a warning.
    """
    if finite.size == 0:
        return None
    med = float(np.median(finite))
    down, up = med - float(finite.min()), float(finite.max()) - med
    if med < 0 and down > 0 and down > 5.0 * up:
        raise SpectrumFormatError(
            f"{where}: the counts are mostly negative (median {med:g}) and their strong "
            "features point down: the spectrum looks sign-flipped or is an absorption "
            "spectrum; ritzline finds emission lines in raw counts: flip the sign first"
        )
    span = float(finite.max() - finite.min())
    if 0 < span <= 1.0 and not np.all(finite == np.rint(finite)):
        note = (f"the counts span only {span:.3g}: they look scaled or normalised, not raw "
                "ADU; line significance comes from the scatter, gain and saturation do not "
                "apply")
        _warn(f"{where}: {note}")
        return note
    return None


def _detect_saturation(counts: np.ndarray) -> float | None:
    """A full-scale ADC value reached by several samples is taken as the saturation level."""
    finite = counts[np.isfinite(counts)]
    if finite.size == 0:
        return None
    peak = float(finite.max())
    if peak in _ADC_FULL_SCALE and np.count_nonzero(finite == peak) >= 3:
        return peak
    return None


_MAX_DETECTOR_PIXELS = 1 << 22


def _detector_pixels(axis, from_file: bool, pixel_origin, where: str):
    """The detector pixel numbers of a pixel axis (0 = first pixel) and what to record.

    Pixel numbers must be whole and not negative once ``pixel_origin`` is subtracted; a
    cropped or gapped axis keeps its numbers (``spectrum_arrays`` puts each sample at its
    pixel), so a solution is always applied at the right detector position.
    """
    origin = 0 if pixel_origin is None else pixel_origin
    if isinstance(origin, bool) or not isinstance(origin, int | np.integer):
        raise SpectrumFormatError(f"{where}: pixel_origin must be an integer, got {origin!r}")
    if not from_file:
        return axis, {"pixel_origin": None, "pixel_range": [0, int(axis.size - 1)],
                      "pixel_gaps": 0}
    if not np.all(axis == np.rint(axis)):
        bad = int(np.flatnonzero(axis != np.rint(axis))[0])
        raise SpectrumFormatError(
            f"{where}: pixel axis value {axis[bad]:g} (data row {bad + 1}) is not a whole "
            "pixel number; if the axis is a wavelength, name its unit (axis_unit=)"
        )
    pixels = axis - origin
    lo, hi = float(pixels.min()), float(pixels.max())
    if lo < 0:
        raise SpectrumFormatError(
            f"{where}: pixel number {lo + origin:g} lies before the first pixel"
            + (f" (pixel_origin {origin})" if origin else "")
            + "; pixels are counted from 0 (pass pixel_origin=1 / --pixel-origin 1 for a "
            "file that counts from 1)"
        )
    if hi >= _MAX_DETECTOR_PIXELS:
        raise SpectrumFormatError(
            f"{where}: pixel number {hi + origin:g} is beyond any detector ritzline handles "
            f"({_MAX_DETECTOR_PIXELS} pixels); is the axis really pixels?"
        )
    gaps = int(hi - lo + 1 - pixels.size)
    return pixels, {"pixel_origin": int(origin), "pixel_range": [int(lo), int(hi)],
                    "pixel_gaps": gaps}


def _build(parsed: _Parsed, path: Path, *, axis_unit, saturation, pixel_origin=None):
    import astropy.units as u
    from specutils import Spectrum

    counts = np.asarray(parsed.counts, dtype=float)
    where = f"{path}: {parsed.location}"
    if counts.size < MIN_SAMPLES:
        raise SpectrumFormatError(
            f"{where}: only {counts.size} samples; a spectrum needs at least {MIN_SAMPLES}"
        )
    finite = np.isfinite(counts)
    if not finite.any():
        raise SpectrumFormatError(f"{where}: column {parsed.column!r} holds no finite values")

    if parsed.axis is None:
        axis = np.arange(counts.size, dtype=float)
        unit = "pix"
        if axis_unit is not None and _resolve_axis_unit(parsed, axis_unit, path) != "pix":
            raise SpectrumFormatError(
                f"{path}: axis_unit={axis_unit!r} given but the file has no axis column"
            )
    else:
        axis = np.asarray(parsed.axis, dtype=float)
        if not np.all(np.isfinite(axis)):
            bad = int(np.flatnonzero(~np.isfinite(axis))[0])
            raise SpectrumFormatError(f"{where}: axis value {bad + 1} is not a finite number")
        steps = np.diff(axis)
        if np.any(steps == 0):
            bad = int(np.flatnonzero(steps == 0)[0])
            raise SpectrumFormatError(
                f"{where}: duplicated axis value {axis[bad]:g} (data rows {bad + 1} and {bad + 2})"
            )
        if not (np.all(steps > 0) or np.all(steps < 0)):
            bad = int(np.flatnonzero(np.sign(steps) != np.sign(steps[0]))[0])
            raise SpectrumFormatError(
                f"{where}: axis is not monotonic (turns at data row {bad + 2}, value "
                f"{axis[bad + 1]:g})"
            )
        unit = _resolve_axis_unit(parsed, axis_unit, path)
        if unit != "pix":
            axis = axis * _TO_NM[unit]
            unit = "nm"
            if np.any(axis <= 0):
                bad = int(np.flatnonzero(axis <= 0)[0])
                raise SpectrumFormatError(
                    f"{where}: wavelength {axis[bad]:g} nm at data row {bad + 1}: wavelengths "
                    "must be positive; check the axis column and its unit"
                )
    pixel_meta = {}
    if unit == "pix":
        axis, pixel_meta = _detector_pixels(axis, parsed.axis is not None, pixel_origin, where)
    elif pixel_origin is not None:
        raise SpectrumFormatError(
            f"{path}: pixel_origin={pixel_origin!r} given but the axis is a wavelength axis"
        )

    counts_note = _counts_look(counts[finite], where)
    mask = ~finite
    if parsed.mask is not None and parsed.mask.shape == mask.shape:
        mask = mask | parsed.mask
    facts = _header_facts(parsed.header_text, path)
    exposure_time = (parsed.exposure_time if parsed.exposure_time is not None
                     else facts.get("exposure_time"))
    if saturation is not None:
        sat, sat_source = float(saturation), "argument"
    elif parsed.saturation is not None or facts.get("saturation") is not None:
        sat = parsed.saturation if parsed.saturation is not None else facts["saturation"]
        sat_source = "file" if sat is not None else None
    else:
        sat = _detect_saturation(counts)
        sat_source = "detected" if sat is not None else None

    meta = dict(parsed.meta or {})
    meta.update(
        source=str(path),
        format=parsed.fmt,
        column=parsed.column,
        columns=list(parsed.columns),
        axis_kind="pixel" if unit == "pix" else "wavelength",
        exposure_time=exposure_time,
        saturation=sat,
        saturation_source=sat_source,
        n_masked=int(mask.sum()),
        n_saturated=int(np.count_nonzero(counts >= sat)) if sat is not None else 0,
        timestamp=parsed.timestamp or facts.get("timestamp"),
        medium=parsed.medium or facts.get("medium"),
        counts_note=counts_note,
        **pixel_meta,
    )
    if sat is not None and np.count_nonzero(counts[finite] >= sat) > 0.5 * finite.sum():
        _warn(f"{where}: saturation level {sat:g} ({sat_source}) is reached by most samples; "
              "ignored (give the right level with --saturation)")
        meta.update(saturation=None, saturation_source=None, n_saturated=0)
    spectral_axis = axis * (u.pix if unit == "pix" else u.nm)
    return Spectrum(spectral_axis=spectral_axis, flux=counts * u.ct, mask=mask, meta=meta)
