"""Identify the lines of the helium glow tube: transitions, upper levels, temperature.

Run from the project root:  python examples/identify_discharge.py [OUTDIR]
"""

import sys
from pathlib import Path

import numpy as np

import ritzline
from ritzline.identify import read_response

here = Path(__file__).parent / "data"
out = Path(sys.argv[1]) if len(sys.argv) > 1 else Path("ritzline-examples")
out.mkdir(parents=True, exist_ok=True)

solution = ritzline.calibrate(ritzline.read_spectrum(here / "hgar_lamp.csv"), lamps=("Hg", "Ar"))
glow = ritzline.read_spectrum(here / "helium_glow.csv")
result = ritzline.identify_lines(
    glow,
    species=None,  # detect which of the shipped species are present
    solution=solution,
    max_electron_energy=25.0,  # eV; levels above it would be flagged
    response=read_response(here / "lr1_response.csv"),
)

present = [row["species"] for row in result.species if row["present"]]
print("species present:", ", ".join(present))
for row in result.lines[:8]:
    print(f"{row['wavelength']:9.3f} nm  {row['species'] or '?':5s} {row['upper']:28s} "
          f"{row['upper_energy_ev']:6.2f} eV  p={row['probability']:.2f}")
lowest = result.levels[np.argmin(result.levels["energy_ev"])]
print(f"lowest excited upper level: {lowest['species']} {lowest['upper']} at "
      f"{lowest['energy_ev']:.3f} eV")
for fit in result.boltzmann:
    if fit.corrected and np.isfinite(fit.temperature_k):
        print(f"{fit.species}: T_exc = {fit.temperature_k:.0f} ± {fit.temperature_err_k:.0f} K")

result.lines.write(out / "lines.ecsv", overwrite=True)
result.levels.write(out / "levels.ecsv", overwrite=True)
