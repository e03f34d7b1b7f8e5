"""Plain-Python test functions (standard library only), cheap to import from a command-line script."""

from __future__ import annotations

import math


def branin(x1: float, x2: float) -> float:
    """Branin-Hoo function: Dixon & Szegö, Towards Global Optimisation 2 (1978); constants as listed by
    Surjanovic & Bingham, Virtual Library of Simulation Experiments (SFU, 2013), "Branin function"."""
    a, b, c = 1.0, 5.1 / (4 * math.pi**2), 5 / math.pi
    r, s, t = 6.0, 10.0, 1 / (8 * math.pi)
    return a * (x2 - b * x1**2 + c * x1 - r) ** 2 + s * (1 - t) * math.cos(x1) + s


def distance(x1: float, x2: float) -> float:
    """Euclidean distance from (pi, 2.275), one of Branin's three minimisers."""
    return math.hypot(x1 - math.pi, x2 - 2.275)
