"""A learned model of the trainer's approval, and the policies that use it."""

from __future__ import annotations

import random
from typing import Dict, Tuple

from tickmark.demo import world

Key = Tuple[bool, str]


# What the rover perceives of a step: whether it is on its dock, and whether
# the action heads toward the dock, away from it, neither, or waits.
RELATIONS = ("toward", "away", "level", "wait")
KEYS = [(on_dock, rel) for on_dock in (False, True) for rel in RELATIONS]
INDEX = {k: i for i, k in enumerate(KEYS)}


def key_of(position, action: str) -> Key:
    if action == "wait":
        relation = "wait"
    else:
        before, after = world.distance(position), world.distance(world.move(position, action))
        relation = "toward" if after < before else "away" if after > before else "level"
    return (position == world.DOCK, relation)


def _solve(a, b):
    """Solves a x = b (a symmetric positive definite) by Gaussian elimination."""
    n = len(b)
    m = [row[:] + [b[i]] for i, row in enumerate(a)]
    for c in range(n):
        p = max(range(c, n), key=lambda r: abs(m[r][c]))
        m[c], m[p] = m[p], m[c]
        pivot = m[c][c]
        for r in range(c + 1, n):
            f = m[r][c] / pivot
            if f:
                row_r, row_c = m[r], m[c]
                for k in range(c, n + 1):
                    row_r[k] -= f * row_c[k]
    x = [0.0] * n
    for r in range(n - 1, -1, -1):
        x[r] = (m[r][n] - sum(m[r][k] * x[k] for k in range(r + 1, n))) / m[r][r]
    return x


class ApprovalModel:
    """The trainer's approval of each (direction of the dock, action).

    Each feedback is one observation: its value should equal the approval of
    the step it judged. Which step that was is uncertain, so the feedback is
    spread over steps with shares (tickmark's credit: F(t_f - s) - F(t_f - e)
    for the trainer's delay kernel; the naive method: all on one step). The
    model is the ridge least-squares fit of value ≈ Σ share × approval(key of
    step), which separates a step's own approval from its neighbours'.
    """

    def __init__(self, ridge: float = 0.5):
        n = len(KEYS)
        self.ridge = ridge
        self.a = [[0.0] * n for _ in range(n)]
        self.b = [0.0] * n
        self.count = 0
        self.approval = [0.0] * n

    def add(self, value: float, shares) -> None:
        """shares: [(key, share)], the feedback's spread over step keys."""
        total = sum(s for _, s in shares)
        if total <= 0:
            return
        x = {}
        for key, share in shares:
            i = INDEX[key]
            x[i] = x.get(i, 0.0) + share / total
        for i, xi in x.items():
            self.b[i] += xi * value
            row = self.a[i]
            for j, xj in x.items():
                row[j] += xi * xj
        self.count += 1

    def fit(self) -> None:
        n = len(KEYS)
        a = [[self.a[i][j] + (self.ridge if i == j else 0.0) for j in range(n)] for i in range(n)]
        self.approval = _solve(a, self.b)

    def estimate(self, position, action: str) -> float:
        return self.approval[INDEX[key_of(position, action)]]

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
