"""Analytic test functions on the unit cube, with their published minima.

Definitions and minima are from the Virtual Library of Simulation
Experiments (Surjanovic & Bingham, https://www.sfu.ca/~ssurjano/), written
down from that library's pages. Every function takes a point of the unit cube
(shape ``(d,)``) and returns a float; lower is better.
"""

from __future__ import annotations

import math

import numpy as np

# Branin-Hoo on [-5, 10] x [0, 15]: minimum 0.397887 at (-pi, 12.275), (pi, 2.275), (9.42478, 2.475).
BRANIN_MIN = 0.397887
BRANIN_ARGMIN = ((-math.pi, 12.275), (math.pi, 2.275), (9.42478, 2.475))
# Hartmann-3 on [0, 1]^3: minimum -3.86278 at (0.114614, 0.555649, 0.852547).
HARTMANN3_MIN = -3.86278
HARTMANN3_ARGMIN = (0.114614, 0.555649, 0.852547)
# Hartmann-6 on [0, 1]^6: minimum -3.32237 at (0.20169, 0.150011, 0.476874, 0.275332, 0.311652, 0.6573).
HARTMANN6_MIN = -3.32237
HARTMANN6_ARGMIN = (0.20169, 0.150011, 0.476874, 0.275332, 0.311652, 0.6573)

_ALPHA = np.array([1.0, 1.2, 3.0, 3.2])
_A3 = np.array([[3.0, 10, 30], [0.1, 10, 35], [3.0, 10, 30], [0.1, 10, 35]])
_P3 = 1e-4 * np.array([[3689, 1170, 2673], [4699, 4387, 7470], [1091, 8732, 5547], [381, 5743, 8828]])
_A6 = np.array([
    [10, 3, 17, 3.5, 1.7, 8],
    [0.05, 10, 17, 0.1, 8, 14],
    [3, 3.5, 1.7, 10, 17, 8],
    [17, 8, 0.05, 10, 0.1, 14],
])
_P6 = 1e-4 * np.array([
    [1312, 1696, 5569, 124, 8283, 5886],
    [2329, 4135, 8307, 3736, 1004, 9991],
    [2348, 1451, 3522, 2883, 3047, 6650],
    [4047, 8828, 8732, 5743, 1091, 381],
])


def branin_raw(x1: float, x2: float) -> float:
    """Branin-Hoo in its own coordinates, x1 in [-5, 10], x2 in [0, 15]."""
    a, b, c = 1.0, 5.1 / (4 * math.pi**2), 5 / math.pi
    r, s, t = 6.0, 10.0, 1 / (8 * math.pi)
    return a * (x2 - b * x1**2 + c * x1 - r) ** 2 + s * (1 - t) * math.cos(x1) + s


def branin(x_unit: np.ndarray) -> float:
    """Branin-Hoo on the unit square, mapped linearly to [-5, 10] x [0, 15]."""
    u = _unit(x_unit, 2)
    return branin_raw(-5.0 + 15.0 * u[0], 15.0 * u[1])


def _hartmann(u: np.ndarray, a: np.ndarray, p: np.ndarray) -> float:
    inner = np.sum(a * (u[None, :] - p) ** 2, axis=1)
    return float(-np.sum(_ALPHA * np.exp(-inner)))


def hartmann3(x_unit: np.ndarray) -> float:
    """Hartmann-3 on [0, 1]^3."""
    return _hartmann(_unit(x_unit, 3), _A3, _P3)


def hartmann6(x_unit: np.ndarray) -> float:
    """Hartmann-6 on [0, 1]^6."""
    return _hartmann(_unit(x_unit, 6), _A6, _P6)


def _unit(x: np.ndarray, d: int) -> np.ndarray:
    u = np.asarray(x, dtype=float).reshape(-1)
    if u.shape != (d,):
        msg = f"expected a point of {d} coordinates, got shape {np.shape(x)}"
        raise ValueError(msg)
    if np.any(u < 0) or np.any(u > 1):
        msg = f"point {u.tolist()} lies outside the unit cube"
        raise ValueError(msg)
    return u
