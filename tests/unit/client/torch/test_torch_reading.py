"""Reading torch modules without a server: both graph readers agree with the hand-written
requests, every inference is visible, nothing falls back to a default silently, override keys
are strict, errors speak in qualified names."""

from __future__ import annotations

from typing import Any

import pytest

from conftest import require_oracle
from seedbed_client import SpecInvalid

torch = require_oracle("torch")
from torch import nn  # noqa: E402
from torch.nn import functional as F  # noqa: E402, N812

from seedbed_client.torch_adapter import describe_module  # noqa: E402
from support import torch_models as tm  # noqa: E402

MODELS: dict[str, tuple[Any, Any, Any, dict[str, Any]]] = {
    "decoder": (
        tm.TimetableDecoder,
        tm.decoder_request,
        lambda: torch.randint(0, 96, (2, 16)),
        {"depth_policy": {"name": "scaled_residual"}},
    ),
    "convnet": (tm.KilnNet, tm.kiln_request, lambda: torch.randn(2, 3, 16, 16), {}),
    "tagger": (tm.HiveTagger, tm.hive_request, lambda: torch.randint(0, 50, (2, 5)), {}),
    "encoder": (tm.SensorEncoder, tm.sensor_request, lambda: torch.randn(2, 7, 6), {}),
    "gauge": (tm.GaugeModel, tm.gauge_request, lambda: torch.randn(3, 8), {}),
}


@pytest.mark.parametrize("name", list(MODELS))
@pytest.mark.parametrize("graph", ["auto", "hooks"])
def test_both_readers_give_the_hand_written_request(name: str, graph: str) -> None:
    factory, hand_written, sample, options = MODELS[name]
    want = hand_written()
    report = describe_module(
        factory(), seed=want["seed"], graph=graph, example_input=sample(), **options
    )
    assert report.request == want
    expected_source = "forward hooks" if graph == "hooks" or name == "gauge" else "traced graph"
    assert report.graph_source == expected_source
    for facts in report.facts:  # nothing defaulted: every activation has a named source
        assert facts.activation_from not in ("default (allowed)",), facts


def test_post_norm_encoder_layer_reads_its_own_structure() -> None:
    report = describe_module(tm.SensorEncoder(norm_first=False), seed="sensor-tokens/1")
    assert report.request == tm.sensor_request(norm_first=False)
    by_layer = {f.layer: f for f in report.facts}
    assert by_layer["enc.0.linear1"].activation == "gelu"
    assert by_layer["enc.0.linear1"].activation_from == "module settings"


class Mixed(nn.Module):
    """Every way of writing an activation in forward (torch.nn.functional reference)."""

    def __init__(self) -> None:
        super().__init__()
        self.p = nn.Linear(4, 4)
        self.q = nn.Linear(4, 4)
        self.r = nn.Linear(4, 4)
        self.s = nn.Linear(4, 4)
        self.t = nn.Linear(4, 4)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        x = F.leaky_relu(self.p(x), 0.2)
        x = self.q(x).relu()
        x = F.elu(self.r(x), alpha=0.5)
        x = torch.sigmoid(self.s(x).view(-1, 4))
        return torch.tanh(F.dropout(self.t(x), 0.1, self.training))


@pytest.mark.parametrize("graph", ["trace", "hooks"])
def test_functional_and_method_activations_with_their_parameters(graph: str) -> None:
    report = describe_module(Mixed(), seed=1, graph=graph, example_input=torch.randn(2, 4))
    got = {
        layer["name"]: (layer["activation"], layer.get("activation_param"))
        for layer in report.request["layers"]
    }
    assert got == {
        "p": ("leaky_relu", 0.2),
        "q": ("relu", None),
        "r": ("elu", 0.5),
        "s": ("sigmoid", None),
        "t": ("tanh", None),
    }


class GatedMlp(nn.Module):
    """A gated feed-forward block: silu(w1 x) * (w3 x), then w2."""

    def __init__(self) -> None:
        super().__init__()
        self.w1 = nn.Linear(8, 16)
        self.w3 = nn.Linear(8, 16)
        self.w2 = nn.Linear(16, 8)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return x + self.w2(F.silu(self.w1(x)) * self.w3(x))


def test_a_gated_path_is_reported_not_guessed() -> None:
    with pytest.raises(SpecInvalid) as caught:
        describe_module(GatedMlp(), seed=1)
    problems = caught.value.problems
    assert [p.field for p in problems] == ["w3"]
    assert "gated or multiplicative" in problems[0].message
    assert "activations={'w3'" in problems[0].message
    report = describe_module(GatedMlp(), seed=1, activations={"w3": "linear"})
    by_layer = {f.layer: f for f in report.facts}
    assert by_layer["w3"].activation_from == "caller override"
    assert by_layer["w1"].activation == "silu"


class Unusual(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.body = nn.Linear(3, 3)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return torch.cumsum(self.body(x), dim=-1)


def test_no_silent_default_unless_allowed() -> None:
    with pytest.raises(SpecInvalid) as caught:
        describe_module(Unusual(), seed=1)
    assert caught.value.field == "body"
    assert "cumsum" in caught.value.problems[0].message
    report = describe_module(Unusual(), seed=1, allow_defaults=True)
    assert report.not_inferred == ["body"]
    assert "default (allowed)" in report.table()


class NoForward(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.stack = nn.Sequential(nn.Linear(3, 4), nn.ReLU(), nn.Linear(4, 2))


def test_module_order_is_the_last_resort_and_says_so() -> None:
    report = describe_module(NoForward(), seed=1, allow_defaults=True)
    assert report.graph_source == "module order"
    assert any("last resort" in n for n in report.notes)
    by_layer = {f.layer: f for f in report.facts}
    assert by_layer["stack.0"].activation == "relu"
    assert by_layer["stack.0"].activation_from == "module order"
    assert by_layer["stack.2"].activation_from == "default (allowed)"


def test_unknown_override_keys_raise_with_a_suggestion() -> None:
    model = tm.GaugeModel()
    for option in ("activations", "roles", "branches", "layer_options"):
        value: Any = {"ot": "output"} if option != "layer_options" else {"ot": {}}
        with pytest.raises(SpecInvalid) as caught:
            describe_module(model, seed=1, **{option: value})
        problem = caught.value.problems[0]
        assert problem.field == f"{option}['ot']"
        assert "did you mean 'out'?" in problem.message
        assert "a, b, c, out" in problem.message


def test_request_problems_name_the_module() -> None:
    with pytest.raises(SpecInvalid) as caught:
        describe_module(
            tm.GaugeModel(),
            seed=1,
            layer_options={"b": {"init": {"method": "glorot", "fan": "up"}}},
        )
    assert caught.value.field == "b.init.fan"
    assert "layers[1].init.fan" in caught.value.problems[0].message
    with pytest.raises(SpecInvalid) as caught:
        describe_module(
            tm.GaugeModel(), seed=1, depth_policy={"name": "scaled_residual", "base": 1}
        )
    assert caught.value.field == "depth_policy.base"


def test_tied_head_is_planned_once() -> None:
    report = describe_module(tm.TimetableDecoder(blocks=1), seed=1)
    names = [layer["name"] for layer in report.request["layers"]]
    assert "head" not in names and "tokens" in names
    assert report.ties == {"tokens.weight": ["head.weight"]}
    assert "tied: head.weight share tokens.weight (planned once)" in report.table()


def test_table_shows_every_layer_with_its_sources() -> None:
    report = describe_module(tm.GaugeModel(), seed=1)
    lines = report.table().splitlines()
    assert lines[0].split() == [
        "layer",
        "kind",
        "activation",
        "from",
        "branch",
        "from",
        "role",
        "from",
    ]
    assert lines[3].split()[:4] == ["b", "dense", "relu", "forward"]
    assert "graph read from: forward hooks" in lines


class FusedAttentionBlock(nn.Module):
    """Hand-written attention with one fused projection split into q, k, v (a common way to
    write GPT-style blocks), torch's scaled_dot_product_attention, and a residual add."""

    def __init__(self, dim: int = 16, heads: int = 2) -> None:
        super().__init__()
        self.heads = heads
        self.norm = nn.LayerNorm(dim)
        self.qkv = nn.Linear(dim, 3 * dim)
        self.out = nn.Linear(dim, dim)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        b, t, d = x.shape
        q, k, v = self.qkv(self.norm(x)).split(d, dim=2)
        q, k, v = (z.view(b, t, self.heads, d // self.heads).transpose(1, 2) for z in (q, k, v))
        y = F.scaled_dot_product_attention(q, k, v, is_causal=True)
        return x + self.out(y.transpose(1, 2).contiguous().view(b, t, d))


@pytest.mark.parametrize("graph", ["trace", "hooks"])
def test_fused_projection_into_attention_is_linear_and_in_the_branch(graph: str) -> None:
    report = describe_module(
        FusedAttentionBlock(), seed=1, graph=graph, example_input=torch.randn(2, 5, 16)
    )
    layers = {layer["name"]: layer for layer in report.request["layers"]}
    assert layers["qkv"]["activation"] == "linear"
    assert {layers[n]["branch"] for n in ("norm", "qkv", "out")} == {"out.skip"}
    assert layers["out"]["role"] == "residual_out"


def test_declared_input_shape_builds_the_sample_for_the_forward_pass() -> None:
    # The sample built from the embedding's size has 8 positions; this decoder's mask needs 16.
    with pytest.raises(SpecInvalid, match="forward pass"):
        describe_module(tm.TimetableDecoder(blocks=1), seed=1, graph="hooks")
    report = describe_module(
        tm.TimetableDecoder(blocks=1), seed=1, graph="hooks", input_shape=(2, 16)
    )
    assert report.graph_source == "forward hooks"
    assert any("declared shape (2, 16)" in n for n in report.notes)
    assert report.request["layers"] == tm.decoder_request(blocks=1)["layers"]


class TiedWithBias(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.emb = nn.Embedding(20, 6)
        self.head = nn.Linear(6, 20)
        self.head.weight = self.emb.weight

    def forward(self, ids: torch.Tensor) -> torch.Tensor:
        return self.head(self.emb(ids))


def test_tied_head_with_a_bias_gets_a_zero_bias_and_a_note() -> None:
    report = describe_module(TiedWithBias(), seed=1)
    assert [layer["name"] for layer in report.request["layers"]] == ["emb"]
    zero = [c for c in report.copies if c.parameter == "head.bias"]
    assert len(zero) == 1 and zero[0].zero
    assert any(
        "head: weight tied to emb.weight" in n and "bias set to zero" in n for n in report.notes
    )


def test_projection_skip_is_reported_with_what_it_reads() -> None:
    report = describe_module(tm.KilnNet(), seed=1)
    (note,) = [n for n in report.notes if "projection on the skip path" in n]
    assert "(stage.1.down.0, stage.1.down.1)" in note
    assert "stage.1.down.0 reads the block's input, the output of stage.0.bn3" in note
    layers = {layer["name"]: layer for layer in report.request["layers"]}
    assert (
        "branch" not in layers["stage.1.conv1"]
        and layers["stage.1.conv3"]["role"] == "residual_out"
    )


def test_table_with_reasons_shows_the_evidence() -> None:
    text = describe_module(tm.GaugeModel(), seed=1).table(reasons=True)
    assert "    followed by tanh" in text
    assert "    feeds a residual add" in text
    assert "    feeds the network output" in text
