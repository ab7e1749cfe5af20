"""Widths that chain between consecutive layers, into and out of branches, and through `reads`.

What a layer reads must have the width it declares: these are facts of the trade (common
practice): a dense layer's n_in is the number of features it multiplies, a conv's channels_in
the channels of the map it slides over, an embedding's dim the width of every token vector.
"""

from __future__ import annotations

from typing import Any

import pytest

from seedbed.core.request.parse import parse
from seedbed.core.request.problems import RequestRejected


def dense(name: str, n_in: int, n_out: int, **extra: Any) -> dict[str, Any]:
    return {"name": name, "kind": "dense", "n_in": n_in, "n_out": n_out, **extra}


def conv(name: str, c_in: int, c_out: int, **extra: Any) -> dict[str, Any]:
    return {
        "name": name,
        "kind": "conv",
        "channels_in": c_in,
        "channels_out": c_out,
        "kernel": [3, 3],
        **extra,
    }


def problems(layers: list[dict[str, Any]], **top: Any) -> list[tuple[str, str, str]]:
    try:
        parse({"seed": 1, "layers": layers, **top})
    except RequestRejected as err:
        return [(p.field, p.code, p.message) for p in err.problems]
    return []


def test_dense_widths_that_do_not_chain_are_refused_naming_both_layers() -> None:
    (found,) = problems([dense("squeeze", 64, 32), dense("readout", 33, 10)])
    field, code, message = found
    assert (field, code) == ("layers[1].n_in", "invalid_value")
    for text in ("'squeeze'", "'readout'", "33", "32", "n_out", "allowed: n_in = 32"):
        assert text in message


def test_conv_channels_chain_and_the_embedding_dim_feeds_what_follows() -> None:
    assert problems([conv("stem", 3, 16), conv("mix", 16, 32)]) == []
    ((field, _, message),) = problems([conv("stem", 3, 16), conv("mix", 24, 32)])
    assert field == "layers[1].channels_in" and "16" in message and "24" in message
    tokens = {"name": "tokens", "kind": "embedding", "vocab": 500, "dim": 48}
    ((field, _, _),) = problems(
        [tokens, {"name": "mix", "kind": "attention", "dim": 64, "heads": 4}]
    )
    assert field == "layers[1].dim"
    # A 1-d conv over the token sequence reads the embedding dim as channels.
    assert problems([tokens, {**conv("seq", 48, 32), "kernel": [5]}]) == []
    assert [f for f, _, _ in problems([tokens, {**conv("seq", 40, 32), "kernel": [5]}])] == [
        "layers[1].channels_in"
    ]


def test_what_the_request_cannot_know_is_not_refused() -> None:
    # conv -> dense: a flatten or a pooling sits between (its size is not in the request).
    assert problems([conv("stem", 3, 16), dense("head", 16 * 7 * 7, 10)]) == []
    # dense -> conv: a reshape of features into a grid (a generator's first step).
    assert problems([dense("lift", 100, 4 * 4 * 64), conv("up", 64, 32)]) == []
    # conv -> norm (per channel, or the flattened map) -> the next conv is checked again.
    norm = {"name": "bn", "kind": "norm", "dim": 16}
    assert problems([conv("a", 3, 16), norm, conv("b", 16, 16)]) == []
    assert [f for f, _, _ in problems([conv("a", 3, 16), norm, conv("b", 8, 16)])] == [
        "layers[2].channels_in"
    ]


def test_ordinary_networks_pass() -> None:
    lstm = {"name": "mem", "kind": "recurrent", "cell": "lstm", "n_in": 32, "hidden": 64}
    gru = {"name": "mem2", "kind": "recurrent", "cell": "gru", "n_in": 64, "hidden": 64}
    assert (
        problems(
            [
                {"name": "tok", "kind": "embedding", "vocab": 90, "dim": 32},
                lstm,
                gru,
                dense("out", 64, 90, role="output"),
            ]
        )
        == []
    )
    blocks = [
        {"name": "tok", "kind": "embedding", "vocab": 300, "dim": 64},
        {
            "name": "enc",
            "kind": "transformer_block",
            "dim": 64,
            "heads": 4,
            "mlp_dim": 256,
            "repeat": 2,
        },
        {"name": "final", "kind": "norm", "dim": 64},
        dense("lm", 64, 300, role="output", bias=False),
    ]
    assert problems(blocks) == []
    resnet = [
        conv("stem", 3, 32),
        {
            "name": "res",
            "kind": "residual_conv_block",
            "channels": 32,
            "kernel": [3, 3],
            "norm": "post",
            "repeat": 2,
        },
        dense("classes", 32, 10, role="output"),
    ]
    assert problems(resnet) == []


def test_two_heads_on_one_trunk_say_what_they_read() -> None:
    trunk = [dense("trunk.0", 20, 64, activation="relu"), dense("trunk.1", 64, 32)]
    heads = [dense("price", 32, 1, role="output"), dense("demand", 32, 4, role="output")]
    assert [f for f, _, _ in problems(trunk + heads)] == ["layers[3].n_in"]
    second = {**heads[1], "reads": ["trunk.1"]}
    assert problems([*trunk, heads[0], second]) == []
    # What `reads` names is checked too.
    wrong = {**heads[1], "n_in": 31, "reads": ["trunk.1"]}
    ((field, _, message),) = problems([*trunk, heads[0], wrong])
    assert field == "layers[3].n_in" and "32" in message and "31" in message


def test_a_concatenating_skip_is_checked_against_the_sum() -> None:
    layers = [dense("enc", 10, 24), dense("mid", 24, 16), dense("dec", 40, 8, reads=["enc", "mid"])]
    assert problems(layers) == []
    layers[2] = dense("dec", 41, 8, reads=["enc", "mid"])
    ((field, _, message),) = problems(layers)
    assert field == "layers[2].n_in" and "24" in message and "16" in message and "= 40" in message


def test_reads_must_name_earlier_layers() -> None:
    found = problems([dense("a", 4, 4), dense("b", 4, 4, reads=["c", "b", "aa"]), dense("c", 4, 4)])
    assert [f for f, _, _ in found] == [
        "layers[1].reads[0]",
        "layers[1].reads[1]",
        "layers[1].reads[2]",
    ]
    assert "later" in found[0][2] and "own output" in found[1][2]


def test_an_input_of_the_network_is_an_empty_reads() -> None:
    side = dense("weather", 6, 32, reads=[])
    assert problems([dense("a", 10, 32), side, dense("b", 32, 1)]) == []


def test_a_collection_of_layers_says_so() -> None:
    bag = [dense("a", 5, 7), dense("c", 9, 9)]
    assert problems(bag) != []
    assert problems(bag, widths="unchecked") == []


def test_layers_that_cannot_sit_in_a_branch() -> None:
    emb = {"name": "e", "kind": "embedding", "vocab": 100, "dim": 512, "branch": "b"}
    assert [(f, c) for f, c, _ in problems([emb])] == [("layers[0].branch", "not_allowed")]
    # The branch's first layer must read the trunk width, whatever the kinds.
    inside = [conv("stem", 3, 16), dense("mlp", 8, 8, branch="r")]
    ((field, _, message),) = problems(inside)
    assert field == "layers[1].n_in" and "branch 'r'" in message
    # reads inside a branch would bypass the branch input.
    found = problems([dense("a", 4, 4), dense("b", 4, 4, branch="r", reads=["a"])])
    assert [(f, c) for f, c, _ in found] == [("layers[1].reads", "not_allowed")]


def test_every_width_inside_a_branch_chains() -> None:
    layers = [
        dense("stem", 8, 16),
        dense("up", 16, 64, branch="r"),
        dense("down", 48, 16, branch="r"),
    ]
    assert [f for f, _, _ in problems(layers)] == ["layers[2].n_in"]


@pytest.mark.parametrize("top", [{}, {"widths": "unchecked"}])
def test_problems_in_blocks_point_at_the_block(top: dict[str, Any]) -> None:
    # The block's first norm opens a residual branch, so it is checked even when the request
    # says its widths are unchecked: the branch's output is added to what it reads.
    layers = [
        {"name": "tok", "kind": "embedding", "vocab": 30, "dim": 32},
        {"name": "enc", "kind": "transformer_block", "dim": 64, "heads": 4, "mlp_dim": 128},
    ]
    found = problems(layers, **top)
    assert [f for f, _, _ in found] == ["layers[1]"]
    assert "enc.0.attn_norm" in found[0][2] and "32" in found[0][2]
