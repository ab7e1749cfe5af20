"""framework_layouts against the frameworks' own behaviour, with torch CPU as the oracle.

A conversion is right when the framework, given the converted tensor, computes the same
function as seedbed's layout describes: a transposed conv in torch's (in, out/groups, *k)
layout must equal the adjoint of the regular conv whose kernel is the served one; LSTM gate
blocks must land where torch's cell reads them (torch.nn.LSTM reference: W_ii|W_if|W_ig|W_io).
"""

from __future__ import annotations

import numpy as np
import pytest

from conftest import require_oracle
from seedbed_client import framework_layouts as fl

torch = require_oracle("torch")
F = torch.nn.functional


def test_change_layout_round_trips_and_matches_the_documented_shapes() -> None:
    rng = np.random.default_rng(3)  # demo values; only the arrangement is under test
    dense = rng.standard_normal((5, 3))
    conv = rng.standard_normal((6, 2, 3, 4))
    assert fl.change_layout(dense, "dense", "out_in", "in_out").shape == (3, 5)
    moved = fl.change_layout(conv, "conv", "out_in", "in_out")
    assert moved.shape == (3, 4, 2, 6)  # (*k, in/groups, out)
    assert moved[1, 2, 0, 5] == conv[5, 0, 1, 2]
    assert np.array_equal(fl.change_layout(moved, "conv", "in_out", "out_in"), conv)
    emb = rng.standard_normal((7, 4))
    assert fl.change_layout(emb, "embedding", "out_in", "in_out") is not None
    assert np.array_equal(fl.change_layout(emb, "embedding", "out_in", "in_out"), emb)


def test_in_out_conv_kernel_is_the_channels_last_convolution() -> None:
    # A kernel in (*k, in, out) applied as sum_{k,i} x[..., i] w[k, i, o] equals torch's
    # conv1d with the out_in kernel: checks the axis order, not just the shape.
    torch.manual_seed(0)
    w = torch.randn(4, 3, 5, dtype=torch.float64)
    x = torch.randn(1, 3, 9, dtype=torch.float64)
    expected = F.conv1d(x, w).numpy()[0]  # (out, L - k + 1)
    kio = fl.change_layout(w.numpy(), "conv", "out_in", "in_out")  # (k, in, out)
    xs = x.numpy()[0]
    got = np.stack(
        [np.einsum("ki,kio->o", xs[:, t : t + 5].T, kio) for t in range(9 - 5 + 1)], axis=1
    )
    np.testing.assert_allclose(got, expected, rtol=1e-12)


@pytest.mark.parametrize("groups", [1, 2, 3])
def test_transposed_conv_layout_connects_the_channels_the_served_kernel_names(groups: int) -> None:
    # seedbed's (out, in/groups, *k): entry [o, i_local, t] connects input channel i to output
    # channel o. In a transposed conv, a unit impulse on input channel i at position 0 writes
    # that channel's kernel row to the output: out[o, t] = W[i, o_local, t] (torch.nn
    # ConvTranspose1d reference). So the impulse response must read back the served kernel.
    torch.manual_seed(1)
    c_in, c_out, k = 2 * groups, 3 * groups, 3
    served = torch.randn(c_out, c_in // groups, k, dtype=torch.float64)
    stored = torch.from_numpy(fl.transposed_conv_to_in_first(served.numpy(), groups))
    module = torch.nn.ConvTranspose1d(c_in, c_out, k, groups=groups, bias=False)
    assert tuple(stored.shape) == tuple(module.weight.shape)
    for i in range(c_in):
        impulse = torch.zeros(1, c_in, 1, dtype=torch.float64)
        impulse[0, i, 0] = 1.0
        response = F.conv_transpose1d(impulse, stored, groups=groups)[0]  # (c_out, k)
        g, i_local = divmod(i, c_in // groups)
        for o in range(c_out):
            if o // (c_out // groups) == g:
                assert torch.equal(response[o], served[o, i_local])
            else:
                assert not response[o].any()
    back = fl.transposed_conv_from_in_first(stored.numpy(), groups)
    assert np.array_equal(back, served.numpy())


def test_transposed_conv_with_different_widths_lands_in_torch_shape() -> None:
    served = np.arange(4 * 3 * 2, dtype=np.float64).reshape(4, 3, 2)  # out 4, in 6, groups 2
    stored = fl.transposed_conv_to_in_first(served, 2)
    module = torch.nn.ConvTranspose1d(6, 4, 2, groups=2)
    assert stored.shape == tuple(module.weight.shape)


def test_regate_puts_lstm_blocks_where_torch_reads_them() -> None:
    # Built from per-gate matrices: torch's LSTM must compute the textbook cell (Hochreiter &
    # Schmidhuber 1997, with forget gate Gers et al. 2000) with the gates we meant.
    torch.manual_seed(2)
    n_in, hidden = 3, 2
    gates = {
        g: torch.randn(hidden, n_in, dtype=torch.float64) for g in fl.SEEDBED_GATE_ORDERS["lstm"]
    }
    onnx_order = fl.FRAMEWORK_GATE_ORDERS["onnx"]["lstm"]
    stacked_onnx = np.concatenate([gates[g].numpy() for g in onnx_order])
    torch_stack = fl.regate(stacked_onnx, onnx_order, fl.FRAMEWORK_GATE_ORDERS["torch"]["lstm"])
    lstm = torch.nn.LSTM(n_in, hidden, bias=False).double()
    with torch.no_grad():
        lstm.weight_ih_l0.copy_(torch.from_numpy(torch_stack))
        lstm.weight_hh_l0.zero_()
    x = torch.randn(1, 1, n_in, dtype=torch.float64)
    _, (h, c) = lstm(x)
    i = torch.sigmoid(gates["input"] @ x[0, 0])
    g = torch.tanh(gates["cell"] @ x[0, 0])
    o = torch.sigmoid(gates["output"] @ x[0, 0])
    c_ref = i * g
    assert torch.allclose(c[0, 0], c_ref, rtol=1e-12)
    assert torch.allclose(h[0, 0], o * torch.tanh(c_ref), rtol=1e-12)


def test_split_and_join_gates_are_inverse_and_refuse_bad_orders() -> None:
    w = np.arange(12.0).reshape(6, 2)
    blocks = fl.split_gates(w, ("reset", "update", "candidate"))
    assert np.array_equal(blocks["update"], w[2:4])
    assert np.array_equal(fl.join_gates(blocks, ("reset", "update", "candidate")), w)
    with pytest.raises(ValueError, match="same gates"):
        fl.regate(w, ("reset", "update", "candidate"), ("reset", "update", "output"))
    with pytest.raises(ValueError, match="does not split"):
        fl.split_gates(np.zeros((5, 2)), ("reset", "update", "candidate"))


def test_fused_tensor_is_the_concatenation_of_its_parts() -> None:
    q, k, v = (np.full((2, 2), float(n)) for n in range(3))
    fused = fl.FusedTensor("attn.in_proj_weight", ("q", "k", "v"))
    out = fused.assemble({"q": q, "k": k, "v": v})
    parts = fl.split_parts(out, 3)
    for got, want in zip(parts, (q, k, v), strict=True):
        assert np.array_equal(got, want)
    onnx_bias = fl.FusedTensor("B", ("wb", "rb"), zero_parts=("rb",))
    b = onnx_bias.assemble({"wb": np.ones(4)})
    assert np.array_equal(b, np.r_[np.ones(4), np.zeros(4)])
    with pytest.raises(KeyError, match="'k'"):
        fused.assemble({"q": q})
