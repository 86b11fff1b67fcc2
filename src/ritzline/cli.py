"""The ``ritzline`` command line: each command parses its options, calls one library
function and formats the result.  Bad input prints one ``error: ...`` line and exits 2;
failed checks exit 1.
"""

import functools
import json
import sys

import click

from . import __version__
from .errors import RitzlineError

EXIT_FAILED = 1
EXIT_USAGE = 2


def _fail(message: str) -> None:
    click.echo(f"error: {message}", err=True)
    sys.exit(EXIT_USAGE)


def handle_errors(func):
    """Turn RitzlineError (and file-system errors) into one ``error:`` line and exit 2.

    With ``--debug`` on the group the traceback is shown instead.
    """

    @functools.wraps(func)
    def wrapper(*args, **kwargs):
        ctx = click.get_current_context()
        debug = bool(ctx.find_root().obj and ctx.find_root().obj.get("debug"))
        try:
            return func(*args, **kwargs)
        except (RitzlineError, OSError) as exc:
            if debug:
                raise
            _fail(" ".join(str(exc).split()) or type(exc).__name__)

    return wrapper


def echo_json(data) -> None:
    click.echo(json.dumps(data, indent=2, default=str))


@click.group(context_settings={"help_option_names": ["-h", "--help"], "max_content_width": 100})
@click.version_option(__version__, prog_name="ritzline")
@click.option("--debug", is_flag=True, help="Show full tracebacks instead of one-line errors.")
@click.pass_context
def main(ctx: click.Context, debug: bool) -> None:
    """ritzline: calibrate spectrometers against reference lamps, find emission lines,
    identify atomic transitions from Ritz wavelengths, and batch-check exposures.

    Run `ritzline COMMAND --help` for each command's options.
    """
    ctx.ensure_object(dict)
    ctx.obj["debug"] = debug


# Commands are defined below, one block each, in pipeline order:
# info, transitions, peaks, calibrate, match, check, demo.

# ---- info ------------------------------------------------------------------------------


def _spectrum_summary(path: str, column) -> dict:
    """What `info` reports of one file (a plain dict, so --json can print it as is)."""
    import numpy as np

    from .spectrum import read_spectrum, spectrum_arrays

    arr = spectrum_arrays(read_spectrum(path, column=column))
    good = arr.counts[~arr.mask]
    meta = arr.meta
    return {
        "file": path,
        "format": meta.get("format"),
        "samples": int(arr.counts.size),
        "axis": meta.get("axis_kind"),
        "axis_unit": arr.unit,
        "axis_min": float(np.min(arr.axis)),
        "axis_max": float(np.max(arr.axis)),
        "counts_min": float(good.min()),
        "counts_max": float(good.max()),
        "masked": int(meta.get("n_masked", 0)),
        "saturation": meta.get("saturation"),
        "saturation_source": meta.get("saturation_source"),
        "saturated": int(meta.get("n_saturated", 0)),
        "column": meta.get("column"),
        "columns": list(meta.get("columns", [])),
        "exposure_time_s": meta.get("exposure_time"),
        "timestamp": meta.get("timestamp"),
        "medium": meta.get("medium"),
    }


@main.command()
@click.argument("files", nargs=-1, required=True, type=click.Path(dir_okay=False))
@click.option("--column", default=None, help="Counts column to read: header name or 0-based index.")
@click.option("--json", "as_json", is_flag=True, help="Print machine-readable JSON instead.")
@handle_errors
def info(files: tuple[str, ...], column: str | None, as_json: bool) -> None:
    """Describe spectrum FILES: samples, axis, count range, masked and saturated samples,
    and the counts columns found.  Reads text (CSV/TSV/semicolon/whitespace), FITS and ECSV.
    """
    if column is not None and column.lstrip("-").isdigit():
        column = int(column)
    summaries = [_spectrum_summary(path, column) for path in files]
    if as_json:
        echo_json(summaries if len(summaries) > 1 else summaries[0])
        return
    for s in summaries:
        unit = "px" if s["axis_unit"] == "pix" else "nm"
        sat = (
            f"{s['saturated']} samples at or above {s['saturation']:g} ({s['saturation_source']})"
            if s["saturation"] is not None
            else "no saturation level known"
        )
        click.echo(f"{s['file']}  [{s['format']}]")
        click.echo(f"  samples     {s['samples']}")
        click.echo(f"  axis        {s['axis']}, {s['axis_min']:g} to {s['axis_max']:g} {unit}")
        click.echo(f"  counts      {s['counts_min']:g} to {s['counts_max']:g}")
        click.echo(f"  masked      {s['masked']}")
        click.echo(f"  saturated   {sat}")
        click.echo(f"  column      {s['column']}  (counts columns: {', '.join(s['columns'])})")
        if s["exposure_time_s"] is not None:
            click.echo(f"  exposure    {s['exposure_time_s']:g} s")
        if s["timestamp"]:
            click.echo(f"  time        {s['timestamp']}")

# ---- transitions -----------------------------------------------------------------------

# ---- peaks -----------------------------------------------------------------------------

# ---- calibrate -------------------------------------------------------------------------

# ---- match -----------------------------------------------------------------------------

# ---- check -----------------------------------------------------------------------------


@main.command("check")
@click.argument("inputs", nargs=-1, required=True, type=click.Path(exists=True))
@click.option("--solution", "solution_path", required=True, type=click.Path(exists=True,
              dir_okay=False), help="Reference wavelength solution (JSON from `calibrate`).")
@click.option("--lamp", multiple=True, help="Take the expected lines from this lamp's list "
              "(repeatable) instead of the lines the reference solution used.")
@click.option("--dark", type=click.Path(exists=True, dir_okay=False),
              help="Dark frame given to the line finder for every exposure.")
@click.option("-o", "--outdir", required=True, type=click.Path(file_okay=False),
              help="Output folder: summary.ecsv, summary.json, figures, report.html.")
@click.option("--workers", type=click.IntRange(min=1), default=None,
              help="Local worker processes (default: number of cores).")
@click.option("--dask-scheduler", metavar="ADDRESS|local", default=None,
              help="Run on a Dask cluster: a scheduler address (tcp://host:port) or 'local'.")
@click.option("--max-shift", type=click.FloatRange(min=0, min_open=True), default=1.0,
              show_default=True, help="Fail above this shift (px); warn above half of it.")
@click.option("--max-fwhm-change", type=click.FloatRange(min=0, min_open=True), default=15.0,
              show_default=True, help="Fail when the FWHM changes by more than this (percent); "
              "warn above half of it.")
@click.option("--min-lines", type=click.IntRange(min=1), default=5, show_default=True,
              help="Fail when fewer expected lines are found.")
@click.option("--resume", is_flag=True,
              help="Skip exposures already checked into OUTDIR by an interrupted run.")
@click.option("--pattern", default=None, metavar="GLOB", help="Files to take from folders, "
              "e.g. '*.fits' or '**/*.txt' (default: usual spectrum suffixes).")
@click.option("--strict", is_flag=True, help="Exit 1 on warnings too.")
@handle_errors
def check(inputs, solution_path, lamp, dark, outdir, workers, dask_scheduler, max_shift,
          max_fwhm_change, min_lines, resume, pattern, strict) -> None:
    """Check exposures against a reference solution: drift, width, saturation, missing lines.

    INPUTS are exposure files or folders.  Writes summary.ecsv, summary.json, figures and a
    self-contained report.html into OUTDIR.  Exit 0 when every exposure passes (warnings
    too unless --strict), 1 when any fails or cannot be read, 2 on bad input.
    """
    from .check import CheckLimits, check_exposures

    limits = CheckLimits(max_shift_px=max_shift, max_fwhm_change_pct=max_fwhm_change,
                         min_lines=min_lines)
    progress_cm = None
    progress = None
    if sys.stderr.isatty():
        from rich.progress import BarColumn, MofNCompleteColumn, Progress, TimeRemainingColumn

        progress_cm = Progress("checking", BarColumn(), MofNCompleteColumn(),
                               TimeRemainingColumn(), transient=True)
        bar = progress_cm.add_task("check", total=None)

        def progress(done: int, total: int) -> None:
            progress_cm.update(bar, completed=done, total=total)

    try:
        if progress_cm is not None:
            progress_cm.start()
        table = check_exposures(
            inputs, solution_path, lamp=list(lamp) or None, dark=dark, limits=limits,
            outdir=outdir, workers=workers, dask_scheduler=dask_scheduler, resume=resume,
            pattern=pattern, progress=progress,
        )
    except KeyboardInterrupt:
        if progress_cm is not None:
            progress_cm.stop()
        click.echo(f"interrupted; finished exposures are kept in {outdir}; run again with "
                   "--resume to check the rest", err=True)
        sys.exit(130)
    finally:
        if progress_cm is not None:
            progress_cm.stop()
    totals = table.meta["totals"]
    click.echo(
        f"{totals['exposures']} exposures: {totals['pass']} pass, {totals['warn']} warn, "
        f"{totals['fail']} fail, {totals['error']} error"
    )
    shown = 0
    for row in table:
        if row["status"] != "pass" and shown < 20:
            click.echo(f"  {row['status']:5s} {row['file']}: {row['reasons']}")
            shown += 1
    hidden = len(table) - totals["pass"] - shown
    if hidden > 0:
        click.echo(f"  ... and {hidden} more; see {outdir}/report.html")
    click.echo(f"wrote {outdir}/summary.ecsv, summary.json, report.html")
    if totals["fail"] or totals["error"] or (strict and totals["warn"]):
        sys.exit(EXIT_FAILED)


# ---- demo ------------------------------------------------------------------------------
