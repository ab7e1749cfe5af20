"""docs/onnx.md's worked example: the hive-sound model it describes gives the table it shows."""

from __future__ import annotations

import json
import re
from pathlib import Path

import numpy as np
import onnx
from fastapi.testclient import TestClient
from onnx import TensorProto, helper, numpy_helper

from .onnx_helpers import post_model

DOC = Path(__file__).resolve().parents[3] / "docs" / "onnx.md"


def _hive_sounds() -> bytes:
    def zeros(name: str, *shape: int) -> TensorProto:
        return numpy_helper.from_array(np.zeros(shape, dtype=np.float32), name)

    nodes = [
        helper.make_node("Conv", ["x", "buzz.w", "buzz.b"], ["c"], "buzz", pads=[1, 1]),
        helper.make_node(
            "BatchNormalization", ["c", "bn.g", "bn.b", "bn.m", "bn.v"], ["n"], "buzz_bn"
        ),
        helper.make_node("Relu", ["n"], ["r"]),
        helper.make_node("GlobalAveragePool", ["r"], ["p"]),
        helper.make_node("Flatten", ["p"], ["f"]),
        helper.make_node("Gemm", ["f", "verdict.w", "verdict.b"], ["y"], "verdict", transB=1),
    ]
    inits = [
        zeros("buzz.w", 6, 1, 5),
        zeros("buzz.b", 6),
        zeros("bn.g", 6),
        zeros("bn.b", 6),
        zeros("bn.m", 6),
        zeros("bn.v", 6),
        zeros("verdict.w", 3, 6),
        zeros("verdict.b", 3),
    ]
    graph = helper.make_graph(
        nodes,
        "hive",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, [1, 1, 40])],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, [1, 3])],
        inits,
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    onnx.checker.check_model(model)
    return model.SerializeToString()


def test_inference_rows_shown_in_the_docs(http: TestClient) -> None:
    text = DOC.read_text(encoding="utf-8")
    block = re.search(r"```json\n(.*?)```", text, re.S)
    assert block is not None
    shown = [json.loads(chunk) for chunk in re.findall(r"\{.*?\}", block.group(1), re.S)]
    r = post_model(http, "plan", _hive_sounds(), seed="hive/2027")
    assert r.status_code == 200, r.text
    keys = ("layer", "node", "activation", "activation_from", "role")
    got = [{k: row[k] for k in keys} for row in r.json()["inference"]]
    assert got == shown
