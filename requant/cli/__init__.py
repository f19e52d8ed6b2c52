"""The ``requant`` command line: parsing and printing only.

One module per command group (:mod:`.convert`, :mod:`.batch`, :mod:`.listen`,
:mod:`.info` for ``inspect`` and ``shaper``, :mod:`.rate` for ``rate``, :mod:`.audit`,
:mod:`.demo`), registered here; options shared by several commands are declared once in
:mod:`.common`.
Nothing below imports this package. Heavy modules (numpy, soundfile, numba,
scipy, matplotlib) are imported inside the commands, so that ``requant
--help`` starts fast. Domain errors (:class:`requant.errors.RequantError`)
become one line on stderr and a non-zero exit code; ``--debug`` shows the
traceback instead.
"""

import sys

import typer

try:  # typer >= 0.20 vendors click
    from typer._click import exceptions as _cx
except ImportError:  # pragma: no cover - older typer with click installed
    import click.exceptions as _cx

from requant.cli import audit as _audit
from requant.cli import batch as _batch
from requant.cli import convert as _convert
from requant.cli import demo as _demo
from requant.cli import info as _info
from requant.cli import listen as _listen
from requant.cli import rate as _rate
from requant.cli.common import err, friendly, handle_sigterm, set_debug, stop_exit_code

__all__ = ["app", "main", "console"]

app = typer.Typer(
    name="requant",
    help="Requantize audio to a shorter word length, with dither and noise shaping, "
         "and prove the result: measured noise beside predicted noise.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
    rich_markup_mode=None,
)


def _notice_compiles():
    """One line on stderr the first time this process compiles a kernel (a new machine, or
    a new requant version): the pause that follows is then not a silent one."""
    from requant import notices

    said = []

    def say(name):
        if not said:
            said.append(name)
            print(f"requant: preparing the fast path for this machine (compiling kernels, once "
                  f"per machine and version, about {notices.COMPILE_SECONDS} s each)",
                  file=sys.stderr, flush=True)

    notices.on_compile(say)


@app.callback(invoke_without_command=True)
def _root(
    ctx: typer.Context,
    debug: bool = typer.Option(False, "--debug", help="Show full tracebacks on errors."),
    version: bool = typer.Option(False, "--version", help="Print the version and exit.",
                                 is_eager=True),
):
    set_debug(debug)
    _notice_compiles()
    if version:
        from requant import __version__

        print(f"requant {__version__}")
        raise typer.Exit()
    if ctx.invoked_subcommand is None:
        print(ctx.get_help())
        raise typer.Exit(code=2)


shaper_app = typer.Typer(help="Show, design and export noise-shaping filters.",
                         no_args_is_help=True, rich_markup_mode=None)
rate_app = typer.Typer(help="Show the sample-rate converter's filter for a pair of rates.",
                       no_args_is_help=True, rich_markup_mode=None)

#: Every command: (typer app, name, function), in the order ``--help`` lists them.
COMMANDS = (
    (app, "convert", _convert.convert),
    (app, "inspect", _info.inspect_command),
    (app, "demo", _demo.demo),
    (app, "batch", _batch.batch),
    (app, "listen", _listen.listen),
    (app, "score", _listen.score),
    (app, "audit", _audit.audit),
    (shaper_app, "show", _info.shaper_show),
    (rate_app, "show", _rate.rate_show),
)
for _app, _name, _fn in COMMANDS:
    _app.command(_name)(friendly(_fn))
app.add_typer(shaper_app, name="shaper")
app.add_typer(rate_app, name="rate")


class _GuardedStdout:
    """Standard output that cannot raise: a failed write (``> /dev/full``, a closed pipe)
    is noted, and :func:`main` says so in one line once the work is done."""

    def __init__(self, stream):
        self._stream = stream
        self.failure = None

    def write(self, text):
        try:
            return self._stream.write(text)
        except OSError as exc:
            self.failure = self.failure or exc
            return len(text)

    def flush(self):
        try:
            self._stream.flush()
        except OSError as exc:
            self.failure = self.failure or exc

    def __getattr__(self, name):
        return getattr(self._stream, name)


def main(argv=None):
    """Console entry point: one line per error, documented exit codes."""
    args = sys.argv[1:] if argv is None else list(argv)
    import signal

    if hasattr(signal, "SIGXFSZ"):
        # a file-size limit then fails the write (EFBIG) instead of killing the process,
        # so the temporary files are removed and the user gets one clear line
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
    handle_sigterm()
    guard = sys.stdout = _GuardedStdout(sys.stdout)
    try:
        rc = _run(args)
    finally:
        sys.stdout = guard._stream
    guard.flush()
    if guard.failure is not None:
        err(f"could not write to standard output ({guard.failure.strerror or guard.failure}); "
            "what was asked for was done, but its summary was not shown")
        return rc or 1
    return rc


def _run(args):
    """The app, with click's and typer's exceptions turned into exit codes."""
    try:
        rc = app(args=args, prog_name="requant", standalone_mode=False)
    except typer.Exit as exc:
        return exc.exit_code
    except _cx.NoArgsIsHelpError as exc:
        print(exc.ctx.get_help() if exc.ctx is not None else "", file=sys.stderr)
        return 2
    except _cx.UsageError as exc:
        hint = ""
        if exc.ctx is not None:
            hint = f" (see '{exc.ctx.command_path} --help')"
        err(f"{exc.format_message()}{hint}")
        return 2
    except typer.Abort:
        err("interrupted; no partial output was left behind")
        return stop_exit_code()
    except _cx.ClickException as exc:
        err(exc.format_message())
        return exc.exit_code
    return rc if isinstance(rc, int) else 0


def console():
    """Entry point of the ``requant`` script."""
    rc = main()
    # Everything is written and closed by now. Freezing the heap spares the interpreter's
    # last garbage collections, which would visit every object of every loaded module
    # (about 40 ms of each run's exit with numpy, soundfile and typer loaded).
    import gc

    gc.freeze()
    sys.exit(rc)
