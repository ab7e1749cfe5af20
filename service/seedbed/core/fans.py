"""Fan-in and fan-out of each layer kind: how many terms a unit sums, how far a unit reaches.

Convention: fans are the true connection counts of the operation as it runs forward.
fan_in is the number of input values each output value sums (what the forward variance
argument needs); fan_out is the number of output values each input value contributes to (what
the backward argument needs, since a gradient arriving at an input sums over exactly those).
Counts are for interior positions; padding at the borders is ignored, as is dilation (it spreads
the taps out but does not change how many there are).

Regular convolution, kernel k (product over spatial dims), stride s (product), groups g:
    fan_in  = (c_in / g) * k          each output sums c_in/g channels times k taps
    fan_out = (c_out / g) * k / s     each input reaches c_out/g channels, and k/s positions
                                      on average: with stride s an input position falls under
                                      floor(k/s) or ceil(k/s) windows, k/s over a period.
Transposed convolution runs the adjoint of such a convolution, so the roles swap:
    fan_in  = (c_in / g) * k / s      each output gathers k/s input positions on average
    fan_out = (c_out / g) * k         each input is spread over k positions of c_out/g channels
Depthwise convolution (g = c_in) needs no special case: fan_in = k.

Frameworks commonly compute fans from the stored weight shape alone: fan_out = c_out * k for a
regular conv, ignoring groups and stride. For a transposed conv, whose weight is stored
(c_in, c_out/g, *kernel), the shape-based rule reads c_in as the output side, so its fan_in and
fan_out come out swapped relative to the operation that actually runs (common practice, from
memory; the tests compare with PyTorch's CPU build). The recommendation warns about this.

Non-integer fans: with a stride that does not divide the kernel the average count is a
fraction. Fans are kept as exact rationals (`Fraction`) and reported by `fan_in`/`fan_out` as an
int when whole, otherwise as the float nearest the exact value (int/int division is correctly
rounded in Python, so this is the same on every machine). They are not rounded to integers:
the average is what the variance argument uses, and rounding would move fan_out-based scales by
up to 1/(2 fan) for no reason.

Embedding: a lookup is a dense layer applied to a one-hot vector of length vocab, but only one
entry is non-zero, so each output value is exactly one weight: fan_in = 1. Each vocabulary row
reaches all dim outputs: fan_out = dim. (Taking fan_in = vocab would shrink embeddings by
sqrt(vocab) for no reason; with fan_in = 1 a LeCun-scaled embedding has unit variance, the
common N(0, 1) default.)

Recurrent layers store their gates stacked along the output axis ((gates*hidden) x n_in and
(gates*hidden) x hidden), but fans are per gate block: each block is its own (hidden x n_in) or
(hidden x hidden) map whose sums feed a different nonlinearity, and the gates are combined by
products, not summed as one wide layer. Treating the stack as one layer would make the scale
depend on how the parameters are stored (four separate matrices would give another answer) and
would shrink every gate by counting gates*hidden outputs.

Attention: each projection (query, key, value, output) is its own (dim x dim) map, fan_in =
fan_out = dim. Heads do not change the fans: they split the projection's output columns into
groups, but every output unit still sums all dim inputs.

API:
    Fans                                              frozen: fan_in, fan_out, explanation
    dense_fans(n_in, n_out) -> Fans
    conv_fans(channels_in, channels_out, kernel, groups=1, transposed=False, stride=None) -> Fans
    embedding_fans(vocab, dim) -> Fans
    recurrent_fans(n_in, hidden, cell, part) -> Fans  cell: simple|lstm|gru, part: input|recurrent
    attention_fans(dim, heads, projection) -> Fans    projection: query|key|value|output
    RECURRENT_GATES: Mapping[str, int]                gate blocks per cell
Bad arguments raise ValueError naming the argument and what is allowed.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from fractions import Fraction
from types import MappingProxyType
from typing import Any

RECURRENT_GATES: Mapping[str, int] = MappingProxyType({"simple": 1, "lstm": 4, "gru": 3})
RECURRENT_PARTS = ("input", "recurrent")
ATTENTION_PROJECTIONS = ("query", "key", "value", "output")


def _report(x: Fraction) -> int | float:
    return x.numerator if x.denominator == 1 else x.numerator / x.denominator


def _show(x: Fraction) -> str:
    return str(x.numerator) if x.denominator == 1 else f"{x.numerator}/{x.denominator}"


@dataclass(frozen=True)
class Fans:
    fan_in_exact: Fraction
    fan_out_exact: Fraction
    explanation: str  # one line: what was counted

    @property
    def fan_in(self) -> int | float:
        """int when whole, else the float nearest the exact average count."""
        return _report(self.fan_in_exact)

    @property
    def fan_out(self) -> int | float:
        return _report(self.fan_out_exact)

    @property
    def whole(self) -> bool:
        return self.fan_in_exact.denominator == 1 and self.fan_out_exact.denominator == 1


def _positive_int(name: str, value: Any) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value < 1:
        raise ValueError(f"{name} must be a positive integer (got {value!r})")
    return value


def _int_tuple(name: str, value: Any, length: int | None) -> tuple[int, ...]:
    allowed = (
        "1 to 3 positive integers"
        if length is None
        else f"{length} positive integer{'s' if length > 1 else ''} (one per kernel dimension)"
    )
    if isinstance(value, str | bytes) or not isinstance(value, Sequence):
        raise ValueError(f"{name} must be a list of {allowed} (got {value!r})")
    items = tuple(value)
    count_ok = 1 <= len(items) <= 3 if length is None else len(items) == length
    if not count_ok or any(isinstance(v, bool) or not isinstance(v, int) or v < 1 for v in items):
        raise ValueError(f"{name} must be a list of {allowed} (got {list(items)!r})")
    return items


def _product(values: tuple[int, ...]) -> int:
    n = 1
    for v in values:
        n *= v
    return n


def _count(n: int | Fraction, noun: str) -> str:
    """ "1 output", "3 outputs", "1.5 outputs": a number with its noun, in the right number."""
    return f"{_show(n) if isinstance(n, Fraction) else n} {noun}{'' if n == 1 else 's'}"


def _choice(name: str, value: Any, allowed: Sequence[str]) -> str:
    if not isinstance(value, str) or value not in allowed:
        raise ValueError(f"{name} must be one of: {', '.join(allowed)} (got {value!r})")
    return value


def dense_fans(n_in: int, n_out: int) -> Fans:
    n_in = _positive_int("n_in", n_in)
    n_out = _positive_int("n_out", n_out)
    return Fans(
        Fraction(n_in),
        Fraction(n_out),
        f"dense {n_in} -> {n_out}: each output sums {_count(n_in, 'input')} (fan_in), "
        f"each input feeds {_count(n_out, 'output')} (fan_out)",
    )


def conv_fans(
    channels_in: int,
    channels_out: int,
    kernel: Sequence[int],
    groups: int = 1,
    transposed: bool = False,
    stride: Sequence[int] | None = None,
) -> Fans:
    c_in = _positive_int("channels_in", channels_in)
    c_out = _positive_int("channels_out", channels_out)
    k = _int_tuple("kernel", kernel, None)
    g = _positive_int("groups", groups)
    if not isinstance(transposed, bool):
        raise ValueError(f"transposed must be true or false (got {transposed!r})")
    s = (1,) * len(k) if stride is None else _int_tuple("stride", stride, len(k))
    if c_in % g or c_out % g:
        raise ValueError(
            f"groups must divide both channels_in ({c_in}) and channels_out ({c_out}) (got {g})"
        )
    taps, step = _product(k), _product(s)
    per_group_in, per_group_out = Fraction(c_in, g), Fraction(c_out, g)
    shape = "x".join(map(str, k))
    stride_text = "x".join(map(str, s))
    kind = "transposed conv" if transposed else "conv"
    head = f"{kind} {c_in} -> {c_out}, kernel {shape}, groups {g}, stride {stride_text}: "
    if not transposed:
        fan_in = per_group_in * taps
        fan_out = per_group_out * taps / step
        text = (
            f"each output sums {c_in}/{g} channels x {taps} taps = "
            f"{_count(fan_in, 'input')}; "
            f"each input reaches {c_out}/{g} channels x {taps}/{step} positions = "
            f"{_count(fan_out, 'output')}"
        )
    else:
        # the adjoint of a conv with the same kernel and stride: in and out swap roles
        fan_in = per_group_in * taps / step
        fan_out = per_group_out * taps
        text = (
            f"each output gathers {c_in}/{g} channels x {taps}/{step} positions = "
            f"{_count(fan_in, 'input')}; each input spreads over {c_out}/{g} channels x "
            f"{taps} taps = {_count(fan_out, 'output')}"
        )
    if fan_in.denominator != 1 or fan_out.denominator != 1:
        text += " (average over positions: the stride does not divide the kernel)"
    return Fans(fan_in, fan_out, head + text)


def embedding_fans(vocab: int, dim: int) -> Fans:
    vocab = _positive_int("vocab", vocab)
    dim = _positive_int("dim", dim)
    return Fans(
        Fraction(1),
        Fraction(dim),
        f"embedding {vocab} x {dim}: a lookup selects one row, so each output is "
        f"exactly 1 weight (fan_in 1); each row feeds {_count(dim, 'output')} (fan_out)",
    )


def recurrent_fans(n_in: int, hidden: int, cell: str, part: str) -> Fans:
    n_in = _positive_int("n_in", n_in)
    hidden = _positive_int("hidden", hidden)
    cell = _choice("cell", cell, tuple(RECURRENT_GATES))
    part = _choice("part", part, RECURRENT_PARTS)
    gates = RECURRENT_GATES[cell]
    source = n_in if part == "input" else hidden
    what = "inputs" if part == "input" else "previous hidden units"
    return Fans(
        Fraction(source),
        Fraction(hidden),
        f"{cell} {part} weights, per gate block ({gates} block{'s' if gates > 1 else ''} "
        f"of {hidden} x {source}): each gate unit sums {source} {what} (fan_in); each "
        f"feeds {hidden} units of every gate (fan_out, per block)",
    )


def attention_fans(dim: int, heads: int, projection: str) -> Fans:
    dim = _positive_int("dim", dim)
    heads = _positive_int("heads", heads)
    projection = _choice("projection", projection, ATTENTION_PROJECTIONS)
    if dim % heads:
        raise ValueError(f"heads must divide dim ({dim}) (got {heads})")
    return Fans(
        Fraction(dim),
        Fraction(dim),
        f"attention {projection} projection {dim} -> {dim} ({heads} heads): each output "
        f"sums all {dim} inputs; heads split the output columns, not the sums",
    )
