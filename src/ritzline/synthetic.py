"""Synthetic spectra with known truth, for tests, benchmarks and the demo data.

The basic detector model: each line is a Gaussian line-spread function integrated over every
pixel (pixel ``i`` spans ``[i - 0.5, i + 0.5]``), on a smooth background, observed with
Poisson photon noise (electrons = counts x gain) plus Gaussian read noise, clipped at a
saturation level.  The realistic model adds what real spectrometers do: a line shape whose
width and asymmetry change across the detector, with Lorentzian wings and an exponential
tail (:class:`LineShape`); broad bands; and a detector with an electronic offset,
optical-black pixels, dark charge with its fixed pattern, hot pixels, cosmic-ray hits,
full-well blooming, two read-out channels, an ADC, averaged scans and dark correction
(:class:`Detector`, :func:`read_out`).  Nothing here is a measurement; it exists so that
the other stages can be checked against a truth they did not see.
"""

from dataclasses import dataclass, field

import numpy as np
from scipy.special import erf, erfc, erfcx, log_ndtr, ndtr

__all__ = [
    "PHOSPHOR_BANDS",
    "PHOSPHOR_PEAKS",
    "Detector",
    "ExposureTruth",
    "Instrument",
    "LampTruth",
    "LineShape",
    "ReadoutTruth",
    "bloom",
    "broad_bands",
    "busy_spectrum",
    "fluorescent_instrument",
    "fluorescent_lamp_exposure",
    "integrated_gaussians",
    "lamp_exposure",
    "line_profiles",
    "observe",
    "position_crlb",
    "profile_cdf",
    "profile_density",
    "profile_fwhm",
    "profile_mean",
    "random_detector",
    "random_instrument",
    "random_line_shape",
    "read_out",
    "realistic_instrument",
    "realistic_lamp_exposure",
    "spectral_response",
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


# ---- line shapes: width and asymmetry that vary across the detector, wings, tails -------

_HWHM_PER_SIGMA = np.sqrt(2.0 * np.log(2.0))


@dataclass(frozen=True)
class LineShape:
    """A spectrometer's line-spread function, as smooth functions of pixel.

    The core is a split normal: its mode sits at the line's pixel, the half width at half
    maximum is ``(1 - a) * FWHM / 2`` toward lower pixels and ``(1 + a) * FWHM / 2`` toward
    higher ones, so the FWHM is the same for any asymmetry ``a``.  A fraction
    ``lorentz_fraction`` of the flux is in Lorentzian wings (a split Cauchy with the same
    half widths, so the FWHM stays that of the core), and a fraction ``tail_fraction`` of
    the rest is an exponentially modified Gaussian (the symmetric core convolved with an
    exponential of scale ``tail_length`` pixels toward ``tail_side``: +1 = higher pixel).
    Every profile is integrated over the pixels exactly through its cumulative distribution.

    ``fwhm`` and ``asymmetry`` are power-series coefficients in normalised pixel
    ``x = 2 p / (n_pixels - 1) - 1``: ``(2.5,)`` is a constant 2.5-px FWHM.
    """

    fwhm: tuple[float, ...] = (2.5,)
    asymmetry: tuple[float, ...] = (0.0,)
    lorentz_fraction: float = 0.0
    tail_fraction: float = 0.0
    tail_length: float = 0.0
    tail_side: int = 1

    def fwhm_at(self, pixels, n_pixels: int) -> np.ndarray:
        """FWHM of the core (px) at pixel positions."""
        return np.polynomial.polynomial.polyval(_norm_pixel(pixels, n_pixels), self.fwhm)

    def asymmetry_at(self, pixels, n_pixels: int) -> np.ndarray:
        """Split-normal asymmetry ``a`` at pixel positions (clipped to |a| <= 0.9)."""
        a = np.polynomial.polynomial.polyval(_norm_pixel(pixels, n_pixels), self.asymmetry)
        return np.clip(a, -0.9, 0.9)

    @property
    def has_tail(self) -> bool:
        return self.tail_fraction > 0 and self.tail_length > 0


def _norm_pixel(pixels, n_pixels: int) -> np.ndarray:
    return 2.0 * np.asarray(pixels, float) / (n_pixels - 1) - 1.0


def _half_widths(shape: LineShape, centres: np.ndarray, n_pixels: int):
    """Left and right half widths at half maximum (px) of the core at each line centre."""
    fwhm = shape.fwhm_at(centres, n_pixels)
    a = shape.asymmetry_at(centres, n_pixels)
    return 0.5 * fwhm * (1.0 - a), 0.5 * fwhm * (1.0 + a)


def _emg_cdf(d, sigma, tau):
    """CDF of a Gaussian (sigma) convolved with an exponential of scale tau toward +d."""
    lam = 1.0 / tau
    z = d / sigma
    return ndtr(z) - np.exp(-lam * d + 0.5 * (lam * sigma) ** 2 + log_ndtr(z - lam * sigma))


def _emg_pdf(d, sigma, tau):
    lam = 1.0 / tau
    u = (lam * sigma**2 - d) / (_SQRT2 * sigma)
    with np.errstate(over="ignore", invalid="ignore", under="ignore"):
        scaled = 0.5 * lam * np.exp(-0.5 * (d / sigma) ** 2) * erfcx(u)
        direct = 0.5 * lam * np.exp(0.5 * (lam * sigma) ** 2 - lam * d) * erfc(u)
    return np.where(u > 0, scaled, direct)


def _split_normal_cdf(d, hl, hr):
    wl = hl / (hl + hr)
    sl, sr = hl / _HWHM_PER_SIGMA, hr / _HWHM_PER_SIGMA
    return np.where(d < 0, 2.0 * wl * ndtr(d / sl), wl + 2.0 * (1.0 - wl) * (ndtr(d / sr) - 0.5))


def _split_cauchy_cdf(d, hl, hr):
    wl = hl / (hl + hr)
    return np.where(d < 0, wl * (1.0 + (2 / np.pi) * np.arctan(d / hl)),
                    wl + (1.0 - wl) * (2 / np.pi) * np.arctan(d / hr))


def _tail_cdf(d, hl, hr, shape: LineShape):
    sigma = 0.5 * (hl + hr) / _HWHM_PER_SIGMA
    if shape.tail_side >= 0:
        return _emg_cdf(d, sigma, shape.tail_length)
    return 1.0 - _emg_cdf(-d, sigma, shape.tail_length)


def _components(shape: LineShape):
    """(weight, CDF(d, hl, hr), kind) of each part of the profile that carries flux."""
    eta = shape.lorentz_fraction
    t = shape.tail_fraction if shape.has_tail else 0.0
    parts = [((1.0 - eta) * (1.0 - t), _split_normal_cdf, "core")]
    if t > 0:
        parts.append(((1.0 - eta) * t, lambda d, hl, hr: _tail_cdf(d, hl, hr, shape), "tail"))
    if eta > 0:
        parts.append((eta, _split_cauchy_cdf, "wings"))
    return [p for p in parts if p[0] > 0]


def profile_cdf(d, hwhm_left, hwhm_right, shape: LineShape) -> np.ndarray:
    """Fraction of a line's flux below offset ``d`` (px) from its mode.

    ``hwhm_left``/``hwhm_right`` are the core's half widths (broadcast against ``d``); the
    wings and tail come from ``shape``.  Differences of this function at pixel edges give
    the pixel-integrated profile.
    """
    d = np.asarray(d, float)
    hl = np.asarray(hwhm_left, float)
    hr = np.asarray(hwhm_right, float)
    with np.errstate(divide="ignore"):
        return sum(w * cdf(d, hl, hr) for w, cdf, _ in _components(shape))


def profile_density(d, hwhm_left, hwhm_right, shape: LineShape) -> np.ndarray:
    """The line profile per unit flux (per px) at offset ``d`` from its mode."""
    d = np.asarray(d, float)
    hl = np.asarray(hwhm_left, float)
    hr = np.asarray(hwhm_right, float)
    sl, sr = hl / _HWHM_PER_SIGMA, hr / _HWHM_PER_SIGMA
    s = np.where(d < 0, sl, sr)
    out = 2.0 / (np.sqrt(2 * np.pi) * (sl + sr)) * np.exp(-0.5 * (d / s) ** 2)
    if shape.has_tail:
        sigma = 0.5 * (sl + sr)
        tail = _emg_pdf(d * np.sign(shape.tail_side or 1), sigma, shape.tail_length)
        out = (1.0 - shape.tail_fraction) * out + shape.tail_fraction * tail
    eta = shape.lorentz_fraction
    if eta > 0:
        g = np.where(d < 0, hl, hr)
        wings = 2.0 / (np.pi * (hl + hr)) / (1.0 + (d / g) ** 2)
        out = (1.0 - eta) * out + eta * wings
    return out


def _window_half(kind: str, shape: LineShape, hl: np.ndarray, hr: np.ndarray) -> int:
    """Half width (px) of the window holding all but ~1e-13 of a profile component."""
    sigma = max(float(np.max(hl, initial=0)), float(np.max(hr, initial=0))) / _HWHM_PER_SIGMA
    half = 8.5 * sigma
    if kind == "tail":
        half += 30.0 * shape.tail_length
    elif kind == "peak":
        half = 2.0 * FWHM_PER_SIGMA * sigma + (3.0 * shape.tail_length if shape.has_tail else 0)
    return int(np.ceil(half)) + 1


def _windows(n_pixels: int, centres, hl, hr, cdf, half: int | None, *, chunk: int = 2_000_000):
    """Yield (line slice, pixel indices, fraction of each line's flux per pixel) of one
    profile component, a chunk of lines at a time so the temporaries stay small; ``half``
    None: every pixel of the detector (Lorentzian wings)."""
    if half is None:
        offsets, width = np.arange(n_pixels), n_pixels
    else:
        offsets, width = np.arange(-half, half + 1), 2 * half + 1
    per = max(1, chunk // width)
    for start in range(0, centres.size, per):
        sl = slice(start, start + per)
        c = centres[sl, None]
        pix = offsets[None, :] if half is None else np.rint(c).astype(int) + offsets[None, :]
        a, b = hl[sl, None], hr[sl, None]
        with np.errstate(divide="ignore"):
            yield sl, pix, cdf(pix + 0.5 - c, a, b) - cdf(pix - 0.5 - c, a, b)


def line_profiles(
    n_pixels: int,
    centres: np.ndarray,
    fluxes: np.ndarray,
    shape: LineShape,
    *,
    peaks: bool = False,
):
    """Noise-free counts of lines with the line shape ``shape``, integrated over each pixel.

    Parameters
    ----------
    n_pixels : int
        Detector length.
    centres : array
        Line positions in pixels (the mode of each line's core).
    fluxes : array
        Total counts of each line (its integral over an infinite detector).
    shape : LineShape
        Width, asymmetry, wings and tail, evaluated at each line's position.
    peaks : bool
        Also return each line's largest pixel (counts) on the detector.

    Returns
    -------
    ndarray of shape (n_pixels,), and with ``peaks`` the per-line maxima.
    """
    centres = np.atleast_1d(np.asarray(centres, float))
    fluxes = np.broadcast_to(np.asarray(fluxes, float), centres.shape)
    out = np.zeros(n_pixels)
    top = np.zeros(centres.size)
    if centres.size == 0:
        return (out, top) if peaks else out
    hl, hr = _half_widths(shape, centres, n_pixels)
    for weight, cdf, kind in _components(shape):
        half = None if kind == "wings" else _window_half(kind, shape, hl, hr)
        for sl, pix, frac in _windows(n_pixels, centres, hl, hr, cdf, half):
            contrib = (weight * fluxes[sl])[:, None] * frac
            if half is None:
                out += contrib.sum(axis=0)
                continue
            ok = (pix >= 0) & (pix < n_pixels)
            out += np.bincount(pix[ok], weights=contrib[ok], minlength=n_pixels)
    if peaks:
        whole = lambda d, a, b: profile_cdf(d, a, b, shape)  # noqa: E731
        half = _window_half("peak", shape, hl, hr)
        for sl, pix, frac in _windows(n_pixels, centres, hl, hr, whole, half):
            ok = (pix >= 0) & (pix < n_pixels)
            top[sl] = np.where(ok, fluxes[sl, None] * frac, 0.0).max(axis=1)
    return (out, top) if peaks else out


def position_crlb(
    n_pixels: int,
    centres: np.ndarray,
    fluxes: np.ndarray,
    shape: LineShape,
    variance: np.ndarray,
    *,
    ignore: np.ndarray | None = None,
) -> np.ndarray:
    """Cramer-Rao bound (px) on each line's position when its shape, flux and background
    are known: ``1 / sqrt(sum_i (d mu_i / d p)^2 / variance_i)`` over the pixels of the
    line, Gaussian noise of the given per-pixel ``variance`` (ADU^2).  For a symmetric
    profile the position decouples from flux, width and background, so this is also the
    bound of a fit of all four.  Pixels marked in ``ignore`` (clipped, bloomed) carry no
    information.
    """
    centres = np.atleast_1d(np.asarray(centres, float))
    fluxes = np.broadcast_to(np.asarray(fluxes, float), centres.shape)
    info = np.zeros(centres.size)
    if centres.size == 0:
        return info
    weight = 1.0 / np.asarray(variance, float)
    if ignore is not None:
        weight = np.where(ignore, 0.0, weight)
    hl, hr = _half_widths(shape, centres, n_pixels)
    half = _window_half("tail" if shape.has_tail else "core", shape, hl, hr)

    def density(d, a, b):  # its differences at pixel edges are d(pixel fraction)/d(centre)
        return profile_density(d, a, b, shape)

    for sl, pix, slope in _windows(n_pixels, centres, hl, hr, density, half):
        ok = (pix >= 0) & (pix < n_pixels)
        w = np.where(ok, weight[np.clip(pix, 0, n_pixels - 1)], 0.0)
        info[sl] = np.sum(w * (fluxes[sl, None] * slope) ** 2, axis=1)
    with np.errstate(divide="ignore"):
        return 1.0 / np.sqrt(info)


def profile_fwhm(shape: LineShape, hwhm_left, hwhm_right) -> np.ndarray:
    """FWHM (px) of the whole profile: the core's when there is no tail (the Lorentzian wings
    share its half widths), otherwise found on a fine grid, one row per line."""
    hl = np.atleast_1d(np.asarray(hwhm_left, float))
    hr = np.atleast_1d(np.asarray(hwhm_right, float))
    if not shape.has_tail:
        return hl + hr
    span = 4.0 * (hl + hr)[:, None] + 12.0 * shape.tail_length
    grid = np.linspace(-1.0, 1.0, 1601)[None, :] * span
    dens = profile_density(grid, hl[:, None], hr[:, None], shape)
    half = 0.5 * dens.max(axis=1)[:, None]
    above = dens >= half
    idx = np.arange(grid.shape[1])[None, :]
    first = np.where(above, idx, grid.shape[1]).min(axis=1)
    last = np.where(above, idx, -1).max(axis=1)
    rows = np.arange(hl.size)

    def crossing(i, j):  # linear interpolation between grid points i (below) and j (above)
        y0, y1 = dens[rows, i] - half[:, 0], dens[rows, j] - half[:, 0]
        return grid[rows, i] + (grid[rows, j] - grid[rows, i]) * (-y0) / (y1 - y0)

    left = crossing(np.maximum(first - 1, 0), first)
    right = crossing(np.minimum(last + 1, grid.shape[1] - 1), last)
    return right - left


def profile_mean(shape: LineShape, hwhm_left, hwhm_right) -> np.ndarray:
    """Mean offset (px) of the core and tail from the mode: sqrt(2/pi) (sigma_r - sigma_l)
    for the split normal, plus tail_length for the exponential tail (the Lorentzian wings
    are left out: their mean is undefined)."""
    sl = np.asarray(hwhm_left, float) / _HWHM_PER_SIGMA
    sr = np.asarray(hwhm_right, float) / _HWHM_PER_SIGMA
    mean = np.sqrt(2.0 / np.pi) * (sr - sl)
    if shape.has_tail:
        t = shape.tail_fraction
        mean = (1.0 - t) * mean + t * np.sign(shape.tail_side or 1) * shape.tail_length
    return mean


def broad_bands(
    wavelength_edges: np.ndarray, centres_nm, fluxes, fwhm_nm
) -> np.ndarray:
    """Noise-free counts of broad Gaussian bands (phosphor emission, continuum humps).

    ``wavelength_edges`` are the wavelengths of the pixel edges (n_pixels + 1 values, in
    either order); each band's flux (counts) is integrated over each pixel exactly in
    wavelength, so a nonlinear dispersion is followed.
    """
    edges = np.asarray(wavelength_edges, float)
    c = np.atleast_1d(np.asarray(centres_nm, float))[:, None]
    s = np.broadcast_to(np.asarray(fwhm_nm, float), c.shape[:1])[:, None] / FWHM_PER_SIGMA
    f = np.broadcast_to(np.asarray(fluxes, float), c.shape[:1])[:, None]
    cdf = ndtr((edges[None, :] - c) / s)
    return np.abs(np.diff(f * cdf, axis=1)).sum(axis=0)


# ---- the detector: offset, dark pattern, artefacts, full well, ADC, averaging -----------


@dataclass(frozen=True)
class Detector:
    """What a real linear CCD/CMOS detector adds between the light and the numbers in a file.

    Signal levels are in ADU (counts of the ADC); ``gain`` (electrons per ADU) and read noise
    stay with the :class:`Instrument` / the caller.  The defaults add nothing.

    Attributes
    ----------
    offset : float
        Electronic offset (bias) added to every pixel, ADU.
    odd_even : float
        Extra offset of the odd pixels (two read-out channels), ADU.
    n_black : int
        Leading optical-black pixels: shielded from light, they still show the offset, the
        dark charge and the read noise.
    dark : float
        Mean dark charge per pixel in the exposure, ADU (Poisson in electrons).
    dsnu : float
        Dark-signal non-uniformity: relative rms of the fixed pixel-to-pixel dark pattern.
    n_hot : int
        Hot pixels: dark charge drawn log-uniformly in ``hot_level`` (ADU).
    pattern_seed : int
        Seed of the fixed pattern (DSNU and hot pixels): every exposure of one detector,
        dark frames included, shows the same pattern.
    spike_rate : float
        Mean number of single-pixel cosmic-ray hits per scan (Poisson); each deposits a
        charge drawn log-uniformly in ``spike_level`` (ADU).
    full_well : float or None
        Charge a pixel holds, ADU above the offset; the excess blooms into the neighbours
        (``bloom_right`` of it toward higher pixel index).  None: no full-well limit.
    adc_bits : int or None
        Each scan is rounded to integer ADU and clipped to [0, 2**adc_bits - 1].
        None: real-valued counts, unclipped (as ``observe``).
    n_scans : int
        Scans averaged into the file (counts no longer integers; variance / n_scans).
    dark_corrected : bool
        The file holds counts minus the offset and the expected dark (a perfect master
        dark): values scatter about zero where there is no light, negatives included.
    """

    offset: float = 0.0
    odd_even: float = 0.0
    n_black: int = 0
    dark: float = 0.0
    dsnu: float = 0.0
    n_hot: int = 0
    hot_level: tuple[float, float] = (50.0, 3000.0)
    pattern_seed: int = 0
    spike_rate: float = 0.0
    spike_level: tuple[float, float] = (100.0, 20000.0)
    full_well: float | None = None
    bloom_right: float = 0.5
    adc_bits: int | None = None
    n_scans: int = 1
    dark_corrected: bool = False

    @property
    def adc_max(self) -> float | None:
        return None if self.adc_bits is None else float(2**self.adc_bits - 1)


@dataclass(frozen=True)
class ReadoutTruth:
    """What :func:`read_out` did: the fixed patterns, the artefacts, the expected variance.

    ``dark`` is the expected dark signal per pixel (pattern and hot pixels, ADU);
    ``offset`` the expected offset per pixel (with the odd/even step); ``variance`` the
    expected variance of each output pixel away from clipping (ADU^2: shot noise of light
    and dark, read noise, quantisation 1/12, divided by the number of scans);
    ``spike_pixel``/``spike_scan``/``spike_adu`` the cosmic-ray hits; ``bloomed`` the pixels
    that received spilled charge or sat at full well in any scan; ``clipped`` the pixels at
    the ADC limit in any scan.
    """

    detector: Detector
    gain: float
    read_noise: float
    offset: np.ndarray
    dark: np.ndarray
    hot_pixel: np.ndarray
    spike_pixel: np.ndarray
    spike_scan: np.ndarray
    spike_adu: np.ndarray
    bloomed: np.ndarray
    clipped: np.ndarray
    variance: np.ndarray


def _spill_one_way(charge: np.ndarray, full_well: float, ends: np.ndarray, amount: np.ndarray):
    """Move ``amount`` of charge from each run ending at ``ends`` toward higher index, filling
    the following pixels up to ``full_well``; what passes the last pixel is lost."""
    n = charge.size
    cap = np.clip(full_well - charge, 0.0, None)
    cs = np.concatenate([[0.0], np.cumsum(cap)])
    go = amount > 0
    ends, amount = ends[go], amount[go]
    base = cs[ends + 1]
    k = np.searchsorted(cs, base + amount, side="left") - 1  # the pixel that takes the rest
    k = np.clip(k, ends + 1, n)
    cover = np.zeros(n + 1)
    np.add.at(cover, ends + 1, 1.0)
    np.add.at(cover, k, -1.0)
    charge += cap * np.cumsum(cover)[:n]
    inside = k < n
    np.add.at(charge, k[inside], (amount - (cs[k] - base))[inside])


def bloom(charge: np.ndarray, full_well: float, right: float = 0.5) -> np.ndarray:
    """Charge above ``full_well`` spilled into the neighbouring pixels (blooming).

    Each run of over-full pixels is set to full well and its excess is passed outward, a
    fraction ``right`` toward higher index and the rest toward lower, filling each
    neighbour up to full well; charge that runs off an end of the detector is lost.  When
    the spills of two runs meet, a further pass spills the overlap again.
    """
    out = np.array(charge, float)
    for _ in range(50):
        over = out - full_well
        sat = over > 1e-9 * full_well
        if not sat.any():
            break
        excess = np.where(over > 0, over, 0.0)
        edge = np.diff(np.concatenate([[0], sat.astype(np.int8), [0]]))
        starts, ends = np.flatnonzero(edge == 1), np.flatnonzero(edge == -1) - 1
        cum = np.concatenate([[0.0], np.cumsum(excess)])
        total = cum[ends + 1] - cum[starts]
        out = np.minimum(out, full_well)
        _spill_one_way(out, full_well, ends, right * total)
        flipped = out[::-1].copy()
        _spill_one_way(flipped, full_well, out.size - 1 - starts, (1.0 - right) * total)
        out = flipped[::-1].copy()
    return out


def read_out(
    light: np.ndarray,
    rng: np.random.Generator,
    *,
    gain: float = 1.0,
    read_noise: float = 5.0,
    detector: Detector = Detector(),
) -> tuple[np.ndarray, ReadoutTruth]:
    """Turn the expected light per pixel (ADU) into the numbers a detector writes.

    Per scan: Poisson electrons of light + dark charge (``gain`` electrons per ADU),
    cosmic-ray hits, full-well clip with blooming, offset (and odd/even step), Gaussian read
    noise (``read_noise`` ADU rms), ADC rounding and clip; then the mean of the scans, and
    optionally the offset and dark removed.  The dark pattern and hot pixels come from the
    detector's ``pattern_seed`` (the same in every scan and every exposure); everything
    else from ``rng``.  A dark frame is ``read_out(np.zeros(n), ...)``.

    Returns
    -------
    counts : ndarray of shape (n_pixels,)
    truth : ReadoutTruth
    """
    det = detector
    light = np.clip(np.asarray(light, float), 0.0, None).copy()
    n = light.size
    light[: det.n_black] = 0.0
    pattern = np.random.default_rng(det.pattern_seed)
    dark = np.full(n, float(det.dark))
    if det.dsnu > 0:
        dark *= np.clip(1.0 + det.dsnu * pattern.standard_normal(n), 0.0, None)
    hot = np.zeros(0, int)
    if det.n_hot:
        hot = np.sort(pattern.choice(n, size=det.n_hot, replace=False))
        lo, hi = np.log(det.hot_level)
        dark[hot] += np.exp(pattern.uniform(lo, hi, det.n_hot))
    offset = det.offset + det.odd_even * (np.arange(n) % 2)
    scans = max(int(det.n_scans), 1)

    electrons = rng.poisson(np.broadcast_to((light + dark) * gain, (scans, n))).astype(float)
    n_hits = rng.poisson(det.spike_rate, scans) if det.spike_rate > 0 else np.zeros(scans, int)
    spike_scan = np.repeat(np.arange(scans), n_hits)
    spike_pixel = rng.integers(0, n, spike_scan.size)
    lo, hi = np.log(det.spike_level)
    spike_adu = np.exp(rng.uniform(lo, hi, spike_scan.size))
    np.add.at(electrons, (spike_scan, spike_pixel), spike_adu * gain)

    bloomed = np.zeros(n, bool)
    if det.full_well is not None:
        fw = det.full_well * gain
        hit = (electrons >= fw).any(axis=1)
        for s in np.flatnonzero(hit):  # one pass per scan that overflows (a few at most)
            spilled = bloom(electrons[s], fw, det.bloom_right)
            bloomed |= (spilled != electrons[s]) | (spilled >= fw)
            electrons[s] = spilled
    adu = electrons / gain + offset + rng.normal(0.0, read_noise, (scans, n))
    clipped = np.zeros(n, bool)
    if det.adc_bits is not None:
        adu = np.clip(np.rint(adu), 0.0, det.adc_max)
        clipped = (adu >= det.adc_max).any(axis=0) | (adu <= 0).any(axis=0)
    counts = adu.mean(axis=0)
    if det.dark_corrected:
        counts = counts - offset - dark
    quant = 1.0 / 12.0 if det.adc_bits is not None else 0.0
    variance = ((light + dark) / gain + read_noise**2 + quant) / scans
    order = np.lexsort((spike_pixel, spike_scan))
    truth = ReadoutTruth(
        detector=det, gain=float(gain), read_noise=float(read_noise), offset=offset,
        dark=dark, hot_pixel=hot, spike_pixel=spike_pixel[order], spike_scan=spike_scan[order],
        spike_adu=spike_adu[order], bloomed=bloomed, clipped=clipped, variance=variance,
    )
    return counts, truth


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
    shape: LineShape | None = None
    detector: Detector | None = None

    @property
    def line_shape(self) -> LineShape:
        """The line shape: ``shape``, or a Gaussian of constant ``fwhm_px`` when unset."""
        return self.shape if self.shape is not None else LineShape(fwhm=(self.fwhm_px,))

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
        """A noisy exposure of lines at air ``wavelengths`` (nm) with total ``fluxes`` (counts).

        With ``shape`` or ``detector`` set, the lines take that shape and the light is read
        out by :func:`read_out` (then clipped at ``saturation`` unless the detector has an
        ADC); otherwise Gaussian lines and :func:`observe`.
        """
        wl = np.asarray(wavelengths, float)
        centres = self.pixel(wl)
        if self.shape is None and self.detector is None:
            inside = (centres > -5 * self.fwhm_px) & (centres < self.n_pixels + 5 * self.fwhm_px)
            expected = integrated_gaussians(
                self.n_pixels, centres[inside], np.asarray(fluxes, float)[inside], self.fwhm_px
            )
            expected = expected + self.background
            if continuum is not None:
                expected = expected + continuum
            return observe(
                expected, rng, gain=self.gain, read_noise=self.read_noise,
                saturation=self.saturation,
            )
        expected = self.expected(centres, fluxes) + self.background
        if continuum is not None:
            expected = expected + continuum
        return self.read(expected, rng)

    def expected(self, centres, fluxes) -> np.ndarray:
        """Noise-free counts of lines at pixel ``centres`` with the instrument's line shape
        (lines whose mode is more than 10 FWHM off the detector are left out, as the
        polynomial may fold back out there)."""
        centres = np.asarray(centres, float)
        margin = 10.0 * max(self.line_shape.fwhm)
        inside = (centres > -margin) & (centres < self.n_pixels - 1 + margin)
        fluxes = np.broadcast_to(np.asarray(fluxes, float), centres.shape)
        return line_profiles(self.n_pixels, centres[inside], fluxes[inside], self.line_shape)

    def read(self, expected: np.ndarray, rng: np.random.Generator) -> np.ndarray:
        """Counts read out from ``expected`` light (ADU) by the instrument's detector."""
        det = self.detector or Detector()
        counts, _ = read_out(expected, rng, gain=self.gain, read_noise=self.read_noise,
                             detector=det)
        if self.saturation is not None and det.adc_bits is None:
            counts = np.minimum(counts, self.saturation)
        return counts


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


def _detector_headroom(instrument: Instrument, saturation: float) -> tuple[float, float, float]:
    """(saturation level of the raw counts, room for light above the background, mean dark)
    of an instrument with a detector: the least of the ADC range above the offset, the full
    well and ``saturation`` (when the detector has no ADC)."""
    det = instrument.detector or Detector()
    top = det.adc_max if det.adc_max is not None else saturation
    room = top - det.offset - abs(det.odd_even)
    if det.full_well is not None:
        room = min(room, det.full_well)
    dark = det.dark * (1.0 + 3.0 * det.dsnu)
    return top, room - dark - instrument.background, dark


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
    all_rel = np.concatenate([rel, extra_rel])
    centres = np.concatenate([pix_all[keep], extra_pix])
    sat = instrument.saturation if instrument.saturation is not None else 65535.0
    headroom = sat - instrument.background
    modelled = instrument.shape is not None or instrument.detector is not None
    if modelled:
        # per-line peak fraction of the instrument's line shape; the detector's own limits
        det = instrument.detector or Detector()
        sat, headroom, _ = _detector_headroom(instrument, sat)
        _, peak_frac = line_profiles(n, centres, np.ones(centres.size), instrument.line_shape,
                                     peaks=True)
        fwhm = profile_fwhm(instrument.line_shape,
                            *_half_widths(instrument.line_shape, centres, n))
        sigma = fwhm / FWHM_PER_SIGMA
        ranked, unit = np.sort(all_rel * peak_frac)[::-1], 1.0
    else:
        peak_frac = 1.0 / (sigma * np.sqrt(2 * np.pi))
        ranked, unit = np.sort(all_rel)[::-1], peak_frac
    n_sat = round(rng.uniform(*saturate) * all_rel.size)
    if all_rel.size == 0:
        scale = 1.0
    elif n_sat > 0:
        # the n_sat-th brightest line peaks just above saturation, the next one below
        lo = ranked[n_sat] if n_sat < ranked.size else 0.0
        target_rel = np.sqrt(ranked[n_sat - 1] * max(lo, ranked[n_sat - 1] * 0.5))
        scale = headroom / (target_rel * unit)
    else:
        scale = rng.uniform(0.3, 0.9) * headroom / (ranked[0] * unit)
    flux = rel * scale
    extra_flux = extra_rel * scale

    fluxes = np.concatenate([flux, extra_flux])
    if modelled:
        counts = instrument.read(instrument.expected(centres, fluxes) + instrument.background,
                                 rng)
    else:
        expected = integrated_gaussians(n, centres, fluxes, fwhm) + instrument.background
        counts = observe(expected, rng, gain=instrument.gain, read_noise=instrument.read_noise)
    n_spikes = int(rng.integers(spikes[0], spikes[1] + 1))
    spike_pix = np.sort(rng.choice(n, size=n_spikes, replace=False)) if n_spikes else np.zeros(0)
    if n_spikes:
        hits = rng.uniform(0.05, 1.0, n_spikes) * headroom
        if modelled and det.adc_bits is not None:
            hits = np.rint(hits * det.n_scans) / det.n_scans  # a hit in one scan of the mean
        counts[spike_pix.astype(int)] += hits
    if instrument.saturation is not None:
        counts = np.minimum(counts, instrument.saturation)

    # Expected matched-filter SNR of each line on its own (background + read noise + shot).
    var_bg = instrument.background / instrument.gain + instrument.read_noise**2
    scans = 1
    if modelled:
        scans = max(det.n_scans, 1)
        var_bg = (var_bg + det.dark / instrument.gain
                  + (1 / 12 if det.adc_bits is not None else 0.0)) / scans
        sigma, fwhm, peak_frac = sigma[: keep.size], fwhm[: keep.size], peak_frac[: keep.size]
        sat = headroom + instrument.background  # light + background that fill the room
    n_eff = 2.0 * np.sqrt(np.pi) * sigma
    snr = flux / np.sqrt(n_eff * var_bg + flux / instrument.gain / scans)
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
    expected = bloom(lines + continuum + dark, sat, right)
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


# ---- realistic exposures with their truth -----------------------------------------------


def random_line_shape(rng: np.random.Generator, *, fwhm_px: tuple[float, float] = (1.5, 6.0),
                      red_side: int = 1) -> LineShape:
    """Draw a line shape: FWHM in ``fwhm_px``; in 60 % of draws the width varies smoothly
    (linear + quadratic, up to about +-35 % across the detector), in 40 % the core is skewed
    (|a| up to 0.3), in 50 % it has Lorentzian wings (1-8 % of the flux), in 30 % an
    exponential tail toward the red (``red_side``: +1 when wavelength grows with pixel)."""
    f0 = float(rng.uniform(*fwhm_px))
    fwhm = (f0,)
    if rng.random() < 0.6:
        fwhm = (f0, f0 * float(rng.uniform(-0.2, 0.2)), f0 * float(rng.uniform(-0.15, 0.15)))
    asym = (0.0,)
    if rng.random() < 0.4:
        asym = (float(rng.uniform(-0.3, 0.3)), float(rng.uniform(-0.1, 0.1)))
    eta = float(rng.uniform(0.01, 0.08)) if rng.random() < 0.5 else 0.0
    tail_f, tail_l = 0.0, 0.0
    if rng.random() < 0.3:
        tail_f, tail_l = float(rng.uniform(0.05, 0.3)), f0 * float(rng.uniform(0.4, 1.5))
    return LineShape(fwhm=fwhm, asymmetry=asym, lorentz_fraction=eta, tail_fraction=tail_f,
                     tail_length=tail_l, tail_side=1 if red_side >= 0 else -1)


def random_detector(rng: np.random.Generator, *, averaged_probability: float = 0.4,
                    dark_corrected_probability: float = 0.1) -> tuple[Detector, float, float]:
    """Draw a detector and its (gain e-/ADU, read noise ADU).

    ADC of 16, 14 or 12 bits (gain 0.7-6 e-/ADU for 16 bits, x4 and x16 for fewer bits, so
    the full well fills the range), read noise 8-60 e-, offset 1-5 % of the range, odd/even
    step in 30 %, optical-black pixels in 20 %, dark 0.05-2 % of the range with 2-15 %
    DSNU, 0-6 hot pixels, 0.5 spikes per scan, full well below the ADC limit (blooming) in
    50 %, 2/5/10 averaged scans with ``averaged_probability``, dark-corrected output with
    ``dark_corrected_probability``."""
    bits = int(rng.choice([16, 14, 12], p=[0.6, 0.25, 0.15]))
    top = 2.0**bits - 1
    gain = float(rng.uniform(0.7, 6.0)) * 2.0 ** (16 - bits)
    read_noise = float(rng.uniform(8.0, 60.0)) / gain
    offset = float(rng.uniform(0.01, 0.05)) * top
    room = top - offset
    det = Detector(
        offset=offset,
        odd_even=float(rng.choice([-1, 1]) * rng.uniform(0.5, 6.0)) if rng.random() < 0.3
        else 0.0,
        n_black=int(rng.integers(8, 33)) if rng.random() < 0.2 else 0,
        dark=float(rng.uniform(0.0005, 0.02)) * room,
        dsnu=float(rng.uniform(0.02, 0.15)),
        n_hot=int(rng.integers(0, 7)),
        pattern_seed=int(rng.integers(2**31)),
        hot_level=(0.005 * room, 0.3 * room),
        spike_rate=0.5,
        spike_level=(max(20.0 * read_noise, 0.002 * room), 0.5 * room),
        full_well=float(rng.uniform(0.6, 0.95)) * room if rng.random() < 0.5 else None,
        bloom_right=float(rng.uniform(0.3, 0.7)),
        adc_bits=bits,
        n_scans=int(rng.choice([2, 5, 10])) if rng.random() < averaged_probability else 1,
        dark_corrected=bool(rng.random() < dark_corrected_probability),
    )
    return det, gain, read_noise


def realistic_instrument(
    rng: np.random.Generator,
    *,
    n_pixels: tuple[int, ...] = (1024, 2048, 3648, 4096),
    span_nm: tuple[float, float] = (60.0, 800.0),
    limits_nm: tuple[float, float] = (200.0, 1100.0),
    fwhm_px: tuple[float, float] = (1.5, 6.0),
    curvature: float = 0.06,
    reversed_probability: float = 0.2,
    averaged_probability: float = 0.4,
    dark_corrected_probability: float = 0.1,
) -> Instrument:
    """Draw a spectrometer as real ones come: strong dispersion curvature, a line shape that
    changes across the detector, and a detector with every artefact of :class:`Detector`.

    The span is log-uniform in ``span_nm``; the quadratic and cubic terms of the dispersion
    are up to ``curvature`` of the half span each (0.06: the curve leaves a straight line by
    up to about 3 % of the span).
    """
    n = int(rng.choice(n_pixels))
    span = float(np.exp(rng.uniform(*np.log(span_nm))))
    span = min(span, limits_nm[1] - limits_nm[0])
    centre = float(rng.uniform(limits_nm[0] + span / 2, limits_nm[1] - span / 2))
    half = span / 2
    c2, c3 = rng.uniform(-curvature, curvature, size=2) * half
    sign = -1.0 if rng.random() < reversed_probability else 1.0
    coeffs = tuple(float(c) for c in (centre - c2, sign * (half - c3), c2, sign * c3))
    shape = random_line_shape(rng, fwhm_px=fwhm_px, red_side=int(sign))
    det, gain, read_noise = random_detector(
        rng, averaged_probability=averaged_probability,
        dark_corrected_probability=dark_corrected_probability)
    return Instrument(n_pixels=n, coeffs=coeffs, fwhm_px=float(shape.fwhm[0]), gain=gain,
                      read_noise=read_noise, background=0.0, saturation=det.adc_max,
                      name="synthetic (realistic)", shape=shape, detector=det)


def spectral_response(wavelength_nm, rng: np.random.Generator | None = None) -> np.ndarray:
    """A smooth relative response of grating x silicon detector (peak about 1): blaze hump,
    ultraviolet cut-off, silicon's red cut-off above ~1000 nm and a weak low-order ripple
    (random phase and depth when ``rng`` is given)."""
    wl = np.asarray(wavelength_nm, float)
    blaze, uv, depth, phase = 550.0, 330.0, 0.05, 0.0
    if rng is not None:
        blaze, uv = rng.uniform(400.0, 750.0), rng.uniform(250.0, 380.0)
        depth, phase = rng.uniform(0.0, 0.1), rng.uniform(0.0, 2 * np.pi)
    hump = np.exp(-0.5 * ((wl - blaze) / 260.0) ** 2)
    cut_uv = 1.0 / (1.0 + np.exp(-(wl - uv) / 18.0))
    cut_red = 1.0 / (1.0 + np.exp((wl - 1010.0) / 35.0))
    ripple = 1.0 + depth * np.sin(2 * np.pi * wl / 180.0 + phase)
    return hump * cut_uv * cut_red * ripple


@dataclass(frozen=True)
class ExposureTruth:
    """What :func:`realistic_lamp_exposure` / :func:`fluorescent_lamp_exposure` made.

    ``lines`` is an astropy Table, one row per rendered line (lamp lines and unlisted
    extra lines) sorted by pixel: ``kind`` ("lamp" | "extra"), ``index`` (row in the lamp
    list, -1 for extras), ``wavelength`` (air nm), ``pixel`` (mode of the core),
    ``centroid`` (pixel + mean of core and tail), ``flux`` (the line's expected counts in
    the file, ADU, over an infinite detector; the mean of averaged scans keeps it),
    ``flux_e`` (electrons per scan), ``peak`` (the line's largest expected pixel on the
    detector, ADU, without continuum or dark), ``fwhm`` (px, of the whole profile),
    ``fwhm_nm``, ``asymmetry``, ``lorentz_fraction``, ``tail_fraction``, ``snr`` (expected
    matched-filter SNR of the line alone, Gaussian approximation), ``crlb`` (Cramer-Rao
    bound on the position, px, see :func:`position_crlb`; clipped and bloomed pixels
    excluded, infinite when nothing is left), ``saturated`` (expected peak above full well
    or the ADC limit), ``bloomed`` (a bloomed pixel within 1 FWHM), ``resolved`` (no other
    line within 1.5 FWHM), ``artefact_nearby`` (a hot pixel or spike within 1.5 FWHM),
    ``visible`` (on the light-sensitive part of the detector), ``usable`` (lamp line listed
    usable, visible, at least 1 FWHM from the ends, resolved, unsaturated, no artefact,
    SNR >= 10).

    ``bands`` (Table: ``centre_nm``, ``fwhm_nm``, ``flux``, ``pixel``) lists the broad
    features; ``continuum`` the expected light per pixel without the lines (ADU; bands,
    hump and the instrument's flat ``background``);
    ``readout`` the detector's part (offset, dark, hot pixels, spikes, variance);
    ``axis_nm`` a wavelength axis as a file might carry it, ``axis_shift_px`` pixels off
    (``axis_nm[i]`` is the true wavelength at pixel ``i + axis_shift_px``); ``flags`` which
    effects are present.
    """

    instrument: Instrument
    lines: object
    missing_index: np.ndarray
    bands: object
    continuum: np.ndarray
    readout: ReadoutTruth
    axis_nm: np.ndarray
    axis_shift_px: float
    flags: dict

    def wavelength_at(self, pixels) -> np.ndarray:
        """True air wavelength (nm) at pixel positions."""
        return self.instrument.wavelength(pixels)

    def fwhm_at(self, pixels) -> np.ndarray:
        """Core FWHM (px) at pixel positions."""
        return self.instrument.line_shape.fwhm_at(pixels, self.instrument.n_pixels)


def _nearest_gap(x: np.ndarray) -> np.ndarray:
    """Distance from each value to its nearest other value."""
    order = np.argsort(x)
    gaps = np.diff(x[order])
    near = np.empty(x.size)
    near[order] = np.minimum(np.r_[np.inf, gaps], np.r_[gaps, np.inf])
    return near


def _near_any(x: np.ndarray, marks: np.ndarray, within: np.ndarray) -> np.ndarray:
    """True where a mark lies within ``within`` of x."""
    if marks.size == 0 or x.size == 0:
        return np.zeros(x.size, bool)
    marks = np.sort(marks.astype(float))
    j = np.clip(np.searchsorted(marks, x), 1, marks.size - 1) if marks.size > 1 else None
    if j is None:
        return np.abs(x - marks[0]) <= within
    return np.minimum(np.abs(x - marks[j - 1]), np.abs(x - marks[j])) <= within


def _render_exposure(
    rng: np.random.Generator,
    instrument: Instrument,
    wl: np.ndarray,
    rel: np.ndarray,
    listed_usable: np.ndarray,
    index: np.ndarray,
    *,
    missing_index: np.ndarray,
    extra: tuple[float, float],
    saturate_probability: float,
    peak_fraction: tuple[float, float],
    continuum_level: tuple[float, float],
    bands: tuple[np.ndarray, np.ndarray, np.ndarray] | None,
    band_level: tuple[float, float],
    axis_error_px: float,
) -> tuple[np.ndarray, ExposureTruth]:
    """Render lines of relative flux ``rel`` at air ``wl`` on ``instrument`` with its shape
    and detector; scale so the brightest line peaks at ``peak_fraction`` of the
    saturation level (or 1.2-6 x it with ``saturate_probability``)."""
    from astropy.table import Table

    n = instrument.n_pixels
    shape = instrument.line_shape
    det = instrument.detector or Detector()
    gain = instrument.gain
    pix = instrument.pixel(wl)

    n_extra = round(rng.uniform(*extra) * wl.size)
    extra_pix = rng.uniform(0, n - 1, n_extra)
    extra_rel = rng.choice(rel, size=n_extra) if rel.size and n_extra else np.zeros(n_extra)
    centres = np.concatenate([pix, extra_pix])
    rel_all = np.concatenate([rel, extra_rel])
    kinds = np.array(["lamp"] * wl.size + ["extra"] * n_extra)

    unit, unit_peak = line_profiles(n, centres, rel_all, shape, peaks=True)
    sat = instrument.saturation if instrument.saturation is not None else 65535.0
    _, room, _ = _detector_headroom(instrument, sat)
    brightest = unit_peak.max() if unit_peak.size else 1.0
    saturating = rng.random() < saturate_probability
    level = rng.uniform(1.2, 6.0) if saturating else rng.uniform(*peak_fraction)
    scale = level * room / brightest
    flux = rel_all * scale
    signal = unit * scale
    peak = unit_peak * scale

    x = np.arange(n) / (n - 1)
    hump = np.exp(-0.5 * ((x - rng.uniform(0.2, 0.8)) / rng.uniform(0.2, 0.6)) ** 2)
    slope = 1.0 + rng.uniform(-0.5, 0.5) * (x - 0.5)
    cont_peak = 10 ** rng.uniform(*continuum_level) * peak.max(initial=0.0)
    continuum = cont_peak * hump * np.clip(slope, 0.1, None)
    band_rows = Table(names=("centre_nm", "fwhm_nm", "flux", "pixel"), dtype=(float,) * 4)
    if bands is not None and len(bands[0]):
        b_c, b_f, b_rel = (np.asarray(v, float) for v in bands)
        edges = instrument.wavelength(np.arange(n + 1) - 0.5)
        unit_band = broad_bands(edges, b_c, b_rel, b_f)
        top = unit_band.max() if unit_band.max() > 0 else 1.0
        b_scale = rng.uniform(*band_level) * peak.max(initial=1.0) / top
        continuum = continuum + unit_band * b_scale
        band_rows = Table({"centre_nm": b_c, "fwhm_nm": b_f, "flux": b_rel * b_scale,
                           "pixel": instrument.pixel(b_c)})
    continuum = continuum + instrument.background
    counts, rt = read_out(signal + continuum, rng, gain=gain,
                          read_noise=instrument.read_noise, detector=det)
    if instrument.saturation is not None and det.adc_max is None:
        counts = np.minimum(counts, instrument.saturation)

    hl, hr = _half_widths(shape, centres, n)
    fwhm = profile_fwhm(shape, hl, hr)
    centroid = centres + profile_mean(shape, hl, hr)
    crlb = position_crlb(n, centres, flux, shape, rt.variance,
                         ignore=rt.clipped | rt.bloomed)
    near = np.clip(np.rint(centres), 0, n - 1).astype(int)
    bg = (continuum + rt.dark)[near]
    var_bg = (bg / gain + instrument.read_noise**2
              + (1 / 12 if det.adc_bits is not None else 0.0)) / det.n_scans
    n_eff = 2.0 * np.sqrt(np.pi) * fwhm / FWHM_PER_SIGMA
    snr = flux / np.sqrt(n_eff * var_bg + flux / gain / det.n_scans)
    expected_top = peak + bg
    saturated = expected_top > (det.full_well if det.full_well is not None else np.inf)
    if det.adc_max is not None:
        saturated |= expected_top + det.offset >= det.adc_max
    bloom_pix = np.flatnonzero(rt.bloomed)
    bloomed = _near_any(centres, bloom_pix, fwhm)
    resolved = _nearest_gap(centres) >= 1.5 * fwhm
    marks = np.concatenate([rt.hot_pixel, rt.spike_pixel]).astype(float)
    artefact = _near_any(centres, marks, 1.5 * fwhm)
    visible = (centres >= det.n_black - 0.5) & (centres <= n - 0.5)
    inside = (centres >= det.n_black + fwhm) & (centres <= n - 1 - fwhm)
    is_lamp = kinds == "lamp"
    usable = (is_lamp & np.concatenate([listed_usable, np.zeros(n_extra, bool)]) & inside
              & resolved & ~saturated & ~artefact & (snr >= 10.0))
    wavelength = np.concatenate([wl, instrument.wavelength(extra_pix)])
    disp = np.abs(instrument.dispersion(centres))
    lines = Table({
        "kind": kinds,
        "index": np.concatenate([index, np.full(n_extra, -1)]),
        "wavelength": wavelength,
        "pixel": centres,
        "centroid": centroid,
        "flux": flux,
        "flux_e": flux * gain,
        "peak": peak,
        "fwhm": fwhm,
        "fwhm_nm": fwhm * disp,
        "asymmetry": shape.asymmetry_at(centres, n),
        "lorentz_fraction": np.full(centres.size, shape.lorentz_fraction),
        "tail_fraction": np.full(centres.size, shape.tail_fraction if shape.has_tail else 0.0),
        "snr": snr,
        "crlb": crlb,
        "saturated": saturated,
        "bloomed": bloomed,
        "resolved": resolved,
        "artefact_nearby": artefact,
        "visible": visible,
        "usable": usable,
    })
    lines["wavelength"].unit = "nm"
    lines["fwhm_nm"].unit = "nm"
    lines.sort("pixel")
    shift = float(rng.uniform(-axis_error_px, axis_error_px)) if axis_error_px > 0 else 0.0
    axis = instrument.wavelength(np.arange(n) + shift)
    fwhm_poly = np.asarray(shape.fwhm, float)
    flags = {
        "offset": det.offset != 0,
        "odd_even": det.odd_even != 0,
        "optical_black": det.n_black > 0,
        "dsnu": det.dsnu > 0 and det.dark > 0,
        "hot_pixels": rt.hot_pixel.size > 0,
        "spikes": rt.spike_pixel.size > 0,
        "bloom": bool(rt.bloomed.any()),
        "adc_clip": bool(rt.clipped.any()),
        "quantised": det.adc_bits is not None,
        "averaged": det.n_scans > 1,
        "dark_corrected": det.dark_corrected,
        "saturated": bool(saturated.any()),
        "varying_width": fwhm_poly.size > 1 and bool(np.any(fwhm_poly[1:] != 0)),
        "skewed": bool(np.any(np.asarray(shape.asymmetry) != 0)) or shape.has_tail,
        "lorentz_wings": shape.lorentz_fraction > 0,
        "broad_bands": len(band_rows) > 0,
        "axis_off": shift != 0,
    }
    truth = ExposureTruth(instrument=instrument, lines=lines, missing_index=missing_index,
                          bands=band_rows, continuum=continuum, readout=rt, axis_nm=axis,
                          axis_shift_px=shift, flags=flags)
    return counts, truth


def _lamp_on_detector(instrument: Instrument, lamp, rng, missing, intensity_scatter,
                      dynamic_range, response_rng, unlisted=1.0):
    """Listed lines of ``lamp`` that fall on the detector, with the dropped ones removed:
    (wavelength, relative flux, listed usable, index, missing index).  Lines without a
    listed intensity get ``unlisted`` x the median listed one."""
    wl_all, inten_all, listed_usable = _lamp_reference(lamp)
    n = instrument.n_pixels
    margin = 3 * max(instrument.line_shape.fwhm)
    lo_nm, hi_nm = np.sort(instrument.wavelength([-margin, n - 1 + margin]))
    on = np.flatnonzero((wl_all >= lo_nm) & (wl_all <= hi_nm))
    n_drop = round(rng.uniform(*missing) * on.size)
    drop = np.sort(rng.choice(on, size=n_drop, replace=False)) if n_drop else on[:0]
    keep = np.setdiff1d(on, drop)
    inten = inten_all.copy()
    finite = np.isfinite(inten) & (inten > 0)
    fill = np.median(inten[finite]) * unlisted if finite.any() else 1.0
    inten = np.where(finite, inten, fill)
    inten = np.clip(inten / inten.max(), 1.0 / dynamic_range, None)
    rel = inten[keep] * np.exp(rng.normal(0.0, intensity_scatter, keep.size))
    rel = rel * spectral_response(wl_all[keep], response_rng)
    x = _norm_pixel(instrument.pixel(wl_all[keep]), n)
    rel = rel * (1.0 - rng.uniform(0.0, 0.3) * x**4)  # vignetting toward the ends
    return wl_all[keep], rel, listed_usable[keep], keep, drop


def realistic_lamp_exposure(
    rng: np.random.Generator,
    lamp="Hg+Ar",
    *,
    instrument: Instrument | None = None,
    missing: tuple[float, float] = (0.1, 0.3),
    extra: tuple[float, float] = (0.0, 0.3),
    saturate_probability: float = 0.15,
    peak_fraction: tuple[float, float] = (0.2, 0.9),
    intensity_scatter: float = 0.5,
    dynamic_range: float = 3000.0,
    continuum_level: tuple[float, float] = (-3.5, -1.5),
    axis_error_px: float = 0.0,
) -> tuple[np.ndarray, ExposureTruth]:
    """A reference-lamp exposure on a realistic detector, with its full truth.

    Parameters
    ----------
    rng : numpy.random.Generator
        The only source of randomness.
    lamp : str, sequence of str, or table
        As for :func:`lamp_exposure`.
    instrument : Instrument, optional
        Default: :func:`realistic_instrument` drawn from ``rng``; its ``shape`` and
        ``detector`` are used (a plain Gaussian and a clean detector when unset).
    missing, extra, intensity_scatter, dynamic_range
        As for :func:`lamp_exposure`; fluxes also follow :func:`spectral_response` and a
        vignetting toward the detector ends.
    saturate_probability : float
        Chance that the brightest line peaks at 1.2-6 x the saturation level (full well or
        ADC limit); otherwise at ``peak_fraction`` of it.
    continuum_level : (low, high)
        log10 of the weak continuum hump's peak relative to the brightest line's peak.
    axis_error_px : float
        The truth's ``axis_nm`` is off by a shift drawn in +-``axis_error_px`` pixels.

    Returns
    -------
    counts : ndarray of shape (n_pixels,)
        What the file would hold (ADU; integers unless averaged or dark-corrected).
    truth : ExposureTruth
    """
    if instrument is None:
        instrument = realistic_instrument(rng)
    wl, rel, listed, index, drop = _lamp_on_detector(
        instrument, lamp, rng, missing, intensity_scatter, dynamic_range, rng)
    return _render_exposure(
        rng, instrument, wl, rel, listed, index, missing_index=drop, extra=extra,
        saturate_probability=saturate_probability, peak_fraction=peak_fraction,
        continuum_level=continuum_level, bands=None, band_level=(0.0, 0.0),
        axis_error_px=axis_error_px)


def fluorescent_instrument(rng: np.random.Generator) -> Instrument:
    """A compact spectrometer over roughly 340-780 nm (3648 px, 14/16-bit ADC) whose lines
    are 4-5.5 px wide, skewed toward the red, as used on fluorescent lamps."""
    det, gain, read_noise = random_detector(rng, averaged_probability=0.3,
                                            dark_corrected_probability=0.0)
    lo, hi = rng.uniform(330.0, 350.0), rng.uniform(760.0, 800.0)
    half = (hi - lo) / 2
    c2 = float(rng.uniform(-0.04, 0.0)) * half
    coeffs = (float((lo + hi) / 2 - c2), float(half), c2, 0.0)
    f0 = float(rng.uniform(4.0, 5.5))
    shape = LineShape(fwhm=(f0, f0 * float(rng.uniform(-0.1, 0.1))),
                      asymmetry=(float(rng.uniform(0.0, 0.2)),),
                      lorentz_fraction=float(rng.uniform(0.0, 0.04)),
                      tail_fraction=float(rng.uniform(0.0, 0.2)),
                      tail_length=f0 * float(rng.uniform(0.5, 1.2)), tail_side=1)
    return Instrument(n_pixels=3648, coeffs=coeffs, fwhm_px=f0, gain=gain,
                      read_noise=read_noise, background=0.0, saturation=det.adc_max,
                      name="synthetic compact spectrometer", shape=shape, detector=det)


#: Broad phosphor bands of an invented three-band fluorescent lamp: (centre nm, FWHM nm,
#: relative peak height) ranges; a blue band, green and red bands and a weak wide hump.
PHOSPHOR_BANDS = (
    ((440.0, 460.0), (30.0, 40.0), (0.4, 1.0)),
    ((535.0, 550.0), (10.0, 20.0), (0.5, 1.2)),
    ((605.0, 620.0), (10.0, 25.0), (0.6, 1.5)),
    ((480.0, 600.0), (35.0, 40.0), (0.1, 0.4)),
)

#: Narrower phosphor emission peaks (rare-earth multiplets blended by the spectrometer), a
#: few nm wide: several times a line's width, far narrower than the bands.  Positions
#: recalled from memory of green- and red-emitting phosphors; widths and heights invented.
PHOSPHOR_PEAKS = (
    ((486.0, 490.0), (3.0, 6.0), (0.2, 0.5)),
    ((541.0, 545.0), (2.5, 5.0), (0.8, 1.6)),
    ((585.0, 590.0), (2.0, 4.0), (0.2, 0.5)),
    ((609.0, 613.0), (2.0, 4.0), (1.0, 2.0)),
    ((625.0, 632.0), (2.0, 4.0), (0.15, 0.4)),
    ((705.0, 712.0), (2.0, 5.0), (0.1, 0.3)),
)


def fluorescent_lamp_exposure(
    rng: np.random.Generator,
    *,
    instrument: Instrument | None = None,
    band_level: tuple[float, float] = (0.3, 1.2),
    phosphor_peaks: bool = True,
    saturate_probability: float = 0.0,
    peak_fraction: tuple[float, float] = (0.3, 0.9),
    axis_error_px: float = 0.0,
) -> tuple[np.ndarray, ExposureTruth]:
    """A fluorescent-lamp exposure: the mercury lines standing on phosphor emission.

    Every listed Hg line on the detector is rendered (none missing, no extras) with the
    instrument's line shape, on the broad bands of :data:`PHOSPHOR_BANDS` (Gaussians
    10-40 nm wide) and, with ``phosphor_peaks``, the narrower :data:`PHOSPHOR_PEAKS`
    (2-6 nm: some 15-45 px on the default instrument, several line widths).  The
    phosphor light peaks at ``band_level`` of the brightest line's peak.  ``truth.bands``
    lists every band and peak; ``truth.lines`` only the mercury lines.
    """
    if instrument is None:
        instrument = fluorescent_instrument(rng)
    wl, rel, listed, index, drop = _lamp_on_detector(
        instrument, "Hg", rng, (0.0, 0.0), 0.3, 300.0, None, unlisted=0.03)
    table = PHOSPHOR_BANDS + (PHOSPHOR_PEAKS if phosphor_peaks else ())
    ranges = np.asarray([[r[0][0], r[0][1], r[1][0], r[1][1], r[2][0], r[2][1]]
                         for r in table])
    centres = rng.uniform(ranges[:, 0], ranges[:, 1])
    widths = rng.uniform(ranges[:, 2], ranges[:, 3])
    fluxes = rng.uniform(ranges[:, 4], ranges[:, 5]) * widths
    return _render_exposure(
        rng, instrument, wl, rel, listed, index, missing_index=drop, extra=(0.0, 0.0),
        saturate_probability=saturate_probability, peak_fraction=peak_fraction,
        continuum_level=(-3.0, -2.0), bands=(centres, widths, fluxes),
        band_level=band_level, axis_error_px=axis_error_px)
