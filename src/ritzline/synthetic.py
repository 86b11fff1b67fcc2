"""Synthetic spectra with known truth, for tests, benchmarks and the demo data.

The detector model: each line is a Gaussian line-spread function integrated over every
pixel (pixel ``i`` spans ``[i - 0.5, i + 0.5]``), on a smooth background, observed with
Poisson photon noise (electrons = counts x gain) plus Gaussian read noise, clipped at a
saturation level.  Nothing here is a measurement; it exists so that the other stages can
be checked against a truth they did not see.
"""

from dataclasses import dataclass, field

import numpy as np
from scipy.special import erf

__all__ = ["Instrument", "integrated_gaussians", "observe", "random_instrument"]

_SQRT2 = np.sqrt(2.0)
FWHM_PER_SIGMA = 2.0 * np.sqrt(2.0 * np.log(2.0))


def integrated_gaussians(
    n_pixels: int, centres: np.ndarray, fluxes: np.ndarray, fwhm: float | np.ndarray
) -> np.ndarray:
    """Noise-free counts of Gaussian lines integrated over each pixel.

    Parameters
    ----------
    n_pixels : int
        Detector length.
    centres : array
        Line centres in pixels (0 = centre of the first pixel).
    fluxes : array
        Total counts of each line (the integral over all pixels).
    fwhm : float or array
        Full width at half maximum in pixels, one value or one per line.

    Returns
    -------
    ndarray of shape (n_pixels,)
    """
    centres = np.atleast_1d(np.asarray(centres, float))
    fluxes = np.broadcast_to(np.asarray(fluxes, float), centres.shape)
    sigma = np.broadcast_to(np.asarray(fwhm, float) / FWHM_PER_SIGMA, centres.shape)
    out = np.zeros(n_pixels)
    if centres.size == 0:
        return out
    # Only pixels within 8 sigma of a line contribute; evaluate on those windows.
    half = int(np.ceil(8 * sigma.max())) + 1
    offsets = np.arange(-half, half + 1)
    pix = np.rint(centres)[:, None].astype(int) + offsets[None, :]
    lo = (pix - 0.5 - centres[:, None]) / (_SQRT2 * sigma[:, None])
    hi = (pix + 0.5 - centres[:, None]) / (_SQRT2 * sigma[:, None])
    contrib = 0.5 * fluxes[:, None] * (erf(hi) - erf(lo))
    ok = (pix >= 0) & (pix < n_pixels)
    np.add.at(out, pix[ok], contrib[ok])
    return out


def observe(
    expected: np.ndarray,
    rng: np.random.Generator,
    *,
    gain: float = 1.0,
    read_noise: float = 5.0,
    saturation: float | None = None,
) -> np.ndarray:
    """Draw a noisy observation of ``expected`` counts (ADU).

    Photon noise is Poisson in electrons (``expected * gain``), read noise is Gaussian with
    ``read_noise`` in ADU; values above ``saturation`` are clipped to it.
    """
    electrons = rng.poisson(np.clip(expected, 0, None) * gain)
    counts = electrons / gain + rng.normal(0.0, read_noise, size=np.shape(expected))
    if saturation is not None:
        counts = np.minimum(counts, saturation)
    return counts


@dataclass(frozen=True)
class Instrument:
    """An invented grating spectrometer: pixel -> air wavelength, resolution and detector.

    ``wavelength(p) = sum_k coeffs[k] * x**k`` with ``x = 2 p / (n_pixels - 1) - 1`` (a power
    series in normalised pixel, so a cubic term gives the usual grating nonlinearity).
    """

    n_pixels: int
    coeffs: tuple[float, ...]
    fwhm_px: float = 2.5
    gain: float = 1.0
    read_noise: float = 5.0
    background: float = 100.0
    saturation: float | None = 65535.0
    name: str = "synthetic"
    extra: dict = field(default_factory=dict, compare=False)

    def _x(self, pixels):
        return 2.0 * np.asarray(pixels, float) / (self.n_pixels - 1) - 1.0

    def wavelength(self, pixels) -> np.ndarray:
        """Air wavelength (nm) at pixel positions."""
        return np.polynomial.polynomial.polyval(self._x(pixels), self.coeffs)

    def dispersion(self, pixels) -> np.ndarray:
        """d(lambda)/d(pixel) in nm per pixel."""
        dcoef = np.polynomial.polynomial.polyder(self.coeffs)
        return np.polynomial.polynomial.polyval(self._x(pixels), dcoef) * 2.0 / (self.n_pixels - 1)

    def pixel(self, wavelengths) -> np.ndarray:
        """Pixel position of air wavelengths (inverse of :meth:`wavelength`, by Newton steps)."""
        wl = np.asarray(wavelengths, float)
        grid = np.linspace(-0.5, self.n_pixels - 0.5, 4 * self.n_pixels)
        wgrid = self.wavelength(grid)
        order = np.argsort(wgrid)
        p = np.interp(wl, wgrid[order], grid[order])
        for _ in range(4):
            p = p - (self.wavelength(p) - wl) / self.dispersion(p)
        return p

    def render(
        self,
        wavelengths,
        fluxes,
        rng: np.random.Generator,
        *,
        continuum: np.ndarray | None = None,
    ) -> np.ndarray:
        """A noisy exposure of lines at air ``wavelengths`` (nm) with total ``fluxes`` (counts)."""
        wl = np.asarray(wavelengths, float)
        centres = self.pixel(wl)
        inside = (centres > -5 * self.fwhm_px) & (centres < self.n_pixels + 5 * self.fwhm_px)
        expected = integrated_gaussians(
            self.n_pixels, centres[inside], np.asarray(fluxes, float)[inside], self.fwhm_px
        )
        expected = expected + self.background
        if continuum is not None:
            expected = expected + continuum
        return observe(
            expected, rng, gain=self.gain, read_noise=self.read_noise, saturation=self.saturation
        )


def random_instrument(
    rng: np.random.Generator,
    *,
    n_pixels: tuple[int, int] = (1024, 4096),
    span_nm: tuple[float, float] = (60.0, 900.0),
    limits_nm: tuple[float, float] = (200.0, 1100.0),
    fwhm_px: tuple[float, float] = (1.5, 6.0),
    cubic: float = 0.01,
    reversed_probability: float = 0.5,
) -> Instrument:
    """Draw a random spectrometer: length, span, centre, nonlinearity, direction, LSF width.

    ``cubic`` bounds the quadratic and cubic terms as a fraction of the half-span.
    """
    n = int(rng.integers(n_pixels[0], n_pixels[1] + 1))
    span = float(rng.uniform(*span_nm))
    span = min(span, limits_nm[1] - limits_nm[0])
    centre = float(rng.uniform(limits_nm[0] + span / 2, limits_nm[1] - span / 2))
    half = span / 2
    c2, c3 = rng.uniform(-cubic, cubic, size=2) * half
    sign = -1.0 if rng.random() < reversed_probability else 1.0
    # Keep the end points inside the limits after the nonlinear terms.
    coeffs = tuple(float(c) for c in (centre - c2, sign * (half - c3), c2, sign * c3))
    return Instrument(
        n_pixels=n,
        coeffs=coeffs,
        fwhm_px=float(rng.uniform(*fwhm_px)),
        gain=float(rng.uniform(0.5, 4.0)),
        read_noise=float(rng.uniform(2.0, 12.0)),
        background=float(rng.uniform(20.0, 500.0)),
        saturation=65535.0,
    )
