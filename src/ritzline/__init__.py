"""ritzline: spectrometer line identification.

Calibrate a spectrometer against a reference lamp, find emission lines with honest
uncertainties, identify the atomic transitions behind them from Ritz wavelengths, and
batch-check exposures.  The public names below are imported lazily so that
``import ritzline`` stays fast; heavy dependencies load on first use.
"""

from importlib import import_module
from typing import TYPE_CHECKING, Any

from .errors import (
    CalibrationError,
    RitzlineError,
    RitzlineWarning,
    SolutionFormatError,
    SpectrumFormatError,
)

__version__ = "0.1.0"

_LAZY = {
    "read_spectrum": "spectrum",
    "find_lines": "peaks",
    "transitions": "levels",
    "blends": "levels",
    "calibrate": "calibration",
    "Solution": "calibration",
    "identify_lines": "identify",
    "Identification": "identify",
    "check_exposures": "check",
}

__all__ = [
    "CalibrationError",
    "RitzlineError",
    "RitzlineWarning",
    "SolutionFormatError",
    "SpectrumFormatError",
    "__version__",
    *sorted(_LAZY),
]

if TYPE_CHECKING:  # pragma: no cover
    from .calibration import Solution, calibrate  # noqa: F401
    from .check import check_exposures  # noqa: F401
    from .identify import Identification, identify_lines  # noqa: F401
    from .levels import blends, transitions  # noqa: F401
    from .peaks import find_lines  # noqa: F401
    from .spectrum import read_spectrum  # noqa: F401


def __getattr__(name: str) -> Any:
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module 'ritzline' has no attribute {name!r}")
    value = getattr(import_module(f".{module}", __name__), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_LAZY))
