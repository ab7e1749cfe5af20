"""Inverse standard normal CDF: Wichura (1988), Algorithm AS 241 (PPND16, double precision).

Rational approximations in three regions of q = p - 1/2, accurate to about 1e-16:

    |q| <= 0.425:  r = 0.180625 - q*q;  z = (q * A(r)) / B(r)
    otherwise:     r = sqrt(-log(min(p, 1 - p)))
                   r <= 5:  z = C(r - 1.6) / D(r - 1.6)
                   r > 5:   z = E(r - 5) / F(r - 5)
                   z takes the sign of q

The polynomials are evaluated by Horner's rule from the highest coefficient down
(t = c7; t = t*r + c6; ...; t = t*r + c0), each multiply and add a separate operation;
the log is deterministic_log, never np.log.
"""

from __future__ import annotations

import numpy as np

from .logarithm import log_positive

SPLIT_CENTRAL = 0.425
SPLIT_FAR = 5.0
CENTRAL_CONST = 0.180625
MIDDLE_SHIFT = 1.6

# Coefficients as printed in Wichura (1988), lowest degree first. B, D, F have a leading 1.
AS241_A = (
    3.3871328727963666080e0,
    1.3314166789178437745e2,
    1.9715909503065514427e3,
    1.3731693765509461125e4,
    4.5921953931549871457e4,
    6.7265770927008700853e4,
    3.3430575583588128105e4,
    2.5090809287301226727e3,
)
AS241_B = (
    1.0,
    4.2313330701600911252e1,
    6.8718700749205790830e2,
    5.3941960214247511077e3,
    2.1213794301586595867e4,
    3.9307895800092710610e4,
    2.8729085735721942674e4,
    5.2264952788528545610e3,
)
AS241_C = (
    1.42343711074968357734e0,
    4.63033784615654529590e0,
    5.76949722146069140550e0,
    3.64784832476320460504e0,
    1.27045825245236838258e0,
    2.41780725177450611770e-1,
    2.27238449892691845833e-2,
    7.74545014278341407640e-4,
)
AS241_D = (
    1.0,
    2.05319162663775882187e0,
    1.67638483018380384940e0,
    6.89767334985100004550e-1,
    1.48103976427480074590e-1,
    1.51986665636164571966e-2,
    5.47593808499534494600e-4,
    1.05075007164441684324e-9,
)
AS241_E = (
    6.65790464350110377720e0,
    5.46378491116411436990e0,
    1.78482653991729133580e0,
    2.96560571828504891230e-1,
    2.65321895265761230930e-2,
    1.24266094738807843860e-3,
    2.71155556874348757815e-5,
    2.01033439929228813265e-7,
)
AS241_F = (
    1.0,
    5.99832206555887937690e-1,
    1.36929880922735805310e-1,
    1.48753612908506148525e-2,
    7.86869131145613259100e-4,
    1.84631831751005468180e-5,
    1.42151175831644588870e-7,
    2.04426310338993978564e-15,
)


def _horner(coeffs: tuple[float, ...], r: np.ndarray, out: np.ndarray) -> np.ndarray:
    """sum coeffs[k] * r**k, from the top coefficient down; `out` must not alias r."""
    np.multiply(r, coeffs[-1], out=out)
    np.add(out, coeffs[-2], out=out)
    for c in coeffs[-3::-1]:
        np.multiply(out, r, out=out)
        np.add(out, c, out=out)
    return out


def _ratio(num: tuple[float, ...], den: tuple[float, ...], r: np.ndarray) -> np.ndarray:
    top = _horner(num, r, np.empty_like(r))
    bottom = _horner(den, r, np.empty_like(r))
    np.divide(top, bottom, out=top)
    return top


def quantile_from_centered(
    q: np.ndarray, out: np.ndarray, p: np.ndarray | None = None
) -> np.ndarray:
    """z = Phi^-1(1/2 + q) into `out` (which may be q itself).

    In the tails AS 241 needs r = min(p, 1 - p). When `p` is given it is taken from p;
    otherwise as 1/2 - |q|, which equals min(p, 1 - p) exactly whenever q = p - 1/2 was exact
    (true for every p the generator makes) and for any |q| >= 1/4 (Sterbenz).
    """
    magnitude = np.abs(q)
    tail = np.flatnonzero(magnitude > SPLIT_CENTRAL)
    q_tail = q[tail]
    if p is not None:
        p_tail = p[tail]
        r_tail = np.minimum(p_tail, 1.0 - p_tail)
    else:
        r_tail = np.subtract(0.5, magnitude[tail])

    # Central region for every element (cheaper than gathering 85 % of them); the tail
    # elements get meaningless values here, possibly inf or nan, and are overwritten below.
    r = np.multiply(q, q, out=magnitude)
    np.subtract(CENTRAL_CONST, r, out=r)
    with np.errstate(all="ignore"):
        top = _horner(AS241_A, r, np.empty_like(r))
        np.multiply(q, top, out=top)
        bottom = _horner(AS241_B, r, np.empty_like(r))
        np.divide(top, bottom, out=out)

    if tail.size:
        s = log_positive(r_tail)
        np.negative(s, out=s)
        np.sqrt(s, out=s)
        far = np.flatnonzero(s > SPLIT_FAR)
        z = _ratio(AS241_C, AS241_D, np.subtract(s, MIDDLE_SHIFT))
        if far.size:
            z[far] = _ratio(AS241_E, AS241_F, np.subtract(s[far], SPLIT_FAR))
        np.copysign(z, q_tail, out=z)
        out[tail] = z
    return out


def normal_quantile(p: np.ndarray) -> np.ndarray:
    """Phi^-1(p) for p strictly inside (0, 1), by AS 241 with a deterministic log."""
    arr = np.asarray(p, dtype=np.float64)
    if arr.size and not (np.all(arr > 0.0) and np.all(arr < 1.0)):
        raise ValueError("p must hold probabilities strictly between 0 and 1 for normal_quantile")
    q = np.subtract(arr, 0.5)
    return quantile_from_centered(q, np.empty_like(q), p=arr)
