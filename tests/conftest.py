"""Shared fixtures: small synthetic spectra written in each supported format."""

import numpy as np
import pytest


@pytest.fixture
def rng():
    return np.random.default_rng(20261201)


@pytest.fixture
def counts(rng):
    """A 256-sample spectrum: flat background, two lines, Poisson-like noise."""
    x = np.arange(256.0)
    model = 120 + 4000 * np.exp(-0.5 * ((x - 80.3) / 1.4) ** 2) + 900 * np.exp(
        -0.5 * ((x - 170.8) / 1.4) ** 2
    )
    return np.round(rng.normal(model, np.sqrt(model)), 2)
