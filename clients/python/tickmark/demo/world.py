"""The dock-rover world: a 10x10 warehouse floor with one charging dock."""

from __future__ import annotations

import random
from typing import Optional, Tuple

ACTIONS = ("north", "south", "east", "west", "wait")
MOVES = {"north": (0, 1), "south": (0, -1), "east": (1, 0), "west": (-1, 0), "wait": (0, 0)}
SIZE = 10
DOCK = (7, 2)


def distance(p: Tuple[int, int], dock: Tuple[int, int] = DOCK) -> int:
    return abs(p[0] - dock[0]) + abs(p[1] - dock[1])


def move(p: Tuple[int, int], action: str) -> Tuple[int, int]:
    dx, dy = MOVES[action]
    return (min(SIZE - 1, max(0, p[0] + dx)), min(SIZE - 1, max(0, p[1] + dy)))


def approves(p: Tuple[int, int], action: str) -> bool:
    """What the (ideal) trainer wants: get closer to the dock, then wait on it."""
    if p == DOCK:
        return action == "wait"
    return distance(move(p, action)) < distance(p)


def relative(p: Tuple[int, int]) -> Tuple[int, int]:
    """Which way the dock lies: (sign dx, sign dy)."""
    sx = (DOCK[0] > p[0]) - (DOCK[0] < p[0])
    sy = (DOCK[1] > p[1]) - (DOCK[1] < p[1])
    return (sx, sy)


class DockRover:
    """An environment with reset() and step(action), like the ones learners use.

    An episode ends when the rover waits on the dock (success) or after
    max_steps steps.
    """

    def __init__(self, seed: Optional[int] = None, max_steps: int = 20):
        self.rng = random.Random(seed)
        self.max_steps = max_steps
        self.position = (0, 0)
        self.steps = 0

    def reset(self) -> Tuple[int, int]:
        while True:
            self.position = (self.rng.randrange(SIZE), self.rng.randrange(SIZE))
            if distance(self.position) >= 4:
                break
        self.steps = 0
        return self.position

    def step(self, action: str):
        self.steps += 1
        docked = self.position == DOCK and action == "wait"
        self.position = move(self.position, action)
        done = docked or self.steps >= self.max_steps
        return self.position, 1.0 if docked else 0.0, done, {"docked": docked}
