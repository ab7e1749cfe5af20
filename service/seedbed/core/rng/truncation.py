"""Constants of the standard normal truncated to [-2, 2], computed with mpmath.

math.erf's last bit depends on the C library, so these come from mpmath (arbitrary
precision, pure Python, same digits everywhere) rounded once to float64.
"""

from __future__ import annotations

import mpmath

TRUNCATION_BOUND = 2.0


def _constants() -> tuple[float, float, float]:
    ctx = mpmath.mp.clone()
    ctx.dps = 50
    b = ctx.mpf(2)
    mass = ctx.erf(b / ctx.sqrt(2))  # Phi(2) - Phi(-2)
    density = ctx.exp(-b * b / 2) / ctx.sqrt(2 * ctx.pi)  # phi(2)
    # Variance of N(0,1) restricted to [-b, b]: 1 - 2*b*phi(b) / (Phi(b) - Phi(-b)).
    factor = ctx.sqrt(1 - 2 * b * density / mass)
    lower_tail = (1 - mass) / 2  # Phi(-2)
    return float(mass), float(factor), float(lower_tail)


TRUNCATION_MASS, TRUNCATION_STD_FACTOR, TRUNCATION_LOWER_TAIL = _constants()
