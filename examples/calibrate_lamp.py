"""Calibrate the LR-1 against its Hg+Ar lamp exposure and use the solution.

Run from the project root:  python examples/calibrate_lamp.py [OUTDIR]
"""

import sys
from pathlib import Path

import ritzline
from ritzline.plots import calibration_residuals

here = Path(__file__).parent
out = Path(sys.argv[1]) if len(sys.argv) > 1 else Path("ritzline-examples")
out.mkdir(parents=True, exist_ok=True)

lamp = ritzline.read_spectrum(here / "data" / "hgar_lamp.csv")
solution = ritzline.calibrate(lamp, lamps=("Hg", "Ar"))  # no initial guess needed

n_used = int(solution.matches["used"].sum())
print(f"{n_used} lines, RMS {solution.rms_nm * 1e3:.2f} pm ({solution.rms_pixel:.3f} px),"
      f" degree {solution.degree}, {solution.verdict}")
for pixel in (0, 1824, 3647):
    print(f"pixel {pixel:4d}: {solution.wavelength(pixel):9.4f} ± "
          f"{solution.wavelength_err(pixel) * 1e3:.2f} pm ({solution.medium})")
print("Hg 546.0750 nm falls on pixel", f"{solution.pixel(546.0750):.2f}")

solution.save(out / "solution.json")
calibration_residuals(solution, out / "residuals.png")

# Next morning: re-calibrate quickly from yesterday's solution (drift only).
again = ritzline.calibrate(lamp, lamps=("Hg", "Ar"), guess=ritzline.Solution.load(out /
                                                                                   "solution.json"))
print(f"re-calibrated from the guess: RMS {again.rms_pixel:.3f} px")
