"""The simulated trainer's reaction delays, in the kernels' text forms.

    lognormal:MU,SIGMA[,SHIFT]   SHIFT + exp(N(MU, SIGMA^2)) seconds
    exgauss:MU,SIGMA,TAU         N(MU, SIGMA^2) + exponential(mean TAU) seconds, > 0
    gamma:SHAPE,SCALE[,SHIFT]    SHIFT + gamma(SHAPE, SCALE) seconds

The same forms name delay kernels to the server (docs/calibration.md), so a
simulation's true delays can be written down beside what calibration fitted.
"""

from __future__ import annotations

import math
import random
from typing import Callable

# The demo's trainer: a right-skewed lognormal, median about 0.55 s, not a
# gamma, so a calibration that picks the family matters.
DEFAULT = "lognormal:-0.92,0.45,0.15"


def parse(text: str) -> Callable[[random.Random], float]:
    """A sampler rng -> seconds for `text`; ValueError for a bad form."""
    family, _, rest = text.partition(":")
    try:
        args = [float(v) for v in rest.split(",")] if rest else []
    except ValueError:
        raise ValueError(f"{text!r}: parameters must be numbers") from None
    if not all(math.isfinite(a) for a in args):
        raise ValueError(f"{text!r}: parameters must be finite")
    if family == "lognormal" and len(args) in (2, 3) and args[1] > 0:
        mu, sigma, shift = args[0], args[1], args[2] if len(args) == 3 else 0.0
        if shift < 0:
            raise ValueError(f"{text!r}: SHIFT must be >= 0")
        return lambda rng: shift + math.exp(rng.gauss(mu, sigma))
    if family == "exgauss" and len(args) == 3 and args[1] > 0 and args[2] > 0:
        mu, sigma, tau = args

        def exgauss(rng: random.Random) -> float:
            while True:
                d = rng.gauss(mu, sigma) + rng.expovariate(1.0 / tau)
                if d > 0:
                    return d
        return exgauss
    if family == "gamma" and len(args) in (2, 3) and args[0] > 0 and args[1] > 0:
        shape, scale, shift = args[0], args[1], args[2] if len(args) == 3 else 0.0
        if shift < 0:
            raise ValueError(f"{text!r}: SHIFT must be >= 0")
        return lambda rng: shift + rng.gammavariate(shape, scale)
    raise ValueError(f"{text!r}: want lognormal:MU,SIGMA[,SHIFT] (SIGMA > 0), "
                     "exgauss:MU,SIGMA,TAU (SIGMA, TAU > 0) or gamma:SHAPE,SCALE[,SHIFT]")
