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

from .errors import SpectrumFormatError

__all__ = [
    "MIN_SAMPLES",
    "SpectrumArrays",
    "read_spectrum",
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


# ---------------------------------------------------------------------------------------
# public reader


def read_spectrum(
    path: str | os.PathLike,
    *,
    column: str | int | None = None,
    axis_unit: str | None = None,
    saturation: float | None = None,
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
        reach in several samples.

    Returns
    -------
    specutils.Spectrum
        Flux in ``u.ct``; spectral axis in ``u.pix`` or ``u.nm``; ``mask`` True where a sample
        is NaN/inf (kept, counted, never dropped).  ``meta``: ``source``, ``column``,
        ``columns`` (all counts columns), ``exposure_time`` (s or None), ``saturation``,
        ``saturation_source``, ``n_masked``, ``n_saturated``, ``timestamp``, ``axis_kind``
        (``"pixel"`` or ``"wavelength"``), ``medium`` (``"air"``, ``"vacuum"`` or None),
        ``format``.

    Raises
    ------
    SpectrumFormatError
        For a missing, empty, binary or malformed file, fewer than 16 samples, an axis that
        is not strictly monotonic, or data that are all NaN.  The message names the file,
        the line or HDU, and the cause.
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

    if raw.startswith(b"SIMPLE  =") or path.suffix.lower() in {".fits", ".fit", ".fts"}:
        parsed = _parse_fits(raw, path, column)
    else:
        text = _decode(raw, path)
        if text.lstrip().startswith("# %ECSV"):
            parsed = _parse_ecsv(text, path, column)
        else:
            parsed = _parse_text(text, path, column)

    return _build(parsed, path, axis_unit=axis_unit, saturation=saturation)


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

    header_names = None
    for j in range(start - 1, -1, -1):
        candidate = lines[j].strip()
        if not candidate:
            continue
        names = _split(candidate.lstrip("#%").strip(), delim)
        if len(names) == n_fields and not any(_is_number(n) for n in names):
            header_names = names
        break
    preamble = "\n".join(lines[:start])

    block = lines[start:]
    data = _fast_block(block, delim, decimal_comma, n_fields)
    if data is None:
        data = _slow_block(block, delim, decimal_comma, n_fields, path, first_line=start + 1)

    names = header_names or (
        ["counts"] if n_fields == 1 else ["axis"] + [f"counts_{k}" for k in range(1, n_fields)]
    )
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
    )


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


def _parse_fits(raw: bytes, path: Path, column) -> _Parsed:
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
    for k, hdu in enumerate(hdus):
        try:
            data = hdu.data
        except Exception as exc:
            raise SpectrumFormatError(f"{path}: HDU {k}: data cannot be read ({exc})") from None
        if data is None:
            continue
        if isinstance(hdu, fits.BinTableHDU | fits.TableHDU):
            return _fits_table(hdu, k, primary, path, column)
        if isinstance(hdu, fits.PrimaryHDU | fits.ImageHDU):
            return _fits_image(hdu, k, primary, path)
    raise SpectrumFormatError(f"{path}: no HDU holds data")


def _fits_header_facts(header, primary) -> dict:
    def card(*keys):
        for key in keys:
            for hdr in (header, primary):
                if key in hdr and hdr[key] not in (None, ""):
                    return hdr[key]
        return None

    ctype = str(card("CTYPE1") or "").upper()
    medium = "air" if ctype.startswith("AWAV") else "vacuum" if ctype.startswith("WAVE") else None
    return {
        "exposure_time": _float_or_none(card("EXPTIME", "EXPOSURE", "ITIME")),
        "saturation": _float_or_none(card("SATURATE", "SATLEVEL")),
        "timestamp": card("DATE-OBS", "DATE-BEG"),
        "medium": medium,
    }


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
    facts = _fits_header_facts(header, primary)
    if "CRVAL1" in header:
        delta = header.get("CDELT1", header.get("CD1_1"))
        if delta is None:
            raise SpectrumFormatError(f"{path}: HDU {k}: CRVAL1 given but no CDELT1 or CD1_1")
        crpix = float(header.get("CRPIX1", 1.0))
        axis = float(header["CRVAL1"]) + (np.arange(data.size) + 1.0 - crpix) * float(delta)
        cunit = str(header.get("CUNIT1", "")).strip().lower()
        unit = _UNIT_WORDS.get(cunit, cunit or None)
        name = str(header.get("CTYPE1", "wavelength")).strip() or "wavelength"
    else:
        axis, unit, name = None, None, None
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
        **_fits_header_facts(hdu.header, primary),
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


def _header_facts(text: str) -> dict:
    facts: dict = {}
    if not text:
        return facts
    m = _EXPOSURE_RE.search(text)
    if m:
        unit = (m.group(1) or m.group(3) or "").lower() or None
        scale = _TIME_UNITS.get(unit)
        if scale is not None:
            facts["exposure_time"] = float(m.group(2)) * scale
    m = _SATURATION_RE.search(text)
    if m:
        facts["saturation"] = float(m.group(1))
    m = _TIMESTAMP_RE.search(text)
    if m:
        facts["timestamp"] = m.group(1).replace(" ", "T", 1)
    m = _MEDIUM_RE.search(text)
    if m and re.search(r"wave|medium|lambda", text, re.IGNORECASE):
        facts["medium"] = "vacuum" if m.group(1).lower().startswith("vac") else "air"
    return facts


def _detect_saturation(counts: np.ndarray) -> float | None:
    """A full-scale ADC value reached by several samples is taken as the saturation level."""
    finite = counts[np.isfinite(counts)]
    if finite.size == 0:
        return None
    peak = float(finite.max())
    if peak in _ADC_FULL_SCALE and np.count_nonzero(finite == peak) >= 3:
        return peak
    return None


def _build(parsed: _Parsed, path: Path, *, axis_unit, saturation):
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

    mask = ~finite
    if parsed.mask is not None and parsed.mask.shape == mask.shape:
        mask = mask | parsed.mask
    facts = _header_facts(parsed.header_text)
    exposure_time = parsed.exposure_time or facts.get("exposure_time")
    if saturation is not None:
        sat, sat_source = float(saturation), "argument"
    elif parsed.saturation is not None or "saturation" in facts:
        sat, sat_source = parsed.saturation or facts["saturation"], "file"
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
    )
    spectral_axis = axis * (u.pix if unit == "pix" else u.nm)
    return Spectrum(spectral_axis=spectral_axis, flux=counts * u.ct, mask=mask, meta=meta)
