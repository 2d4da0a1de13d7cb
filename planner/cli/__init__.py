"""The ``veerwise`` command line: a thin click layer over the stages.

Every command parses options, calls stage functions, writes files and prints. Our
errors become one line on stderr and exit code 2 here, in one place.
"""

from __future__ import annotations

import sys
import warnings

import click

from planner import __version__
from planner.errors import Interrupted, PlannerError

#: Exit codes: 0 success, 1 a bug (traceback), 2 bad input or a refused run, 130 stopped.
EXIT_BAD_INPUT = 2
EXIT_STOPPED = 130


def _show_warning(message, category, filename, lineno, file=None, line=None):
    click.echo(f"veerwise: warning: {message}", err=True)


class _Group(click.Group):
    """Runs a command and turns every expected failure into one line on stderr."""

    def main(self, args=None, prog_name=None, complete_var=None, standalone_mode=True, **extra):
        previous = warnings.showwarning
        warnings.showwarning = _show_warning
        try:
            result = super().main(args=args, prog_name=prog_name or "veerwise", complete_var=complete_var,
                                  standalone_mode=False, **extra)
        except PlannerError as err:
            click.echo(f"veerwise: error: {err}", err=True)
            sys.exit(EXIT_STOPPED if isinstance(err, Interrupted) else EXIT_BAD_INPUT)
        except (click.exceptions.Abort, KeyboardInterrupt):
            click.echo("veerwise: stopped; nothing was written", err=True)
            sys.exit(EXIT_STOPPED)
        except click.UsageError as err:
            where = f"{err.ctx.command_path}: " if err.ctx is not None else ""
            click.echo(f"veerwise: error: {where}{err.format_message()}", err=True)
            sys.exit(EXIT_BAD_INPUT)
        except click.ClickException as err:
            click.echo(f"veerwise: error: {err.format_message()}", err=True)
            sys.exit(err.exit_code or EXIT_BAD_INPUT)
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

from planner.cli import plan_commands, run_commands, site_commands  # noqa: E402,F401  (registers commands)
