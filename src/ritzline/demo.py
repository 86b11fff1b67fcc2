"""The end-to-end demonstration on the bundled example data (an invented LR-1 bench
spectrometer in an invented teaching laboratory; every file is synthetic, see
``examples/make_demo_data.py``): calibrate against the Hg+Ar lamp, identify the lines of a
helium glow tube, batch-check a drifting morning of lamp frames.
"""

from __future__ import annotations

import os
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ._io import write_table
from ._resources import data_path

__all__ = ["DemoResult", "run_demo"]

DEMO_LAMP = ("Hg", "Ar")


@dataclass(frozen=True)
class DemoResult:
    """What the demo found (short facts for people) and every file it wrote."""

    facts: dict
    files: dict[str, list[Path]] = field(default_factory=dict)


def run_demo(
    outdir: str | os.PathLike = "ritzline-demo",
    *,
    workers: int | None = None,
    say: Callable[[str], None] | None = None,
) -> DemoResult:
    """Run calibration, identification and a batch check on the bundled data.

    Parameters
    ----------
    outdir : path
        Folder for every output (made if missing): ``calibration/``, ``identification/``,
        ``check/``.
    workers : int, optional
        Worker processes for the batch check (default: number of cores).
    say : callable, optional
        Called with a one-line progress message before each stage.
    """
    from . import plots
    from .calibration import calibrate, with_input
    from .check import check_exposures
    from .identify import identify_lines, read_response
    from .spectrum import read_spectrum

    say = say or (lambda message: None)
    out = Path(outdir)
    folders = {name: out / name for name in ("calibration", "identification", "check")}
    for folder in folders.values():
        folder.mkdir(parents=True, exist_ok=True)
    facts: dict = {}
    files: dict[str, list[Path]] = {}

    say("calibrating the Hg+Ar lamp exposure ...")
    lamp_path = data_path("examples", "hgar_lamp.csv")
    solution = calibrate(read_spectrum(lamp_path), DEMO_LAMP)
    solution = with_input(solution, lamp_path)
    cal = folders["calibration"]
    files["calibration"] = [
        solution.save(cal / "solution.json"),
        plots.calibration_residuals(solution, cal / "residuals.png"),
    ]
    facts["calibration"] = solution.summary()

    say("identifying the helium glow-tube lines ...")
    glow_path = data_path("examples", "helium_glow.csv")
    glow = read_spectrum(glow_path)
    result = identify_lines(
        glow, None, solution=solution, medium=solution.medium,
        response=read_response(data_path("examples", "lr1_response.csv")),
    )
    ident = folders["identification"]
    write_table(result.lines, ident / "lines.ecsv")
    write_table(result.levels, ident / "levels.ecsv")
    write_table(result.species, ident / "species.ecsv")
    files["identification"] = [
        ident / "lines.ecsv",
        ident / "levels.ecsv",
        ident / "species.ecsv",
        plots.plot_identify_spectrum(result, ident / "spectrum.png", spectrum=glow,
                                     solution=solution),
        plots.plot_identify_levels(result, ident / "level_diagram.png"),
    ]
    if result.boltzmann:
        files["identification"].append(
            plots.plot_identify_boltzmann(result.boltzmann, ident / "boltzmann.png"))
    identified = np.asarray(result.lines["species"]) != ""
    temperatures = {
        bp.species: (bp.temperature_k, bp.temperature_err_k)
        for bp in result.boltzmann
        if bp.corrected and np.isfinite(bp.temperature_k)
    }
    facts["identification"] = {
        "lines": len(result.lines),
        "identified": int(identified.sum()),
        "second_order": int(sum("second_order" in f for f in result.lines["flags"])),
        "present": [str(r["species"]) for r in result.species if r["present"]],
        "levels": len(result.levels),
        "temperatures": temperatures,
    }

    say("checking the series of lamp frames ...")
    check_dir = folders["check"]
    summary = check_exposures(
        [data_path("examples", "series")], cal / "solution.json", outdir=check_dir,
        workers=workers,
    )
    first = ("summary.ecsv", "summary.json", "report.html")
    files["check"] = sorted(
        (p for p in check_dir.iterdir() if not p.name.startswith(".")),
        key=lambda p: (first.index(p.name) if p.name in first else len(first), p.name),
    )
    shifts = np.asarray(summary["shift_px"], float)
    facts["check"] = {
        **summary.meta["totals"],
        "max_shift_px": float(np.nanmax(shifts)) if np.isfinite(shifts).any() else None,
        "not_pass": [
            (Path(str(r["file"])).name, str(r["status"]), str(r["reasons"]))
            for r in summary
            if r["status"] != "pass"
        ],
    }
    return DemoResult(facts=facts, files=files)
