"""Invented lamp-exposure sequences with known drift, for the batch-check tests and benchmark.

The bench instrument and its line list are invented (a 3648-pixel detector over roughly
545-715 nm with well separated lines); nothing here is a measurement.  Each exposure is a
``synthetic.lamp_exposure`` of the instrument moved on the detector by a known shift and
stretch, so a line at reference pixel p sits at p + shift + stretch * (p - centre).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ritzline.synthetic import Instrument, lamp_exposure

N_PIXELS = 3648
CENTRE = (N_PIXELS - 1) / 2
SATURATION = 65535.0


def bench_instrument(fwhm_px: float = 2.6) -> Instrument:
    """The invented bench spectrometer (power series in normalised pixel, air nm)."""
    return Instrument(
        n_pixels=N_PIXELS,
        coeffs=(630.0, 85.0, 0.8, -0.4),
        fwhm_px=fwhm_px,
        gain=1.5,
        read_noise=6.0,
        background=150.0,
        saturation=SATURATION,
        name="invented bench spectrometer",
    )


def bench_lines(seed: int = 7, n: int = 36) -> dict:
    """An invented lamp line list: air wavelengths (nm) at least ~10 px apart, with relative
    intensities within a factor 3 so that every line is bright."""
    rng = np.random.default_rng(seed)
    inst = bench_instrument()
    pix = np.sort(rng.choice(np.arange(60, N_PIXELS - 60, 12), size=n, replace=False))
    pix = pix + rng.uniform(-1, 1, n)
    return {"wavelength": inst.wavelength(pix), "intensity": rng.uniform(0.35, 1.0, n)}


def drifted(inst: Instrument, shift: float, stretch: float = 0.0, fwhm_px=None) -> Instrument:
    """The instrument with its spectrum moved: reference pixel p -> p + shift + stretch*(p-c).

    In normalised pixel x = (p - c)/c the old x_ref = (x - shift/c) / (1 + stretch), so the
    new power series is the old one composed with that linear map.
    """
    c = (inst.n_pixels - 1) / 2
    a = 1.0 / (1.0 + stretch)
    b = -shift / c * a
    poly = np.polynomial.Polynomial(inst.coeffs)(np.polynomial.Polynomial([b, a]))
    coeffs = tuple(float(v) for v in poly.coef)
    return Instrument(
        n_pixels=inst.n_pixels,
        coeffs=coeffs,
        fwhm_px=inst.fwhm_px if fwhm_px is None else fwhm_px,
        gain=inst.gain,
        read_noise=inst.read_noise,
        background=inst.background,
        saturation=inst.saturation,
        name=inst.name,
    )


def clean_exposure(inst: Instrument, lines: dict, rng: np.random.Generator, **kw):
    """A lamp exposure with no missing/extra lines, no saturation and no spikes (unless
    overridden in ``kw``)."""
    opts = {
        "missing": (0.0, 0.0),
        "extra": (0.0, 0.0),
        "saturate": (0.0, 0.0),
        "spikes": (0, 0),
        "intensity_scatter": 0.2,
    }
    opts.update(kw)
    return lamp_exposure(inst, lines, rng, **opts)


def write_text_exposure(path: Path, counts: np.ndarray, *, timestamp: str | None = None) -> Path:
    """One counts column with a short '#' preamble (time stamp, saturation level)."""
    head = ["# invented bench spectrometer, lamp exposure", f"# saturation: {SATURATION:.0f}"]
    if timestamp:
        head.append(f"# timestamp: {timestamp}")
    body = "\n".join(f"{v:.1f}" for v in counts)
    path.write_text("\n".join([*head, "counts", body]) + "\n")
    return path


def reference_solution(inst: Instrument, lines: dict, rng: np.random.Generator):
    """A reference Solution as a calibration would make it: the lines of one exposure of the
    undrifted instrument measured with ``find_lines``, paired with their wavelengths; the
    pixel -> wavelength map is the instrument's own (exact, as a Chebyshev series)."""
    from ritzline.calibration import Solution
    from ritzline.peaks import find_lines

    counts, truth = clean_exposure(inst, lines, rng)
    found = find_lines(counts, fwhm_guess=inst.fwhm_px, saturation=SATURATION)
    fp = np.asarray(found["pixel"], float)
    j = np.abs(fp[None, :] - truth.pixel[:, None]).argmin(axis=1)
    ok = np.abs(fp[j] - truth.pixel) < 1.0
    cheb = np.polynomial.chebyshev.poly2cheb(inst.coeffs)
    # the file stores each line's residual (fit minus reference) and their RMS; Solution.load
    # checks the coefficients against them
    fit = np.polynomial.chebyshev.chebval(2 * fp[j[ok]] / (inst.n_pixels - 1) - 1, cheb)
    resid = fit - truth.wavelength[ok]
    doc = {
        "schema": "ritzline.wavelength-solution",
        "schema_version": 1,
        "polynomial": {
            "kind": "chebyshev",
            "domain": [0, inst.n_pixels - 1],
            "coefficients": [float(c) for c in cheb],
            "covariance": np.diag(np.full(cheb.size, 1e-8)).tolist(),
        },
        "medium": "air",
        "lamps": ["invented"],
        "n_pixels": inst.n_pixels,
        "fwhm_pixel": float(np.median(np.asarray(found["fwhm_pixel"], float)[j[ok]])),
        "rms_nm": float(np.sqrt(np.mean(resid**2))),
        "rms_pixel": 0.01,
        "confidence": 1.0,
        "verdict": "confident",
        "lines": [
            {
                "pixel": float(fp[k]),
                "pixel_err": float(found["pixel_err"][k]),
                "wavelength_ref": float(w),
                "wavelength_ref_err": 0.0001,
                "species": "invented",
                "designation": "",
                "residual_nm": float(r),
                "used": True,
                "reason": "",
            }
            for k, w, r in zip(j[ok], truth.wavelength[ok], resid, strict=True)
        ],
    }
    return Solution.from_dict(doc, source="synthetic reference")


def write_sequence(
    folder: Path,
    inst: Instrument,
    lines: dict,
    rng: np.random.Generator,
    shifts,
    stretches=None,
    fwhms=None,
    *,
    start: str = "2026-03-14T08:00:00",
    step_s: int = 60,
) -> list[Path]:
    """Write one text exposure per shift (and stretch, FWHM), time-stamped ``step_s`` apart."""
    folder.mkdir(parents=True, exist_ok=True)
    shifts = np.asarray(shifts, float)
    stretches = np.zeros_like(shifts) if stretches is None else np.asarray(stretches, float)
    t0 = np.datetime64(start)
    paths = []
    for i, s in enumerate(shifts):
        fwhm = None if fwhms is None else float(fwhms[i])
        counts, _ = clean_exposure(drifted(inst, s, stretches[i], fwhm), lines, rng)
        stamp = str(t0 + np.timedelta64(i * step_s, "s"))
        paths.append(write_text_exposure(folder / f"lamp_{i:05d}.txt", counts, timestamp=stamp))
    return paths
