"""The request format: strict validation, readable problems, defaults and the canonical form."""

from __future__ import annotations

import copy
import json
from typing import Any

import ml_dtypes
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from seedbed.core.request.branches import branches_of
from seedbed.core.request.layers import (
    AttentionLayer,
    ConvLayer,
    DenseLayer,
    EmbeddingLayer,
    NormLayer,
    RecurrentLayer,
)
from seedbed.core.request.limits import Limits
from seedbed.core.request.network import NetworkRequest, canonical_request
from seedbed.core.request.overrides import BiasOverride, WeightOverride
from seedbed.core.request.parse import parse
from seedbed.core.request.problems import PROBLEM_CODES, RequestRejected
from seedbed.core.request.vocabulary import DTYPE_MAX, DTYPE_TINY
from seedbed.core.tensors import slots_by_layer


def dense(name: Any = "d0", **extra: Any) -> dict[str, Any]:
    return {"name": name, "kind": "dense", "n_in": 8, "n_out": 16, **extra}


def conv(name: str = "c0", **extra: Any) -> dict[str, Any]:
    return {"name": name, "kind": "conv", "channels_in": 4, "channels_out": 6,
            "kernel": [3, 3], **extra}  # fmt: skip


def lstm(name: str = "r0", **extra: Any) -> dict[str, Any]:
    return {"name": name, "kind": "recurrent", "cell": "lstm", "n_in": 5, "hidden": 7, **extra}


def req(*layers: Any, **top: Any) -> dict[str, Any]:
    return {"seed": 7, "layers": list(layers) or [dense()], **top}


def rejected(body: object, limits: Limits | None = None) -> RequestRejected:
    with pytest.raises(RequestRejected) as info:
        parse(body, limits)
    return info.value


# ---------------------------------------------------------------------------------------------
# Bad inputs: (body, field, code, a phrase of the message that says what is allowed)

BAD: list[tuple[str, object, str, str, str]] = [
    # top level
    ("seed bool", req(seed=True), "seed", "invalid_type", "integer 0 to 9223372036854775807"),
    ("seed negative", req(seed=-1), "seed", "invalid_value", "integer 0 to"),
    ("seed 2**63", req(seed=2**63), "seed", "invalid_value", "integer 0 to"),
    ("seed float", req(seed=1.5), "seed", "invalid_type", "string of 1 to 128 characters"),
    ("seed empty str", req(seed=""), "seed", "invalid_value", "string of 1 to 128"),
    ("seed long str", req(seed="s" * 129), "seed", "invalid_value", "string of 1 to 128"),
    ("seed lone surrogate", req(seed="ab\ud800"), "seed", "invalid_value", "valid Unicode"),
    ("seed missing", {"layers": [dense()]}, "seed", "missing_field", "integer 0 to"),
    ("dtype unknown", req(dtype="float8"), "dtype", "invalid_value", "float16, bfloat16"),
    ("dtype null", req(dtype=None), "dtype", "invalid_type", "float32, float64"),
    ("layout unknown", req(layout="rows"), "layout", "invalid_value", "out_in or in_out"),
    ("top unknown", req(seeds=1), "seeds", "unknown_field", "seed, dtype, layout, layers"),
    ("layers empty", {"seed": 1, "layers": []}, "layers", "invalid_value", "at least one"),
    ("layers not list", {"seed": 1, "layers": "d0"}, "layers", "invalid_type", "a list"),
    ("layers missing", {"seed": 1}, "layers", "missing_field", "at least one layer"),
    ("body not object", [dense()], "(body)", "invalid_type", "JSON object"),
    # layer basics
    ("layer not object", req(5), "layers[0]", "invalid_type", "layer object with name, kind"),
    ("kind missing", req({"name": "x", "n_in": 1}), "layers[0].kind", "missing_field",
     "dense, conv, embedding, recurrent, attention, norm"),
    ("kind unknown", req({"name": "x", "kind": "lstm"}), "layers[0].kind", "invalid_value",
     "dense, conv, embedding"),
    ("size quoted", req(dense(n_in="8")), "layers[0].n_in", "invalid_type", "not be quoted"),
    ("size bool", req(dense(n_in=True)), "layers[0].n_in", "invalid_type", "positive integer"),
    ("size zero", req(dense(n_in=0)), "layers[0].n_in", "invalid_value", "positive integer"),
    ("size float", req(dense(n_out=8.0)), "layers[0].n_out", "invalid_type", "positive integer"),
    ("size giant", req(dense(n_out=10**30)), "layers[0].n_out", "too_large", "2147483647"),
    ("size missing", req({"name": "d", "kind": "dense", "n_in": 3}), "layers[0].n_out",
     "missing_field", "positive integer"),
    ("layer unknown field", req(dense(units=4)), "layers[0].units", "unknown_field",
     "name, kind, n_in, n_out, bias"),
    ("name empty", req(dense(name="")), "layers[0].name", "invalid_value", "1 to 128"),
    ("name space", req(dense(name="a b")), "layers[0].name", "invalid_value", "letters, digits"),
    ("name leading dot", req(dense(name=".a")), "layers[0].name", "invalid_value",
     "starting with a letter, digit or '_'"),
    ("name too long", req(dense(name="n" * 129)), "layers[0].name", "invalid_value", "1 to 128"),
    ("name not str", req(dense(name=3)), "layers[0].name", "invalid_type", "1 to 128 characters"),
    ("name duplicate", req(dense("a"), dense("b"), dense("a")), "layers[2].name",
     "duplicate_name", "already used by layers[0].name"),
    ("tensor name clash", req({"name": "a", "kind": "attention", "dim": 8, "heads": 2},
                              dense("a.query", n_in=8, n_out=8)),
     "layers[1].name", "duplicate_name", "field layers[0].name"),
    ("activation unknown", req(dense(activation="swish")), "layers[0].activation",
     "invalid_value", "leaky_relu"),
    ("activation param unused", req(dense(activation="relu", activation_param=0.1)),
     "layers[0].activation_param", "not_allowed", "leaky_relu (slope)"),
    ("leaky slope range", req(dense(activation="leaky_relu", activation_param=2.0)),
     "layers[0].activation_param", "invalid_value", "[0, 1]"),
    ("param nan", req(dense(activation="elu", activation_param=float("nan"))),
     "layers[0].activation_param", "invalid_value", "finite number"),
    ("softmax hidden", req(dense(activation="softmax")), "layers[0].activation", "not_allowed",
     "role: output"),
    ("role unknown", req(dense(role="final")), "layers[0].role", "invalid_value", "residual_out"),
    ("bias string", req(dense(bias="yes")), "layers[0].bias", "invalid_type", "true or false"),
    ("bias int", req(dense(bias=1)), "layers[0].bias", "invalid_type", "true or false"),
    # conv
    ("kernel empty", req(conv(kernel=[])), "layers[0].kernel", "invalid_value", "1 to 3"),
    ("kernel 4d", req(conv(kernel=[3, 3, 3, 3])), "layers[0].kernel", "invalid_value", "1 to 3"),
    ("kernel entry zero", req(conv(kernel=[3, 0])), "layers[0].kernel[1]", "invalid_value",
     "positive integer"),
    ("kernel not list", req(conv(kernel=3)), "layers[0].kernel", "invalid_type",
     "list of 1 to 3 positive integers"),
    ("groups not dividing", req(conv(groups=4)), "layers[0].groups", "invalid_value",
     "must divide channels_in (4) and channels_out (6)"),
    ("stride length", req(conv(stride=[2])), "layers[0].stride", "invalid_value",
     "one entry per kernel entry"),
    ("transposed string", req(conv(transposed="no")), "layers[0].transposed", "invalid_type",
     "true or false"),
    # embedding, recurrent, attention, norm
    ("embedding bias", req({"name": "e", "kind": "embedding", "vocab": 9, "dim": 4,
                            "bias": True}),
     "layers[0].bias", "not_allowed", "omit bias or set it false"),
    ("cell unknown", req(lstm(cell="vanilla")), "layers[0].cell", "invalid_value", "'simple'"),
    ("gate missing", req(lstm(gate_order=["input", "forget", "cell"])), "layers[0].gate_order",
     "invalid_value", "input, forget, cell, output"),
    ("gate repeated", req(lstm(gate_order=["input", "input", "cell", "output"])),
     "layers[0].gate_order", "invalid_value", "exactly once"),
    ("gru gate names", req(lstm(cell="gru", gate_order=["input", "forget", "cell"])),
     "layers[0].gate_order", "invalid_value", "reset, update, candidate"),
    ("simple gates", req(lstm(cell="simple", gate_order=["candidate"])), "layers[0].gate_order",
     "not_allowed", "omit gate_order"),
    ("gru forget bias", req(lstm(cell="gru", forget_bias=1.0)), "layers[0].forget_bias",
     "not_allowed", "only for lstm"),
    ("lstm activation", req(lstm(activation="relu")), "layers[0].activation", "not_allowed",
     "only for simple cells"),
    ("heads not dividing", req({"name": "a", "kind": "attention", "dim": 8, "heads": 3}),
     "layers[0].heads", "invalid_value", "must divide dim (8)"),
    ("norm fan method", req({"name": "n", "kind": "norm", "dim": 8, "init": {"method": "he"}}),
     "layers[0].init.method", "not_allowed", "use constant"),
    # weight override
    ("method unknown", req(dense(init={"method": "xavier"})), "layers[0].init.method",
     "invalid_value", "glorot"),
    ("method missing", req(dense(init={"gain": 1.0})), "layers[0].init.method", "missing_field",
     "symmetric_uniform, glorot, he"),
    ("bound with normal", req(dense(init={"method": "he", "bound": 0.1})),
     "layers[0].init.bound", "not_allowed", "only allowed when the distribution is uniform"),
    ("std and bound", req(dense(init={"method": "lecun", "distribution": "uniform",
                                      "std": 0.1, "bound": 0.1})),
     "layers[0].init.bound", "not_allowed", "either std or bound"),
    ("constant no value", req(dense(init={"method": "constant"})), "layers[0].init.value",
     "missing_field", "a finite number"),
    ("orthogonal distribution", req(dense(init={"method": "orthogonal",
                                                "distribution": "normal"})),
     "layers[0].init.distribution", "not_allowed", "takes only gain"),
    ("glorot fan", req(dense(init={"method": "glorot", "fan": "in"})), "layers[0].init.fan",
     "not_allowed", "allowed: mean"),
    ("fan with std", req(dense(init={"method": "he", "std": 0.02, "fan": "out"})),
     "layers[0].init.fan", "not_allowed", "final scale"),
    ("gain negative", req(dense(init={"method": "he", "gain": -1.0})), "layers[0].init.gain",
     "invalid_value", "from 1e-06 to 1e+06"),
    ("gain subnormal", req(dense(init={"method": "he", "gain": 5e-324})), "layers[0].init.gain",
     "invalid_value", "from 1e-06 to 1e+06"),
    ("gain huge", req(dense(init={"method": "orthogonal", "gain": 1e300})),
     "layers[0].init.gain", "invalid_value", "from 1e-06 to 1e+06"),
    ("gain infinite", req(dense(init={"method": "he", "gain": float("inf")})),
     "layers[0].init.gain", "invalid_value", "from 1e-06 to 1e+06"),
    ("std zero", req(dense(init={"method": "he", "std": 0.0})), "layers[0].init.std",
     "invalid_value", "positive finite number"),
    ("uniform by definition", req(dense(init={"method": "symmetric_uniform",
                                              "distribution": "normal"})),
     "layers[0].init.distribution", "not_allowed", "omit distribution or set uniform"),
    ("value on he", req(dense(init={"method": "he", "value": 0.0})), "layers[0].init.value",
     "not_allowed", "only allowed when method is constant"),
    ("init unknown field", req(dense(init={"method": "he", "mode": "fan_in"})),
     "layers[0].init.mode", "unknown_field", "method, distribution, fan, gain, std, bound, value"),
    ("init not object", req(dense(init="he")), "layers[0].init", "invalid_type", "an object"),
    # bias override and class prior
    ("bias method", req(dense(bias_init={"method": "zeros", "value": 0.0})),
     "layers[0].bias_init.method", "invalid_value", "constant"),
    ("bias_init without bias", req(dense(bias=False, bias_init={"method": "constant",
                                                                "value": 0.0})),
     "layers[0].bias_init", "not_allowed", "bias: true"),
    ("prior one", req(dense(role="output", class_prior=1.0)), "layers[0].class_prior",
     "invalid_value", "strictly between 0 and 1"),
    ("prior hidden", req(dense(class_prior=0.01)), "layers[0].class_prior", "not_allowed",
     "role is output"),
    ("prior attention", req({"name": "a", "kind": "attention", "dim": 8, "heads": 2,
                             "role": "output", "class_prior": 0.1}),
     "layers[0].class_prior", "not_allowed", "dense and conv"),
    ("prior and bias_init", req(dense(role="output", class_prior=0.1,
                                      bias_init={"method": "constant", "value": 0.0})),
     "layers[0].bias_init", "not_allowed", "not both"),
    # values that do not fit the dtype
    ("constant over fp16", req(dense(init={"method": "constant", "value": -1e5}),
                               dtype="float16"),
     "layers[0].init.value", "invalid_value", "65504"),
    ("std over fp16", req(dense(init={"method": "he", "std": 8000.0}), dtype="float16"),
     "layers[0].init.std", "invalid_value", "65504"),
    ("bound over fp16", req(dense(init={"method": "glorot", "bound": 7e4}), dtype="float16"),
     "layers[0].init.bound", "invalid_value", "65504"),
    ("bias over fp16", req(dense(bias_init={"method": "constant", "value": 7e4}),
                           dtype="float16"),
     "layers[0].bias_init.value", "invalid_value", "65504"),
    ("forget bias over fp16", req(lstm(forget_bias=1e5), dtype="float16"),
     "layers[0].forget_bias", "invalid_value", "65504"),
    ("std under fp16", req(dense(init={"method": "he", "std": 1e-5}), dtype="float16"),
     "layers[0].init.std", "invalid_value", "at least 6.10352e-05"),
    ("bound under fp32", req(dense(init={"method": "symmetric_uniform", "bound": 1e-39})),
     "layers[0].init.bound", "invalid_value", "at least 1.17549e-38"),
    ("std over fp32", req(dense(init={"method": "he", "std": 1e38})), "layers[0].init.std",
     "invalid_value", "3.40282e+38"),
]  # fmt: skip


def test_table_is_large_enough() -> None:
    assert len(BAD) >= 40
    assert len({case[0] for case in BAD}) == len(BAD)


@pytest.mark.parametrize(
    ("label", "body", "field", "code", "allowed"), BAD, ids=[b[0] for b in BAD]
)
def test_bad_input(label: str, body: object, field: str, code: str, allowed: str) -> None:
    err = rejected(copy.deepcopy(body))
    found = [p for p in err.problems if p.field == field]
    assert found, f"no problem at {field}: {err.problems}"
    assert found[0].code == code, found[0]
    assert allowed in found[0].message, found[0].message
    for p in err.problems:
        assert p.code in PROBLEM_CODES
        # Never pydantic's wording, its documentation URLs, or Python type names.
        for leak in ("pydantic", "https://", "Input should", "NoneType", "tagged-union"):
            assert leak not in p.message, p


def test_problems_on_later_layers_name_their_index() -> None:
    err = rejected(req(dense("a"), conv("b"), conv("c", kernel=[3, -1])))
    assert [(p.field, p.code) for p in err.problems] == [("layers[2].kernel[1]", "invalid_value")]


def test_every_problem_is_reported_not_just_the_first() -> None:
    err = rejected(req(dense(n_in="8", n_out=0, extra=1), seed=None, dtype="int8"))
    fields = {p.field for p in err.problems}
    assert {"seed", "dtype", "layers[0].n_in", "layers[0].n_out", "layers[0].extra"} <= fields
    assert not err.too_large


def test_gigantic_integer_does_not_break_the_message() -> None:
    # Python refuses to print integers over 4300 digits; the message must still be built.
    err = rejected(req(dense(n_in=10**5000)))
    (p,) = err.problems
    assert (p.field, p.code) == ("layers[0].n_in", "too_large")
    assert "about 5001 digits" in p.message and "2147483647" in p.message
    assert err.too_large


def test_dtype_max_table_matches_numpy_and_ml_dtypes() -> None:
    # Oracle: numpy's and ml_dtypes' finfo (IEEE 754 binary16/32/64 and bfloat16 maxima).
    assert DTYPE_MAX["float16"] == float(np.finfo(np.float16).max)
    assert DTYPE_MAX["float32"] == float(np.finfo(np.float32).max)
    assert DTYPE_MAX["float64"] == float(np.finfo(np.float64).max)
    assert DTYPE_MAX["bfloat16"] == float(ml_dtypes.finfo(ml_dtypes.bfloat16).max)
    assert DTYPE_TINY["float16"] == float(np.finfo(np.float16).tiny)
    assert DTYPE_TINY["float32"] == float(np.finfo(np.float32).tiny)
    assert DTYPE_TINY["float64"] == float(np.finfo(np.float64).tiny)
    assert DTYPE_TINY["bfloat16"] == float(ml_dtypes.finfo(ml_dtypes.bfloat16).tiny)


def test_std_bound_uses_the_extreme_normal_draw() -> None:
    # 65504 / 8.3 = 7892.05: a std just under fits float16, just over does not.
    parse(req(dense(init={"method": "he", "std": 7892.0}), dtype="float16"))
    rejected(req(dense(init={"method": "he", "std": 7893.0}), dtype="float16"))
    # The same std is fine in float32.
    parse(req(dense(init={"method": "he", "std": 7893.0})))


# ---------------------------------------------------------------------------------------------
# Valid requests: every kind, defaults filled


def test_every_kind_is_accepted_with_defaults_filled() -> None:
    body = req(
        dense("enc.0", activation="relu"),
        conv("stem", channels_in=3, channels_out=64, kernel=[7, 7], stride=[2, 2],
             activation="leaky_relu"),
        conv("up", channels_in=8, channels_out=4, kernel=[4], transposed=True, groups=2),
        {"name": "tok", "kind": "embedding", "vocab": 1000, "dim": 32},
        lstm("mem"),
        {"name": "gru_1", "kind": "recurrent", "cell": "gru", "n_in": 4, "hidden": 3,
         "gate_order": ["update", "reset", "candidate"]},
        {"name": "rnn", "kind": "recurrent", "cell": "simple", "n_in": 4, "hidden": 3,
         "activation": "relu", "init": {"method": "identity"}},
        {"name": "attn", "kind": "attention", "dim": 64, "heads": 8, "bias": False,
         "role": "residual_out"},
        {"name": "ln", "kind": "norm", "dim": 64, "init": {"method": "constant", "value": 1.0}},
        dense("head", n_out=10, activation="softmax", role="output"),
        dense("detector", n_out=1, activation="sigmoid", role="output", class_prior=0.01),
        seed="team-baseline",
        dtype="bfloat16",
        layout="in_out",
        widths="unchecked",  # one of each kind: a collection, not a chain
    )  # fmt: skip
    r = parse(body).request
    assert (r.seed, r.dtype, r.layout) == ("team-baseline", "bfloat16", "in_out")
    kinds = [type(layer) for layer in r.layers]
    assert kinds == [DenseLayer, ConvLayer, ConvLayer, EmbeddingLayer, RecurrentLayer,
                     RecurrentLayer, RecurrentLayer, AttentionLayer, NormLayer, DenseLayer,
                     DenseLayer]  # fmt: skip
    d, stem, up, emb, mem, gru, rnn, attn, ln, head, det = r.layers
    assert isinstance(d, DenseLayer) and d.bias and d.role == "hidden" and d.init is None
    assert isinstance(stem, ConvLayer) and stem.groups == 1 and not stem.transposed
    assert stem.activation_param == 0.01  # leaky_relu's default slope, filled in
    assert isinstance(up, ConvLayer) and up.stride == [1] and up.transposed
    assert isinstance(emb, EmbeddingLayer) and emb.bias is False and emb.activation == "linear"
    assert isinstance(mem, RecurrentLayer)
    assert mem.gate_order == ["input", "forget", "cell", "output"] and mem.forget_bias == 1.0
    assert mem.activation is None
    assert isinstance(gru, RecurrentLayer) and gru.gate_order == ["update", "reset", "candidate"]
    assert gru.forget_bias is None
    assert isinstance(rnn, RecurrentLayer) and rnn.gate_order is None and rnn.activation == "relu"
    assert isinstance(attn, AttentionLayer) and not attn.bias
    assert isinstance(ln, NormLayer) and ln.bias and ln.init is not None
    assert isinstance(head, DenseLayer) and head.activation == "softmax"
    assert isinstance(det, DenseLayer) and det.class_prior == 0.01


def test_override_defaults() -> None:
    r = parse(req(
        dense("a", init={"method": "glorot"}),
        dense("b", init={"method": "he", "fan": "out"}),
        dense("c", init={"method": "lecun", "distribution": "truncated_normal", "std": 0.02}),
        dense("d", init={"method": "symmetric_uniform", "bound": 0.05}),
        dense("e", init={"method": "orthogonal", "gain": 2}),
        widths="unchecked",
    )).request  # fmt: skip
    inits = [layer.init for layer in r.layers]
    assert all(i is not None for i in inits)
    a, b, c, d, e = (i for i in inits if i is not None)
    assert (a.distribution, a.fan, a.gain) == ("uniform", "mean", None)
    assert (b.distribution, b.fan) == ("normal", "out")
    assert (c.distribution, c.fan, c.std) == ("truncated_normal", None, 0.02)
    assert (d.distribution, d.fan, d.bound) == ("uniform", None, 0.05)
    assert (e.distribution, e.gain) == (None, 2.0) and isinstance(e.gain, float)


def test_simple_cell_defaults_to_tanh_and_lstm_without_bias_has_no_forget_bias() -> None:
    r = parse(req(lstm("s", cell="simple"), lstm("l", bias=False), widths="unchecked")).request
    assert r.layers[0].activation == "tanh"
    second = r.layers[1]
    assert isinstance(second, RecurrentLayer) and second.forget_bias is None


def test_seed_integer_and_string_are_kept_apart() -> None:
    assert parse(req(seed=0)).request.seed == 0
    assert parse(req(seed=2**63 - 1)).request.seed == 2**63 - 1
    assert parse(req(seed="12")).request.seed == "12"
    assert parse(req(seed="s" * 128)).request.seed == "s" * 128


def test_name_length_follows_the_limits() -> None:
    parse(req(dense(name="n" * 128)))
    err = rejected(req(dense(name="n" * 11)), Limits(max_name_length=10))
    assert err.problems[0].field == "layers[0].name"
    assert "1 to 10 characters" in err.problems[0].message


def test_models_are_immutable() -> None:
    r = parse(req()).request
    with pytest.raises(ValueError, match="frozen"):
        setattr(r, "seed", 3)  # noqa: B010 (an assignment mypy would flag before runtime)


def test_parse_carries_the_slots_and_branches_of_its_request() -> None:
    parsed = parse(req(dense("a"), dense("b", n_in=16, branch="skip", role="residual_out")))
    assert parsed.slots == tuple(tuple(s) for s in slots_by_layer(parsed.request))
    assert parsed.branches == tuple(branches_of(parsed.request))
    assert [b.name for b in parsed.branches] == ["skip"]


def test_request_rejected_needs_problems() -> None:
    with pytest.raises(ValueError, match="at least one problem"):
        RequestRejected([])


def test_schema_has_descriptions_and_examples_for_every_field() -> None:
    # The models become the OpenAPI document: every field should explain itself.
    for model in (NetworkRequest, DenseLayer, ConvLayer, EmbeddingLayer, RecurrentLayer,
                  AttentionLayer, NormLayer, WeightOverride, BiasOverride):  # fmt: skip
        for name, info in model.model_fields.items():
            assert info.description, f"{model.__name__}.{name} has no description"
            assert info.examples, f"{model.__name__}.{name} has no examples"
    schema = NetworkRequest.model_json_schema()
    assert schema["examples"]
    parse(schema["examples"][0])  # the published example is itself valid


# ---------------------------------------------------------------------------------------------
# Canonical form


def test_same_meaning_same_canonical_form() -> None:
    terse = req(
        dense("a"),
        lstm("b"),
        conv("c", kernel=[3]),
        dense("d", activation="leaky_relu", init={"method": "he", "gain": 1}),
        widths="unchecked",
    )
    explicit = {
        "seed": 7,
        "dtype": "float32",
        "layout": "out_in",
        "widths": "unchecked",
        "layers": [
            dense("a", bias=True, role="hidden", activation="linear", init=None),
            lstm("b", gate_order=["input", "forget", "cell", "output"], forget_bias=1,
                 bias=True),
            conv("c", kernel=[3], stride=[1], groups=1, transposed=False),
            dense("d", activation="leaky_relu", activation_param=0.01,
                  init={"method": "he", "distribution": "normal", "fan": "in", "gain": 1.0}),
        ],
    }  # fmt: skip
    assert canonical_request(parse(terse).request) == canonical_request(parse(explicit).request)


def test_different_meaning_different_canonical_form() -> None:
    base = canonical_request(parse(req()).request)
    assert canonical_request(parse(req(seed="7")).request) != base
    assert canonical_request(parse(req(layout="in_out")).request) != base
    assert canonical_request(parse(req(dense(bias=False))).request) != base


def test_canonical_keys_are_sorted_and_json_ready() -> None:
    c = canonical_request(parse(req(conv(init={"method": "he"}))).request)

    def check(v: Any) -> None:
        if isinstance(v, dict):
            assert list(v) == sorted(v)
            for x in v.values():
                check(x)
        elif isinstance(v, list):
            for x in v:
                check(x)

    check(c)
    assert json.loads(json.dumps(c)) == c
    assert "activation_param" not in c["layers"][0]  # unset options are omitted, not null


_names = st.integers(min_value=0, max_value=10**6).map(lambda i: f"layer_{i}")
_size = st.integers(min_value=1, max_value=64)
_activation = st.sampled_from(["relu", "tanh", "gelu", "selu", "linear", "sigmoid", "silu"])


@st.composite
def _override(draw: st.DrawFn) -> dict[str, Any]:
    method = draw(st.sampled_from(["symmetric_uniform", "glorot", "he", "lecun", "orthogonal",
                                   "identity", "constant"]))  # fmt: skip
    out: dict[str, Any] = {"method": method}
    positive = st.floats(min_value=1e-3, max_value=10.0, allow_nan=False)  # fits every dtype
    if method == "constant":
        out["value"] = draw(st.floats(min_value=-10, max_value=10, allow_nan=False))
    elif method in ("orthogonal", "identity"):
        if draw(st.booleans()):
            out["gain"] = draw(positive | st.integers(min_value=1, max_value=5))
    else:
        dist = (
            "uniform"
            if method == "symmetric_uniform"
            else draw(st.sampled_from(["uniform", "normal", "truncated_normal"]))
        )
        if draw(st.booleans()):
            out["distribution"] = dist
        scale = draw(st.sampled_from(["formula", "std", "bound"]))
        if scale == "std":
            out["std"] = draw(positive)
        elif scale == "bound" and dist == "uniform":
            out["distribution"] = "uniform"
            out["bound"] = draw(positive)
        else:
            if method != "glorot" and draw(st.booleans()):
                out["fan"] = draw(st.sampled_from(["in", "out", "mean"]))
            if draw(st.booleans()):
                out["gain"] = draw(positive)
    return out


@st.composite
def _layer(draw: st.DrawFn, name: str) -> dict[str, Any]:
    kind = draw(st.sampled_from(["dense", "conv", "embedding", "recurrent", "attention",
                                 "norm"]))  # fmt: skip
    layer: dict[str, Any] = {"name": name, "kind": kind}
    if kind == "dense":
        layer |= {"n_in": draw(_size), "n_out": draw(_size)}
    elif kind == "conv":
        g = draw(st.integers(1, 4))
        k = draw(st.lists(st.integers(1, 5), min_size=1, max_size=3))
        layer |= {"channels_in": g * draw(st.integers(1, 4)),
                  "channels_out": g * draw(st.integers(1, 4)), "kernel": k}  # fmt: skip
        if g != 1 or draw(st.booleans()):  # groups=1 is sometimes written, sometimes omitted
            layer["groups"] = g
        if draw(st.booleans()):
            layer["stride"] = [draw(st.integers(1, 3)) for _ in k]
        if draw(st.booleans()):
            layer["transposed"] = draw(st.booleans())
    elif kind == "embedding":
        layer |= {"vocab": draw(_size), "dim": draw(_size)}
    elif kind == "recurrent":
        cell = draw(st.sampled_from(["simple", "lstm", "gru"]))
        layer |= {"cell": cell, "n_in": draw(_size), "hidden": draw(_size)}
        if cell != "simple" and draw(st.booleans()):
            gates = ["input", "forget", "cell", "output"] if cell == "lstm" else [
                "reset", "update", "candidate"]  # fmt: skip
            layer["gate_order"] = draw(st.permutations(gates))
        if cell == "lstm" and draw(st.booleans()):
            layer["forget_bias"] = draw(st.floats(-5, 5, allow_nan=False))
    elif kind == "attention":
        heads = draw(st.integers(1, 4))
        layer |= {"dim": heads * draw(st.integers(1, 8)), "heads": heads}
    else:
        layer["dim"] = draw(_size)
    may_activate = not (kind == "recurrent" and layer["cell"] != "simple")
    if may_activate and draw(st.booleans()):
        layer["activation"] = draw(_activation | st.just("leaky_relu"))
        if layer["activation"] == "leaky_relu" and draw(st.booleans()):
            layer["activation_param"] = draw(st.floats(0, 1, allow_nan=False))
    if draw(st.booleans()):
        layer["role"] = draw(st.sampled_from(["hidden", "residual_out"]))
    if kind != "embedding" and draw(st.booleans()):
        layer["bias"] = draw(st.booleans())
    if layer.get("bias") is False:
        layer.pop("forget_bias", None)  # an lstm without bias has no forget-gate bias
    if kind == "norm":
        if draw(st.booleans()):
            layer["init"] = {"method": "constant", "value": draw(st.floats(-2, 2))}
    elif draw(st.booleans()):
        layer["init"] = draw(_override())
    if layer.get("bias", kind != "embedding") and draw(st.booleans()):
        layer["bias_init"] = {"method": "constant", "value": draw(st.floats(-1, 1))}
    return layer


@st.composite
def _request(draw: st.DrawFn) -> dict[str, Any]:
    names = draw(st.lists(_names, min_size=1, max_size=5, unique=True))
    body: dict[str, Any] = {
        "seed": draw(st.integers(0, 2**63 - 1) | st.text(min_size=1, max_size=20)),
        "layers": [draw(_layer(n)) for n in names],
        "widths": "unchecked",  # the drawn layers do not chain
    }
    if draw(st.booleans()):
        body["dtype"] = draw(st.sampled_from(["float32", "float64", "float16", "bfloat16"]))
    if draw(st.booleans()):
        body["layout"] = draw(st.sampled_from(["out_in", "in_out"]))
    return body


@settings(max_examples=150, deadline=None)
@given(_request())
def test_canonical_form_is_a_fixed_point(body: dict[str, Any]) -> None:
    first = parse(body).request
    canon = canonical_request(first)
    again = parse(json.loads(json.dumps(canon))).request
    assert canonical_request(again) == canon
    assert again == first


@pytest.mark.parametrize(
    ("kind", "said"),
    [
        ({}, "an object"),
        ([1], "a list of 1 items"),
        (5, "the integer 5"),
        ("dens", "the string 'dens'"),
    ],
)
def test_bad_kind_is_described_as_sent(kind: object, said: str) -> None:
    with pytest.raises(RequestRejected) as err:
        parse({"seed": 1, "layers": [{"name": "a", "kind": kind}]})
    (problem,) = err.value.problems
    assert problem.field == "layers[0].kind" and f"got {said};" in problem.message
