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

# ---- transitions -----------------------------------------------------------------------

# ---- peaks -----------------------------------------------------------------------------

# ---- calibrate -------------------------------------------------------------------------

# ---- match -----------------------------------------------------------------------------

# ---- check -----------------------------------------------------------------------------

# ---- demo ------------------------------------------------------------------------------
