"""Fan counts, checked against PyTorch's shape-based rule where the conventions agree and
against connection counts taken from real connectivity masks where they do not."""

from __future__ import annotations

import itertools
from fractions import Fraction
from typing import Any

import numpy as np
import pytest

from conftest import require_oracle
from seedbed.core.fans import (
    RECURRENT_GATES,
    Fans,
    attention_fans,
    conv_fans,
    dense_fans,
    embedding_fans,
    recurrent_fans,
)


def _torch_fans(tensor: Any) -> tuple[int, int]:
    torch = require_oracle("torch")
    fan_in, fan_out = torch.nn.init._calculate_fan_in_and_fan_out(tensor)
    return int(fan_in), int(fan_out)


def _pair(f: Fans) -> tuple[float, float]:
    return f.fan_in, f.fan_out


# --- PyTorch oracle (CPU): where conventions agree, equality; where not, the documented relation


def test_dense_matches_torch_linear() -> None:
    torch = require_oracle("torch")
    layer = torch.nn.Linear(784, 256)
    assert _pair(dense_fans(784, 256)) == _torch_fans(layer.weight)


@pytest.mark.parametrize(("dims", "kernel"), [(1, (5,)), (2, (3, 3)), (2, (7, 1)), (3, (3, 2, 4))])
def test_conv_matches_torch_for_groups_one_stride_one(dims: int, kernel: tuple[int, ...]) -> None:
    torch = require_oracle("torch")
    cls = {1: torch.nn.Conv1d, 2: torch.nn.Conv2d, 3: torch.nn.Conv3d}[dims]
    layer = cls(6, 10, kernel)
    assert _pair(conv_fans(6, 10, kernel)) == _torch_fans(layer.weight)


def test_strided_and_grouped_conv_differ_from_torch_as_documented() -> None:
    # torch derives fans from the weight shape (c_out, c_in/g, *k): fan_out = c_out * k,
    # ignoring groups and stride (common practice). Ours counts connections: (c_out/g)*k/s.
    torch = require_oracle("torch")
    layer = torch.nn.Conv2d(8, 12, (3, 3), stride=(2, 2), groups=4)
    t_in, t_out = _torch_fans(layer.weight)
    ours = conv_fans(8, 12, (3, 3), groups=4, stride=(2, 2))
    assert ours.fan_in == t_in  # fan_in agrees even with groups: the stored slice is per group
    assert ours.fan_out_exact == Fraction(t_out, 4 * 4)  # groups 4, stride 2x2


@pytest.mark.parametrize(("dims", "kernel"), [(1, (4,)), (2, (3, 5)), (3, (2, 2, 3))])
def test_transposed_conv_is_swapped_relative_to_torch(dims: int, kernel: tuple[int, ...]) -> None:
    # A transposed conv's weight is stored (c_in, c_out/g, *k); the shape rule reads c_in as the
    # output side. For the operation that actually runs, our fan_in (what each output sums) is
    # torch's fan_out and vice versa (groups 1, stride 1).
    torch = require_oracle("torch")
    cls = {1: torch.nn.ConvTranspose1d, 2: torch.nn.ConvTranspose2d, 3: torch.nn.ConvTranspose3d}[
        dims
    ]
    layer = cls(6, 10, kernel)
    t_in, t_out = _torch_fans(layer.weight)
    ours = conv_fans(6, 10, kernel, transposed=True)
    assert (ours.fan_in, ours.fan_out) == (t_out, t_in)


def test_embedding_differs_from_torch_and_gives_unit_lecun_scale() -> None:
    # torch's shape rule reads the (vocab, dim) table as a dense map dim -> vocab. A lookup
    # selects one row, so each output is one weight: our fan_in is 1, fan_out dim.
    torch = require_oracle("torch")
    torch.manual_seed(7)
    table = torch.nn.Embedding(5000, 64)
    assert _torch_fans(table.weight) == (64, 5000)
    ours = embedding_fans(5000, 64)
    assert (ours.fan_in, ours.fan_out) == (1, 64)
    # consistency with common practice: LeCun scale with fan_in 1 is std 1, torch's default
    # N(0, 1) embedding init (320,000 samples: the std is within 1% of 1 with overwhelming odds)
    assert float(table.weight.detach().std()) == pytest.approx(1.0, abs=0.01)


@pytest.mark.parametrize(
    ("cell", "cls_name"), [("simple", "RNN"), ("lstm", "LSTM"), ("gru", "GRU")]
)
def test_recurrent_fans_per_gate_block(cell: str, cls_name: str) -> None:
    torch = require_oracle("torch")
    n_in, hidden = 24, 40
    layer = getattr(torch.nn, cls_name)(n_in, hidden)
    gates = RECURRENT_GATES[cell]
    for part, weight in (("input", layer.weight_ih_l0), ("recurrent", layer.weight_hh_l0)):
        ours = recurrent_fans(n_in, hidden, cell, part)
        t_in, t_out = _torch_fans(weight)
        # the stacked matrix: fan_in agrees, torch's fan_out counts all gates at once
        assert weight.shape[0] == gates * hidden
        assert ours.fan_in == t_in
        assert ours.fan_out * gates == t_out
        # each gate block on its own is an ordinary (hidden x source) map: exact agreement
        for block in weight.detach().chunk(gates, dim=0):
            assert _pair(ours) == _torch_fans(block)


def test_attention_projections_match_torch_per_projection() -> None:
    torch = require_oracle("torch")
    dim, heads = 48, 6
    mha = torch.nn.MultiheadAttention(dim, heads)
    chunks = mha.in_proj_weight.detach().chunk(3, dim=0)  # query, key, value stacked
    for projection, weight in zip(("query", "key", "value"), chunks, strict=True):
        assert _pair(attention_fans(dim, heads, projection)) == _torch_fans(weight)
    assert _pair(attention_fans(dim, heads, "output")) == _torch_fans(mha.out_proj.weight)
    # heads split output columns; they do not change what each output sums
    assert _pair(attention_fans(dim, 1, "query")) == _pair(attention_fans(dim, heads, "query"))


# --- independent connection counts from real connectivity masks --------------------------------


def _conv_mask(
    c_in: int,
    c_out: int,
    groups: int,
    kernel: tuple[int, ...],
    stride: tuple[int, ...],
    size: tuple[int, ...],
) -> tuple[np.ndarray, tuple[int, ...]]:
    """Boolean (outputs x inputs) connectivity of an unpadded grouped, strided conv, built tap by
    tap. Rows are (out channel, out position), columns (in channel, in position)."""
    out_size = tuple((n - k) // s + 1 for n, k, s in zip(size, kernel, stride, strict=True))
    mask = np.zeros((c_out, *out_size, c_in, *size), dtype=bool)
    per_in, per_out = c_in // groups, c_out // groups
    for o in range(c_out):
        group = o // per_out
        for c in range(group * per_in, (group + 1) * per_in):
            for pos in itertools.product(*(range(n) for n in out_size)):
                for tap in itertools.product(*(range(k) for k in kernel)):
                    src = tuple(p * s + t for p, s, t in zip(pos, stride, tap, strict=True))
                    mask[(o, *pos, c, *src)] = True
    rows = c_out * int(np.prod(out_size))
    return mask.reshape(rows, -1), out_size


def _interior_average(
    counts: np.ndarray, kernel: tuple[int, ...], stride: tuple[int, ...], reach: tuple[int, ...]
) -> Fraction:
    """Average of per-position counts (shape (channels, *spatial)) over interior positions.

    Position i (per dim) is interior when every window that could cover it exists:
    i >= k-1 and i // s <= reach-1. Whole stride periods are used, so the average is exact.
    """
    index = []
    for k, s, r, n in zip(kernel, stride, reach, counts.shape[1:], strict=True):
        first, stop = k - 1, min(r * s, n)
        periods = (stop - first) // s
        assert periods >= 1, "example too small to have an interior"
        index.append(slice(first, first + periods * s))
    box = counts[(slice(None), *index)]
    return Fraction(int(box.sum()), box.size)


GROUPED_CASES = [
    # c_in, c_out, groups, kernel, stride, input size
    (4, 6, 2, (3,), (1,), (12,)),
    (4, 6, 2, (3,), (2,), (15,)),
    (6, 4, 2, (2,), (3,), (20,)),  # stride does not divide the kernel: fan_out 4/2*2/3
    (4, 6, 2, (3, 2), (2, 1), (11, 7)),
    (4, 4, 4, (3, 3), (1, 1), (8, 8)),  # depthwise
    (3, 6, 3, (3, 3), (2, 2), (11, 11)),  # depthwise with a channel multiplier, strided
    (2, 4, 2, (2, 3, 2), (2, 1, 2), (7, 6, 7)),
]


@pytest.mark.parametrize(("c_in", "c_out", "groups", "kernel", "stride", "size"), GROUPED_CASES)
def test_conv_fans_equal_counted_connections(
    c_in: int,
    c_out: int,
    groups: int,
    kernel: tuple[int, ...],
    stride: tuple[int, ...],
    size: tuple[int, ...],
) -> None:
    mask, out_size = _conv_mask(c_in, c_out, groups, kernel, stride, size)
    row_counts = mask.sum(axis=1)
    assert np.all(row_counts == row_counts[0])  # unpadded: every output is interior
    col_counts = mask.sum(axis=0).reshape(c_in, *size)
    ours = conv_fans(c_in, c_out, kernel, groups=groups, stride=stride)
    assert ours.fan_in_exact == int(row_counts[0])
    assert ours.fan_out_exact == _interior_average(col_counts, kernel, stride, out_size)


@pytest.mark.parametrize(("c_in", "c_out", "groups", "kernel", "stride", "size"), GROUPED_CASES)
def test_transposed_conv_fans_equal_counted_connections_of_the_adjoint(
    c_in: int,
    c_out: int,
    groups: int,
    kernel: tuple[int, ...],
    stride: tuple[int, ...],
    size: tuple[int, ...],
) -> None:
    # The transposed conv c_out -> c_in is the adjoint of the conv c_in -> c_out: its
    # connectivity is the transposed mask, so its rows are the conv's columns.
    mask, out_size = _conv_mask(c_in, c_out, groups, kernel, stride, size)
    adjoint = mask.T
    per_output = adjoint.sum(axis=1).reshape(c_in, *size)
    per_input = adjoint.sum(axis=0)
    ours = conv_fans(c_out, c_in, kernel, groups=groups, transposed=True, stride=stride)
    assert ours.fan_in_exact == _interior_average(per_output, kernel, stride, out_size)
    assert np.all(per_input == per_input[0])
    assert ours.fan_out_exact == int(per_input[0])


@pytest.mark.parametrize(
    ("c_in", "c_out", "groups", "kernel", "stride", "size"),
    [(4, 6, 2, (3,), (2,), (6,)), (6, 4, 2, (2,), (3,), (7,)), (2, 4, 2, (3, 2), (2, 3), (5, 4))],
)
def test_transposed_conv_fans_equal_counts_from_torch_operator(
    c_in: int,
    c_out: int,
    groups: int,
    kernel: tuple[int, ...],
    stride: tuple[int, ...],
    size: tuple[int, ...],
) -> None:
    # The real operation as the oracle: torch's conv_transpose with all-ones weights applied to
    # every one-hot input gives its matrix column by column; non-zero means connected.
    torch = require_oracle("torch")
    fn = {1: torch.nn.functional.conv_transpose1d, 2: torch.nn.functional.conv_transpose2d}[
        len(kernel)
    ]
    weight = torch.ones((c_in, c_out // groups, *kernel), dtype=torch.float64)
    n_inputs = c_in * int(np.prod(size))
    one_hot = torch.eye(n_inputs, dtype=torch.float64).reshape(n_inputs, c_in, *size)
    columns = fn(one_hot, weight, stride=stride, groups=groups)  # (input, c_out, *out_size)
    out_size = tuple(columns.shape[2:])
    connected = (columns != 0).numpy().reshape(n_inputs, -1).T  # (outputs x inputs)
    per_output = connected.sum(axis=1).reshape(c_out, *out_size)
    per_input = connected.sum(axis=0)
    ours = conv_fans(c_in, c_out, kernel, groups=groups, transposed=True, stride=stride)
    assert ours.fan_in_exact == _interior_average(per_output, kernel, stride, size)
    assert np.all(per_input == ours.fan_out_exact)


# --- reporting ---------------------------------------------------------------------------------


def test_whole_fans_are_ints_and_fractional_ones_floats() -> None:
    whole = conv_fans(3, 64, (7, 7), stride=(1, 1))
    assert (whole.fan_in, whole.fan_out) == (147, 3136)
    assert isinstance(whole.fan_in, int) and isinstance(whole.fan_out, int) and whole.whole
    frac = conv_fans(6, 4, (2,), groups=2, stride=(3,))
    assert frac.fan_out_exact == Fraction(4, 3)
    assert isinstance(frac.fan_out, float) and frac.fan_out == 4 / 3 and not frac.whole
    assert "average" in frac.explanation
    assert "147" in whole.explanation


def test_explanations_are_one_line() -> None:
    for f in (
        dense_fans(3, 4),
        conv_fans(2, 2, (3,)),
        embedding_fans(10, 4),
        recurrent_fans(3, 5, "lstm", "recurrent"),
        attention_fans(8, 2, "key"),
    ):
        assert f.explanation and "\n" not in f.explanation


# --- bad inputs --------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("call", "field"),
    [
        (lambda: dense_fans(0, 3), "n_in"),
        (lambda: dense_fans(3, -1), "n_out"),
        (lambda: dense_fans(True, 3), "n_in"),
        (lambda: dense_fans(3.0, 3), "n_in"),
        (lambda: conv_fans(0, 4, (3,)), "channels_in"),
        (lambda: conv_fans(4, 4, ()), "kernel"),
        (lambda: conv_fans(4, 4, (3, 3, 3, 3)), "kernel"),
        (lambda: conv_fans(4, 4, (3, 0)), "kernel"),
        (lambda: conv_fans(4, 4, "33"), "kernel"),
        (lambda: conv_fans(4, 4, 3), "kernel"),
        (lambda: conv_fans(4, 6, (3,), groups=4), "groups"),
        (lambda: conv_fans(6, 4, (3,), groups=4), "groups"),
        (lambda: conv_fans(4, 4, (3,), groups=0), "groups"),
        (lambda: conv_fans(4, 4, (3, 3), stride=(2,)), "stride"),
        (lambda: conv_fans(4, 4, (3,), stride=(0,)), "stride"),
        (lambda: conv_fans(4, 4, (3,), transposed="yes"), "transposed"),
        (lambda: embedding_fans(0, 4), "vocab"),
        (lambda: embedding_fans(4, 0), "dim"),
        (lambda: recurrent_fans(3, 4, "cell9", "input"), "cell"),
        (lambda: recurrent_fans(3, 4, "lstm", "hidden"), "part"),
        (lambda: recurrent_fans(3, 0, "lstm", "input"), "hidden"),
        (lambda: attention_fans(8, 3, "query"), "heads"),
        (lambda: attention_fans(8, 2, "keys"), "projection"),
    ],
)
def test_bad_arguments_name_the_field(call: Any, field: str) -> None:
    with pytest.raises(ValueError, match=rf"^{field} must") as err:
        call()
    message = str(err.value)
    assert "got" in message


def test_choice_errors_list_allowed_values() -> None:
    with pytest.raises(ValueError, match="simple, lstm, gru"):
        recurrent_fans(3, 4, "LSTM", "input")
    with pytest.raises(ValueError, match="input, recurrent"):
        recurrent_fans(3, 4, "gru", "output")
    with pytest.raises(ValueError, match="query, key, value, output"):
        attention_fans(8, 2, "q")
    with pytest.raises(ValueError, match="1 to 3 positive integers"):
        conv_fans(2, 2, [])
