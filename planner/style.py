"""veerwise's own colours, symbols and names for everything drawn, kept in one place."""

from __future__ import annotations

#: Cell fill colours of the labelled grid.
FREE = "#f4f1ea"
OUTSIDE = "#c9c6bf"
HAZARD = "#a8412a"
HAZARD_SOFT = "#e0963a"  # hazards that do not end the run
BUFFER_EDGE = "#a8412a"
ROUGH = "#b9ae84"
DRIFT = "#2f6f8f"
GOAL = "#2e7d4f"
START = "#1f1f1f"
GRID_LINE = "#ffffff"
TEXT = "#222222"

#: Start and goal symbols (matplotlib marker codes).
START_MARKER = "^"
GOAL_MARKER = "D"

#: The two policies: colour, line style and the name shown to users.
POLICY = {
    "cautious": {"color": "#1d5c96", "linestyle": "-", "label": "cautious (SARSA)"},
    "shortest": {"color": "#d9730d", "linestyle": "--", "label": "shortest (Q-learning)"},
}
#: Exact references drawn beside the learned policies.
REFERENCE = {
    "cautious": {"color": "#6b95c0", "linestyle": ":", "label": "exact on-policy"},
    "shortest": {"color": "#f0b070", "linestyle": ":", "label": "exact optimal"},
}
#: Cells where the two policies choose differently.
DISAGREE = "#7b3fa0"
#: Colour map of the risk maps (log scale of incident probability).
RISK_CMAP = "magma_r"

FIGURE_DPI = 130
FONT_SIZE = 9

#: Printed on every figure: the outputs are for simulation and review only.
FIGURE_NOTICE = "veerwise - for simulation and review only"
