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

# ---- demo ------------------------------------------------------------------------------
