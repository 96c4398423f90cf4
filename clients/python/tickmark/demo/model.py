"""A learned model of the trainer's approval, and the policies that use it."""

from __future__ import annotations

import random
from typing import Dict, Tuple

from tickmark.demo import world

Key = Tuple[int, int, str]


class ApprovalModel:
    """Mean credited approval per (direction of the dock, action).

    Fed with (position, action, value, weight) from labels: value is
    Σ credit × feedback × trainer weight, weight is Σ credit.
    """

    def __init__(self):
        self.value: Dict[Key, float] = {}
        self.weight: Dict[Key, float] = {}

    def add(self, position, action: str, value: float, weight: float) -> None:
        key = (*world.relative(position), action)
        self.value[key] = self.value.get(key, 0.0) + value
        self.weight[key] = self.weight.get(key, 0.0) + weight

    def estimate(self, position, action: str) -> float:
        key = (*world.relative(position), action)
        w = self.weight.get(key, 0.0)
        return self.value[key] / w if w > 1e-9 else 0.0

    def greedy(self, position, rng: random.Random) -> str:
        scores = [(self.estimate(position, a), rng.random(), a) for a in world.ACTIONS]
        return max(scores)[2]


def evaluate(policy, episodes: int = 100, seed: int = 7) -> float:
    """Success rate of `policy(position, rng)` on seeded episodes (no server)."""
    rng = random.Random(seed)
    env = world.DockRover(seed=seed)
    successes = 0
    for _ in range(episodes):
        position, done, info = env.reset(), False, {}
        while not done:
            position, _, done, info = env.step(policy(position, rng))
        successes += bool(info.get("docked"))
    return successes / episodes


def random_policy(position, rng: random.Random) -> str:
    return rng.choice(world.ACTIONS)
