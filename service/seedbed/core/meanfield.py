"""Mean-field signal propagation figures for one activation and one (sigma_w^2, sigma_b^2).

The picture (Poole et al. 2016; Schoenholz et al. 2017) is a wide network whose weights are
i.i.d. with variance sigma_w^2 / fan_in and whose biases have second moment sigma_b^2. At
infinite width a layer's pre-activations are Gaussian, and their mean square q (the *length*)
moves from layer to layer by the length map

    L(q) = sigma_w^2 E[phi(sqrt(q) z)^2] + sigma_b^2,        z ~ N(0, 1).

Figures computed here, and the formulas used (equation numbers are from memory):

* q*: the fixed point of L reached from the starting length `start` (default 1: unit-variance
  pre-activations). L is increasing in q for the activations we know, so iterates move
  monotonically towards the nearest fixed point in the direction L(start) - start points; we
  find it by bracketing and a safeguarded secant search rather than by iterating (iterations
  crawl near criticality). If the iterates grow without bound, q* is reported as None
  ("unbounded"). For the positively homogeneous activations (linear, relu, leaky_relu)
  L(q) = sigma_w^2 m q + sigma_b^2 with m = E[phi(z)^2] exactly, so q* = sigma_b^2 /
  (1 - sigma_w^2 m) when sigma_w^2 m < 1; when sigma_w^2 m = 1 and sigma_b^2 = 0 every length
  is a fixed point ("neutral"; we report q* = start).
* chi_1 = sigma_w^2 E[phi'(sqrt(q*) z)^2] (Poole et al. 2016): the slope of the correlation map
  at c = 1, i.e. how a small difference between two inputs grows (> 1, chaotic) or shrinks
  (< 1, ordered) per layer. At q* = 0 we use the limit q -> 0+, which for kinked activations is
  the mean of the squared one-sided slopes at 0.
* xi_q, the depth over which q approaches q*: |q^l - q*| ~ exp(-l / xi_q) with
  xi_q = -1 / log L'(q*). Differentiating under the expectation,
  L'(q) = sigma_w^2 E[phi(sqrt(q) z) phi'(sqrt(q) z) z] / sqrt(q); Gaussian integration by parts
  turns this into chi_1 + sigma_w^2 E[phi'' phi] (Schoenholz et al. 2017, eq. 5 [from memory]).
  We evaluate the first form, which needs phi' only (ReLU's phi'' is a delta).
* xi_c, the depth over which the correlation c of two inputs approaches its fixed point c*:
  xi_c = -1 / log chi_c with chi_c = sigma_w^2 E[phi'(u1) phi'(u2)] at c*, u1 = sqrt(q*) z1,
  u2 = sqrt(q*)(c* z1 + sqrt(1 - c*^2) z2) (Schoenholz et al. 2017, eq. 9 [from memory]).
  In the ordered phase c* = 1 and chi_c = chi_1; in the chaotic phase c* < 1 solves
  c = (sigma_w^2 E[phi(u1) phi(u2)] + sigma_b^2) / q*. xi_c diverges at chi_1 = 1: that is the
  edge of chaos, where signals (and gradients) travel deepest. Infinite depth scales are
  reported as None with phase "critical".
* The critical sigma_w^2 for a given sigma_b^2 solves chi_1(sigma_w^2) = 1 with q* moving along.
  When sigma_b^2 = 0 and phi(0) = 0, q* = 0 is a fixed point whose chi_1 is sigma_w^2 times the
  limit of E[phi'(sqrt(q) z)^2] at q -> 0; it loses stability at sigma_w^2 = 1 / that limit,
  which is the critical point when chi_1 stays >= 1 beyond it (checked). For tanh this gives
  exactly 1 (Poole et al. 2016).

Numerics: expectations use composite Gauss-Legendre quadrature in float64 over z in [-12, 12]
(the Gaussian tail beyond weighs < 1e-32), with breakpoints at z = 0 (where every piecewise
activation has its kink) and at fixed x-space points x = +-(1/4 ... 8) mapped to z = x /
sqrt(q), so the activation's curved region is resolved at any length q. The quadrature weights
are normalised to sum exactly to one. These figures explain choices; they never feed weight
bytes, so float64 and numpy's ufuncs (not bit-reproducible across platforms) are fine.

API:
    length_map(activation, sigma_w2, sigma_b2, q, param=None) -> float
    mean_field(activation, sigma_w2, sigma_b2, param=None, start=1.0) -> MeanFieldFigures
    critical_sigma_w2(activation, sigma_b2, param=None) -> float | None
    rationale_sentence(figures) -> str     one plain sentence for a plan's rationale
"""

from __future__ import annotations

import functools
import math
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np
import numpy.typing as npt

from seedbed.core.activations import activation_derivative, apply_activation, describe_activation
from seedbed.core.references import short_cite

FloatArray = npt.NDArray[np.float64]
Phase = Literal["ordered", "critical", "chaotic", "unbounded"]
FixedPointKind = Literal["attracting", "neutral", "unbounded"]

_Z_MAX = 12.0
_Z_BREAKS = (
    -12.0,
    -9.0,
    -7.0,
    -5.5,
    -4.0,
    -3.0,
    -2.0,
    -1.0,
    0.0,
    1.0,
    2.0,
    3.0,
    4.0,
    5.5,
    7.0,
    9.0,
    12.0,
)
_X_BREAKS = (0.25, 0.5, 1.0, 2.0, 4.0, 8.0)
_LEGENDRE_POINTS = 16
# Below this length the activation is evaluated at q = _TINY_Q: the q -> 0+ limit in float64.
_TINY_Q = 1e-300
_Q_HUGE = 1e12  # lengths beyond this count as "unbounded": the signal grows without limit
_PHASE_TOL = 1e-9  # |chi_1 - 1| below this is "critical"
_HOMOGENEOUS = frozenset({"linear", "relu", "leaky_relu"})


@functools.cache
def _legendre() -> tuple[FloatArray, FloatArray]:
    x, w = np.polynomial.legendre.leggauss(_LEGENDRE_POINTS)
    return x.astype(np.float64), w.astype(np.float64)


def _breakpoints(scale: float) -> FloatArray:
    """Sorted z breakpoints for an integrand phi(scale * z)."""
    extra = [b / scale for b in _X_BREAKS if b / scale < _Z_MAX] if scale > 0 else []
    pts = set(_Z_BREAKS) | set(extra) | {-b for b in extra}
    return np.array(sorted(pts), dtype=np.float64)


def _nodes(breaks: FloatArray) -> tuple[FloatArray, FloatArray]:
    """Composite Gauss-Legendre nodes over consecutive breakpoints, weights times N(0,1) pdf."""
    x, w = _legendre()
    a, b = breaks[:-1, None], breaks[1:, None]
    half = (b - a) / 2
    z = (a + b) / 2 + half * x[None, :]
    weights = half * w[None, :] * np.exp(-z * z / 2)
    return z.ravel(), weights.ravel()


@functools.lru_cache(maxsize=256)
def _cached_nodes(scale: float) -> tuple[FloatArray, FloatArray, float]:
    z, w = _nodes(_breakpoints(scale))
    return z, w, float(np.sum(w))


def _expect(fn: Callable[[FloatArray], FloatArray], q: float) -> float:
    """E[fn(z)], z ~ N(0,1), by composite Gauss-Legendre on the breakpoints for length q."""
    s = math.sqrt(max(q, _TINY_Q))
    z, w, total = _cached_nodes(s)
    # Dividing by the sum of the same weights, summed the same way, makes E[1] exactly 1.
    return float(np.sum(w * fn(z)) / total)


@dataclass(frozen=True)
class _Act:
    name: str
    param: float | None

    def phi(self, x: FloatArray) -> FloatArray:
        with np.errstate(over="ignore", under="ignore"):
            return apply_activation(self.name, x, self.param)

    def slope(self, x: FloatArray) -> FloatArray:
        with np.errstate(over="ignore", under="ignore"):
            return activation_derivative(self.name, x, self.param)

    def second_moment(self, q: float) -> float:
        s = math.sqrt(max(q, _TINY_Q))
        return _expect(lambda z: self.phi(s * z) ** 2, q)

    def slope_moment(self, q: float) -> float:
        s = math.sqrt(max(q, _TINY_Q))
        return _expect(lambda z: self.slope(s * z) ** 2, q)

    def homogeneous_moment(self) -> float:
        """E[phi(z)^2] = E[phi'(z)^2] for linear, relu, leaky_relu, in closed form."""
        if self.name == "linear":
            return 1.0
        if self.name == "relu":
            return 0.5
        assert self.param is not None
        return (1.0 + self.param * self.param) / 2.0


def _resolve(activation: str, param: float | None) -> _Act:
    info = describe_activation(activation)
    if info.output_only:
        raise ValueError(
            f"activation: {activation} is an output activation (not elementwise); "
            "mean-field figures need an elementwise hidden-layer activation"
        )
    if info.param is not None and param is None:
        param = info.param.default
    apply_activation(activation, np.zeros(1), param)  # validates param with a clear message
    return _Act(info.name, param)


def _check_variances(sigma_w2: float, sigma_b2: float) -> None:
    if not (math.isfinite(sigma_w2) and sigma_w2 > 0):
        raise ValueError(f"sigma_w2 must be a positive finite number (got {sigma_w2!r})")
    if not (math.isfinite(sigma_b2) and sigma_b2 >= 0):
        raise ValueError(f"sigma_b2 must be a non-negative finite number (got {sigma_b2!r})")


def length_map(
    activation: str, sigma_w2: float, sigma_b2: float, q: float, param: float | None = None
) -> float:
    """L(q) = sigma_w^2 E[phi(sqrt(q) z)^2] + sigma_b^2 (Poole et al. 2016)."""
    _check_variances(sigma_w2, sigma_b2)
    if not (math.isfinite(q) and q >= 0):
        raise ValueError(f"q must be a non-negative finite number (got {q!r})")
    act = _resolve(activation, param)
    return sigma_w2 * act.second_moment(q) + sigma_b2


def _find_root(
    f: Callable[[float], float],
    lo: float,
    hi: float,
    flo: float,
    fhi: float,
    rel: float = 1e-14,
    tol: float = 1e-300,
) -> float:
    """A root of f in [lo, hi] (lo < hi) where f(lo) and f(hi) differ in sign: Illinois regula
    falsi, with every fourth step a bisection so the bracket always shrinks."""
    if flo == 0.0:
        return lo
    if fhi == 0.0:
        return hi
    kept = 0  # +1: lo was kept last time, -1: hi was kept
    for step in range(300):
        if hi - lo <= max(rel * max(abs(lo), abs(hi)), tol):
            break
        x = (lo * fhi - hi * flo) / (fhi - flo)
        if step % 4 == 3 or not lo < x < hi:
            x = (lo + hi) / 2
        fx = f(x)
        if fx == 0.0:
            return x
        if (fx > 0) == (fhi > 0):
            hi, fhi = x, fx
            if kept == 1:
                flo /= 2
            kept = 1
        else:
            lo, flo = x, fx
            if kept == -1:
                fhi /= 2
            kept = -1
    return (lo + hi) / 2


def _fixed_point_below(
    act: _Act, sw2: float, sb2: float, start: float, g: Callable[[float], float], g_start: float
) -> float:
    """The largest fixed point below `start` when L(start) < start (iterates decrease)."""
    if sb2 == 0.0 and float(act.phi(np.zeros(1))[0]) == 0.0:
        # L(0) = 0: q = 0 is a fixed point. Search on rho(q) = L(q)/q - 1, whose q -> 0 limit
        # sigma_w^2 lim E[phi'^2] - 1 is known; near a marginal 0 (rho -> 0-) the plain
        # difference L(q) - q drowns in rounding long before q reaches 0.
        def rho(q: float) -> float:
            return sw2 * act.second_moment(q) / q - 1.0

        at_zero = sw2 * act.slope_moment(0.0) - 1.0
        hi, rhi = start, g_start / start
        lo = start
        while lo > 1e-280:
            lo /= 4.0
            rlo = rho(lo)
            positive = rlo > (1e-12 if at_zero <= 1e-12 else 0.0)
            if positive:
                return _find_root(rho, lo, hi, rlo, rhi)
            hi, rhi = lo, rlo
        return 0.0
    hi, ghi = start, g_start
    lo = start
    while lo > 1e-280:
        lo /= 4.0
        glo = g(lo)
        if glo >= 0:
            return _find_root(g, lo, hi, glo, ghi)
        hi, ghi = lo, glo
    return _find_root(g, 0.0, lo, g(0.0), g(lo))  # L(0) > 0: the root is in (0, lo)


def _fixed_point(
    act: _Act, sw2: float, sb2: float, start: float
) -> tuple[float | None, FixedPointKind]:
    if act.name in _HOMOGENEOUS:
        slope = sw2 * act.homogeneous_moment()
        if abs(slope - 1.0) <= 1e-12:
            return (start, "neutral") if sb2 == 0.0 else (None, "unbounded")
        if slope < 1.0:
            return sb2 / (1.0 - slope), "attracting"
        return (0.0, "attracting") if start == 0.0 and sb2 == 0.0 else (None, "unbounded")

    def g(q: float) -> float:
        return sw2 * act.second_moment(q) + sb2 - q

    g0 = g(start)
    if g0 == 0.0:
        return start, "attracting"
    if g0 < 0:
        return _fixed_point_below(act, sw2, sb2, start, g, g0), "attracting"
    lo, glo = start, g0  # iterates grow: the smallest fixed point above `start`
    hi = start
    while True:
        hi = hi * 4.0 if hi > 0 else 1e-12
        if hi > _Q_HUGE:
            return None, "unbounded"
        ghi = g(hi)
        if ghi <= 0:
            return _find_root(g, lo, hi, glo, ghi), "attracting"
        lo, glo = hi, ghi


def _chi_1(act: _Act, sw2: float, q_star: float | None) -> float | None:
    if act.name in _HOMOGENEOUS:
        return sw2 * act.homogeneous_moment()
    if q_star is None:
        return None
    return sw2 * act.slope_moment(q_star)


def _length_slope(act: _Act, sw2: float, q: float) -> float:
    """L'(q) = sigma_w^2 E[phi(sqrt q z) phi'(sqrt q z) z] / sqrt(q) (see module doc)."""
    if act.name in _HOMOGENEOUS:
        return sw2 * act.homogeneous_moment()
    s = math.sqrt(max(q, _TINY_Q))
    return sw2 * _expect(lambda z: act.phi(s * z) * act.slope(s * z) * z, q) / s


def _pair_expectation(
    f: Callable[[FloatArray], FloatArray], g: Callable[[FloatArray], FloatArray], q: float, c: float
) -> float:
    """E[f(u1) g(u2)], u1 = sqrt(q) z1, u2 = sqrt(q) (c z1 + sqrt(1 - c^2) z2).

    The outer integral over z1 uses the usual breakpoints; for each outer node the inner
    integral over z2 is split where u2 crosses the kink and the x-space breakpoints, which are
    oblique lines in the (z1, z2) plane."""
    s = math.sqrt(max(q, _TINY_Q))
    z1, w1, total = _cached_nodes(s)
    w1 = w1 / total
    r = math.sqrt(max(0.0, 1.0 - c * c))
    if r < 1e-12:
        return float(np.dot(w1, f(s * z1) * g(s * z1)))
    # inner breakpoints: u2 = s*(c z1 + r z2) = b  <=>  z2 = (b/s - c z1) / r
    xb = np.array([0.0, *_X_BREAKS, *(-b for b in _X_BREAKS)], dtype=np.float64)
    moving = (xb[None, :] / s - c * z1[:, None]) / r
    fixed = np.broadcast_to(np.array(_Z_BREAKS), (z1.size, len(_Z_BREAKS)))
    breaks = np.sort(np.clip(np.concatenate([fixed, moving], axis=1), -_Z_MAX, _Z_MAX), axis=1)
    x, w = _legendre()
    a, b = breaks[:, :-1, None], breaks[:, 1:, None]
    half = (b - a) / 2
    z2 = (a + b) / 2 + half * x[None, None, :]
    w2 = half * w[None, None, :] * np.exp(-z2 * z2 / 2)
    w2 = w2 / w2.sum(axis=(1, 2), keepdims=True)
    u2 = s * (c * z1[:, None, None] + r * z2)
    inner = np.sum(w2 * g(u2), axis=(1, 2))
    return float(np.dot(w1, f(s * z1) * inner))


def _correlation_fixed_point(act: _Act, sw2: float, sb2: float, q_star: float) -> float:
    """c* < 1 of the correlation map in the chaotic phase (chi_1 > 1)."""

    def h(c: float) -> float:
        return (sw2 * _pair_expectation(act.phi, act.phi, q_star, c) + sb2) / q_star - c

    lo, hi = 0.0, 1.0 - 1e-6
    hlo, hhi = h(lo), h(hi)
    if abs(hlo) <= 1e-13:  # e.g. an odd activation without bias: c* = 0 exactly
        return 0.0
    while hlo < 0 and lo > -1.0 + 1e-6:  # anti-correlated fixed points (rare)
        lo = max(-1.0 + 1e-6, lo - 0.5)
        hlo = h(lo)
    if hlo < 0 or hhi > 0:
        return 1.0  # no interior fixed point found: treat c* = 1
    return _find_root(h, lo, hi, hlo, hhi, rel=1e-10, tol=1e-11)


def _depth(rate: float | None) -> float | None:
    """-1 / log(rate): None (infinite) at rate 1, 0 at rate 0."""
    if rate is None or not math.isfinite(rate):
        return None
    if rate <= 0.0:
        return 0.0
    if abs(rate - 1.0) <= _PHASE_TOL:
        return None
    return -1.0 / math.log(rate)


@dataclass(frozen=True)
class MeanFieldFigures:
    activation: str
    activation_param: float | None
    sigma_w2: float
    sigma_b2: float
    start: float
    q_star: float | None  # None: the length grows without bound
    fixed_point: FixedPointKind
    length_slope: float | None  # L'(q*)
    chi_1: float | None
    c_star: float | None  # correlation fixed point (1 in the ordered phase)
    xi_q: float | None  # None: infinite or undefined, see notes
    xi_c: float | None
    phase: Phase
    critical_sigma_w2: float | None
    notes: tuple[str, ...] = field(default=())

    def as_dict(self) -> dict[str, Any]:
        return {
            "activation": self.activation,
            "activation_param": self.activation_param,
            "sigma_w2": self.sigma_w2,
            "sigma_b2": self.sigma_b2,
            "start_length": self.start,
            "q_star": self.q_star,
            "fixed_point": self.fixed_point,
            "length_slope": self.length_slope,
            "chi_1": self.chi_1,
            "c_star": self.c_star,
            "xi_q": self.xi_q,
            "xi_c": self.xi_c,
            "phase": self.phase,
            "critical_sigma_w2": self.critical_sigma_w2,
            "notes": list(self.notes),
            "references": [short_cite("poole-2016"), short_cite("schoenholz-2017")],
        }


def _phase(chi: float | None) -> Phase:
    if chi is None:
        return "unbounded"
    if abs(chi - 1.0) <= _PHASE_TOL:
        return "critical"
    return "ordered" if chi < 1.0 else "chaotic"


def _figures(act: _Act, sw2: float, sb2: float, start: float) -> MeanFieldFigures:
    notes: list[str] = []
    q_star, kind = _fixed_point(act, sw2, sb2, start)
    chi = _chi_1(act, sw2, q_star)
    slope: float | None = None
    xi_q: float | None = None
    xi_c: float | None = None
    c_star: float | None = None
    if q_star is None:
        phase: Phase = "unbounded"
        notes.append(
            "the length map has no finite fixed point above the starting length: "
            "pre-activation variance grows with depth without limit"
        )
    else:
        phase = _phase(chi)
        slope = _length_slope(act, sw2, q_star)
        if kind == "neutral":
            notes.append(
                "every length is a fixed point (L(q) = q): the scale is preserved, "
                f"not restored; q_star is the starting length {start:g}"
            )
        else:
            xi_q = _depth(slope)
        if phase == "chaotic" and q_star > 0:
            c_star = _correlation_fixed_point(act, sw2, sb2, q_star)
            if c_star < 1.0:
                chi_c = sw2 * _pair_expectation(act.slope, act.slope, q_star, c_star)
                xi_c = _depth(chi_c)
            else:
                xi_c = _depth(chi)
        else:
            c_star = 1.0
            xi_c = _depth(chi)
        if phase == "critical":
            notes.append("chi_1 = 1 (edge of chaos): the correlation depth scale xi_c is infinite")
    if q_star == 0.0:
        notes.append(
            "q* = 0: the signal's length decays towards zero with depth; chi_1 is the q -> 0 limit"
        )
    return MeanFieldFigures(
        activation=act.name,
        activation_param=act.param,
        sigma_w2=sw2,
        sigma_b2=sb2,
        start=start,
        q_star=q_star,
        fixed_point=kind,
        length_slope=slope,
        chi_1=chi,
        c_star=c_star,
        xi_q=xi_q,
        xi_c=xi_c,
        phase=phase,
        critical_sigma_w2=_critical(act, sb2),
        notes=tuple(notes),
    )


@functools.lru_cache(maxsize=256)
def _critical(act: _Act, sb2: float) -> float | None:
    if act.name in _HOMOGENEOUS:
        return 1.0 / act.homogeneous_moment()

    def excess(sw2: float) -> float:
        q_star, _ = _fixed_point(act, sw2, sb2, 1.0)
        chi = _chi_1(act, sw2, q_star)
        return math.inf if chi is None else chi - 1.0

    lo = 1e-3
    if sb2 == 0.0 and float(act.phi(np.zeros(1))[0]) == 0.0:
        # q* = 0 is a fixed point; it loses stability where sigma_w^2 * lim E[phi'^2] = 1.
        candidate = 1.0 / act.slope_moment(0.0)
        if excess(candidate * (1 + 1e-3)) >= -_PHASE_TOL:
            return candidate
        lo = candidate * (1 + 1e-3)
    flo = excess(lo)
    if flo >= 0:
        return None
    hi = lo
    while True:
        hi *= 2.0
        if hi > 1e6:
            return None
        fhi = excess(hi)
        if fhi >= 0:
            break
        lo, flo = hi, fhi
    if not math.isfinite(fhi):
        # chi_1 undefined (q* unbounded) at hi: shrink hi until chi_1 is defined
        for _ in range(200):
            mid = (lo + hi) / 2
            fm = excess(mid)
            if fm >= 0 and math.isfinite(fm):
                hi, fhi = mid, fm
                break
            if fm < 0:
                lo, flo = mid, fm
            else:
                hi = mid
        if not math.isfinite(fhi):
            return None
    return _find_root(excess, lo, hi, flo, fhi, rel=1e-12)


@functools.lru_cache(maxsize=512)
def _mean_field_cached(
    name: str, param: float | None, sw2: float, sb2: float, start: float
) -> MeanFieldFigures:
    return _figures(_Act(name, param), sw2, sb2, start)


def mean_field(
    activation: str,
    sigma_w2: float,
    sigma_b2: float = 0.0,
    param: float | None = None,
    start: float = 1.0,
) -> MeanFieldFigures:
    """Length fixed point, chi_1, depth scales and the critical sigma_w^2 (see module doc)."""
    _check_variances(sigma_w2, sigma_b2)
    if not (math.isfinite(start) and start > 0):
        raise ValueError(f"start must be a positive finite length (got {start!r})")
    act = _resolve(activation, param)
    return _mean_field_cached(act.name, act.param, float(sigma_w2), float(sigma_b2), float(start))


def critical_sigma_w2(
    activation: str, sigma_b2: float = 0.0, param: float | None = None
) -> float | None:
    """sigma_w^2 with chi_1 = 1 at the given sigma_b^2; None if none exists below 1e6."""
    _check_variances(1.0, sigma_b2)
    return _critical(_resolve(activation, param), float(sigma_b2))


def _num(x: float | None) -> str:
    return "unbounded" if x is None else f"{x:.4g}"


def rationale_sentence(fig: MeanFieldFigures) -> str:
    """One plain sentence for a plan's rationale, with the numbers and the sources."""
    crit = (
        ""
        if fig.critical_sigma_w2 is None
        else f"; the edge of chaos (chi_1 = 1) at this sigma_b^2 is sigma_w^2 = "
        f"{fig.critical_sigma_w2:.4g}"
    )
    depth = {
        "critical": "signals and gradients keep their correlations over many layers",
        "ordered": f"input correlations are forgotten over about {_num(fig.xi_c)} layers",
        "chaotic": f"nearby inputs decorrelate over about {_num(fig.xi_c)} layers",
        "unbounded": "the signal's length grows without limit with depth",
    }[fig.phase]
    return (
        f"Mean field ({short_cite('poole-2016')}; {short_cite('schoenholz-2017')}): "
        f"{fig.activation} with sigma_w^2 = {fig.sigma_w2:.4g}, sigma_b^2 = "
        f"{fig.sigma_b2:.4g} has length fixed point q* = {_num(fig.q_star)} and chi_1 = "
        f"{_num(fig.chi_1)} ({fig.phase}): {depth}{crit}. Infinite-width estimate."
    )


__all__ = [
    "MeanFieldFigures",
    "critical_sigma_w2",
    "length_map",
    "mean_field",
    "rationale_sentence",
]
