"""The client's request builders express branches, block shorthands and depth policies, and
refuse what the service refuses (the service's own request parser is the reference here: the
client must not send what it would refuse, nor refuse what it accepts)."""

from __future__ import annotations

from typing import Any

import pytest

from seedbed_client import (
    AttentionSpec,
    DenseSpec,
    EmbeddingSpec,
    NetworkSpec,
    NormSpec,
    SpecInvalid,
)
from seedbed_client.layers import (
    DepthPolicy,
    ResidualConvBlockSpec,
    TransformerBlockSpec,
    request_problems,
)


def _service_accepts(request: dict[str, Any]) -> bool:
    from seedbed.core.request.parse import parse
    from seedbed.core.request.problems import RequestRejected

    try:
        parse(request)
    except RequestRejected:
        return False
    return True


def test_branches_blocks_and_policy_round_trip_through_the_service() -> None:
    net = NetworkSpec(seed="harbour-radio/base", depth_policy=DepthPolicy("scaled_residual"))
    net.add(
        EmbeddingSpec("tokens", 64, 16),
        NormSpec("b0.ln", 16, branch="b0.attn_skip"),
        AttentionSpec("b0.attn", 16, 4, branch="b0.attn_skip", role="residual_out"),
        TransformerBlockSpec("enc", 16, 4, 32, norm="pre", repeat=2),
        NormSpec("final", 16),
        DenseSpec("next", 16, 64, role="output", bias=False),
    )
    request = net.to_request()
    assert request["depth_policy"] == {"name": "scaled_residual"}
    assert request["layers"][1]["branch"] == "b0.attn_skip"
    assert request["layers"][3] == {
        "name": "enc",
        "kind": "transformer_block",
        "dim": 16,
        "heads": 4,
        "mlp_dim": 32,
        "norm": "pre",
        "repeat": 2,
    }
    assert _service_accepts(request)
    assert NetworkSpec.from_request(request).to_request() == request


def test_residual_conv_block_is_accepted_by_the_service() -> None:
    net = NetworkSpec(seed=3).add(ResidualConvBlockSpec("res", 8, 3, norm="post", repeat=2))
    assert _service_accepts(net.to_request())


POLICIES: list[dict[str, Any]] = [
    {"name": "fixup"},
    {"name": "skip_gate"},
    {"name": "scaled_residual", "base_std": 0.01, "residual_layers": 4},
    {"name": "scaled_residual", "base_std": -1},
    {"name": "scaled_residual", "architecture": "encoder"},
    {"name": "deepnorm", "architecture": "encoder", "encoder_layers": 6},
    {"name": "deepnorm", "architecture": "encoder", "decoder_layers": 6},
    {"name": "deepnorm"},
    {"name": "t_fixup", "architecture": "encoder_decoder"},
    {"name": "t_fixup", "architecture": "encoder_decoder", "decoder_start": "b"},
    {"name": "width_transfer", "base_width": 8},
    {"name": "width_transfer"},
    {"name": "width_transfer", "base_width": 0},
    {"name": "muon"},
    {"name": "fixup", "gain": 2},
]


@pytest.mark.parametrize("policy", POLICIES, ids=lambda p: str(p))
def test_depth_policy_checks_agree_with_the_service(policy: dict[str, Any]) -> None:
    request = {
        "seed": 1,
        "layers": [
            {"name": "a", "kind": "dense", "n_in": 8, "n_out": 8, "branch": "r"},
            {"name": "b", "kind": "dense", "n_in": 8, "n_out": 8, "branch": "r"},
            {"name": "out", "kind": "dense", "n_in": 8, "n_out": 2, "role": "output"},
        ],
        "depth_policy": policy,
    }
    local = request_problems(request)
    assert (not local) == _service_accepts(request), local


def test_branch_rules_the_client_can_check() -> None:
    net = NetworkSpec(seed=1).add(
        DenseSpec("a", 4, 4, branch="a"),
        DenseSpec("b", 4, 4, branch="s"),
        DenseSpec("c", 4, 4),
        DenseSpec("d", 4, 4, branch="s"),
        DenseSpec("out", 4, 2, role="output", branch="t"),
    )
    with pytest.raises(SpecInvalid) as caught:
        net.to_request()
    fields = [p.field for p in caught.value.problems]
    assert fields == ["layers[0].branch", "layers[3].branch", "layers[4].role"]
    assert not _service_accepts(net._dict())


@pytest.mark.parametrize(
    "extra",
    [{"role": "output"}, {"branch": "x"}, {"block": "x"}, {"class_prior": 0.5}],
    ids=lambda e: next(iter(e)),
)
def test_block_shorthands_refuse_layer_only_fields_like_the_service(extra: dict[str, Any]) -> None:
    block = TransformerBlockSpec("enc", 8, 2, 16, **extra)
    net = NetworkSpec(seed=1).add(block)
    field = next(iter(extra))
    assert [p.field for p in net.problems()] == [f"layers[0].{field}"]
    assert not _service_accepts(net._dict())
