"""Bad uploads get a 4xx with a code, never a 5xx; allowances are explicit."""

from __future__ import annotations

from typing import Any

import numpy as np
import onnx
import pytest
from fastapi.testclient import TestClient
from onnx import TensorProto, helper, numpy_helper

from .onnx_graphs import conv_net, mlp
from .onnx_helpers import RAW, post_model


def _error(r: Any, status: int, code: str) -> dict[str, Any]:
    assert r.status_code == status, r.text
    err = r.json()["error"]
    assert err["code"] == code, err
    return dict(err)


def _graph(nodes: list[Any], inits: list[Any], check: bool = True) -> bytes:
    graph = helper.make_graph(
        nodes,
        "bad",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, [2, 4])],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, [2, 3])],
        inits,
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    if check:
        onnx.checker.check_model(model)
    return model.SerializeToString()


def _w(name: str, *shape: int) -> TensorProto:
    return numpy_helper.from_array(np.zeros(shape, dtype=np.float32), name)


@pytest.mark.parametrize("route", ["plan", "weights", "model"])
def test_not_protobuf(http: TestClient, route: str) -> None:
    _error(post_model(http, route, b"\xff\xfe this is a photo, not a graph"), 422, "not_onnx")


def test_empty_and_truncated(http: TestClient) -> None:
    _error(post_model(http, "plan", b""), 422, "empty_model")
    whole = conv_net()
    for cut in (len(whole) // 3, len(whole) // 2, len(whole) - 7):
        r = post_model(http, "plan", whole[:cut])
        assert 400 <= r.status_code < 500, (cut, r.text)
        assert r.json()["error"]["code"] in ("not_onnx", "undefined_input")


def test_oversized_refused_from_content_length(http: TestClient) -> None:
    # The app under test accepts 1 MiB; the declared length alone is enough to refuse.
    big = b"\x08" * ((1 << 20) + 1)
    err = _error(post_model(http, "plan", big), 413, "body_too_large")
    assert "SEEDBED_MAX_ONNX_BYTES" in err["message"]


def test_oversized_refused_while_streaming(http: TestClient) -> None:
    def pieces() -> Any:
        for _ in range(40):
            yield b"\x00" * 65536  # 2.5 MiB in all, no Content-Length (chunked)

    r = http.post("/v1/onnx/plan", content=pieces(), headers=RAW, params={"seed": "1"})
    _error(r, 413, "body_too_large")


def test_cyclic_graph(http: TestClient) -> None:
    nodes = [
        helper.make_node("Gemm", ["x", "W", "b"], ["h"], "loop_a", transB=1),
        helper.make_node("Add", ["h", "y"], ["z"]),
        helper.make_node("Relu", ["z"], ["y"]),
    ]
    model = _graph(nodes, [_w("W", 3, 4), _w("b", 3)], check=False)
    err = _error(post_model(http, "plan", model), 422, "cyclic_graph")
    assert "Add" in err["message"]


def test_dangling_input(http: TestClient) -> None:
    nodes = [helper.make_node("Gemm", ["x", "W", "ghost"], ["y"], "g", transB=1)]
    _error(
        post_model(http, "plan", _graph(nodes, [_w("W", 3, 4)], check=False)),
        422,
        "undefined_input",
    )


def test_unknown_op_holding_weights_is_listed_then_kept_on_request(http: TestClient) -> None:
    nodes = [
        helper.make_node("Gemm", ["x", "W", "b"], ["h"], "g", transB=1),
        helper.make_node("PRelu", ["h", "slopes"], ["y"]),
    ]
    model = _graph(
        nodes,
        [
            _w("W", 3, 4),
            _w("b", 3),
            numpy_helper.from_array(np.full(3, 0.25, np.float32), "slopes"),
        ],
    )
    err = _error(post_model(http, "plan", model), 422, "unsupported_weights")
    assert "'slopes' (read by PRelu)" in err["message"] and "keep" in err["message"]
    seeded = post_model(http, "model", model, keep=["slopes"])
    assert seeded.status_code == 200
    stored = {
        t.name: numpy_helper.to_array(t)
        for t in onnx.load_from_string(seeded.content).graph.initializer
    }
    np.testing.assert_array_equal(stored["slopes"], 0.25)
    _error(post_model(http, "plan", model, keep=["slopes", "nowhere"]), 422, "unknown_initializer")


def test_scaled_gemm_is_refused(http: TestClient) -> None:
    nodes = [helper.make_node("Gemm", ["x", "W"], ["y"], "g", transB=1, alpha=2.0)]
    _error(post_model(http, "plan", _graph(nodes, [_w("W", 3, 4)])), 422, "unsupported_attribute")


def test_no_weights_and_wrong_media_type(http: TestClient) -> None:
    model = _graph([helper.make_node("Relu", ["x"], ["y"])], [])
    _error(post_model(http, "plan", model), 422, "no_weights")
    r = http.post(
        "/v1/onnx/plan",
        content=mlp(),
        params={"seed": "1"},
        headers={"content-type": "application/json"},
    )
    _error(r, 415, "unsupported_media_type")
    r = http.post("/v1/onnx/plan", content=mlp(), headers=RAW)
    assert r.status_code == 422  # seed is required


def test_inferred_request_problems_point_into_it(http: TestClient) -> None:
    # An embedding table too large for the service's limits: refused as the inferred request's.
    table = TensorProto(name="table", data_type=TensorProto.FLOAT, dims=[1 << 31, 1 << 20])
    table.data_location = TensorProto.EXTERNAL
    table.external_data.add(key="location", value="table.bin")
    graph = helper.make_graph(
        [helper.make_node("Gather", ["table", "ids"], ["y"], "vast")],
        "vast",
        [helper.make_tensor_value_info("ids", TensorProto.INT64, [3])],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, [3, 1 << 20])],
        [table],
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    r = post_model(http, "plan", model.SerializeToString())
    assert r.status_code == 413, r.text
    assert r.json()["error"]["field"].startswith("inferred_request.")


def test_multipart_upload_and_its_refusals(http: TestClient) -> None:
    r = http.post("/v1/onnx/plan", params={"seed": "1"}, files={"model": ("m.onnx", mlp())})
    assert r.status_code == 200
    r = http.post("/v1/onnx/plan", params={"seed": "1"}, files={"weights": ("m.onnx", mlp())})
    _error(r, 422, "unknown_part")


def test_external_data_initializers_need_only_shapes(http: TestClient) -> None:
    # Weights stored in a side file the service never sees: shapes are enough for every route.
    w = TensorProto(name="W", data_type=TensorProto.FLOAT, dims=[3, 4])
    w.data_location = TensorProto.EXTERNAL
    for key, value in (("location", "weights.bin"), ("offset", "0"), ("length", "48")):
        w.external_data.add(key=key, value=value)
    graph = helper.make_graph(
        [helper.make_node("Gemm", ["x", "W"], ["y"], "far", transB=1)],
        "far",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, [2, 4])],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, [2, 3])],
        [w],
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    data = model.SerializeToString()
    assert post_model(http, "plan", data).status_code == 200
    seeded = post_model(http, "model", data)
    assert seeded.status_code == 200
    (init,) = onnx.load_from_string(seeded.content).graph.initializer
    assert init.data_location == TensorProto.DEFAULT and len(init.raw_data) == 48


def test_weights_in_constant_nodes_and_subgraphs_are_refused_then_kept(
    http: TestClient,
) -> None:
    folded = numpy_helper.from_array(np.full((4, 3), 0.5, np.float32), "folded_value")
    nodes = [
        helper.make_node("Constant", [], ["folded"], value=folded),
        helper.make_node("MatMul", ["x", "folded"], ["y"], "squash"),
    ]
    model = _graph(nodes, [])
    err = _error(post_model(http, "plan", model), 422, "unsupported_weights")
    assert "'folded' (a Constant node of 12 floats, read by MatMul)" in err["message"]
    kept = post_model(http, "model", _graph(nodes, []), keep=["folded"])
    assert kept.status_code == 422  # nothing else to fill: no_weights, not a silent success
    assert kept.json()["error"]["code"] == "no_weights"

    body = helper.make_graph(
        [helper.make_node("MatMul", ["x", "inner.w"], ["z"])],
        "branch",
        [],
        [helper.make_tensor_value_info("z", TensorProto.FLOAT, [2, 3])],
        [_w("inner.w", 4, 3)],
    )
    cond = numpy_helper.from_array(np.array(True), "flag")
    nodes = [
        helper.make_node("Gemm", ["x", "W"], ["h"], "outer", transB=1),
        helper.make_node("If", ["flag"], ["y"], "choose", then_branch=body, else_branch=body),
    ]
    model = _graph(nodes, [_w("W", 3, 4), cond], check=False)
    err = _error(post_model(http, "plan", model), 422, "unsupported_weights")
    assert "inside the subgraph of If node 'choose'" in err["message"]
    assert post_model(http, "plan", model, keep=["inner.w"]).status_code == 200


def test_activation_override_replaces_what_was_read(http: TestClient) -> None:
    r = post_model(http, "plan", mlp(), activation=["probe=leaky_relu:0.1", "mix=selu"])
    assert r.status_code == 200, r.text
    rows = {row["layer"]: row for row in r.json()["inference"]}
    assert rows["probe"]["activation_param"] == 0.1
    assert rows["mix"]["activation"] == "selu"
    assert rows["mix"]["activation_from"] == "caller override"
    err = _error(post_model(http, "plan", mlp(), activation=["mx=relu"]), 422, "unknown_layer")
    assert "did you mean 'mix'" in err["message"]
    _error(post_model(http, "plan", mlp(), activation=["probe"]), 422, "invalid_value")
    _error(post_model(http, "plan", mlp(), activation=["probe=swirl"]), 422, "invalid_value")


def test_lstm_variants_seedbed_does_not_plan_are_refused(http: TestClient) -> None:
    def lstm(**attrs: Any) -> bytes:
        inputs = ["x3", "W", "R", "B", "", "", "", "P" if "peep" in attrs else ""]
        attrs.pop("peep", None)
        graph = helper.make_graph(
            [helper.make_node("LSTM", inputs, ["y"], "cell", hidden_size=2, **attrs)],
            "cell",
            [helper.make_tensor_value_info("x3", TensorProto.FLOAT, [1, 1, 3])],
            [helper.make_tensor_value_info("y", TensorProto.FLOAT, [1, 1, 1, 2])],
            [_w("W", 1, 8, 3), _w("R", 1, 8, 2), _w("B", 1, 16), _w("P", 1, 6)],
        )
        model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
        return model.SerializeToString()

    err = _error(post_model(http, "plan", lstm(peep=True)), 422, "unsupported_weights")
    assert "peephole" in err["message"]
    assert post_model(http, "plan", lstm(peep=True), keep=["P"]).status_code == 200
    _error(post_model(http, "plan", lstm(input_forget=1)), 422, "unsupported_attribute")
    _error(
        post_model(http, "plan", lstm(activations=["Sigmoid", "Relu", "Relu"])),
        422,
        "unsupported_attribute",
    )


def test_damaged_nodes_never_give_a_server_error(http: TestClient) -> None:
    # Every readable model of the suite, damaged node by node: inputs dropped, attributes of
    # the wrong type, dims emptied. Each answer is 200 or a coded 4xx, never a 5xx.
    from .onnx_graphs import gpt_block, recurrent

    rng = np.random.default_rng(20261204)
    for build in (mlp, conv_net, recurrent, gpt_block):
        original = onnx.load_from_string(build())
        for k in range(len(original.graph.node)):
            for damage in ("drop_input", "bad_attribute", "empty_dims"):
                model = onnx.ModelProto()
                model.CopyFrom(original)
                node = model.graph.node[k]
                if damage == "drop_input" and node.input:
                    del node.input[int(rng.integers(len(node.input)))]
                elif damage == "bad_attribute" and node.attribute:
                    a = node.attribute[0]
                    a.type, a.s = onnx.AttributeProto.STRING, b"twelve"
                elif damage == "empty_dims" and model.graph.initializer:
                    del model.graph.initializer[k % len(model.graph.initializer)].dims[:]
                keep = ["causal"] if build is gpt_block else []
                r = post_model(http, "model", model.SerializeToString(), keep=keep)
                assert r.status_code < 500, (build.__name__, k, damage, r.text)
                if r.status_code >= 400:
                    assert r.json()["error"]["code"]
