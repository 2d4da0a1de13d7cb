"""Routes: the nominal path of a policy, its waypoints and their clearances.

This stage owns the nominal route (follow the greedy action and the most likely
outcome from the start until the goal, an incident, or a repeated cell).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from planner.model import EVENT_GOAL, EVENT_NONE, Model


@dataclass(frozen=True)
class NominalPath:
    """The cells of a nominal route and how it ended.

    ``states`` are flat state indices from the start, in order; ``end_event`` is the
    model event code of the final move (``EVENT_GOAL`` for success), or -1 when the
    route returned to a cell it had visited (a loop); ``end_state`` is the cell the
    final move reached (the goal or hazard cell; -1 when it left the boundary).
    """

    states: np.ndarray
    end_event: int
    end_state: int

    @property
    def reached_goal(self) -> bool:
        return self.end_event == EVENT_GOAL

    @property
    def n_moves(self) -> int:
        return int(self.states.size) - 1 + (1 if self.end_event != -1 else 0)


def nominal_path(model: Model, greedy_action: np.ndarray, *, start: int | None = None) -> NominalPath:
    """Follow ``greedy_action`` and each move's most likely outcome.

    Ties between equally likely outcomes go to the first in the table (deterministic).
    """
    state = model.start if start is None else int(start)
    seen = {state}
    states = [state]
    n_a = model.n_actions
    while True:
        k = state * n_a + int(greedy_action[state])
        lo, hi = model.offsets[k], model.offsets[k + 1]
        if hi == lo:
            return NominalPath(np.asarray(states, dtype=np.int64), -1, state)
        best = lo + int(np.argmax(model.prob[lo:hi]))
        event = int(model.event[best])
        if event != EVENT_NONE:
            return NominalPath(np.asarray(states, dtype=np.int64), event, int(model.next_state[best]))
        state = int(model.next_state[best])
        if state in seen:
            return NominalPath(np.asarray(states, dtype=np.int64), -1, state)
        seen.add(state)
        states.append(state)
