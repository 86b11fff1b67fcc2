"""The exception hierarchy of ritzline: one base class, one subclass per kind of failure.

Messages name the file (or object) concerned, the cause, and what to do about it.
"""

__all__ = [
    "CalibrationError",
    "RitzlineError",
    "RitzlineWarning",
    "SolutionFormatError",
    "SpectrumFormatError",
]


class RitzlineError(Exception):
    """Base class of every error ritzline raises on purpose."""


class SpectrumFormatError(RitzlineError):
    """A spectrum file (or array) cannot be read or is not a usable spectrum."""


class SolutionFormatError(RitzlineError):
    """A wavelength-solution file is missing, malformed or of an unknown schema version."""


class CalibrationError(RitzlineError):
    """No trustworthy wavelength solution could be found for a lamp exposure."""


class RitzlineWarning(UserWarning):
    """Something was read or computed but deserves a look; the message starts with the file
    (or object) and the place, as ``<file>: <where>: <what>``.  The command line prints it
    as one ``warning:`` line."""
