"""Locate the data shipped with ritzline (line lists, lamp definitions, demo data).

In a built wheel the top-level ``line_lists/`` and ``calibration/`` folders and
``examples/data/`` are mapped to ``ritzline/_data/`` (the last as ``examples``); in an
editable install or a source checkout they stay where they are in the project.
Every reader goes through :func:`data_path` so both layouts work.
"""

from functools import cache
from pathlib import Path

__all__ = ["data_path"]

_FOLDERS = {"line_lists": "line_lists", "calibration": "calibration", "examples": "examples/data"}


@cache
def _root(folder: str) -> Path:
    if folder not in _FOLDERS:
        raise ValueError(f"unknown data folder {folder!r}; expected one of {sorted(_FOLDERS)}")
    package = Path(__file__).resolve().parent
    for candidate in (package / "_data" / folder, package.parents[1] / _FOLDERS[folder]):
        if candidate.is_dir():
            return candidate
    raise FileNotFoundError(
        f"ritzline data folder {folder!r} not found next to the package or at the project "
        "root; reinstall ritzline"
    )


def data_path(folder: str, *parts: str) -> Path:
    """Return the path of a shipped data file, e.g. ``data_path("line_lists", "Ne_I.lines.ecsv")``.

    Parameters
    ----------
    folder : {"line_lists", "calibration", "examples"}
        Top-level data folder.
    *parts : str
        Path components inside that folder.
    """
    return _root(folder).joinpath(*parts)
