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

__all__ = ["atomic_write", "file_sha256", "write_table"]


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


def write_table(table, path: str | os.PathLike, format: str | None = None) -> None:
    """Write an astropy Table atomically; ECSV unless the suffix or ``format`` says otherwise."""
    path = Path(path)
    fmt = format or {".fits": "fits", ".csv": "ascii.csv"}.get(path.suffix.lower(), "ascii.ecsv")
    if fmt == "fits":
        with atomic_write(path, "wb") as fh:
            table.write(fh, format="fits")
    else:
        with atomic_write(path, "w", encoding="utf-8", newline="") as fh:
            table.write(fh, format=fmt)


def file_sha256(path: str | os.PathLike) -> str:
    """Hex SHA-256 of a file, read in 1 MiB chunks (solutions record their input's)."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()
