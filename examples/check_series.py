"""Batch-check a morning of lamp frames against the reference solution.

Run from the project root:  python examples/check_series.py [OUTDIR]
"""

import sys
from pathlib import Path

import ritzline
from ritzline.check import CheckLimits

here = Path(__file__).parent / "data"
out = Path(sys.argv[1]) if len(sys.argv) > 1 else Path("ritzline-examples")

reference = ritzline.calibrate(ritzline.read_spectrum(here / "hgar_lamp.csv"), lamps=("Hg", "Ar"))
summary = ritzline.check_exposures(
    [here / "series"],
    reference,
    limits=CheckLimits(max_shift_px=1.0, max_fwhm_change_pct=15.0, min_lines=5),
    outdir=out / "check",  # summary.ecsv, summary.json, figures, report.html
    workers=2,
)
for row in summary:
    print(f"{Path(row['file']).name:14s} {row['status']:5s} shift {row['shift_px']:+7.3f} px  "
          f"FWHM {row['fwhm_px']:5.2f} px  {row['reasons']}")
print(summary.meta["totals"])
