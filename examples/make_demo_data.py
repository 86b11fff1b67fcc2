"""Regenerate the bundled demo data, deterministically, from the shipped line lists.

The scenario is invented: the LR-1, a bench grating spectrometer (3648-pixel linear CCD,
about 0.15 nm per pixel from 340 to 880 nm, 16-bit ADC) in the Lantern Row teaching
laboratory, which uses it for lamp calibration practicals and for a helium glow-tube
experiment.  Every file here is synthetic: lines rendered with ritzline's detector model
(pixel-integrated Gaussian line-spread function, Poisson photon noise, read noise,
saturation) from the line lists in ``line_lists/``.  Nothing is a measurement.

Run from the project root:  ``python examples/make_demo_data.py [OUTDIR]``
(default OUTDIR: ``examples/data``).
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np

from ritzline.levels import lamp_lines, transitions
from ritzline.synthetic import Instrument

SEED = 20261201
K_B_EV = 8.617333262e-5  # Boltzmann constant in eV/K (CODATA 2018)

# The LR-1: pixel -> air wavelength as a cubic in normalised pixel x in [-1, 1].
LR1 = Instrument(
    n_pixels=3648,
    coeffs=(609.0, 271.5, -2.6, -1.9),
    fwhm_px=2.8,
    gain=1.6,
    read_noise=6.0,
    background=180.0,
    saturation=65535.0,
    name="LR-1 bench spectrometer (invented)",
)


def response(wavelength_nm: np.ndarray) -> np.ndarray:
    """The LR-1's relative spectral response (grating blaze x CCD), peak 1 near 560 nm."""
    wl = np.asarray(wavelength_nm, float)
    return np.exp(-0.5 * ((wl - 560.0) / 190.0) ** 2) * (1.0 - 0.25 * np.tanh((wl - 800.0) / 60.0))


def shifted(instrument: Instrument, shift_px: float, fwhm_px: float | None = None) -> Instrument:
    """The same spectrometer after its spectrum moved by ``shift_px`` toward higher pixels."""
    dx = 2.0 * shift_px / (instrument.n_pixels - 1)
    moved = np.polynomial.Polynomial(instrument.coeffs)(np.polynomial.Polynomial([-dx, 1.0]))
    coeffs = tuple(float(c) for c in moved.coef)
    return Instrument(
        n_pixels=instrument.n_pixels,
        coeffs=coeffs,
        fwhm_px=fwhm_px or instrument.fwhm_px,
        gain=instrument.gain,
        read_noise=instrument.read_noise,
        background=instrument.background,
        saturation=instrument.saturation,
        name=instrument.name,
    )


def lamp_fluxes(lamp: str, peak_counts: float) -> tuple[np.ndarray, np.ndarray]:
    """Wavelengths and total line counts of a lamp seen through the LR-1's response."""
    table = lamp_lines(lamp, wavelength_range=(330.0, 890.0), medium="air")
    wl = np.asarray(table["wavelength"], float)
    intensity = np.asarray(table["intensity"], float)
    intensity = np.where(np.isfinite(intensity), intensity, np.nanmedian(intensity) * 0.3)
    flux = intensity * response(wl)
    # Peak pixel of a Gaussian of total F is about F / (1.064 FWHM): scale the brightest.
    flux *= peak_counts * 1.064 * LR1.fwhm_px / flux.max()
    return wl, flux


def _finite_max(values: np.ndarray) -> float:
    finite = values[np.isfinite(values)]
    return float(finite.max()) if finite.size else np.nan


def write_csv(path: Path, counts: np.ndarray, preamble: list[str]) -> None:
    rows = "\n".join(f"{i},{c:.1f}" for i, c in enumerate(counts))
    header = "".join(f"# {line}\n" for line in preamble)
    path.write_text(header + "pixel,counts\n" + rows + "\n", encoding="utf-8")


def main(outdir: Path) -> None:
    rng = np.random.default_rng(SEED)
    outdir.mkdir(parents=True, exist_ok=True)
    common = [
        "Lantern Row teaching laboratory - LR-1 bench spectrometer (invented; synthetic data)",
        "Detector: 3648-pixel linear CCD, 16-bit ADC, saturation level: 65535",
    ]

    # 1. Calibration lamp: mercury-argon pen lamp, strongest line just below full scale.
    wl, flux = lamp_fluxes("Hg+Ar", peak_counts=52000.0)
    counts = LR1.render(wl, flux, rng)
    write_csv(
        outdir / "hgar_lamp.csv",
        counts,
        [*common, "Source: Hg+Ar pen lamp", "Exposure time: 200 ms", "Date: 2026-11-30T08:55:00"],
    )

    # 2. Neon lamp on the same instrument (a second lamp type for the calibration example).
    wl, flux = lamp_fluxes("Ne", peak_counts=40000.0)
    write_csv(
        outdir / "neon_lamp.csv",
        LR1.render(wl, flux, rng),
        [*common, "Source: Ne lamp", "Exposure time: 100 ms", "Date: 2026-11-30T09:05:00"],
    )

    # 3. Helium glow tube with hydrogen and neon traces; Boltzmann-distributed upper levels
    #    at T_exc = 6000 K where transition probabilities are listed, published relative
    #    intensities otherwise; no order-sorting filter, so He 388.9 nm shows in 2nd order.
    t_exc = 6000.0
    parts = []
    for species, scale in (("He", 1.0), ("H", 0.08), ("Ne", 0.02)):
        tr = transitions(species, wavelength_range=(330.0, 890.0), medium="air",
                         observed_only=True)
        wlx = np.asarray(tr["wavelength"], float)
        gA = np.asarray(tr["g_upper"] * tr["aki"], float)
        boltz = gA / wlx * np.exp(-(np.asarray(tr["upper_ev"]) - tr["upper_ev"].min())
                                  / (K_B_EV * t_exc))
        listed = np.asarray(tr["intensity"], float)
        strength = np.where(np.isfinite(boltz), boltz / _finite_max(boltz),
                            listed / _finite_max(listed) * 0.5)
        keep = np.isfinite(strength) & (strength > 0)
        parts.append((wlx[keep], scale * strength[keep]))
    wl = np.concatenate([p[0] for p in parts])
    strength = np.concatenate([p[1] for p in parts])
    flux = strength * response(wl)
    flux *= 30000.0 * 1.064 * LR1.fwhm_px / flux.max()
    parent = np.argmax(np.where(np.abs(wl - 388.865) < 0.01, flux, 0))
    wl = np.append(wl, 2.0 * wl[parent])
    flux = np.append(flux, 0.04 * flux[parent] * response(2.0 * wl[parent]) / response(wl[parent]))
    write_csv(
        outdir / "helium_glow.csv",
        LR1.render(wl, flux, rng),
        [*common, "Source: He glow tube (H, Ne traces), 2.1 kV supply",
         "Exposure time: 500 ms", "Date: 2026-11-30T10:20:00"],
    )
    rows = "\n".join(f"{w:.1f},{r:.4f}" for w, r in zip(
        np.arange(330.0, 891.0, 5.0), response(np.arange(330.0, 891.0, 5.0)), strict=True))
    (outdir / "lr1_response.csv").write_text(
        "# LR-1 relative spectral response (invented; used to render the demo data)\n"
        "wavelength (nm),response\n" + rows + "\n", encoding="utf-8")

    # 4. A morning of lamp frames: thermal drift of up to 1.6 px toward higher pixels, the
    #    focus softening in the last frames, one file cut off by a full disk.
    series = outdir / "series"
    series.mkdir(exist_ok=True)
    wl, flux = lamp_fluxes("Hg+Ar", peak_counts=45000.0)
    for k in range(12):
        drift = 1.6 * (1.0 - np.exp(-k / 5.0))
        fwhm = LR1.fwhm_px * (1.0 + (0.12 if k >= 10 else 0.0))
        frame = shifted(LR1, drift, fwhm).render(wl, flux, rng)
        path = series / f"frame_{k:02d}.csv"
        write_csv(path, frame, [*common, "Source: Hg+Ar pen lamp", "Exposure time: 200 ms",
                                f"Date: 2026-11-30T{8 + k // 2:02d}:{30 * (k % 2):02d}:00"])
    bad = series / "frame_07.csv"
    text = bad.read_text(encoding="utf-8")
    bad.write_text(text[: len(text) // 3] + "12\x00\x00\x00", encoding="latin-1")


if __name__ == "__main__":
    main(Path(sys.argv[1]) if len(sys.argv) > 1 else Path(__file__).parent / "data")
