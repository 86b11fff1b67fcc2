"""Small file-writing helpers shared by every stage that writes: atomic writes only.

A file is written to a temporary name in the destination folder, flushed to disk, then
renamed over the destination, so a crash or Ctrl-C never leaves a half-written file.
"""

import contextlib
import hashlib
import os
import tempfile
from collections.abc import Iterator
from pathlib import Path
from typing import IO

__all__ = ["atomic_write", "file_sha256", "read_table", "table_format", "write_table"]


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


@contextlib.contextmanager
def atomic_write(path: str | os.PathLike, mode: str = "w", **open_kw) -> Iterator[IO]:
    """Open a temporary file next to ``path``; on clean exit rename it over ``path``.

    On an exception the temporary file is removed and ``path`` is left as it was.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        # mkstemp makes the file private (0600); give it the permissions a plain open would.
        os.chmod(tmp, 0o666 & ~_umask())
        with os.fdopen(fd, mode, **open_kw) as fh:
            yield fh
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise


_TABLE_FORMATS = {
    ".ecsv": "ascii.ecsv",
    ".csv": "ascii.csv",
    ".fits": "fits",
    ".fit": "fits",
}


def table_format(path: str | os.PathLike) -> str:
    """The astropy format ritzline writes a table in, from the file's suffix.

    ``.ecsv`` (units and provenance kept), ``.csv`` (plain comma-separated values for a
    spreadsheet; units and meta are not kept) or ``.fits``/``.fit``; any other suffix is
    refused rather than silently written in another format.
    """
    from .errors import RitzlineError

    suffix = Path(path).suffix.lower()
    if suffix not in _TABLE_FORMATS:
        raise RitzlineError(
            f"{path}: tables are written as .ecsv, .csv or .fits; {suffix or 'no suffix'} "
            "is not one of them"
        )
    return _TABLE_FORMATS[suffix]


def write_table(table, path: str | os.PathLike, format: str | None = None) -> None:
    """Write an astropy Table atomically, in the format its suffix names (see
    :func:`table_format`) unless ``format`` is given."""
    path = Path(path)
    fmt = format or table_format(path)
    if fmt == "fits":
        with atomic_write(path, "wb") as fh:
            table.write(fh, format="fits")
    else:
        if fmt == "ascii.csv":  # spreadsheets and ritzline's text reader read 0/1, not True
            table = table.copy(copy_data=False)
            for name in table.colnames:
                if table[name].dtype == bool:
                    table[name] = table[name].astype("u1")
        with atomic_write(path, "w", encoding="utf-8", newline="") as fh:
            table.write(fh, format=fmt)


def read_table(path: str | os.PathLike):
    """Read back a table ritzline wrote (ECSV, CSV or FITS) as an astropy Table.

    Raises RitzlineError naming the file when it cannot be read.
    """
    import warnings

    from astropy.table import Table

    from .errors import RitzlineError

    path = Path(path)
    fmt = table_format(path)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            return Table.read(path, format=fmt)
    except FileNotFoundError:
        raise RitzlineError(f"{path}: no such file") from None
    except Exception as exc:  # astropy raises many types for a damaged table
        raise RitzlineError(f"{path}: not a readable {fmt} table ({exc})") from None


def file_sha256(path: str | os.PathLike) -> str:
    """Hex SHA-256 of a file, read in 1 MiB chunks (solutions record their input's)."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()
