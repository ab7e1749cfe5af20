"""Activation functions and their variance-preserving gains.

The gain, one definition for every activation
---------------------------------------------
For an activation phi, seedbed's gain is

    g = 1 / sqrt(E[phi(z)^2]),   z ~ N(0, 1).

If a layer's pre-activations have unit variance and the next layer's weights have variance
g^2 / fan_in, the next layer's pre-activations again have unit variance: each is a sum of
fan_in independent terms w * phi(z) with E[(w phi(z))^2] = (g^2 / fan_in) * E[phi(z)^2].
This is the forward argument of He et al. 2015, sec. 2.2, written with the second moment
E[phi(z)^2] rather than a variance, which also covers activations whose output mean is not zero
(sigmoid, softplus, GELU ...). Where a closed form is published it is used (linear 1; ReLU
sqrt(2), He et al. 2015 eq. 10; leaky ReLU sqrt(2/(1+a^2)), eq. 15; SELU 1, Klambauer et al.
2017); every other gain is computed numerically from the same definition.

tanh: we give tanh the same second-moment gain, 1/sqrt(E[tanh(z)^2]) = 1.5925..., and NOT the
5/3 that frameworks commonly use (common practice, from memory). One definition for all
activations keeps every gain explainable by the same sentence; 5/3 is an empirical rounding
chosen to keep tanh units out of saturation, not a variance-preserving value. A caller who wants
5/3 can pass it as an explicit gain.

softmax is an output activation only: there is no next layer whose input variance it could
preserve, so its gain is 1 by convention, and the result says so.

Determinism
-----------
Gains set the scale of generated weights, and weights must be bit-identical on every machine.
C-library exp/erf/tanh and numpy's SIMD ufuncs may differ in the last bit between platforms, so
every value that can reach a weight (numeric second moments, SELU's lambda and alpha) is computed
with mpmath in a private context at a fixed precision (pure integer arithmetic, the same on every
machine) and rounded once to float64. Numeric second moments use composite Gauss-Legendre
quadrature on fixed breakpoints over [-12, 12] with nodes computed by mpmath itself; the kink of
piecewise activations sits on a breakpoint. The truncated tails weigh less than 1e-30; against
adaptive mpmath quadrature at 140 bits the result agrees to ~1e-28 relative, far under float64's
half-ulp, so the float is the correctly rounded gain. A new (activation, parameter) pair costs
about 20-50 ms once (measured on a 2-core machine: elu with a new alpha ~21 ms; GELU, whose erfc
is the slowest and which takes no parameter, 50-100 ms once per process); results are cached.

`apply_activation` and `activation_derivative` evaluate phi and phi' on numpy arrays for
diagnostics. They use numpy ufuncs and are NOT bit-reproducible across platforms; never feed
their results into generated weights.

API
---
    ACTIVATIONS: Mapping[str, ActivationInfo]     the registry
    activation_names() -> list[str]               sorted names
    describe_activation(name) -> ActivationInfo   family, parameter, formula, sources
    gain_for(name, param=None) -> GainResult      value, closed_form, how, second_moment
    selu_constants() -> tuple[float, float]       (lambda, alpha) from their closed forms
    apply_activation(name, x, param=None) -> np.ndarray
    activation_derivative(name, x, param=None) -> np.ndarray
    GAIN_DEFINITION: str                          the definition above, for catalog text

Bad names or parameters raise ValueError naming the allowed names or range. The parameter is the
request's `activation_param`; only leaky_relu (its negative-side slope), elu (alpha) and
hard_sigmoid (its slope) take one.
"""

from __future__ import annotations

import functools
import itertools
import math
import threading
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from types import MappingProxyType
from typing import Any, Literal

import mpmath
import numpy as np
import numpy.typing as npt

from seedbed.core.references import cite, short_cite

Family = Literal["rectifier", "saturating", "self_normalizing", "smooth", "linear", "output"]
FloatArray = npt.NDArray[np.float64]

GAIN_DEFINITION = (
    "gain = 1/sqrt(E[phi(z)^2]) with z ~ N(0, 1), for every activation phi: with weights of "
    "variance gain^2/fan_in the next layer's pre-activations keep the variance of this layer's "
    "(the forward argument of He et al. 2015, sec. 2.2, written with the second moment so that "
    "activations with a non-zero mean are covered too). Closed form where published, otherwise "
    "computed numerically with mpmath at fixed precision. tanh gets 1.5925 by this definition, "
    "not the 5/3 used by many frameworks. softmax is output-only: gain 1 by convention."
)


@dataclass(frozen=True)
class ParamSpec:
    """The one optional parameter an activation may take (the request's activation_param)."""

    name: str
    meaning: str
    default: float
    low: float
    high: float
    low_inclusive: bool
    high_inclusive: bool

    def range_text(self) -> str:
        left = "[" if self.low_inclusive else "("
        right = "]" if self.high_inclusive else ")"
        return f"{left}{self.low:g}, {self.high:g}{right}"

    def contains(self, value: float) -> bool:
        above = value >= self.low if self.low_inclusive else value > self.low
        below = value <= self.high if self.high_inclusive else value < self.high
        return above and below


@dataclass(frozen=True)
class ActivationInfo:
    name: str
    formula: str
    family: Family
    rectifier_like: bool  # unbounded above, identity-like for large inputs: He-family scaling
    saturating: bool  # flat on both sides: gradients vanish through deep stacks
    output_only: bool  # only meaningful after the last layer
    param: ParamSpec | None
    source: str  # where the function itself was introduced
    gain_source: str  # where its gain comes from
    notes: str = ""

    def as_dict(self) -> dict[str, Any]:
        """JSON-ready description (for the catalog)."""
        param: dict[str, Any] | None = None
        if self.param is not None:
            param = {
                "name": self.param.name,
                "meaning": self.param.meaning,
                "default": self.param.default,
                "allowed": self.param.range_text(),
            }
        return {
            "name": self.name,
            "formula": self.formula,
            "family": self.family,
            "rectifier_like": self.rectifier_like,
            "saturating": self.saturating,
            "output_only": self.output_only,
            "param": param,
            "source": self.source,
            "gain_source": self.gain_source,
            "notes": self.notes,
        }


@dataclass(frozen=True)
class GainResult:
    activation: str
    param: float | None  # the parameter actually used (default filled in)
    value: float
    closed_form: bool  # True: a published closed form (or softmax's stated convention)
    second_moment: float | None  # E[phi(z)^2], z ~ N(0,1); None for softmax (not elementwise)
    how: str  # plain text with the numbers and the source
    references: tuple[str, ...]


_GAIN_FORWARD = short_cite("he-2015", "sec. 2.2")

_SLOPE = ParamSpec(
    "slope", "slope a of the negative side, phi(x) = a*x for x < 0", 0.01, 0.0, 1.0, True, True
)
_ALPHA = ParamSpec(
    "alpha", "saturation value -alpha of the negative side", 1.0, 0.0, 10.0, False, True
)

# ONNX HardSigmoid defaults to 0.2 (opset 6); PyTorch's and Howard et al.'s h-sigmoid use 1/6.
_HARD_SLOPE = ParamSpec(
    "slope",
    "slope a of the ramp, phi(x) = clip(a*x + 1/2, 0, 1)",
    1.0 / 6.0,
    0.0,
    10.0,
    False,
    True,
)

_INFOS: tuple[ActivationInfo, ...] = (
    ActivationInfo(
        "linear",
        "phi(x) = x",
        "linear",
        False,
        False,
        False,
        None,
        "identity map",
        short_cite("he-2015", "eq. 10 with a linear unit"),
    ),
    ActivationInfo(
        "relu",
        "phi(x) = max(x, 0)",
        "rectifier",
        True,
        False,
        False,
        None,
        cite("nair-2010"),
        short_cite("he-2015", "eq. 10"),
    ),
    ActivationInfo(
        "leaky_relu",
        "phi(x) = x for x >= 0, a*x for x < 0",
        "rectifier",
        True,
        False,
        False,
        _SLOPE,
        cite("maas-2013"),
        short_cite("he-2015", "eq. 15"),
    ),
    ActivationInfo(
        "elu",
        "phi(x) = x for x > 0, alpha*(exp(x) - 1) for x <= 0",
        "rectifier",
        True,
        False,
        False,
        _ALPHA,
        cite("clevert-2016"),
        f"numeric second moment ({_GAIN_FORWARD} argument)",
    ),
    ActivationInfo(
        "selu",
        "phi(x) = lambda*x for x > 0, lambda*alpha*(exp(x) - 1) for x <= 0",
        "self_normalizing",
        False,
        False,
        False,
        None,
        cite("klambauer-2017"),
        short_cite("klambauer-2017", "fixed point with unit second moment"),
        notes="Unbounded above, but its own rule applies: LeCun scaling (gain 1), "
        "lambda and alpha from their closed forms in Klambauer et al. 2017.",
    ),
    ActivationInfo(
        "gelu",
        "phi(x) = x*Phi(x), Phi the standard normal CDF (exact erf form)",
        "smooth",
        True,
        False,
        False,
        None,
        cite("hendrycks-2016"),
        f"numeric second moment ({_GAIN_FORWARD} argument)",
    ),
    ActivationInfo(
        "silu",
        "phi(x) = x*sigmoid(x)",
        "smooth",
        True,
        False,
        False,
        None,
        cite("elfwing-2018"),
        f"numeric second moment ({_GAIN_FORWARD} argument)",
    ),
    ActivationInfo(
        "hard_swish",
        "phi(x) = x*clip(x/6 + 1/2, 0, 1)",
        "smooth",
        True,
        False,
        False,
        None,
        cite("howard-2019"),
        f"numeric second moment ({_GAIN_FORWARD} argument)",
        notes="Piecewise: 0 below -3, x above 3; the kinks sit on quadrature breakpoints.",
    ),
    ActivationInfo(
        "hard_sigmoid",
        "phi(x) = clip(a*x + 1/2, 0, 1)",
        "saturating",
        False,
        True,
        False,
        _HARD_SLOPE,
        cite("howard-2019"),
        "closed-form second moment (normal CDF and density at the kinks)",
        notes="Flat outside |x| <= 1/(2a): saturates like sigmoid, with a zero gradient there.",
    ),
    ActivationInfo(
        "softplus",
        "phi(x) = log(1 + exp(x))",
        "smooth",
        True,
        False,
        False,
        None,
        cite("dugas-2001"),
        f"numeric second moment ({_GAIN_FORWARD} argument)",
    ),
    ActivationInfo(
        "tanh",
        "phi(x) = tanh(x)",
        "saturating",
        False,
        True,
        False,
        None,
        "hyperbolic tangent",
        f"numeric second moment ({_GAIN_FORWARD} argument)",
        notes="Gain 1.5925 = 1/sqrt(E[tanh(z)^2]), not the 5/3 common in frameworks "
        "(an empirical rounding): one definition for every activation.",
    ),
    ActivationInfo(
        "sigmoid",
        "phi(x) = 1/(1 + exp(-x))",
        "saturating",
        False,
        True,
        False,
        None,
        "logistic function",
        f"numeric second moment ({_GAIN_FORWARD} argument)",
        notes="Non-zero mean output; the second-moment gain accounts for it.",
    ),
    ActivationInfo(
        "softmax",
        "phi(x)_i = exp(x_i) / sum_j exp(x_j) (last axis)",
        "output",
        False,
        True,
        True,
        None,
        "normalised exponential",
        "convention: output-only, gain 1",
        notes="Output layers only: no next layer to preserve, so gain 1.",
    ),
)

ACTIVATIONS: Mapping[str, ActivationInfo] = MappingProxyType({a.name: a for a in _INFOS})


def activation_names() -> list[str]:
    return sorted(ACTIVATIONS)


def describe_activation(name: str) -> ActivationInfo:
    if not isinstance(name, str) or name not in ACTIVATIONS:
        raise ValueError(
            f"activation must be one of: {', '.join(activation_names())} (got {name!r})"
        )
    return ACTIVATIONS[name]


def _resolve_param(info: ActivationInfo, param: float | None) -> float | None:
    """Fill the default and validate; the error names the field and the allowed range."""
    spec = info.param
    if spec is None:
        if param is not None:
            raise ValueError(
                f"activation_param: activation {info.name!r} takes no parameter (got {param!r}); "
                "only leaky_relu (slope), elu (alpha) and hard_sigmoid (slope) take one"
            )
        return None
    if param is None:
        return spec.default
    if isinstance(param, bool) or not isinstance(param, int | float):
        raise ValueError(
            f"activation_param ({spec.name} of {info.name}) must be a number in "
            f"{spec.range_text()} (got {param!r})"
        )
    value = float(param)
    if not math.isfinite(value) or not spec.contains(value):
        raise ValueError(
            f"activation_param ({spec.name} of {info.name}) must be in {spec.range_text()} "
            f"(got {param!r})"
        )
    return value + 0.0  # folds -0.0 into 0.0 so both share one cache entry


# ---------------------------------------------------------------------------------------------
# Deterministic high-precision part (mpmath). Everything here may feed generated weights.

_PREC = 96  # bits; ~29 decimal digits, >40 bits of margin over float64
_NODES = 20  # Gauss-Legendre points per sub-interval
_BREAKS = (-12, -10, -8, -7, -6, -5, -4, -3, -2, -1, 0, 1, 2, 3, 4, 5, 6, 7, 8, 10, 12)

_MP = mpmath.MPContext()
_MP.prec = _PREC
# mpmath contexts are not thread-safe (routines raise and restore the working precision), and
# the web layer calls the core from a thread pool: all use of _MP holds this lock.
_MP_LOCK = threading.Lock()

MpFn = Callable[[Any, Any], Any]  # (z, param) -> phi(z), mpmath values


def _mp_elu(z: Any, alpha: Any) -> Any:
    return z if z > 0 else alpha * _MP.expm1(z)


_MP_SQRT_HALF = _MP.sqrt(_MP.mpf(0.5))  # computed once at import, before any threads exist


def _mp_gelu(z: Any, _: Any) -> Any:
    return z * _MP.erfc(-z * _MP_SQRT_HALF) / 2


def _mp_silu(z: Any, _: Any) -> Any:
    return z / (1 + _MP.exp(-z))


def _mp_softplus(z: Any, _: Any) -> Any:
    # log(1 + e^z) = z + log(1 + e^-z): keeps the argument of log1p small on both sides
    return _MP.log1p(_MP.exp(z)) if z < 0 else z + _MP.log1p(_MP.exp(-z))


def _mp_hard_swish(z: Any, _: Any) -> Any:
    return z * min(max(z / 6 + _MP.mpf(0.5), 0), 1)


def _mp_tanh(z: Any, _: Any) -> Any:
    return _MP.tanh(z)


def _mp_sigmoid(z: Any, _: Any) -> Any:
    return 1 / (1 + _MP.exp(-z))


_MP_FUNCS: Mapping[str, MpFn] = MappingProxyType(
    {
        "elu": _mp_elu,
        "gelu": _mp_gelu,
        "silu": _mp_silu,
        "softplus": _mp_softplus,
        "hard_swish": _mp_hard_swish,
        "tanh": _mp_tanh,
        "sigmoid": _mp_sigmoid,
    }
)


@functools.cache
def _legendre_nodes() -> tuple[tuple[Any, Any], ...]:
    """Gauss-Legendre nodes and weights on [-1, 1], by Newton's method on P_n.

    Written out (rather than taken from mpmath's quadrature classes) so that the starting
    guesses come from mpmath's cos, not the platform's: the nodes are then a pure function of
    the precision. Caller holds _MP_LOCK.
    """
    n = _NODES
    nodes: list[tuple[Any, Any]] = []
    with _MP.workprec(_PREC + 24):
        tol = _MP.ldexp(1, -(_PREC + 16))

        def legendre(x: Any) -> tuple[Any, Any]:
            p_prev, p = _MP.mpf(0), _MP.mpf(1)
            for k in range(1, n + 1):
                p_prev, p = p, ((2 * k - 1) * x * p - (k - 1) * p_prev) / k
            return p, n * (x * p - p_prev) / (x * x - 1)  # P_n(x), P_n'(x)

        for j in range(1, n // 2 + 1):
            x = _MP.cos(_MP.pi * (j - _MP.mpf(0.25)) / (n + _MP.mpf(0.5)))
            for _ in range(100):
                p, dp = legendre(x)
                step = p / dp
                x -= step
                if abs(step) < tol:
                    break
            else:  # pragma: no cover - Newton from these guesses converges in < 10 steps
                raise RuntimeError("Gauss-Legendre node iteration did not converge")
            _, dp = legendre(x)
            w = 2 / ((1 - x * x) * dp * dp)
            nodes.append((x, w))
            nodes.append((-x, w))
    # mpf(...) outside workprec rounds each value once to the working precision _PREC
    return tuple((_MP.mpf(x), _MP.mpf(w)) for x, w in nodes)


def _numeric_second_moment(name: str, param: float | None) -> Any:
    """E[phi(z)^2] for z ~ N(0,1) as an mpmath number (deterministic)."""
    phi = _MP_FUNCS[name]
    with _MP_LOCK:
        nodes = _legendre_nodes()
        p = _MP.mpf(param) if param is not None else None  # exact: floats are dyadic
        total = _MP.zero
        for a, b in itertools.pairwise(_BREAKS):
            half = _MP.mpf(b - a) / 2
            mid = _MP.mpf(a + b) / 2
            part = _MP.zero
            for x, w in nodes:
                z = mid + half * x
                part += w * phi(z, p) ** 2 * _MP.exp(-z * z / 2)
            total += half * part
        return total / _MP.sqrt(2 * _MP.pi)


@functools.cache
def _selu_constants_mp() -> tuple[Any, Any]:
    """SELU's lambda and alpha from their closed forms (Klambauer et al. 2017, eq. 14 [from
    memory]): the values that make mean 0 and variance 1 a fixed point."""
    with _MP_LOCK:
        e = _MP.e
        c1 = _MP.erfc(1 / _MP.sqrt(2))
        c2 = _MP.erfc(_MP.sqrt(2))
        pi = _MP.pi
        alpha = -_MP.sqrt(2 / pi) / (c1 * _MP.sqrt(e) - 1)
        lam = (
            (1 - c1 * _MP.sqrt(e))
            * _MP.sqrt(2 * pi)
            / _MP.sqrt(2 * c2 * e**2 + pi * c1**2 * e - 2 * (2 + pi) * c1 * _MP.sqrt(e) + pi + 2)
        )
        return lam, alpha


def selu_constants() -> tuple[float, float]:
    """(lambda, alpha) of SELU, each the float64 nearest to its closed form."""
    lam, alpha = _selu_constants_mp()
    return float(lam), float(alpha)


def _fmt(x: float) -> str:
    return f"{x:.7g}"


def _closed_form_gain(name: str, param: float | None) -> GainResult:
    refs_he = (cite("he-2015"),)
    if name == "linear":
        return GainResult(
            name,
            None,
            1.0,
            True,
            1.0,
            f"1 (E[z^2] = 1; {short_cite('he-2015', 'eq. 10')} with a linear unit)",
            refs_he,
        )
    if name == "relu":
        return GainResult(
            name,
            None,
            math.sqrt(2.0),
            True,
            0.5,
            f"sqrt(2) = {_fmt(math.sqrt(2.0))} (E[relu(z)^2] = 1/2; "
            f"{short_cite('he-2015', 'eq. 10')})",
            refs_he,
        )
    if name == "leaky_relu":
        assert param is not None
        with _MP_LOCK:
            a = _MP.mpf(param)
            m2 = (1 + a * a) / 2
            gain = float(_MP.sqrt(1 / m2))
            m2_f = float(m2)
        return GainResult(
            name,
            param,
            gain,
            True,
            m2_f,
            f"sqrt(2/(1+{param!r}^2)) = {_fmt(gain)} (E[phi(z)^2] = (1+a^2)/2 = "
            f"{_fmt(m2_f)}; {short_cite('he-2015', 'eq. 15')})",
            refs_he,
        )
    if name == "selu":
        lam, alpha = selu_constants()
        return GainResult(
            name,
            None,
            1.0,
            True,
            1.0,
            f"1: with lambda = {lam!r} and alpha = {alpha!r} the SELU fixed point "
            f"has E[selu(z)^2] = 1, so LeCun scaling "
            f"({short_cite('klambauer-2017')})",
            (cite("klambauer-2017"), cite("lecun-1998")),
        )
    if name == "hard_sigmoid":
        assert param is not None
        with _MP_LOCK:
            # phi = a z + 1/2 on [-c, c], c = 1/(2a), 1 above, 0 below. With Phi, pdf the normal
            # CDF and density: int_{-c}^{c} z^2 pdf = (2 Phi(c) - 1) - 2 c pdf(c), the odd term
            # vanishes, so E[phi^2] = a^2 ((2Phi(c)-1) - 2c pdf(c)) + (2Phi(c)-1)/4 + 1 - Phi(c).
            a = _MP.mpf(param)
            c = 1 / (2 * a)
            cdf = _MP.ncdf(c)
            pdf = _MP.npdf(c)
            m2 = a * a * ((2 * cdf - 1) - 2 * c * pdf) + (2 * cdf - 1) / 4 + 1 - cdf
            gain = float(1 / _MP.sqrt(m2))
            m2_f = float(m2)
        return GainResult(
            name,
            param,
            gain,
            True,
            m2_f,
            f"1/sqrt(E[hard_sigmoid(z; slope={param!r})^2]) = 1/sqrt({_fmt(m2_f)}) "
            f"= {_fmt(gain)}, E in closed form from the normal CDF and density at "
            f"the kinks +-1/(2a); variance-preserving gain ({_GAIN_FORWARD} "
            "argument with the second moment)",
            (cite("he-2015"),),
        )
    if name == "softmax":
        return GainResult(
            name,
            None,
            1.0,
            True,
            None,
            "1 by convention: softmax is an output activation, there is no next "
            "layer whose input variance it could preserve",
            (),
        )
    raise AssertionError(name)  # pragma: no cover


@functools.lru_cache(maxsize=512)  # bounded: elu's alpha is caller-chosen
def _gain_cached(name: str, param: float | None) -> GainResult:
    if name not in _MP_FUNCS:
        return _closed_form_gain(name, param)
    m2 = _numeric_second_moment(name, param)
    with _MP_LOCK:
        gain = float(1 / _MP.sqrt(m2))
        m2_f = float(m2)
    spec = ACTIVATIONS[name].param
    label = f"{name}(z)" if spec is None else f"{name}(z; {spec.name}={param!r})"
    how = (
        f"1/sqrt(E[{label}^2]) = 1/sqrt({_fmt(m2_f)}) = {_fmt(gain)}, z ~ N(0,1), "
        f"E computed numerically (mpmath, {_PREC}-bit Gauss-Legendre); variance-preserving "
        f"gain ({_GAIN_FORWARD} argument with the second moment)"
    )
    if name == "tanh":
        how += "; not the 5/3 = 1.666667 common in frameworks, an empirical rounding"
    return GainResult(name, param, gain, False, m2_f, how, (cite("he-2015"),))


def gain_for(name: str, param: float | None = None) -> GainResult:
    """The variance-preserving gain 1/sqrt(E[phi(z)^2]) of an activation (see module doc)."""
    info = describe_activation(name)
    return _gain_cached(info.name, _resolve_param(info, param))


# ---------------------------------------------------------------------------------------------
# numpy evaluation for diagnostics: NOT bit-reproducible across platforms.

_erfc = np.frompyfunc(math.erfc, 1, 1)


def _normal_cdf(x: FloatArray) -> FloatArray:
    return np.asarray(_erfc(-x / math.sqrt(2.0)), dtype=np.float64) / 2


def _normal_pdf(x: FloatArray) -> FloatArray:
    return np.exp(-x * x / 2) / math.sqrt(2 * math.pi)


def _sigmoid(x: FloatArray) -> FloatArray:
    e = np.exp(-np.abs(x))  # never overflows
    return np.where(x >= 0, 1 / (1 + e), e / (1 + e))


def _softmax(x: FloatArray) -> FloatArray:
    if x.ndim == 0:
        return np.ones_like(x)
    shifted = np.exp(x - np.max(x, axis=-1, keepdims=True))
    return shifted / np.sum(shifted, axis=-1, keepdims=True)


def _forward(name: str, x: FloatArray, p: float | None) -> FloatArray:
    neg = np.minimum(x, 0.0)  # keeps exp from overflowing on the unused branch
    if name == "linear":
        return x.copy()
    if name == "relu":
        return np.maximum(x, 0.0)
    if name == "leaky_relu":
        assert p is not None
        return np.where(x >= 0, x, p * x)
    if name == "elu":
        assert p is not None
        return np.where(x > 0, x, p * np.expm1(neg))
    if name == "selu":
        lam, alpha = selu_constants()
        return lam * np.where(x > 0, x, alpha * np.expm1(neg))
    if name == "gelu":
        return x * _normal_cdf(x)
    if name == "silu":
        return x * _sigmoid(x)
    if name == "softplus":
        return np.logaddexp(0.0, x)
    if name == "hard_swish":
        return x * np.clip(x / 6 + 0.5, 0.0, 1.0)
    if name == "hard_sigmoid":
        assert p is not None
        return np.clip(p * x + 0.5, 0.0, 1.0)
    if name == "tanh":
        return np.tanh(x)
    if name == "sigmoid":
        return _sigmoid(x)
    if name == "softmax":
        return _softmax(x)
    raise AssertionError(name)  # pragma: no cover


def _slope(name: str, x: FloatArray, p: float | None) -> FloatArray:
    # At the kink x = 0 of piecewise functions the left-hand derivative is returned.
    neg = np.minimum(x, 0.0)
    if name == "linear":
        return np.ones_like(x)
    if name == "relu":
        return (x > 0).astype(np.float64)
    if name == "leaky_relu":
        assert p is not None
        return np.where(x > 0, 1.0, p)
    if name == "elu":
        assert p is not None
        return np.where(x > 0, 1.0, p * np.exp(neg))
    if name == "selu":
        lam, alpha = selu_constants()
        return lam * np.where(x > 0, 1.0, alpha * np.exp(neg))
    if name == "gelu":
        return _normal_cdf(x) + x * _normal_pdf(x)
    if name == "silu":
        s = _sigmoid(x)
        return s * (1 + x * (1 - s))
    if name == "softplus":
        return _sigmoid(x)
    if name == "hard_swish":
        return np.where(x <= -3, 0.0, np.where(x > 3, 1.0, x / 3 + 0.5))
    if name == "hard_sigmoid":
        assert p is not None
        return np.where(np.abs(p * x) < 0.5, p, 0.0)
    if name == "tanh":
        t = np.tanh(x)
        return 1 - t * t
    if name == "sigmoid":
        s = _sigmoid(x)
        return s * (1 - s)
    if name == "softmax":
        s = _softmax(x)
        return s * (1 - s)  # diagonal of the Jacobian only
    raise AssertionError(name)  # pragma: no cover


def apply_activation(name: str, x: npt.ArrayLike, param: float | None = None) -> FloatArray:
    """phi(x) elementwise in float64 (softmax: along the last axis). Diagnostics only."""
    info = describe_activation(name)
    p = _resolve_param(info, param)
    return _forward(info.name, np.asarray(x, dtype=np.float64), p)


def activation_derivative(name: str, x: npt.ArrayLike, param: float | None = None) -> FloatArray:
    """phi'(x) elementwise in float64. Diagnostics only.

    At the kink x = 0 of relu, leaky_relu, elu and selu the left-hand derivative is returned.
    For softmax, which is not elementwise, the diagonal of its Jacobian, s*(1-s).
    """
    info = describe_activation(name)
    p = _resolve_param(info, param)
    return _slope(info.name, np.asarray(x, dtype=np.float64), p)
