"""Wavelength calibration against reference lamps, with no initial guess or seeded by an
earlier solution, from one or several exposures of one detector.

Modules by concern: ``inputs`` (detected lines with the uncertainty their shape allows;
every listed line of each exposure's lamps, merged at the resolution), ``search`` (candidate
maps from spacing-ratio votes of quadruplets, and line pairs for sparse lamps), ``fit`` (a
Chebyshev map under a curvature prior, grown additively by posterior odds; the tests it
must pass), ``solve`` (:func:`calibrate`) and ``solution`` (:class:`Solution` and its file).
"""

from .solution import (
    SCHEMA_NAME,
    SCHEMA_VERSION,
    Solution,
    calibrated_spectrum,
    with_input,
    write_calibrated,
)
from .solve import calibrate

__all__ = [
    "SCHEMA_NAME",
    "SCHEMA_VERSION",
    "Solution",
    "calibrate",
    "calibrated_spectrum",
    "with_input",
    "write_calibrated",
]
