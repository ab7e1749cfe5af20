"""The PyTorch adapter with the CPU build of torch: every parameter ends up equal to the served
arrays, in torch's own layout.

The expected layouts are torch's documented parameter shapes (torch.nn documentation, from
memory): Linear/Conv weight (out, in/groups, *k); ConvTranspose weight (in, out/groups, *k);
LSTM weight_ih_l[k] stacks (W_ii|W_if|W_ig|W_io), GRU (W_ir|W_iz|W_in); MultiheadAttention
in_proj_weight stacks query, key and value projections.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import pytest

from conftest import require_oracle
from e2e.server import RunningServer
from seedbed_client import Client, SpecInvalid

torch = require_oracle("torch")
from torch import nn  # noqa: E402 - only once the oracle check above has passed

adapter = pytest.importorskip("seedbed_client.torch_adapter")


class SonarDenoiser(nn.Module):
    """An invented model: sonar returns (1-D conv), a ping-type embedding, an LSTM over time, a
    GRU, attention, a transposed conv back to the signal, and a classifier head."""

    def __init__(self) -> None:
        super().__init__()
        self.front = nn.Sequential(
            nn.Conv1d(2, 8, 5, groups=2), nn.BatchNorm1d(8), nn.LeakyReLU(0.1), nn.Dropout(0.1)
        )
        self.ping = nn.Embedding(9, 8, padding_idx=0)
        self.track = nn.LSTM(8, 6, num_layers=2, bidirectional=True)
        self.smooth = nn.GRU(12, 4)
        self.focus = nn.MultiheadAttention(4, 2)
        self.focus_norm = nn.LayerNorm(4)
        self.back = nn.ConvTranspose1d(4, 6, 3, groups=2, stride=2)
        self.head = nn.Sequential(nn.Linear(4, 16), nn.GELU(), nn.Linear(16, 3), nn.Softmax(-1))


def test_every_parameter_equals_the_served_arrays(
    service: RunningServer, make_client: Callable[..., Client]
) -> None:
    torch.manual_seed(0)
    model = SonarDenoiser()
    client = make_client(service.base_url)
    # No forward(): the graph cannot be read, so module order decides where it can and the
    # rest is explicitly allowed to default.
    report = adapter.seed_module(model, client, seed="sonar/denoiser-1", allow_defaults=True)
    served = client.weights(report.request, format="npz")  # cached now: same bytes
    p = dict(model.named_parameters())

    def same(param: str, expected: np.ndarray) -> None:
        got = p[param].detach().numpy()
        assert got.shape == expected.shape, param
        assert np.array_equal(got, expected), param

    same("front.0.weight", served["front.0.weight"])  # (out, in/groups, k) as served
    same("front.0.bias", served["front.0.bias"])
    same("front.1.weight", served["front.1.scale"])
    same("front.1.bias", served["front.1.shift"])
    emb = served["ping.weight"].copy()
    emb[0] = 0  # padding_idx row is zeroed, as torch does at construction
    same("ping.weight", emb)
    for k, sfx in [(0, ""), (0, "_reverse"), (1, ""), (1, "_reverse")]:
        name = f"track.l{k}{sfx}"
        same(f"track.weight_ih_l{k}{sfx}", served[f"{name}.input_weight"])
        same(f"track.weight_hh_l{k}{sfx}", served[f"{name}.recurrent_weight"])
        same(f"track.bias_ih_l{k}{sfx}", served[f"{name}.bias"])
        same(f"track.bias_hh_l{k}{sfx}", np.zeros(24, dtype=np.float32))
        # torch's gate order is i, f, g, o: the forget block is rows 6..12 and must hold the
        # LSTM forget bias of 1 (Gers et al. 2000), the other gates 0.
        bias = p[f"track.bias_ih_l{k}{sfx}"] + p[f"track.bias_hh_l{k}{sfx}"]
        assert bias[6:12].tolist() == [1.0] * 6 and bias[:6].abs().sum() == 0
    assert p["track.weight_ih_l1"].shape == (24, 12)  # layer 1 reads both directions
    same("smooth.weight_ih_l0", served["smooth.l0.input_weight"])
    same("smooth.weight_hh_l0", served["smooth.l0.recurrent_weight"])
    stacked = np.concatenate([served[f"focus.{x}.weight"] for x in ("query", "key", "value")])
    same("focus.in_proj_weight", stacked)
    same("focus.out_proj.weight", served["focus.output.weight"])
    same("focus_norm.weight", served["focus_norm.scale"])

    # ConvTranspose: torch holds (in, out/groups, k); seedbed serves (out, in/groups, k).
    # Element by element: torch[g*in_g + i, o, :] == served[g*out_g + o, i, :].
    w = served["back.weight"]
    assert w.shape == (6, 2, 3)
    expected = np.zeros((4, 3, 3), dtype=np.float32)
    for g in range(2):
        for i in range(2):
            for o in range(3):
                expected[g * 2 + i, o] = w[g * 3 + o, i]
    same("back.weight", expected)
    same("head.0.weight", served["head.0.weight"])
    same("head.2.bias", served["head.2.bias"])

    layers = {layer["name"]: layer for layer in report.request["layers"]}
    assert report.inferred == {
        "front.0": "linear",  # a BatchNorm with an affine part follows: a layer of its own
        "front.1": "leaky_relu(0.1)",  # the norm feeds the activation
        "head.0": "gelu",
        "head.2": "softmax",
    }
    assert layers["head.2"]["role"] == "output"
    assert layers["back"]["transposed"] is True and layers["back"]["stride"] == [2]
    assert "back" in report.not_inferred
    assert any("bias_hh" in note for note in report.notes)


def test_bfloat16_module_and_explicit_activations(
    service: RunningServer, make_client: Callable[..., Client]
) -> None:
    model = nn.Sequential(nn.Linear(6, 5), nn.Linear(5, 2)).to(torch.bfloat16)
    client = make_client(service.base_url)
    report = adapter.seed_module(
        model, client, seed=11, activations={"0": "tanh"}, roles={"1": "output"}
    )
    served = client.weights(report.request, format="safetensors")
    assert report.request["dtype"] == "bfloat16"
    for name in ("0.weight", "0.bias", "1.weight"):
        got = dict(model.named_parameters())[name].detach().view(torch.int16).numpy()
        assert np.array_equal(got, served[name].view(np.int16)), name
    assert report.request["layers"][0]["activation"] == "tanh"
    assert report.inferred == {"1": "linear"}  # traced: it feeds the network output


def test_unknown_parameters_are_refused_or_left_alone(
    service: RunningServer, make_client: Callable[..., Client]
) -> None:
    slope = nn.PReLU()
    model = nn.Sequential(nn.Linear(3, 3), slope)
    with pytest.raises(SpecInvalid) as caught:
        adapter.describe_module(model, seed=1)
    assert caught.value.field == "1.weight"
    before = slope.weight.detach().clone()
    report = adapter.seed_module(
        model,
        make_client(service.base_url),
        seed=1,
        allow_untouched=True,
        activations={"0": "linear"},  # PReLU has no seedbed gain: said explicitly
    )
    assert report.skipped == ["1.weight"] and torch.equal(slope.weight, before)
