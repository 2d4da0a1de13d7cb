"""veerwise: cautious and shortest routes across a test yard, with their hazard risk.

Stages, in data-flow order: ``site`` -> ``grid`` -> ``model`` -> ``learn`` / ``exact``
-> ``risk`` -> ``route`` -> ``export`` / ``plots`` / ``brief``. The command line lives
in ``planner.cli``.
"""

__version__ = "0.1.0"
