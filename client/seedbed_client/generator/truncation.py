"""Constants of the standard normal truncated to [-2, 2], as exact float64 literals.

math.erf's last bit depends on the C library, so the values were computed once with mpmath at
50 digits and rounded to float64; they are written as hexadecimal literals so that the client
needs no arbitrary-precision library and every machine reads the same bits. A test recomputes
them with mpmath (tests/unit/client/test_generator_constants.py).
"""

from __future__ import annotations

TRUNCATION_BOUND = 2.0

# Phi(2) - Phi(-2) = erf(2 / sqrt(2)): the probability mass kept by the truncation.
TRUNCATION_MASS = float.fromhex("0x1.e8b4307d3627ap-1")  # 0.9544997361036416
# Std of N(0,1) restricted to [-2, 2]: sqrt(1 - 2*2*phi(2) / (Phi(2) - Phi(-2))).
TRUNCATION_STD_FACTOR = float.fromhex("0x1.c25e4b6dba981p-1")  # 0.8796256610342398
# Phi(-2): the mass of one tail cut away.
TRUNCATION_LOWER_TAIL = float.fromhex("0x1.74bcf82c9d860p-6")  # 0.02275013194817921
