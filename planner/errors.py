"""The one exception hierarchy of veerwise.

Every error a user can cause is a ``PlannerError``; the command line turns it into
one line on stderr and exit code 2, with the library's setting names said as its
options (:mod:`planner.cli.option_names`). Each subclass also inherits the builtin that
callers would naturally catch, so existing ``except ValueError`` clauses keep working.
"""

from __future__ import annotations


class PlannerError(Exception):
    """Root of every error veerwise raises on purpose."""


class SiteError(PlannerError, ValueError):
    """The site file breaks a rule of the schema (names the feature)."""


class SettingsError(PlannerError, ValueError):
    """A setting is out of its allowed range.

    The message names the setting as its owner and field (``Dynamics.slip``, see
    :mod:`planner.checks`); the command line says the option instead (``--slip``).
    """


class BudgetError(PlannerError, MemoryError):
    """The requested grid or model is larger than the allowed budget."""


class SolverError(PlannerError, ArithmeticError):
    """A numerical solve did not meet its stated tolerance."""


class RunFolderError(PlannerError, OSError):
    """A run folder is missing, incomplete, tampered with or from another version."""


class Interrupted(PlannerError):
    """The user stopped a long command; the message says what was written (usually nothing)."""


class Stopped(KeyboardInterrupt):
    """A stop signal (SIGINT or SIGTERM) arrived; ``signum`` says which.

    A ``KeyboardInterrupt`` so that every clean-up path written for Ctrl-C also runs
    for SIGTERM.
    """

    def __init__(self, signum: int):
        super().__init__(signum)
        self.signum = signum


class PlannerWarning(UserWarning):
    """Root of veerwise's warnings."""


class RunFolderWarning(PlannerWarning):
    """A run folder needed attention (a stale lock taken over, leftovers cleaned)."""


class SiteWarning(PlannerWarning):
    """Something in the site is legal but worth a second look."""


class NotConvergedWarning(PlannerWarning):
    """Learning stopped before the learned policy matched its exact reference."""
