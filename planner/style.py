"""veerwise's own colours, symbols and names for everything drawn, kept in one place.

The map's classes are told apart by colour for every reader: each pair differs by at
least ``MAP_MIN_DELTA_E`` (CIEDE2000) for normal vision and under simulated
deuteranopia, protanopia and tritanopia (Machado, Oliveira and Fernandes 2009,
severity 100); ``tests/test_plots.py`` measures it. Run-ending hazards are hatched as
well as coloured, so they read even in grey print.
"""

from __future__ import annotations

#: Cell fill colours of the labelled grid.
FREE = "#f6f3ec"
OUTSIDE = "#a0a9b4"
HAZARD = "#8e2a1a"  # hazards that end the run (also hatched)
HAZARD_SOFT = "#ffa21e"  # hazards that do not end the run
BUFFER_EDGE = "#8e2a1a"
ROUGH = "#eed3a0"
DRIFT = "#58245c"  # drift arrows
DRIFT_EDGE = "#ffffff"  # their outline, so they stand out over routes and fills
GOAL = "#3ea270"
START = "#111111"
GRID_LINE = "#ffffff"
TEXT = "#222222"
MUTED = "#666666"

#: Hatching of hazards that end the run, and its colour.
HAZARD_HATCH = "////"
HATCH_COLOR = "#f6f3ec"

#: Start and goal symbols (matplotlib marker codes).
START_MARKER = "^"
GOAL_MARKER = "D"

#: The two policies: colour, line style and the name shown to users.
POLICY = {
    "cautious": {"color": "#0068c5", "linestyle": "-", "label": "cautious (SARSA)"},
    "shortest": {"color": "#c85908", "linestyle": "--", "label": "shortest (Q-learning)"},
}
#: The third route, the shortest within a risk budget (``plan --risk-budget``): its own
#: colour (dark grey, the class farthest from every other under every simulation) and
#: line style. Kept apart from ``POLICY``, which names the two learned policies.
BUDGET = {"color": "#555555", "linestyle": "-.", "label": "within-budget (exact)"}
#: Every delivered route's look, by route name.
ROUTE = {**POLICY, "budget": BUDGET}
#: Failure paths drawn over a route, the off-route moves on them, and the budget line
#: of the trade-off figure.
FAILURE_PATH = START
BUDGET_LINE = HAZARD

#: Exact references drawn beside the learned policies.
REFERENCE = {
    "cautious": {"color": "#0068c5", "linestyle": ":", "label": "exact on-policy"},
    "shortest": {"color": "#c85908", "linestyle": ":", "label": "exact optimal"},
}

#: Frame of the briefing's banners (seeds disagree, not converged).
DISAGREE = "#58245c"

#: Every colour class of the site map a reviewer must tell apart (checked under
#: simulated colour-vision deficiency).
MAP_CLASSES = {
    "open ground": FREE, "outside boundary": OUTSIDE, "rough ground": ROUGH,
    "hazard, run goes on": HAZARD_SOFT, "hazard, ends the run": HAZARD, "goal": GOAL, "start": START,
    "cautious route": POLICY["cautious"]["color"], "shortest route": POLICY["shortest"]["color"],
    "within-budget route": BUDGET["color"], "drift arrow": DRIFT,
}
#: Least CIEDE2000 difference between any two map classes, under each simulation.
MAP_MIN_DELTA_E = 12.0

#: Colour map of the risk maps (log scale of incident probability): perceptually
#: uniform and readable with colour-vision deficiency; hazards are drawn apart from it.
RISK_CMAP = "cividis"
#: Risk-map fills outside the colour scale: hazards (hatched) and cells below its floor.
RISK_HAZARD = "#ffffff"
RISK_HAZARD_EDGE = "#111111"
RISK_BELOW_FLOOR = FREE
#: Values below this are drawn as "below the floor" on the risk maps.
RISK_FLOOR = 1e-6

#: Pixels per inch of every figure (the briefing embeds them at print resolution).
FIGURE_DPI = 300
FONT_SIZE = 9
#: Width of a map figure, inches (the printable width of an A4 page).
MAP_WIDTH_IN = 7.2

#: Printed on every figure: the outputs are for simulation and review only.
FIGURE_NOTICE = "veerwise - for simulation and review only"
