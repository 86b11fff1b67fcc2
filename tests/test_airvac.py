"""Air ↔ vacuum conversion against an independent implementation and published values."""

import astropy.units as u
import numpy as np
import pytest
from specutils.utils.wcs_utils import air_to_vac, vac_to_air

from ritzline.airvac import AIR_MIN_NM, air_to_vacuum, refractive_index, vacuum_to_air

GRID = np.linspace(200.0, 1100.0, 1801)


def test_vacuum_to_air_matches_specutils_morton2000_within_0p001_nm():
    # independent implementation: specutils vac_to_air, Morton (2000, ApJS 130, 403) eq. 8
    reference = vac_to_air(GRID * u.nm, method="Morton2000").to_value(u.nm)
    assert np.max(np.abs(vacuum_to_air(GRID) - reference)) < 0.001


def test_air_to_vacuum_matches_specutils_morton2000_within_0p001_nm():
    # independent implementation: specutils air_to_vac, Morton (2000) method
    reference = air_to_vac(GRID * u.nm, method="Morton2000").to_value(u.nm)
    assert np.max(np.abs(air_to_vacuum(GRID) - reference)) < 0.001


def test_round_trip_air_vacuum_air_within_1e_6_nm():
    assert np.max(np.abs(vacuum_to_air(air_to_vacuum(GRID)) - GRID)) < 1e-6
    assert np.max(np.abs(air_to_vacuum(vacuum_to_air(GRID)) - GRID)) < 1e-6


def test_refractive_index_of_standard_air_at_helium_neon_line():
    # n − 1 = 2.7652e-4 for standard air at 632.99 nm (vacuum), Peck & Reeder 1972 (memory)
    assert float(refractive_index(632.99)) - 1 == pytest.approx(2.7652e-4, abs=2e-8)


def test_sodium_d2_vacuum_wavelength_converts_to_published_air_wavelength():
    # Na D2: 589.1583 nm vacuum (memory), 588.9950 nm air (Na I line-list header: confirmed)
    assert vacuum_to_air(589.1583) == pytest.approx(588.9950, abs=2e-4)


def test_wavelengths_below_200_nm_are_left_unchanged():
    # below 200 nm wavelengths are quoted in vacuum by convention (common practice)
    vuv = np.array([121.567, 184.9499, AIR_MIN_NM - 0.07])
    np.testing.assert_array_equal(vacuum_to_air(vuv), vuv)
    np.testing.assert_array_equal(air_to_vacuum(vuv), vuv)


def test_conversions_are_vectorised_and_keep_shape():
    grid = GRID[:1800].reshape(3, -1)
    assert vacuum_to_air(grid).shape == grid.shape
    assert air_to_vacuum(grid).shape == grid.shape


def test_scalar_in_gives_float_out():
    assert isinstance(vacuum_to_air(500.0), float)
    assert isinstance(air_to_vacuum(500.0), float)


def test_quantity_input_is_converted_to_nm():
    assert vacuum_to_air(5000.0 * u.AA) == pytest.approx(vacuum_to_air(500.0), abs=1e-12)


def test_air_wavelength_is_shorter_than_vacuum_wavelength():
    assert np.all(vacuum_to_air(GRID) < GRID)
