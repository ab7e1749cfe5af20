"""The published scale rules, as pure functions of fans and gain.

Every function returns the numbers together with a sentence that shows them and cites the
source, so rationales never have to re-derive anything. The rules:

    glorot             std = gain * sqrt(2/(fan_in+fan_out))        Glorot & Bengio 2010, eq. 12
                       bound = gain * sqrt(6/(fan_in+fan_out))      eq. 16 (uniform)
    he                 std = gain / sqrt(fan), fan = fan_in         He et al. 2015, eq. 10
                                           or fan = fan_out         eq. 14 (backward)
                                           or (fan_in+fan_out)/2    the "mean" option
    lecun              std = gain / sqrt(fan_in)                    LeCun et al. 1998, sec. 4.6
                                                                    [from memory]
    symmetric_uniform  U(-bound, bound); default bound gain/sqrt(fan_in), the older heuristic
                       U(-1/sqrt(n), 1/sqrt(n)) of Glorot & Bengio 2010, eq. 1
    prior bias         b = log(pi/(1-pi)) for an output unit with class prior pi
                       (Lin et al. 2017, sec. 4.1)

The gain is the activation's (see seedbed.core.activations); He's sqrt(2) for ReLU is the gain
of ReLU, so `he_scale` with the default gain is exactly eq. 10.

A std becomes distribution parameters with `distribution_for_std`: uniform bound std*sqrt(3);
normal std itself; truncated normal (cut at +-TRUNCATION_BOUND = 2 untruncated sigmas) sigma =
std / TRUNCATION_STD_FACTOR, since truncation shrinks the std by that factor. The factor and the
bound come from seedbed_client.generator, the generator that does the truncating.

Determinism: these values become weights, so only IEEE-exact operations (+ - * / and
math.sqrt, all correctly rounded) are used on floats, and the logarithm of the prior bias is
computed with mpmath at fixed precision. No math.log/exp here.

API:
    select_fan(fan_in, fan_out, which) -> float                 which: in | out | mean
    glorot_scale(fan_in, fan_out, gain=1.0) -> Scale
    he_scale(fan_in, fan_out, gain=sqrt(2), fan="in") -> Scale
    lecun_scale(fan_in, gain=1.0) -> Scale
    symmetric_uniform_scale(fan_in, bound=None, gain=1.0) -> Scale
    uniform_bound_for_std(std) -> float
    truncated_sigma_for_std(std) -> float
    distribution_for_std(std, distribution) -> Realised         distribution: uniform | normal |
    distribution_for_bound(bound, distribution) -> Realised                   truncated_normal
    realise(scale, distribution) -> Realised                    keeps a rule's own bound
    prior_bias(pi) -> PriorBias
"""

from __future__ import annotations

import functools
import math
import threading
from dataclasses import dataclass
from typing import Any, Literal

import mpmath

from seedbed.core.references import cite, short_cite
from seedbed_client.generator import TRUNCATION_BOUND, TRUNCATION_STD_FACTOR

FanChoice = Literal["in", "out", "mean"]
Distribution = Literal["uniform", "normal", "truncated_normal"]
FAN_CHOICES: tuple[str, ...] = ("in", "out", "mean")
DISTRIBUTIONS: tuple[str, ...] = ("uniform", "normal", "truncated_normal")

_SQRT3 = math.sqrt(3.0)


@dataclass(frozen=True)
class Scale:
    method: str  # glorot | he | lecun | symmetric_uniform
    std: float  # target standard deviation of the weights
    uniform_bound: float  # bound of the uniform with this std (a rule's own formula if it has one)
    gain: float
    fan: float | None  # the fan the rule divided by (glorot: the mean fan)
    text: str  # the numbers and the source
    references: tuple[str, ...]


@dataclass(frozen=True)
class Realised:
    """How the generator draws a distribution: standard draws times `sampler_scale`."""

    distribution: str
    sampler_scale: float  # uniform: the bound; normal: the std; truncated: the untruncated sigma
    std: float  # of the distribution as realised (after truncation)
    bound: float | None  # uniform and truncated only
    text: str


@dataclass(frozen=True)
class PriorBias:
    value: float
    prior: float
    text: str
    references: tuple[str, ...]


def _fmt(x: float) -> str:
    return f"{x:.7g}"


def _positive(name: str, value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise ValueError(f"{name} must be a positive finite number (got {value!r})")
    v = float(value)
    if not math.isfinite(v) or v <= 0:
        raise ValueError(f"{name} must be a positive finite number (got {value!r})")
    return v


def select_fan(fan_in: float, fan_out: float, which: str = "in") -> float:
    """The fan a rule divides by: fan_in, fan_out, or their mean (fan_in+fan_out)/2."""
    fi = _positive("fan_in", fan_in)
    fo = _positive("fan_out", fan_out)
    if which == "in":
        return fi
    if which == "out":
        return fo
    if which == "mean":
        return (fi + fo) / 2
    raise ValueError(f"fan must be one of: {', '.join(FAN_CHOICES)} (got {which!r})")


def glorot_scale(fan_in: float, fan_out: float, gain: float = 1.0) -> Scale:
    fi = _positive("fan_in", fan_in)
    fo = _positive("fan_out", fan_out)
    g = _positive("gain", gain)
    total = fi + fo
    std = g * math.sqrt(2.0 / total)
    bound = g * math.sqrt(6.0 / total)
    text = (
        f"Glorot: std = gain*sqrt(2/(fan_in+fan_out)) = {_fmt(g)}*sqrt(2/({_fmt(fi)}+{_fmt(fo)}))"
        f" = {_fmt(std)} ({short_cite('glorot-2010', 'eq. 12')}); uniform bound "
        f"gain*sqrt(6/(fan_in+fan_out)) = {_fmt(bound)} ({short_cite('glorot-2010', 'eq. 16')})"
    )
    return Scale("glorot", std, bound, g, total / 2, text, (cite("glorot-2010"),))


_HE_WHERE = {
    "in": ("fan_in", "eq. 10, forward"),
    "out": ("fan_out", "eq. 14, backward"),
    "mean": ("(fan_in+fan_out)/2", "eq. 10 and 14 averaged"),
}


def he_scale(fan_in: float, fan_out: float, gain: float = math.sqrt(2.0), fan: str = "in") -> Scale:
    n = select_fan(fan_in, fan_out, fan)
    g = _positive("gain", gain)
    std = g / math.sqrt(n)
    label, where = _HE_WHERE[fan]
    text = (
        f"He: std = gain/sqrt({label}) = {_fmt(g)}/sqrt({_fmt(n)}) = {_fmt(std)} "
        f"({short_cite('he-2015', where)}: sqrt(2/n) for ReLU, with the activation's gain)"
    )
    return Scale("he", std, std * _SQRT3, g, n, text, (cite("he-2015"),))


def lecun_scale(fan_in: float, gain: float = 1.0) -> Scale:
    n = _positive("fan_in", fan_in)
    g = _positive("gain", gain)
    std = g / math.sqrt(n)
    text = (
        f"LeCun: std = gain/sqrt(fan_in) = {_fmt(g)}/sqrt({_fmt(n)}) = {_fmt(std)} "
        f"({short_cite('lecun-1998', 'sec. 4.6 [from memory]')})"
    )
    return Scale("lecun", std, std * _SQRT3, g, n, text, (cite("lecun-1998"),))


def symmetric_uniform_scale(fan_in: float, bound: float | None = None, gain: float = 1.0) -> Scale:
    """U(-bound, bound). Without an explicit bound: gain/sqrt(fan_in) (Glorot & Bengio eq. 1).

    An explicit bound is taken as given; the gain then plays no part.
    """
    n = _positive("fan_in", fan_in)
    g = _positive("gain", gain)
    if bound is None:
        b = g / math.sqrt(n)
        text = (
            f"symmetric uniform: bound = gain/sqrt(fan_in) = {_fmt(g)}/sqrt({_fmt(n)}) = "
            f"{_fmt(b)}, the heuristic U(-1/sqrt(n), 1/sqrt(n)) "
            f"({short_cite('glorot-2010', 'eq. 1')}); std = bound/sqrt(3) = {_fmt(b / _SQRT3)}"
        )
        refs: tuple[str, ...] = (cite("glorot-2010"),)
    else:
        b = _positive("bound", bound)
        text = (
            f"symmetric uniform with the given bound {_fmt(b)}: std = bound/sqrt(3) = "
            f"{_fmt(b / _SQRT3)}"
        )
        refs = ()
    return Scale("symmetric_uniform", b / _SQRT3, b, g, n, text, refs)


def uniform_bound_for_std(std: float) -> float:
    """U(-b, b) has std b/sqrt(3), so b = std*sqrt(3)."""
    return _positive("std", std) * _SQRT3


def truncated_sigma_for_std(std: float) -> float:
    """Untruncated sigma whose normal, cut at +-2 sigma, has the given std."""
    return _positive("std", std) / TRUNCATION_STD_FACTOR


def _check_distribution(distribution: str) -> str:
    if distribution not in DISTRIBUTIONS:
        raise ValueError(
            f"distribution must be one of: {', '.join(DISTRIBUTIONS)} (got {distribution!r})"
        )
    return distribution


def _truncated(sigma: float, how: str) -> Realised:
    std = sigma * TRUNCATION_STD_FACTOR
    bound = sigma * TRUNCATION_BOUND
    return Realised(
        "truncated_normal",
        sigma,
        std,
        bound,
        f"{how}: untruncated sigma {_fmt(sigma)}, cut at +-{TRUNCATION_BOUND:g} sigma"
        f" = +-{_fmt(bound)}; truncation scales the std by {TRUNCATION_STD_FACTOR!r}"
        f", realised std {_fmt(std)}",
    )


def distribution_for_std(std: float, distribution: str) -> Realised:
    """Parameters of `distribution` with standard deviation `std`."""
    s = _positive("std", std)
    dist = _check_distribution(distribution)
    if dist == "normal":
        return Realised(dist, s, s, None, f"normal with std {_fmt(s)}")
    if dist == "uniform":
        b = s * _SQRT3
        return Realised(dist, b, b / _SQRT3, b, f"uniform on +-std*sqrt(3) = +-{_fmt(b)}")
    return _truncated(s / TRUNCATION_STD_FACTOR, f"truncated normal with std {_fmt(s)}")


def distribution_for_bound(bound: float, distribution: str) -> Realised:
    """Parameters of `distribution` whose values lie in [-bound, bound] (normal has no bound)."""
    b = _positive("bound", bound)
    dist = _check_distribution(distribution)
    if dist == "normal":
        raise ValueError(
            "bound applies to distribution uniform or truncated_normal, not normal "
            "(give std instead)"
        )
    if dist == "uniform":
        return Realised(dist, b, b / _SQRT3, b, f"uniform on +-{_fmt(b)}, std bound/sqrt(3)")
    return _truncated(b / TRUNCATION_BOUND, f"truncated normal within +-{_fmt(b)}")


def realise(scale: Scale, distribution: str) -> Realised:
    """Like distribution_for_std(scale.std, ...), but uniform keeps the rule's own bound
    (Glorot's eq. 16 bound gain*sqrt(6/n) may differ from std*sqrt(3) in the last bit)."""
    dist = _check_distribution(distribution)
    if dist == "uniform":
        b = scale.uniform_bound
        return Realised(dist, b, b / _SQRT3, b, f"uniform on +-{_fmt(b)}")
    return distribution_for_std(scale.std, dist)


_BIAS_PREC = 113  # bits; the result is rounded once to float64
# Building an mpmath context costs about half a millisecond, more than the rest of a small
# plan: one private context, behind a lock (mpmath contexts are not thread-safe), and the few
# distinct priors a service sees remembered.
_BIAS_MP = mpmath.MPContext()
_BIAS_MP.prec = _BIAS_PREC
_BIAS_LOCK = threading.Lock()


@functools.lru_cache(maxsize=1024)
def _log_odds(p: float) -> float:
    with _BIAS_LOCK:
        x = _BIAS_MP.mpf(p)  # exact: a float is a dyadic rational
        return float(_BIAS_MP.log(x / (1 - x)))


def prior_bias(pi: float) -> PriorBias:
    """Output bias log(pi/(1-pi)), so that sigmoid(bias) = pi at the start (Lin et al. 2017)."""
    if (
        isinstance(pi, bool)
        or not isinstance(pi, int | float)
        or not math.isfinite(pi)
        or not 0.0 < float(pi) < 1.0
    ):
        raise ValueError(f"prior must be a number strictly between 0 and 1 (got {pi!r})")
    p = float(pi)
    value = _log_odds(p)
    text = (
        f"prior bias b = log(pi/(1-pi)) = log({p!r}/(1-{p!r})) = {_fmt(value)}, so that "
        f"sigmoid(b) = {p!r} at the start ({short_cite('lin-2017', 'sec. 4.1')})"
    )
    return PriorBias(value, p, text, (cite("lin-2017"),))
