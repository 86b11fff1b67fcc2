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


def _one_line(text: str) -> str:
    return " ".join(str(text).split())


_READING: list[str] = []  # the input file being worked on, for messages that lack it


class _WarningPrinter:
    """Prints every warning once as ``warning: <file>: <where>: <what>`` (no source paths).

    ritzline's own warnings carry their file and place; any other library's warning is
    prefixed with the input file being worked on and its category.
    """

    def __init__(self):
        self.seen: set[str] = set()

    def __call__(self, message, category, filename, lineno, file=None, line=None):
        from .errors import RitzlineWarning

        text = _one_line(message)
        if not issubclass(category, RitzlineWarning):
            text = f"{category.__name__}: {text}"
            if _READING and not text.startswith(_READING[-1]):
                text = f"{_READING[-1]}: {text}"
        if text not in self.seen:
            self.seen.add(text)
            click.echo(f"warning: {text}", err=True)


def handle_errors(func):
    """The one diagnostics path of every command.

    RitzlineError and file-system errors become one ``error:`` line and exit 2; warnings
    (ritzline's own and any library's) become ``warning:`` lines; a closed output pipe ends
    the command quietly; anything unexpected is one ``error: internal error`` line.  With
    ``--debug`` on the group tracebacks are shown instead.
    """

    @functools.wraps(func)
    def wrapper(*args, **kwargs):
        import warnings

        ctx = click.get_current_context()
        debug = bool(ctx.find_root().obj and ctx.find_root().obj.get("debug"))
        _READING.clear()
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("always")
                if not debug:
                    # numerical notes from inside numpy ("Mean of empty slice") say nothing
                    # a user can act on; an empty line table is reported by each command
                    warnings.filterwarnings("ignore", category=RuntimeWarning,
                                            module=r"numpy(\.|$)")
                    warnings.filterwarnings("ignore", message=r"find_lines: .*empty line table")
                warnings.showwarning = _WarningPrinter()
                return func(*args, **kwargs)
        except BrokenPipeError:
            _quiet_broken_pipe()
        except (RitzlineError, OSError) as exc:
            if debug:
                raise
            _fail(_with_file(_one_line(exc) or type(exc).__name__))
        except (click.exceptions.Exit, click.ClickException, click.Abort, SystemExit,
                KeyboardInterrupt):
            raise
        except Exception as exc:
            if debug:
                raise
            _fail(f"internal error: {type(exc).__name__}: {_one_line(exc)} (run "
                  "`ritzline --debug ...` for the traceback, and please report it)")

    return wrapper


def _with_file(message: str) -> str:
    """The message, prefixed with the input file when it names no file itself."""
    import os

    head = message.split(": ", 1)[0]
    if not _READING or os.path.exists(head) or any(p in message for p in _READING):
        return message
    return f"{_READING[-1]}: {message}"


def _quiet_broken_pipe() -> None:
    """The reader of our output went away (``ritzline transitions Ne | head``): stop
    quietly, without a second error when Python flushes stdout at exit."""
    import os

    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
    except (OSError, ValueError):
        pass
    sys.exit(0)


def _column_arg(column: str | None):
    """--column value: a 0-based index when it is a number, else a name."""
    if column is not None and column.strip().lstrip("-").isdigit():
        return int(column)
    return column


def read_input(path, column=None, hdu=None, pixel_origin=None, **kwargs):
    """read_spectrum with the command-line reader options."""
    from .spectrum import read_spectrum

    _READING.append(str(path))
    return read_spectrum(path, column=_column_arg(column), hdu=hdu, pixel_origin=pixel_origin,
                         **kwargs)


def reader_options(func):
    """--hdu and --pixel-origin for every command that reads a spectrum."""
    func = click.option(
        "--pixel-origin", type=click.IntRange(min=0), default=None,
        help="Number the file gives the first detector pixel (1 for 1-based exports).",
    )(func)
    return click.option(
        "--hdu", default=None, metavar="N|NAME",
        help="FITS: the HDU to read (0-based number or EXTNAME; default the first with data).",
    )(func)


def _checked_suffix(value: str | None, check) -> str | None:
    """A click callback's body: ``value`` unchanged when ``check`` accepts its suffix."""
    if value is None:
        return None
    try:
        check(value)
    except RitzlineError as exc:
        raise click.BadParameter(str(exc)) from None
    return value


def figure_path(_ctx, _param, value: str | None):
    """Click callback: a figure path whose suffix names a format ritzline writes."""
    from .plots import figure_format

    return _checked_suffix(value, figure_format)


def table_path(_ctx, _param, value: str | None):
    """Click callback: a table path whose suffix names a format ritzline writes."""
    from ._io import table_format

    return _checked_suffix(value, table_format)


def parse_wavelength_range(_ctx, _param, value: str | None):
    """Click callback: parse "400:700" into (400.0, 700.0) nm (None when not given)."""
    if value is None:
        return None
    try:
        lo, hi = (float(x) for x in value.split(":"))
    except ValueError:
        raise click.BadParameter(f"expected MIN:MAX in nm, e.g. 400:700, not {value!r}") from None
    if not lo < hi:
        raise click.BadParameter(f"MIN must be below MAX, got {value!r}")
    return lo, hi


def parse_axis_err(_ctx, _param, value: str | None):
    """Click callback: "2px", "2 px", "0.5nm" or a bare number of pixels -> a Quantity."""
    if value is None:
        return None
    import astropy.units as u

    text = value.strip().lower().replace(" ", "")
    unit = u.pix
    for suffix, un in (("px", u.pix), ("pix", u.pix), ("nm", u.nm)):
        if text.endswith(suffix):
            text, unit = text[: -len(suffix)], un
            break
    try:
        number = float(text)
    except ValueError:
        raise click.BadParameter(f"expected a distance such as 2px or 0.5nm, not {value!r}") \
            from None
    if not number >= 0:
        raise click.BadParameter(f"the axis uncertainty cannot be negative, got {value!r}")
    return number * unit


def echo_json(data) -> None:
    click.echo(json.dumps(data, indent=2, default=str))


class _Group(click.Group):
    """The command group; usage errors are printed as one ``error:`` line too."""

    def main(self, args=None, prog_name=None, complete_var=None, standalone_mode=True,
             **extra):
        try:
            rv = super().main(args, prog_name, complete_var, standalone_mode=False, **extra)
        except click.exceptions.NoArgsIsHelpError as exc:
            click.echo(exc.ctx.get_help() if exc.ctx else str(exc), err=True)
            sys.exit(EXIT_USAGE)
        except click.UsageError as exc:
            command = exc.ctx.command_path if exc.ctx else "ritzline"
            click.echo(f"error: {command}: {_one_line(exc.format_message())} (see "
                       f"'{command} --help')", err=True)
            sys.exit(EXIT_USAGE)
        except click.ClickException as exc:
            click.echo(f"error: {_one_line(exc.format_message())}", err=True)
            sys.exit(exc.exit_code)
        except click.Abort:
            click.echo("error: aborted", err=True)
            sys.exit(130)
        except BrokenPipeError:
            _quiet_broken_pipe()
        if not standalone_mode:
            return rv
        sys.exit(rv if isinstance(rv, int) else 0)


@click.group(cls=_Group,
             context_settings={"help_option_names": ["-h", "--help"], "max_content_width": 100})
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


def _spectrum_summary(path: str, column, hdu=None, pixel_origin=None) -> dict:
    """What `info` reports of one file (a plain dict, so --json can print it as is)."""
    import numpy as np

    from .spectrum import spectrum_arrays

    arr = spectrum_arrays(read_input(path, column, hdu, pixel_origin))
    good = arr.counts[~arr.mask]
    if not good.size:
        good = np.array([np.nan])
    meta = arr.meta
    return {
        "file": path,
        "format": meta.get("format"),
        "samples": int(np.count_nonzero(arr.present)),
        "axis": meta.get("axis_kind"),
        "axis_unit": arr.unit,
        "axis_min": float(np.min(arr.axis[arr.present])),
        "axis_max": float(np.max(arr.axis[arr.present])),
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
        "pixel_range": meta.get("pixel_range"),
        "pixel_gaps": meta.get("pixel_gaps"),
        "footer": meta.get("footer"),
    }


@main.command()
@click.argument("files", nargs=-1, required=True, type=click.Path(dir_okay=False))
@click.option("--column", default=None, help="Counts column to read: header name or 0-based index.")
@click.option("--json", "as_json", is_flag=True, help="Print machine-readable JSON instead.")
@reader_options
@handle_errors
def info(files: tuple[str, ...], column: str | None, as_json: bool, hdu, pixel_origin) -> None:
    """Describe spectrum FILES: samples, axis, count range, masked and saturated samples,
    and the counts columns found.  Reads text (CSV/TSV/semicolon/whitespace), FITS and ECSV.
    """
    summaries = [_spectrum_summary(path, column, hdu, pixel_origin) for path in files]
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
        if s["pixel_gaps"]:
            lo, hi = s["pixel_range"]
            click.echo(f"  pixels      {lo} to {hi}, {s['pixel_gaps']} missing (masked)")
        click.echo(f"  counts      {s['counts_min']:g} to {s['counts_max']:g}")
        click.echo(f"  masked      {s['masked']}")
        click.echo(f"  saturated   {sat}")
        click.echo(f"  column      {s['column']}  (counts columns: {', '.join(s['columns'])})")
        if s["exposure_time_s"] is not None:
            click.echo(f"  exposure    {s['exposure_time_s']:g} s")
        if s["timestamp"]:
            click.echo(f"  time        {s['timestamp']}")
        if s["footer"]:
            click.echo(f"  after data  {_one_line(s['footer'])[:60]} (ignored)")

# ---- transitions -----------------------------------------------------------------------


def _transitions_flags(row, blend_label: str) -> str:
    flags = []
    if row["observed"]:
        flags.append("obs" if row["ritz"] else "obs(no levels)")
    if row["intercombination"]:
        flags.append("intercomb")
    if row["lower_kind"]:
        flags.append(str(row["lower_kind"]))
    if row["memory"]:
        flags.append("memory")
    if blend_label:
        flags.append(blend_label)
    return " ".join(flags)


def _transitions_print(table, medium: str, blend_of: dict[int, str], *,
                       console=None) -> None:
    """The transitions table.  Numbers are never cut: the level names and flags wrap, and
    on a terminal too narrow for every column the optional ones are left out, with a line
    saying which (``-o`` writes them all)."""
    import math

    from rich import box
    from rich.console import Console
    from rich.table import Table as RichTable

    def num(value, fmt: str) -> str:
        return "" if value is None or not math.isfinite(float(value)) else format(value, fmt)

    columns = [  # (header, justify, optional, cell)
        ("species", "left", False, lambda r, i: str(r["species"])),
        ("λ (nm)", "right", False, lambda r, i: num(r["wavelength"], ".4f")),
        ("±", "right", False, lambda r, i: num(r["wavelength_err"], ".4f")),
        ("published", "right", True, lambda r, i: num(r["wavelength_obs"], ".5f")),
        ("lower", "left", False, lambda r, i: str(r["lower"])),
        ("upper", "left", False, lambda r, i: str(r["upper"])),
        ("E_up (eV)", "right", False, lambda r, i: num(r["upper_ev"], ".3f")),
        ("rel. int.", "right", True, lambda r, i: num(r["intensity"], "g")),
        ("A_ki (s⁻¹)", "right", True, lambda r, i: num(r["aki"], ".3g")),
        ("flags", "left", False, lambda r, i: _transitions_flags(r, blend_of.get(i, ""))),
    ]
    cells = [[cell(row, i) for (_, _, _, cell) in columns] for i, row in enumerate(table)]
    widths = [max([len(h)] + [len(c[k]) for c in cells]) for k, (h, *_) in enumerate(columns)]
    if console is None:
        console = Console()
        if not console.is_terminal:
            console = Console(width=220)  # files and pipes get whole rows
    wrapping = {"lower", "upper", "flags"}
    # words of the wrapping columns need room too: their longest word
    for k, (h, *_) in enumerate(columns):
        if h in wrapping:
            widths[k] = max([len(h)] + [len(w) for c in cells for w in c[k].split()] or [0])
    keep = list(range(len(columns)))
    dropped = []
    for k in (8, 7, 3):  # A_ki, rel. int., published: left out first
        if sum(widths[j] + 3 for j in keep) <= console.width:
            break
        keep.remove(k)
        dropped.append(columns[k][0])
    rt = RichTable(
        title=f"{len(table)} transitions, wavelengths in {medium}",
        title_justify="left",
        box=box.SIMPLE_HEAD,
    )
    for k in keep:
        header, justify, _, _ = columns[k]
        if header in wrapping:
            rt.add_column(header, justify=justify, overflow="fold", min_width=widths[k])
        else:
            rt.add_column(header, justify=justify, no_wrap=True, min_width=widths[k])
    for row_cells in cells:
        rt.add_row(*(row_cells[k] for k in keep))
    console.print(rt)
    if dropped:
        console.print(f"(terminal too narrow: left out {', '.join(reversed(dropped))}; "
                      "widen it or write the table with -o)")


@main.command("transitions")
@click.argument("species", nargs=-1, required=True)
@click.option(
    "--range",
    "wavelength_range",
    callback=parse_wavelength_range,
    metavar="MIN:MAX",
    help="Wavelength range in nm (in the chosen medium), e.g. 400:700.",
)
@click.option(
    "--medium",
    type=click.Choice(["air", "vacuum"]),
    default="air",
    show_default=True,
    help="Medium of the wavelengths (standard air, Peck & Reeder 1972; air = vacuum < 200 nm).",
)
@click.option("--observed-only", is_flag=True, help="Only level pairs in the published lists.")
@click.option(
    "--no-intercombination",
    is_flag=True,
    help="Leave out spin-changing lines between LS terms (e.g. Hg I 253.65 nm).",
)
@click.option(
    "--min-intensity",
    type=float,
    default=None,
    help="Only lines with a published relative intensity of at least this value.",
)
@click.option(
    "--fwhm",
    type=click.FloatRange(min=0, min_open=True),
    default=None,
    help="Instrument FWHM in nm: mark lines closer than half of it as blends (B1, B2, ...).",
)
@click.option(
    "-o",
    "--output",
    type=click.Path(dir_okay=False),
    default=None,
    callback=table_path,
    help="Also write the table to this file (ECSV; .csv for a spreadsheet, .fits).",
)
@handle_errors
def transitions_command(
    species: tuple[str, ...],
    wavelength_range,
    medium: str,
    observed_only: bool,
    no_intercombination: bool,
    min_intensity: float | None,
    fwhm: float | None,
    output: str | None,
) -> None:
    """List the electric-dipole transitions of SPECIES (e.g. Ne, "Hg I", NeI, "Ar II": any
    neutral or singly ionised spectrum of the NIST ASD level data) with Ritz wavelengths
    computed from published energy levels, joined to the published lines (intensity shown
    blank where no source gives one).

    Flags: obs = in the published line list; intercomb = spin-changing; ground/metastable =
    kind of lower level; memory = values recalled without a readable published table.
    """
    from ._io import write_table
    from .levels import blends, transitions

    table = transitions(
        species,
        wavelength_range=wavelength_range,
        medium=medium,
        observed_only=observed_only,
        intercombination=not no_intercombination,
        min_intensity=min_intensity,
    )
    blend_of: dict[int, str] = {}
    if fwhm is not None and len(table):
        groups = blends(table, fwhm)
        multi = groups[groups["n_members"] > 1]
        for number, rows in enumerate(multi["member_rows"], start=1):
            for i in str(rows).split(","):
                blend_of[int(i)] = f"B{number}"
        table["blend"] = [blend_of.get(i, "") for i in range(len(table))]
        table.meta["blend_fwhm_nm"] = fwhm
        table.meta["blend_fraction"] = 0.5
    _transitions_print(table, medium, blend_of)
    if output:
        write_table(table, output)
        click.echo(f"wrote {output}")

# ---- peaks -----------------------------------------------------------------------------


def _peaks_print(lines) -> None:
    from rich.console import Console
    from rich.table import Table as RichTable

    wl = "wavelength" in lines.colnames
    tab = RichTable(box=None, header_style="bold", pad_edge=False)
    heads = ["#", "pixel", "± px"] + (["λ nm", "± nm"] if wl else []) + [
        "FWHM px", "flux", "± flux", "SNR", "flags"]
    for h in heads:
        tab.add_column(h, justify="left" if h == "flags" else "right")
    for i, row in enumerate(lines, 1):
        cells = [str(i), f"{row['pixel']:.3f}", f"{row['pixel_err']:.3f}"]
        if wl:
            cells += [f"{row['wavelength']:.4f}", f"{row['wavelength_err']:.4f}"]
        cells += [f"{row['fwhm_pixel']:.2f}", f"{row['flux']:.4g}", f"{row['flux_err']:.2g}",
                  f"{row['snr']:.1f}", str(row["flags"])]
        tab.add_row(*cells)
    import shutil

    # Wide enough for every column even when the output is not a terminal (no truncation).
    width = max(shutil.get_terminal_size((140, 24)).columns, 120)
    Console(highlight=False, soft_wrap=True, width=width).print(tab)
    meta = lines.meta
    noise = meta.get("noise_model", {})
    gain = noise.get("gain")
    rejected = ", ".join(f"{k} {v}" for k, v in meta.get("rejected", {}).items() if v)
    summary = f"{len(lines)} lines"
    if meta.get("lsf_fwhm_pixel"):
        summary += f"; LSF FWHM {meta['lsf_fwhm_pixel']:.3f} px"
    if gain:
        summary += (f"; gain {gain:.3g} e-/ADU, read noise {noise.get('read_noise', 0.0):.3g}"
                    f" ADU ({noise.get('method', '?')})")
    click.echo(summary)
    inst = meta.get("instrument")
    if inst:
        shape = (f"line shape: FWHM {inst['fwhm_chebyshev_px'][0]:.2f} px"
                 + (" (varies along the detector)" if len(inst["fwhm_chebyshev_px"]) > 1 else "")
                 + (f", skew {inst['asymmetry_chebyshev'][0]:+.2f}"
                    if any(inst["asymmetry_chebyshev"]) else "")
                 + (f", Lorentzian fraction {inst['lorentzian_fraction']:.3f}"
                    if inst["lorentzian_fraction"] else ""))
        click.echo(f"{shape}; offset {inst['offset_adu']:.6g} ADU "
                   f"({inst['sources'].get('offset', '?')})")
        if inst["flags"]:
            click.echo("not constrained by this exposure (conservative values used): "
                       + ", ".join(inst["flags"]))
    broad = meta.get("broad_features") or []
    if broad:
        click.echo(f"broad features (not lines): {len(broad)}, at pixel "
                   + ", ".join(f"{b['pixel']:.0f} (FWHM {b['fwhm_pixel']:.0f} px)"
                               for b in broad[:6]))
    if rejected:
        click.echo(f"rejected candidates: {rejected}")


@main.command("peaks")
@click.argument("file", type=click.Path(exists=True, dir_okay=False))
@click.option("--solution", "solution_path", type=click.Path(exists=True, dir_okay=False),
              default=None, help="Wavelength solution (JSON) to add wavelengths to the lines.")
@click.option("--dark", "dark_path", type=click.Path(exists=True, dir_okay=False),
              default=None, help="Dark/background exposure of the same detector to subtract.")
@click.option("--min-snr", type=click.FloatRange(min=0, min_open=True), default=5.0,
              show_default=True, help="Report lines whose signal-to-noise reaches this.")
@click.option("--fwhm", "fwhm_guess", type=click.FloatRange(min=0, min_open=True),
              default=None, help="Line-spread FWHM in pixels (default: measured).")
@click.option("--saturation", type=float, default=None,
              help="Saturation level in ADU (default: from the file or detected).")
@click.option("--gain", type=click.FloatRange(min=0, min_open=True), default=None,
              help="Detector gain in e-/ADU (default: estimated).")
@click.option("--read-noise", type=click.FloatRange(min=0), default=None,
              help="Read noise in ADU (used with --gain).")
@click.option("--instrument", "instrument_path", type=click.Path(exists=True, dir_okay=False),
              default=None, help="Instrument model (JSON, or a solution carrying one) of this "
              "spectrometer: its offset, gain, read noise and line shape are used instead of "
              "being estimated again (default: the --solution's, if it has one).")
@click.option("--save-instrument", "save_instrument", type=click.Path(dir_okay=False),
              default=None, help="Write the instrument model measured on FILE (JSON).")
@click.option("--column", default=None, help="Counts column of a table file.")
@click.option("-o", "--output", type=click.Path(dir_okay=False), default=None,
              callback=table_path,
              help="Write the line table (ECSV; .csv for a spreadsheet, .fits).")
@click.option("--plot", "plot_path", type=click.Path(dir_okay=False), default=None,
              callback=figure_path,
              help="Draw the spectrum with the lines marked (.png, .pdf or .svg).")
@reader_options
@handle_errors
def peaks_cmd(file, solution_path, dark_path, min_snr, fwhm_guess, saturation, gain,
              read_noise, instrument_path, save_instrument, column, output, plot_path, hdu,
              pixel_origin):
    """Find the emission lines of FILE: centroids, widths, fluxes and their errors.

    The detector's offset, gain and read noise and the line shape along the detector (the
    instrument model) are measured on FILE unless --instrument or --solution gives them;
    --save-instrument keeps them for the exposures that follow.
    """
    from ._io import write_table
    from .instrument import Instrument
    from .peaks import attach_wavelengths, find_lines
    from .spectrum import require_solution_pixels

    spectrum = read_input(file, column, hdu, pixel_origin, saturation=saturation)
    dark = read_input(dark_path, column, hdu, pixel_origin) if dark_path else None
    solution = None
    if solution_path:
        from .calibration import Solution

        solution = Solution.load(solution_path)
        require_solution_pixels(spectrum, solution)
    instrument = (Instrument.load(instrument_path) if instrument_path
                  else getattr(solution, "instrument", None))
    lines = find_lines(spectrum, min_snr=min_snr, fwhm_guess=fwhm_guess,
                       saturation=saturation, gain=gain, read_noise=read_noise, dark=dark,
                       instrument=instrument)
    if save_instrument:
        Instrument.from_dict(lines.meta["instrument"]).save(save_instrument)
        click.echo(f"instrument model written to {save_instrument}")
    if solution is not None:
        lines = attach_wavelengths(lines, solution)
    lines.meta["input"] = str(file)
    if len(lines):
        _peaks_print(lines)
    else:
        reason = lines.meta.get("warning") or f"no line reaches min_snr={min_snr:g}"
        click.echo(f"no lines found in {file}: {reason}")
    if output:
        write_table(lines, output)
        click.echo(f"lines written to {output}")
    if plot_path:
        from .peaks import line_background
        from .plots import plot_peaks
        from .spectrum import spectrum_arrays

        arr = spectrum_arrays(spectrum)
        counts = arr.counts - spectrum_arrays(dark).counts if dark is not None else arr.counts
        plot_peaks(counts, lines, plot_path,
                   background=line_background(spectrum, lines, dark=dark))
        click.echo(f"plot written to {plot_path}")


# ---- calibrate -------------------------------------------------------------------------


@main.command("calibrate")
@click.argument("lamp_files", nargs=-1, required=True,
                type=click.Path(exists=True, dir_okay=False))
@click.option("--lamp", "lamps", multiple=True, required=True,
              help="Lamp species. One file: repeat for mixed lamps (--lamp Hg --lamp Ar). "
                   "Several files of one detector: once per file, in order; join a mixed "
                   "lamp with '+' (--lamp Ne --lamp Hg+Ar).")
@click.option("--range", "wrange", default=None, metavar="MIN:MAX",
              callback=parse_wavelength_range,
              help="Coarse wavelength range of the detector in nm (default 200:1100).")
@click.option("--degree", type=click.IntRange(1, 7), default=None,
              help="Chebyshev degree (default: 5 under a curvature prior, the lines "
                   "deciding what they can).")
@click.option("--guess", "guess_path", type=click.Path(exists=True, dir_okay=False),
              default=None, help="Earlier solution of this detector: it seeds the search "
                                 "and its shape is the prior of the new map.")
@click.option("--medium", type=click.Choice(["air", "vacuum"]), default="air",
              show_default=True, help="Medium of the reference and solution wavelengths.")
@click.option("--column", default=None, help="Counts column of a table file.")
@click.option("-o", "--output", required=True, type=click.Path(dir_okay=False),
              help="Where to write the solution (JSON).")
@click.option("--plot", "plot_path", type=click.Path(dir_okay=False), default=None,
              callback=figure_path, help="Write a residual plot (.png, .pdf or .svg).")
@click.option("--write-calibrated", "calibrated_path", type=click.Path(dir_okay=False),
              default=None, callback=table_path,
              help="Write the exposure with its wavelength axis (ECSV; .csv, .fits; one "
                   "lamp file only).")
@click.option("--json", "as_json", is_flag=True, help="Print the summary as JSON.")
@reader_options
@handle_errors
def calibrate_cmd(lamp_files, lamps, wrange, degree, guess_path, medium, column, output,
                  plot_path, calibrated_path, as_json, hdu, pixel_origin):
    """Solve the pixel -> wavelength map of reference-lamp exposures LAMP_FILES.

    No line positions are needed: lines are found and matched to the lamps' published
    wavelengths automatically.  Several files (e.g. a neon and a mercury exposure of one
    spectrometer) give one solution.  Safety: lamps run at high voltage and some emit UV-C
    or contain mercury; follow the lamp maker's instructions and your local safety rules.
    """
    from .calibration import Solution, calibrate, with_input, write_calibrated
    from .spectrum import require_solution_pixels

    if len(lamp_files) > 1 and len(lamps) != len(lamp_files):
        raise click.UsageError(f"{len(lamp_files)} files need one --lamp each (in order), got "
                               f"{len(lamps)}")
    if len(lamp_files) > 1 and calibrated_path:
        raise click.UsageError("--write-calibrated takes one lamp file")
    spectra = [read_input(f, column, hdu, pixel_origin) for f in lamp_files]
    guess = Solution.load(guess_path) if guess_path else None
    if guess is not None:
        for spectrum in spectra:
            require_solution_pixels(spectrum, guess)
    if len(spectra) == 1:
        spectrum, lamp_arg = spectra[0], tuple(lamps)
    else:
        spectrum, lamp_arg = spectra, [tuple(name.split(",")) for name in lamps]
    solution = calibrate(spectrum, lamp_arg, wavelength_range=wrange,
                         degree=degree, guess=guess, medium=medium)
    solution = with_input(solution, *lamp_files)
    solution.save(output)
    if plot_path:
        from .plots import calibration_residuals

        calibration_residuals(solution, plot_path)
    if calibrated_path:
        write_calibrated(spectra[0], solution, calibrated_path)
    info = solution.summary()
    if as_json:
        echo_json(info)
        return
    lo, hi = info["dispersion_nm_per_px"]
    wl_lo, wl_hi = info["wavelength_limits_nm"]
    click.echo(f"lamp          {'+'.join(info['lamps'])} ({info['medium']})")
    click.echo(f"lines used    {info['lines_used']} (rejected {info['lines_rejected']})")
    click.echo(f"RMS           {info['rms_nm'] * 1e3:.3f} pm = {info['rms_pixel']:.3f} px")
    click.echo(f"degree        {info['degree']}"
               + (f" ({info['degree_limited']})" if info.get("degree_limited") else ""))
    click.echo(f"dispersion    {lo:.5f} - {hi:.5f} nm/px ({info['direction']})")
    click.echo(f"coverage      {wl_lo:.3f} - {wl_hi:.3f} nm")
    click.echo(f"confidence    {info['confidence']:.6f} ({info['verdict']}; chance of a match "
               f"this good by accident {info['p_chance']:.1e})")
    click.echo(f"solution      {output}")


# ---- match -----------------------------------------------------------------------------


def _match_print(result, max_rows: int) -> None:
    import numpy as np

    t = result.lines
    ax = result.meta["axis_correction"]
    unit = ax["unit"]
    click.echo(f"wavelength axis: searched within ±{ax['axis_err_told']:.3g} {unit}; "
               f"correction offset {ax['offset']:+.3f} ± {ax['offset_err']:.3f} {unit}, "
               f"tilt {ax['tilt']:+.3f} ± {ax['tilt_err']:.3f} {unit} (edge to centre)")
    if "shift_nm" in ax:
        lo, mid, hi = ax["shift_nm"]
        elo, emid, ehi = ax["shift_err_nm"]
        click.echo(f"  subtracted from the measured wavelengths: {lo:+.4f} ± {elo:.4f} nm at the "
                   f"first pixel, {mid:+.4f} ± {emid:.4f} nm mid-way, {hi:+.4f} ± {ehi:.4f} nm at "
                   "the last")
    click.echo(f"{'measured':>10s} {'±':>7s} {'SNR':>6s}  {'species':7s} {'listed':>9s} "
               f"{'upper level':28s} {'E_up/eV':>7s} {'p':>5s}  flags")
    for k, row in enumerate(t):
        if k >= max_rows:
            click.echo(f"  ... {len(t) - max_rows} more lines; write them with -o")
            break
        ref = f"{row['ref_wavelength']:9.3f}" if np.isfinite(row["ref_wavelength"]) else " " * 9
        ev = f"{row['upper_energy_ev']:7.3f}" if np.isfinite(row["upper_energy_ev"]) else " " * 7
        sp = row["species"] or "?"
        up = str(row["upper"])[:28]
        click.echo(f"{row['wavelength']:10.3f} {row['wavelength_err']:7.3f} {row['snr']:6.0f}  "
                   f"{sp:7s} {ref} {up:28s} {ev} {row['probability']:5.2f}  {row['flags']}")
    n_id = int(np.sum(np.asarray(t["species"]) != ""))
    click.echo(f"{n_id} of {len(t)} lines identified (p >= "
               f"{result.meta['options']['min_probability']:g})")
    click.echo("")
    click.echo("species:")
    for row in result.species:
        verdict = "present" if row["present"] else "absent"
        llr = row["log_likelihood_ratio"]
        strong = (f"strong lines found {row['strong_found']}/{row['strong_expected']}"
                  if row["strong_expected"] else "no strong line expected in this range")
        click.echo(f"  {row['species']:6s} {verdict:8s} lines {row['n_assigned']:3d}  {strong}  "
                   f"log-likelihood ratio {llr:8.1f}")
    click.echo("")
    lv = result.levels
    click.echo(f"excited upper levels ({len(lv)}), by energy; the minimum electron energy "
               "from the ground state is the level energy:")
    for row in lv:
        mark = "  ABOVE LIMIT: " + row["note"] if row["above_limit"] else ""
        click.echo(f"  {row['species']:6s} {row['upper']:30s} {row['energy_cm1']:11.3f} cm-1 "
                   f"{row['energy_ev']:7.3f} eV  {row['n_lines']} line(s){mark}")
    if not result.meta["response_corrected"]:
        click.echo("intensities are uncorrected for the spectral response (no --response): "
                   "no excitation temperature")
    from .plots import boltzmann_label

    for bp in result.boltzmann:
        label = boltzmann_label(bp)  # the same rule as the Boltzmann plot's legend
        if bp.corrected and " T = " in label:
            click.echo(f"{bp.species}: excitation temperature {bp.temperature_k:.0f} ± "
                       f"{bp.temperature_err_k:.0f} K ({bp.message})")
        elif bp.corrected:
            click.echo(label)


@main.command("match")
@click.argument("file", type=click.Path(exists=True, dir_okay=False))
@click.option("--species", default=None, metavar="LIST",
              help="Species to consider, comma-separated (e.g. Ne,Ar or 'Ne I,Hg I,Ar II'): "
              "any neutral or singly ionised spectrum of the NIST ASD data; default: detect "
              "among the eight lamp species H, He, Ne, Ar, Kr, Xe, Hg, Na.")
@click.option("--solution", "solution_path", type=click.Path(exists=True, dir_okay=False),
              help="Wavelength solution (JSON from `calibrate`); needed for a pixel-axis file.")
@click.option("--medium", type=click.Choice(["air", "vacuum"]), default=None,
              help="Medium of the wavelengths (default: the solution's, else air).")
@click.option("--max-energy", type=click.FloatRange(min=0, min_open=True), default=None,
              help="Electron energy limit (eV): flag lines from upper levels above it.")
@click.option("--response", type=click.Path(exists=True, dir_okay=False), default=None,
              help="Relative spectral response file (wavelength nm, response) for level "
              "populations and the excitation temperature.")
@click.option("--column", default=None, help="Counts column of the spectrum file.")
@click.option("--axis-err", default=None, metavar="DIST", callback=parse_axis_err,
              help="How far off the wavelength axis may be, e.g. 2px or 0.5nm (a bare "
              "number is px; default 0.5 px). An offset and tilt are searched within it.")
@click.option("-o", "--output", type=click.Path(dir_okay=False), default=None,
              callback=table_path, help="Write the line assignments (ECSV; .csv, .fits).")
@click.option("--levels", "levels_path", type=click.Path(dir_okay=False), default=None,
              callback=table_path, help="Write the excited-level table (ECSV; .csv, .fits).")
@click.option("--species-table", type=click.Path(dir_okay=False), default=None,
              callback=table_path,
              help="Write the species evidence table (ECSV; .csv, .fits).")
@click.option("--plot", type=click.Path(dir_okay=False), default=None, callback=figure_path,
              help="Write the labelled spectrum figure (.png, .pdf or .svg).")
@click.option("--scale", "intensity_scale", type=click.Choice(["linear", "sqrt", "asinh", "log"]),
              default="asinh", show_default=True,
              help="Intensity scale of the labelled spectrum (asinh, sqrt and log show weak "
              "lines beside strong ones).")
@click.option("--diagram", type=click.Path(dir_okay=False), default=None, callback=figure_path,
              help="Write the energy-level diagram of the observed transitions "
              "(.png, .pdf or .svg).")
@click.option("--boltzmann", type=click.Path(dir_okay=False), default=None,
              callback=figure_path, help="Write the Boltzmann plot (.png, .pdf or .svg).")
@click.option("--max-rows", type=click.IntRange(min=1), default=200, show_default=True,
              help="Print at most this many lines.")
@reader_options
@handle_errors
def match(file, species, solution_path, medium, max_energy, response, column, axis_err,
          output, levels_path, species_table, plot, intensity_scale, diagram, boltzmann,
          max_rows, hdu, pixel_origin) -> None:
    """Identify the atomic transitions behind the emission lines of FILE.

    Prints each line's assignment with its probability, the species judged present, and the
    excited upper levels in order of energy.  Exit 0 on success, 2 on bad input.
    """
    from ._io import write_table
    from .identify import identify_lines, read_response
    from .spectrum import require_solution_pixels

    spectrum = read_input(file, column, hdu, pixel_origin)
    solution = None
    if solution_path:
        from .calibration import Solution

        solution = Solution.load(solution_path)
        require_solution_pixels(spectrum, solution)
    medium = (medium or getattr(solution, "medium", None)
              or (spectrum.meta or {}).get("medium") or "air")
    resp = read_response(response) if response else None
    result = identify_lines(spectrum, species, solution=solution, medium=medium,
                            max_electron_energy=max_energy, response=resp, axis_err=axis_err)
    if len(result.lines):
        _match_print(result, max_rows)
    else:
        click.echo(f"no lines found in {file}: nothing to identify")
    for table, path in ((result.lines, output), (result.levels, levels_path),
                        (result.species, species_table)):
        if path:
            write_table(table, path)
            click.echo(f"wrote {path}")
    if plot or diagram or boltzmann:
        from . import plots

        if plot:
            written = plots.plot_identify_spectrum(result, plot, spectrum=spectrum,
                                                   solution=solution, scale=intensity_scale)
            click.echo(f"wrote {written}")
        if diagram:
            click.echo(f"wrote {plots.plot_identify_levels(result, diagram)}")
        if boltzmann:
            if result.boltzmann:
                click.echo(f"wrote {plots.plot_identify_boltzmann(result.boltzmann, boltzmann)}")
            else:
                click.echo("no Boltzmann plot: fewer than two identified lines with "
                           "transition probabilities")

# ---- check -----------------------------------------------------------------------------


EXIT_INCOMPLETE = 3
CHECK_SHOWN = 20  # non-pass exposures listed on the console (the report lists them all)


def _incomplete_banner(missing: int, total: int, outdir: str, why: str) -> None:
    rule = "!" * 78
    lines = [rule, f"!! INCOMPLETE RUN: {missing} of {total} exposures have no result.",
             "!! The totals above count only the exposures that were checked."]
    if why:
        lines.append(f"!! {why}")
    lines += [f"!! Run the same command again with --resume to check the rest "
              f"(results in {outdir}).", rule]
    click.echo("\n".join(lines), err=True)


@main.command("check")
@click.argument("inputs", nargs=-1, required=True, type=click.Path(exists=True))
@click.option("--solution", "solution_path", required=True, type=click.Path(exists=True,
              dir_okay=False), help="Reference wavelength solution (JSON from `calibrate`).")
@click.option("--lamp", multiple=True, help="Take the expected lines from this lamp's list "
              "(repeatable) instead of the lines the reference solution used.")
@click.option("--dark", type=click.Path(exists=True, dir_okay=False),
              help="Dark frame given to the line finder for every exposure.")
@click.option("-o", "--outdir", required=True, type=click.Path(file_okay=False),
              help="Output folder: summary.ecsv, summary.json, figures, report.html.  One run "
              "at a time owns it (a lock file); a second run into it is refused.")
@click.option("--workers", type=click.IntRange(min=1), default=None,
              help="Local worker processes (default: number of cores).")
@click.option("--dask-scheduler", metavar="ADDRESS|local", default=None,
              help="Run on a Dask cluster: a scheduler address (tcp://host:port; its workers "
              "need ritzline and the same file paths) or 'local' for a cluster on this machine.")
@click.option("--max-shift", type=click.FloatRange(min=0, min_open=True), default=1.0,
              show_default=True, help="Fail above this shift (px); warn above half of it.")
@click.option("--max-fwhm-change", type=click.FloatRange(min=0, min_open=True), default=15.0,
              show_default=True, help="Fail when the FWHM changes by more than this (percent); "
              "warn above half of it.")
@click.option("--min-lines", type=click.IntRange(min=1), default=5, show_default=True,
              help="Fail when fewer expected lines are found.")
@click.option("--max-masked", type=click.IntRange(min=0), default=0, show_default=True,
              help="Warn when an exposure has more masked samples (NaN, inf) than this.")
@click.option("--resume", is_flag=True,
              help="Skip exposures already checked into OUTDIR by an interrupted run.")
@click.option("--pattern", default=None, metavar="GLOB", help="Files to take from folders, "
              "e.g. '*.fits' or '**/*.txt' (default: usual spectrum suffixes).")
@click.option("--measure", type=click.Choice(["expected", "search"]), default="expected",
              show_default=True, help="How lines are measured: 'expected' fits the reference's "
              "lines where they are expected (fast); 'search' runs the blind line finder on "
              "every exposure.")
@click.option("--strict", is_flag=True, help="Exit 1 on warnings too.")
@handle_errors
def check(inputs, solution_path, lamp, dark, outdir, workers, dask_scheduler, max_shift,
          max_fwhm_change, min_lines, max_masked, resume, pattern, measure, strict) -> None:
    """Check exposures against a reference solution: drift, width, saturation, missing lines.

    INPUTS are exposure files or folders; files that are not spectra by their name
    (README.txt, *.json, *.png ...) are skipped and listed.  Writes summary.ecsv,
    summary.json, figures and a self-contained report.html into OUTDIR.

    \b
    Exit status:
      0  every exposure checked; none failed (warnings too unless --strict)
      1  some exposure failed or could not be read (or warned, with --strict)
      2  bad input: options, solution file, no exposures, OUTDIR owned by another run
      3  incomplete run: some exposures have no result (a worker process died);
         a banner says so; run again with --resume
      130  interrupted (Ctrl-C); run again with --resume
    """
    import warnings

    from .check import STATUSES, CheckLimits, check_exposures

    limits = CheckLimits(max_shift_px=max_shift, max_fwhm_change_pct=max_fwhm_change,
                         min_lines=min_lines, max_masked_samples=max_masked)
    progress_cm = None
    progress = None
    if sys.stderr.isatty():
        from rich.console import Console
        from rich.progress import BarColumn, MofNCompleteColumn, Progress, TimeRemainingColumn

        progress_cm = Progress("checking", BarColumn(), MofNCompleteColumn(),
                               TimeRemainingColumn(), transient=True,
                               console=Console(stderr=True))
        bar = progress_cm.add_task("check", total=None)

        def progress(done: int, total: int) -> None:
            progress_cm.update(bar, completed=done, total=total)

    def show_warning(message, category, *_args, **_kw) -> None:
        click.echo(f"warning: {message}", err=True)

    try:
        with warnings.catch_warnings():
            warnings.showwarning = show_warning
            if progress_cm is not None:
                progress_cm.start()
            table = check_exposures(
                inputs, solution_path, lamp=list(lamp) or None, dark=dark, limits=limits,
                outdir=outdir, workers=workers, dask_scheduler=dask_scheduler, resume=resume,
                pattern=pattern, progress=progress, method=measure,
            )
    except KeyboardInterrupt:
        if progress_cm is not None:
            progress_cm.stop()
        rule = "!" * 78
        click.echo(f"{rule}\n!! INTERRUPTED: not every exposure was checked; the finished "
                   f"ones are kept in {outdir}.\n!! Run the same command again with --resume "
                   f"to check the rest.\n{rule}", err=True)
        sys.exit(130)
    finally:
        if progress_cm is not None:
            progress_cm.stop()
    meta = table.meta
    skipped = meta.get("skipped_files") or []
    if skipped:
        names = ", ".join(str(p) for p in skipped[:10]) + (", ..." if len(skipped) > 10 else "")
        click.echo(f"skipped {len(skipped)} file{'s' if len(skipped) != 1 else ''} that "
                   f"{'are' if len(skipped) != 1 else 'is'} not a spectrum: {names}")
    totals = meta["totals"]
    resumed = meta.get("resumed_exposures", 0)
    click.echo(
        f"{totals['exposures']} exposures: {totals['pass']} pass, {totals['warn']} warn, "
        f"{totals['fail']} fail, {totals['error']} error"
        + (f" ({resumed} already checked in {outdir})" if resumed else "")
    )
    # the worst first: errors, then fails, then warnings, each in input order
    status = [str(s) for s in table["status"]]
    order = sorted((i for i, s in enumerate(status) if s != "pass"),
                   key=lambda i: (-STATUSES.index(status[i]), i))
    for i in order[:CHECK_SHOWN]:
        row = table[i]
        reasons = str(row["reasons"]).removeprefix(f"{row['file']}: ")
        click.echo(f"  {row['status']:5s} {row['file']}: {reasons}")
    if len(order) > CHECK_SHOWN:
        click.echo(f"  ... and {len(order) - CHECK_SHOWN} more; see {outdir}/report.html")
    click.echo(f"wrote {outdir}/summary.ecsv, summary.json, report.html")
    if not meta.get("complete", True):
        _incomplete_banner(int(meta.get("missing_exposures") or 0),
                           totals["exposures"] + int(meta.get("missing_exposures") or 0),
                           outdir, str(meta.get("stopped") or ""))
        sys.exit(EXIT_INCOMPLETE)
    if totals["fail"] or totals["error"] or (strict and totals["warn"]):
        sys.exit(EXIT_FAILED)


# ---- demo ------------------------------------------------------------------------------


@main.command("demo")
@click.option("-o", "--outdir", default="ritzline-demo", show_default=True,
              type=click.Path(file_okay=False), help="Folder for every output of the demo.")
@click.option("--workers", type=click.IntRange(min=1), default=None,
              help="Worker processes for the batch check (default: number of cores).")
@handle_errors
def demo(outdir: str, workers: int | None) -> None:
    """Run the whole pipeline on the bundled example data, offline, in seconds.

    The data are synthetic: an invented LR-1 bench spectrometer in an invented teaching
    laboratory looking at an Hg+Ar calibration lamp, a helium glow tube with hydrogen and
    neon traces, and a morning of lamp frames that drift (one file is damaged).
    """
    from .demo import run_demo

    result = run_demo(outdir, workers=workers, say=lambda m: click.echo(m, err=True))
    cal, ident, chk = (result.facts[k] for k in ("calibration", "identification", "check"))
    lo, hi = cal["wavelength_limits_nm"]
    click.echo("")
    click.echo("1. calibration (Hg+Ar lamp)")
    click.echo(f"   {cal['lines_used']} lines used, RMS {cal['rms_nm'] * 1e3:.2f} pm "
               f"({cal['rms_pixel']:.3f} px), degree {cal['degree']}, {lo:.1f}-{hi:.1f} nm, "
               f"{cal['verdict']}")
    click.echo("2. identification (helium glow tube)")
    click.echo(f"   {ident['identified']} of {ident['lines']} lines identified "
               f"({ident['second_order']} second-order image); species present: "
               f"{', '.join(ident['present'])}; {ident['levels']} excited upper levels")
    for species, (t, dt) in ident["temperatures"].items():
        if dt < 0.25 * t:  # the others rest on too few lines to quote
            click.echo(f"   {species} excitation temperature {t:.0f} ± {dt:.0f} K")
    click.echo("3. batch check (12 lamp frames)")
    click.echo(f"   {chk['pass']} pass, {chk['warn']} warn, {chk['fail']} fail, "
               f"{chk['error']} error; largest shift {chk['max_shift_px']:+.2f} px")
    for name, status, reasons in chk["not_pass"][:4]:
        click.echo(f"   {status:5s} {name}: {reasons}")
    if len(chk["not_pass"]) > 4:
        click.echo(f"   ... {len(chk['not_pass']) - 4} more in the report")
    click.echo("")
    click.echo("files:")
    for stage, paths in result.files.items():
        if paths:
            names = [paths[0].as_posix()] + [p.name for p in paths[1:]]
            click.echo(f"  {stage + ':':16s} {', '.join(names)}")
    click.echo(f"open {outdir}/check/report.html in a browser for the batch report")
