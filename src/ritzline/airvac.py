"""Refractive index of standard air and the conversion between air and vacuum wavelengths.

Published air wavelengths from 200 to 2000 nm refer to dry standard air (15 °C, 101 325 Pa,
0.03 % CO₂); the dispersion formula used for them is that of Peck & Reeder (1972).  Below
200 nm wavelengths are quoted in vacuum by the usual convention, so both conversions leave
lines whose *vacuum* wavelength is below :data:`AIR_MIN_NM` unchanged (air wavelengths
from 199.935 nm up are converted, which keeps the two functions exact inverses).
"""

import numpy as np

__all__ = ["AIR_MIN_NM", "air_to_vacuum", "refractive_index", "vacuum_to_air"]

#: Below this wavelength (nm) published wavelengths are vacuum values: air = vacuum.
AIR_MIN_NM = 200.0

# Peck & Reeder, J. Opt. Soc. Am. 62, 958 (1972), eq. (2), sigma in µm⁻¹:
# (n - 1)·1e8 = 8060.51 + 2480990/(132.274 - σ²) + 17455.7/(39.32957 - σ²)
_PR_A = 8060.51
_PR_B = 2480990.0
_PR_C = 132.274
_PR_D = 17455.7
_PR_E = 39.32957

_TOLERANCE_NM = 1e-9
_MAX_ITERATIONS = 20


def _as_nm(wavelength) -> np.ndarray:
    """Float64 array in nm from an array-like (taken as nm) or an astropy Quantity."""
    if hasattr(wavelength, "unit"):
        import astropy.units as u

        wavelength = wavelength.to_value(u.nm, equivalencies=u.spectral())
    return np.asarray(wavelength, dtype=np.float64)


def refractive_index(vacuum_nm) -> np.ndarray:
    """Refractive index of standard air at a vacuum wavelength (Peck & Reeder 1972).

    Parameters
    ----------
    vacuum_nm : array_like or Quantity
        Vacuum wavelength, nm.

    Returns
    -------
    numpy.ndarray
        n(λ); exactly 1 below :data:`AIR_MIN_NM` (vacuum convention).
    """
    lam = _as_nm(vacuum_nm)
    return np.where(lam >= AIR_MIN_NM, _peck_reeder(lam), 1.0)


def _peck_reeder(vacuum_nm: np.ndarray) -> np.ndarray:
    """The dispersion formula itself (used unclamped near the 200 nm boundary)."""
    lam = np.maximum(vacuum_nm, 185.0)  # below its range, hold the formula's value
    sigma2 = (1e3 / lam) ** 2  # µm⁻²
    return 1.0 + 1e-8 * (_PR_A + _PR_B / (_PR_C - sigma2) + _PR_D / (_PR_E - sigma2))


def vacuum_to_air(vacuum_nm) -> np.ndarray | float:
    """Convert vacuum wavelengths (nm) to standard-air wavelengths (nm).

    Parameters
    ----------
    vacuum_nm : array_like or Quantity
        Vacuum wavelength(s), nm (a Quantity may be in any spectral unit).

    Returns
    -------
    numpy.ndarray or float
        λ_air = λ_vac / n(λ_vac); vacuum values below 200 nm are returned unchanged.

    Examples
    --------
    >>> round(float(vacuum_to_air(656.4614)), 4)
    656.2801
    """
    lam = _as_nm(vacuum_nm)
    out = lam / refractive_index(lam)
    return out if out.ndim else float(out)


def air_to_vacuum(air_nm) -> np.ndarray | float:
    """Convert standard-air wavelengths (nm) to vacuum wavelengths (nm).

    Solves λ_vac = λ_air · n(λ_vac) by fixed-point iteration until every element changes
    by less than 1e-9 nm (the round trip through :func:`vacuum_to_air` then agrees to
    better than 1e-6 nm).  Values whose vacuum wavelength would be below 200 nm are
    returned unchanged.

    Parameters
    ----------
    air_nm : array_like or Quantity
        Air wavelength(s), nm.

    Returns
    -------
    numpy.ndarray or float
        Vacuum wavelength(s), nm.
    """
    air = _as_nm(air_nm)
    vac = air * _peck_reeder(air)
    for _ in range(_MAX_ITERATIONS):
        new = air * _peck_reeder(vac)
        done = not np.any(np.abs(new - vac) >= _TOLERANCE_NM)  # NaN counts as done
        vac = new
        if done:
            break
    # the 200 nm convention refers to the vacuum wavelength, as in vacuum_to_air, so the
    # two conversions are exact inverses on both sides of the boundary
    vac = np.where(vac >= AIR_MIN_NM, vac, air)
    return vac if vac.ndim else float(vac)
