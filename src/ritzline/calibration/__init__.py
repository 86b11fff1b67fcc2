"""Wavelength calibration against reference lamps, with no initial guess or seeded by an
earlier solution, from one or several exposures of one detector.

How lamp exposures are solved
-----------------------------
1. ``inputs``: lines are found (``peaks.find_lines``); each keeps the centroid error it was
   given, widened when the line is broader than the LSF around it (an unresolved blend).
   Every listed line of each exposure's lamps takes part: lines closer than a fraction of
   the resolution become one feature at their intensity-weighted centroid, flagged list
   entries get a larger reference uncertainty.
2. ``search``: spacing ratios of line quadruplets vote for (direction, dispersion, central
   wavelength); for lamps with few lines, every pair of strong detections against every
   pair of listed lines proposes a linear map as well.  Both count the candidate maps they
   examined.
3. ``fit``: from each start, a Chebyshev map under a curvature prior grows additively:
   a detection joins when its nearest plausible listed line lies inside the window the
   map's own uncertainty gives and every other one is clearly worse; a matched line leaves
   only when the map through the others rejects it.  The outermost lines are then tested
   jointly against the map of the rest.
4. Trust: the chance that a list of the same density fits this well by accident, over
   every candidate map examined and with strong listed lines that fall on empty detector
   counted against, must be below ``CONFIDENT_P``; the residuals must agree with the
   measured centroid errors.  Otherwise :class:`~ritzline.errors.CalibrationError`.

The :class:`Solution` and its JSON file are described in ``solution``.
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
