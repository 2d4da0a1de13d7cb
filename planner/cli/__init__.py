"""The ``veerwise`` command line: a thin click layer over the stages.

Every command parses options, calls stage functions, writes files and prints. Our
errors become one line on stderr and exit code 2 here, in one place.
"""

from __future__ import annotations

import contextlib
import errno
import signal
import sys
import threading
import warnings

import click

from planner import __version__
from planner.cli.option_names import as_options
from planner.errors import Interrupted, PlannerError, Stopped
from planner.names import for_terminal

#: Exit codes: 0 success, 1 a bug (traceback), 2 bad input or a refused run, 130 stopped
#: by SIGINT (Ctrl-C), 143 stopped by SIGTERM (128 + the signal's number, as shells report it).
EXIT_BAD_INPUT = 2
EXIT_STOPPED = 130
#: Operating-system errors that are the machine's state, not a bug: said in one line.
_MACHINE_ERRNOS = {errno.ENOSPC, errno.EDQUOT, errno.EROFS, errno.EACCES, errno.EPERM, errno.EMFILE, errno.EFBIG}


def _say(kind: str, message) -> None:
    """One line on stderr; the library's setting names (``Dynamics.slip``) said as options (``--slip``)."""
    text = getattr(message, "said_as_options", None) or as_options(str(message))
    click.echo(f"veerwise: {kind}: {for_terminal(text)}", err=True)


def _show_warning(message, category, filename, lineno, file=None, line=None):
    _say("warning", message)


def _on_signal(signum, frame):
    raise Stopped(signum)


def _stop_code(err: BaseException) -> int:
    """128 + the number of the signal that stopped the command (found along the exception chain)."""
    seen = set()
    while err is not None and id(err) not in seen:
        seen.add(id(err))
        if isinstance(err, Stopped):
            return 128 + err.signum
        err = err.__cause__ or err.__context__
    return EXIT_STOPPED


@contextlib.contextmanager
def _stop_signals():
    """SIGINT and SIGTERM stop any command the same clean way (only the main thread gets signals)."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    previous = {s: signal.signal(s, _on_signal) for s in (signal.SIGINT, signal.SIGTERM)}
    try:
        yield
    finally:
        for s, handler in previous.items():
            signal.signal(s, handler)


class _Group(click.Group):
    """Runs a command and turns every expected failure into one line on stderr."""

    def main(self, args=None, prog_name=None, complete_var=None, standalone_mode=True, **extra):
        previous = warnings.showwarning
        warnings.showwarning = _show_warning
        try:
            with _stop_signals():
                result = super().main(args=args, prog_name=prog_name or "veerwise", complete_var=complete_var,
                                      standalone_mode=False, **extra)
        except PlannerError as err:
            _say("error", err)
            sys.exit(_stop_code(err) if isinstance(err, Interrupted) else EXIT_BAD_INPUT)
        except (click.exceptions.Abort, KeyboardInterrupt) as err:
            _say("error", "stopped; nothing was written")
            sys.exit(_stop_code(err))
        except click.UsageError as err:
            where = f"{err.ctx.command_path}: " if err.ctx is not None else ""
            _say("error", f"{where}{err.format_message()}")
            sys.exit(EXIT_BAD_INPUT)
        except click.ClickException as err:
            _say("error", err.format_message())
            sys.exit(err.exit_code or EXIT_BAD_INPUT)
        except MemoryError as err:
            _say("error", f"out of memory{f' ({err})' if str(err) else ''}; nothing was written. Use a larger "
                          "--cell, fewer --episodes, --training-runs or --rollouts, or a machine with more memory")
            sys.exit(EXIT_BAD_INPUT)
        except OSError as err:
            if err.errno not in _MACHINE_ERRNOS:
                raise
            where = f"{err.filename}: " if err.filename else ""
            _say("error", f"{where}{err.strerror or err}; nothing was written")
            sys.exit(EXIT_BAD_INPUT)
        finally:
            warnings.showwarning = previous
        sys.exit(result if isinstance(result, int) else 0)


@click.group(cls=_Group, context_settings={"help_option_names": ["-h", "--help"], "max_content_width": 100})
@click.version_option(__version__, prog_name="veerwise")
def cli():
    """Plan cautious and shortest routes across a test yard and measure their hazard risk.

    For simulation and review only: outputs are not approved for field operation.
    Follow the site's safety rules, certified operators and local regulations.
    """


main = cli

from planner.cli import campaign_commands, plan_commands, run_commands, site_commands  # noqa: E402,F401  (registers commands)
