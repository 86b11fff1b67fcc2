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

__all__ = [
    "Instrument",
    "LampTruth",
    "integrated_gaussians",
    "lamp_exposure",
    "observe",
    "random_instrument",
]

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


# ---- lamp exposures (calibration tests, benchmarks, drift sequences, demo) --------------


@dataclass(frozen=True)
class LampTruth:
    """What :func:`lamp_exposure` rendered, for checking a calibration against it.

    Arrays with one entry per listed lamp line that fell on the detector and was rendered
    (``missing`` lines are not among them): ``wavelength`` (air nm), ``pixel``, ``flux``
    (counts), ``snr`` (matched-filter signal-to-noise expected for the line alone),
    ``saturated`` (peak above the saturation level), ``resolved`` (no other rendered line,
    listed or extra, within 1.5 FWHM), ``usable`` (listed as usable for calibration,
    resolved, unsaturated, SNR >= 10, at least one FWHM inside the detector) and
    ``index`` (row in the input list).  ``missing_index`` lists the rows on the detector that
    were left out; ``extra_pixel``/``extra_flux`` the unlisted lines added; ``spike_pixel``
    the single-pixel hits.
    """

    instrument: Instrument
    wavelength: np.ndarray
    pixel: np.ndarray
    flux: np.ndarray
    snr: np.ndarray
    saturated: np.ndarray
    resolved: np.ndarray
    usable: np.ndarray
    index: np.ndarray
    missing_index: np.ndarray
    extra_pixel: np.ndarray
    extra_flux: np.ndarray
    spike_pixel: np.ndarray

    def wavelength_at(self, pixels) -> np.ndarray:
        """True air wavelength (nm) at pixel positions."""
        return self.instrument.wavelength(pixels)

    @property
    def n_usable(self) -> int:
        return int(np.count_nonzero(self.usable))


def _lamp_reference(lamp) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(wavelength nm, intensity, listed as usable) of a lamp: a name / names for
    ``levels.lamp_lines``, or anything with ``wavelength`` and ``intensity`` columns
    (intensity may be NaN; an optional ``usable`` column)."""
    if isinstance(lamp, str) or (
        isinstance(lamp, (tuple, list)) and lamp and all(isinstance(s, str) for s in lamp)
    ):
        from . import levels

        names = [lamp] if isinstance(lamp, str) else list(lamp)
        tables = [levels.lamp_lines(name, medium="air") for name in names]
    else:
        tables = [lamp]
    wl = np.concatenate([np.asarray(t["wavelength"], float) for t in tables])
    inten = np.concatenate([np.asarray(t["intensity"], float) for t in tables])
    usable = np.concatenate([
        np.asarray(t["usable"], bool) if "usable" in _names(t) else np.ones(len(t["wavelength"]),
                                                                            bool)
        for t in tables
    ])
    return wl, inten, usable


def _names(table) -> list[str]:
    return list(getattr(table, "colnames", None) or table.keys())


def lamp_exposure(
    instrument: Instrument,
    lamp,
    rng: np.random.Generator,
    *,
    missing: tuple[float, float] = (0.1, 0.3),
    extra: tuple[float, float] = (0.0, 0.3),
    saturate: tuple[float, float] = (0.0, 0.1),
    spikes: tuple[int, int] = (0, 5),
    intensity_scatter: float = 0.7,
    dynamic_range: float = 3000.0,
) -> tuple[np.ndarray, LampTruth]:
    """A noisy reference-lamp exposure with everything a real one gets wrong.

    Parameters
    ----------
    instrument : Instrument
        The spectrometer (true pixel -> air wavelength mapping, LSF, detector noise).
    lamp : str, sequence of str, or table
        Lamp name(s) understood by ``ritzline.levels.lamp_lines`` (every listed line is
        rendered, as a real lamp emits them all; only those listed as usable can count as
        usable in the truth), or any table/mapping with ``wavelength`` (air nm) and
        ``intensity`` columns (and optionally ``usable``); NaN intensities get the list's
        median.
    rng : numpy.random.Generator
        The only source of randomness.
    missing : (low, high)
        Fraction of the listed lines on the detector left out, drawn uniformly.
    extra : (low, high)
        Unlisted lines (impurities, ghosts) added, as a fraction of the rendered listed lines,
        at random positions with fluxes drawn from the same distribution.
    saturate : (low, high)
        Fraction of the rendered lines whose peak exceeds the saturation level.
    spikes : (low, high)
        Number of single-pixel cosmic-ray hits, inclusive range.
    intensity_scatter : float
        Log-normal scatter (natural-log sigma) of the line fluxes about the listed relative
        intensities: lamps never match the tables.
    dynamic_range : float
        Listed intensities are clipped to this ratio below the brightest.

    Returns
    -------
    counts : ndarray of shape (n_pixels,)
        ADU, noisy, clipped at ``instrument.saturation``.
    truth : LampTruth
    """
    wl_all, inten_all, listed_usable = _lamp_reference(lamp)
    n = instrument.n_pixels
    fwhm = instrument.fwhm_px
    sigma = fwhm / FWHM_PER_SIGMA
    pix_all = instrument.pixel(wl_all)
    # far outside the detector the inverse can land on another branch of the polynomial
    lo_nm, hi_nm = np.sort(instrument.wavelength([-3 * fwhm, n - 1 + 3 * fwhm]))
    genuine = (wl_all >= lo_nm) & (wl_all <= hi_nm)
    on = np.flatnonzero(genuine & (pix_all > -3 * fwhm) & (pix_all < n - 1 + 3 * fwhm))
    n_drop = round(rng.uniform(*missing) * on.size)
    drop = np.sort(rng.choice(on, size=n_drop, replace=False)) if n_drop else on[:0]
    keep = np.setdiff1d(on, drop)

    inten = inten_all.copy()
    finite = np.isfinite(inten) & (inten > 0)
    fill = np.median(inten[finite]) if finite.any() else 1.0
    inten = np.where(finite, inten, fill)
    inten = np.clip(inten / inten.max(), 1.0 / dynamic_range, None)
    rel = inten[keep] * np.exp(rng.normal(0.0, intensity_scatter, keep.size))

    n_extra = round(rng.uniform(*extra) * keep.size)
    extra_pix = rng.uniform(0, n - 1, n_extra)
    extra_rel = rng.choice(rel, size=n_extra) if rel.size and n_extra else np.zeros(n_extra)

    # Scale fluxes so the requested fraction of lines saturates (peak = flux x peak_frac).
    peak_frac = 1.0 / (sigma * np.sqrt(2 * np.pi))
    all_rel = np.concatenate([rel, extra_rel])
    sat = instrument.saturation if instrument.saturation is not None else 65535.0
    headroom = sat - instrument.background
    n_sat = round(rng.uniform(*saturate) * all_rel.size)
    ranked = np.sort(all_rel)[::-1]
    if all_rel.size == 0:
        scale = 1.0
    elif n_sat > 0:
        # the n_sat-th brightest line peaks just above saturation, the next one below
        lo = ranked[n_sat] if n_sat < ranked.size else 0.0
        target_rel = np.sqrt(ranked[n_sat - 1] * max(lo, ranked[n_sat - 1] * 0.5))
        scale = headroom / (target_rel * peak_frac)
    else:
        scale = rng.uniform(0.3, 0.9) * headroom / (ranked[0] * peak_frac)
    flux = rel * scale
    extra_flux = extra_rel * scale

    centres = np.concatenate([pix_all[keep], extra_pix])
    fluxes = np.concatenate([flux, extra_flux])
    expected = integrated_gaussians(n, centres, fluxes, fwhm) + instrument.background
    counts = observe(expected, rng, gain=instrument.gain, read_noise=instrument.read_noise)
    n_spikes = int(rng.integers(spikes[0], spikes[1] + 1))
    spike_pix = np.sort(rng.choice(n, size=n_spikes, replace=False)) if n_spikes else np.zeros(0)
    if n_spikes:
        counts[spike_pix.astype(int)] += rng.uniform(0.05, 1.0, n_spikes) * headroom
    if instrument.saturation is not None:
        counts = np.minimum(counts, instrument.saturation)

    # Expected matched-filter SNR of each line on its own (background + read noise + shot).
    var_bg = instrument.background / instrument.gain + instrument.read_noise**2
    n_eff = 2.0 * np.sqrt(np.pi) * sigma
    snr = flux / np.sqrt(n_eff * var_bg + flux / instrument.gain)
    saturated = flux * peak_frac + instrument.background > sat
    order = np.argsort(centres)
    gaps = np.diff(centres[order])
    near = np.full(centres.size, np.inf)
    near_sorted = np.minimum(np.r_[np.inf, gaps], np.r_[gaps, np.inf])
    near[order] = near_sorted
    resolved = near[: keep.size] >= 1.5 * fwhm
    # a line cut by the end of the detector gives no honest centroid
    inside = (pix_all[keep] >= fwhm) & (pix_all[keep] <= n - 1 - fwhm)
    usable = resolved & ~saturated & (snr >= 10.0) & inside & listed_usable[keep]
    truth = LampTruth(
        instrument=instrument,
        wavelength=wl_all[keep],
        pixel=pix_all[keep],
        flux=flux,
        snr=snr,
        saturated=saturated,
        resolved=resolved,
        usable=usable,
        index=keep,
        missing_index=drop,
        extra_pixel=extra_pix,
        extra_flux=extra_flux,
        spike_pixel=spike_pix,
    )
    return counts, truth


@dataclass(frozen=True)
class BusyTruth:
    """What :func:`busy_spectrum` put in: lines, detector and artefacts."""

    centre: np.ndarray
    flux: np.ndarray
    fwhm: float
    gain: float
    read_noise: float
    saturation: float
    saturated: np.ndarray  # per line: its expected peak exceeded the saturation level
    background: np.ndarray  # smooth continuum (ADU per pixel), without the dark
    dark: np.ndarray  # expected dark signal per pixel (pattern + hot pixels)
    hot_pixel: np.ndarray
    spike_pixel: np.ndarray


def _bloom(expected: np.ndarray, level: float, right: float = 0.5) -> np.ndarray:
    """Spill charge above ``level`` into the neighbouring pixels until none is left.

    A fraction ``right`` of each pixel's excess goes to the next pixel, the rest to the
    previous one (0.5: symmetric blooming).
    """
    out = expected.copy()
    for _ in range(10 * out.size):
        over = np.clip(out - level, 0, None)
        if not over.any():
            break
        out -= over
        out[:-1] += (1.0 - right) * over[1:]
        out[1:] += right * over[:-1]
    return out


def busy_spectrum(
    rng: np.random.Generator,
    *,
    n_pixels: int = 3648,
    n_lines: int = 120,
    n_close_pairs: int = 12,
    n_saturated: int = 3,
    n_hot: int = 8,
    n_spikes: int = 6,
    fwhm: tuple[float, float] = (2.2, 3.5),
    bloom_asymmetry: float = 0.0,
) -> tuple[np.ndarray, np.ndarray, BusyTruth]:
    """A dense emission spectrum with the artefacts of a real exposure, plus a master dark.

    Lines have log-uniform fluxes (from below the detection limit to far above saturation),
    some close pairs (0.8-2.5 FWHM apart), a few lines bright enough to saturate and bloom
    (charge above full well spills into the neighbours; ``bloom_asymmetry`` up to 0.5 makes
    it favour one side by a random amount up to that), a smooth continuum, a fixed dark
    pattern with hot pixels, and single-pixel cosmic-ray spikes that are not in the dark.

    Returns
    -------
    counts : ndarray
        The exposure (ADU), clipped at the saturation level.
    dark : ndarray
        A master dark of the same detector (mean of 16 dark frames, so its own noise is small).
    truth : BusyTruth
    """
    n = n_pixels
    fw = float(rng.uniform(*fwhm))
    gain = float(rng.uniform(0.8, 2.5))
    rn = float(rng.uniform(3.0, 8.0))
    sat = 65535.0
    x = np.arange(n) / (n - 1)
    continuum = rng.uniform(50, 300) * (1 + 0.5 * np.sin(2 * np.pi * (x * rng.uniform(0.5, 2)
                                                                         + rng.uniform())))
    continuum += rng.uniform(100, 2000) * np.exp(-0.5 * ((x - rng.uniform(0.2, 0.8)) / 0.15) ** 2)
    dark = rng.uniform(200, 400) + 30 * x + 5 * np.sin(2 * np.pi * np.arange(n) / 16.0)
    hot = rng.choice(np.arange(5, n - 5), size=n_hot, replace=False)
    dark[hot] += rng.uniform(300, 5000, n_hot)
    centre = rng.uniform(3, n - 4, n_lines)
    flux = 10 ** rng.uniform(1.5, 4.8, n_lines)
    first = rng.choice(n_lines, size=n_close_pairs, replace=False)
    pair_c = centre[first] + rng.choice([-1, 1], n_close_pairs) * rng.uniform(0.8, 2.5,
                                                                             n_close_pairs) * fw
    pair_f = flux[first] * 10 ** rng.uniform(-1, 1, n_close_pairs)
    sigma = fw / FWHM_PER_SIGMA
    peak_frac = 1.0 / (sigma * np.sqrt(2 * np.pi))
    bright_c = rng.uniform(20, n - 20, n_saturated)
    bright_f = sat / peak_frac * rng.uniform(1.5, 8.0, n_saturated)
    centre = np.r_[centre, pair_c, bright_c]
    flux = np.r_[flux, pair_f, bright_f]
    inside = (centre > 0) & (centre < n - 1)
    centre, flux = centre[inside], flux[inside]
    lines = integrated_gaussians(n, centre, flux, fw)
    right = 0.5 + bloom_asymmetry * rng.uniform(-1.0, 1.0) if bloom_asymmetry else 0.5
    expected = _bloom(lines + continuum + dark, sat, right)
    saturated = flux * peak_frac + np.interp(centre, np.arange(n), continuum + dark) > sat
    counts = observe(expected, rng, gain=gain, read_noise=rn, saturation=sat)
    spikes = rng.choice(np.arange(n), size=n_spikes, replace=False)
    counts[spikes] = np.minimum(counts[spikes] + rng.uniform(300, 20000, n_spikes), sat)
    master = np.mean([observe(dark, rng, gain=gain, read_noise=rn) for _ in range(16)], axis=0)
    order = np.argsort(centre)
    truth = BusyTruth(
        centre=centre[order], flux=flux[order], fwhm=fw, gain=gain, read_noise=rn,
        saturation=sat, saturated=saturated[order], background=continuum, dark=dark,
        hot_pixel=np.sort(hot), spike_pixel=np.sort(spikes),
    )
    return counts, master, truth
