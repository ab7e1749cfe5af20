"""One network, three frameworks, one starting point.

An invented hop-leaf classifier (a conv stem, a grouped conv, a norm, a residual GELU MLP and
a head) is built three times: as plain PyTorch modules, as a Flax module and as an ONNX graph.
One request is served by a real server; PyTorch gets the served arrays copied in by hand (its
layouts are seedbed's out_in), Flax gets them through seedbed_client.flax_adapter (filling the
tree it read itself), and the ONNX graph through POST /v1/onnx/model. Checked:

- the Flax bridge and the ONNX import each infer the same request as the one written here
  (branch labels aside, which name the same layers);
- every parameter is byte-identical across the three after its layout conversion (Flax
  kernels are (in, out) and HWIO; PyTorch and ONNX store (out, in) and OIHW);
- the forward outputs on one input agree within float32 tolerance (PyTorch vs JAX vs
  onnxruntime, each running its own kernels).
"""

from __future__ import annotations

from typing import Any

import httpx
import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper

from conftest import require_oracle
from seedbed_client import Client

SEED = "hop-leaf/2026-12"
REQUEST: dict[str, Any] = {
    "seed": SEED,
    "dtype": "float32",
    "layout": "out_in",
    "layers": [
        {
            "name": "stem",
            "kind": "conv",
            "channels_in": 3,
            "channels_out": 8,
            "kernel": [3, 3],
            "activation": "relu",
        },
        {
            "name": "grouped",
            "kind": "conv",
            "channels_in": 8,
            "channels_out": 8,
            "kernel": [3, 3],
            "groups": 2,
            "activation": "tanh",
        },
        {"name": "norm", "kind": "norm", "dim": 8, "branch": "mlp"},
        {
            "name": "up",
            "kind": "dense",
            "n_in": 8,
            "n_out": 16,
            "activation": "gelu",
            "branch": "mlp",
        },
        {"name": "down", "kind": "dense", "n_in": 16, "n_out": 8, "branch": "mlp"},
        {"name": "head", "kind": "dense", "n_in": 8, "n_out": 4, "role": "output"},
    ],
}
EPS = 1e-5
X = np.cos(np.arange(2 * 3 * 6 * 6, dtype=np.float32) * 0.37).reshape(2, 3, 6, 6)  # NCHW


def _comparable(request: dict[str, Any]) -> list[dict[str, Any]]:
    """Layers with defaults filled as the service fills them and branch labels dropped."""
    out = []
    for layer in request["layers"]:
        entry = {k: v for k, v in layer.items() if k != "branch"}
        entry["in_branch"] = "branch" in layer
        entry.setdefault("bias", True)
        entry.setdefault("activation", "linear")
        entry.setdefault("role", "hidden")
        if entry["kind"] == "conv":
            entry.setdefault("groups", 1)
            entry.setdefault("stride", [1, 1])
            entry.setdefault("transposed", False)
        out.append(entry)
    return out


def _torch_model(arrays: dict[str, np.ndarray]) -> Any:
    torch = require_oracle("torch")
    nn = torch.nn

    class HopLeaf(nn.Module):
        def __init__(self) -> None:
            super().__init__()
            self.stem = nn.Conv2d(3, 8, 3, padding=1)
            self.grouped = nn.Conv2d(8, 8, 3, padding=1, groups=2)
            self.norm = nn.LayerNorm(8, eps=EPS)
            self.up = nn.Linear(8, 16)
            self.down = nn.Linear(16, 8)
            self.head = nn.Linear(8, 4)

        def forward(self, x: Any) -> Any:
            x = torch.relu(self.stem(x))
            x = torch.tanh(self.grouped(x))
            x = x.mean(dim=(2, 3))
            x = x + self.down(nn.functional.gelu(self.up(self.norm(x))))
            return self.head(x)

    model = HopLeaf()
    with torch.no_grad():
        for name, param in model.named_parameters():
            # PyTorch stores Linear (out, in) and Conv2d (out, in/groups, kH, kW): seedbed's
            # out_in. LayerNorm's weight/bias are seedbed's scale/shift.
            served = name.replace("norm.weight", "norm.scale").replace("norm.bias", "norm.shift")
            param.copy_(torch.from_numpy(arrays[served].copy()))
    return model


def _flax_model() -> Any:
    nn = require_oracle("flax.linen")
    jnp = require_oracle("jax.numpy")

    class HopLeaf(nn.Module):
        @nn.compact
        def __call__(self, x: Any) -> Any:
            x = nn.relu(nn.Conv(8, (3, 3), padding="SAME", name="stem")(x))
            x = jnp.tanh(
                nn.Conv(8, (3, 3), padding="SAME", feature_group_count=2, name="grouped")(x)
            )
            x = x.mean(axis=(1, 2))
            h = nn.LayerNorm(epsilon=EPS, name="norm")(x)
            h = nn.gelu(nn.Dense(16, name="up")(h), approximate=False)
            x = x + nn.Dense(8, name="down")(h)
            return nn.Dense(4, name="head")(x)

    return HopLeaf()


def _onnx_graph() -> bytes:
    def zeros(name: str, *shape: int) -> TensorProto:
        return numpy_helper.from_array(np.zeros(shape, dtype=np.float32), name)

    def const(name: str, value: float) -> TensorProto:
        return numpy_helper.from_array(np.array(value, dtype=np.float32), name)

    nodes = [
        helper.make_node(
            "Conv", ["x", "stem.weight", "stem.bias"], ["s"], "stem", pads=[1, 1, 1, 1]
        ),
        helper.make_node("Relu", ["s"], ["sa"]),
        helper.make_node(
            "Conv",
            ["sa", "grouped.weight", "grouped.bias"],
            ["g"],
            "grouped",
            pads=[1, 1, 1, 1],
            group=2,
        ),
        helper.make_node("Tanh", ["g"], ["ga"]),
        helper.make_node("GlobalAveragePool", ["ga"], ["p"]),
        helper.make_node("Flatten", ["p"], ["f"]),
        helper.make_node(
            "LayerNormalization",
            ["f", "norm.scale", "norm.shift"],
            ["n"],
            "norm",
            axis=-1,
            epsilon=EPS,
        ),
        helper.make_node("Gemm", ["n", "up.weight", "up.bias"], ["u"], "up", transB=1),
        helper.make_node("Div", ["u", "sqrt2"], ["u1"]),
        helper.make_node("Erf", ["u1"], ["u2"]),
        helper.make_node("Add", ["u2", "one"], ["u3"]),
        helper.make_node("Mul", ["u", "u3"], ["u4"]),
        helper.make_node("Mul", ["u4", "half"], ["ua"]),
        helper.make_node("Gemm", ["ua", "down.weight", "down.bias"], ["d"], "down", transB=1),
        helper.make_node("Add", ["f", "d"], ["r"], "mlp"),
        helper.make_node("Gemm", ["r", "head.weight", "head.bias"], ["y"], "head", transB=1),
    ]
    inits = [
        zeros("stem.weight", 8, 3, 3, 3),
        zeros("stem.bias", 8),
        zeros("grouped.weight", 8, 4, 3, 3),
        zeros("grouped.bias", 8),
        zeros("norm.scale", 8),
        zeros("norm.shift", 8),
        zeros("up.weight", 16, 8),
        zeros("up.bias", 16),
        zeros("down.weight", 8, 16),
        zeros("down.bias", 8),
        zeros("head.weight", 4, 8),
        zeros("head.bias", 4),
        const("sqrt2", float(np.sqrt(2.0))),
        const("one", 1.0),
        const("half", 0.5),
    ]
    graph = helper.make_graph(
        nodes,
        "hop_leaf",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, [2, 3, 6, 6])],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, [2, 4])],
        inits,
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    onnx.checker.check_model(model)
    return model.SerializeToString()


@pytest.mark.slow
def test_pytorch_flax_and_onnx_start_from_the_same_bytes(base_url: str) -> None:
    torch = require_oracle("torch")
    jax = require_oracle("jax")
    ort = require_oracle("onnxruntime")
    from seedbed_client.flax_adapter import describe_params, seed_params

    with Client(base_url) as client:
        arrays = dict(client.weights(REQUEST, format="safetensors"))
        # Flax: the bridge reads the tree and a jaxpr, fetches and fills.
        flax_model = _flax_model()
        x_nhwc = jax.numpy.asarray(X.transpose(0, 2, 3, 1))
        variables = flax_model.init(jax.random.PRNGKey(0), x_nhwc)
        described = describe_params(
            variables, seed=SEED, apply_fn=flax_model.apply, example_input=x_nhwc
        )
        assert _comparable(described.request) == _comparable(REQUEST), described.table()
        filled, _ = seed_params(
            variables, client, seed=SEED, apply_fn=flax_model.apply, example_input=x_nhwc
        )
    # ONNX: the service reads the graph and fills it.
    graph = _onnx_graph()
    with httpx.Client(base_url=base_url, timeout=60.0) as http:
        review = http.post(
            "/v1/onnx/plan",
            content=graph,
            params={"seed": SEED},
            headers={"Content-Type": "application/octet-stream"},
        )
        assert review.status_code == 200, review.text
        assert _comparable(review.json()["request"]) == _comparable(REQUEST)
        seeded = http.post(
            "/v1/onnx/model",
            content=graph,
            params={"seed": SEED},
            headers={"Content-Type": "application/octet-stream"},
        )
        assert seeded.status_code == 200
    onnx_params = {
        t.name: numpy_helper.to_array(t)
        for t in onnx.load_from_string(seeded.content).graph.initializer
    }
    torch_model = _torch_model(arrays)
    torch_params = {n: p.detach().numpy() for n, p in torch_model.named_parameters()}
    flax_params = jax.tree_util.tree_map(np.asarray, filled["params"])

    # Every parameter, byte for byte, after the documented layout conversion.
    for layer in ("stem", "grouped"):
        oihw = torch_params[f"{layer}.weight"]
        assert onnx_params[f"{layer}.weight"].tobytes() == oihw.tobytes()
        hwio = np.ascontiguousarray(flax_params[layer]["kernel"].transpose(3, 2, 0, 1))
        assert hwio.tobytes() == oihw.tobytes()
        assert oihw.tobytes() == arrays[f"{layer}.weight"].tobytes()
    for layer in ("up", "down", "head"):
        out_in = torch_params[f"{layer}.weight"]
        assert onnx_params[f"{layer}.weight"].tobytes() == out_in.tobytes()
        assert np.ascontiguousarray(flax_params[layer]["kernel"].T).tobytes() == out_in.tobytes()
    for layer in ("stem", "grouped", "up", "down", "head"):
        b = torch_params[f"{layer}.bias"].tobytes()
        assert onnx_params[f"{layer}.bias"].tobytes() == b
        assert flax_params[layer]["bias"].tobytes() == b
    for torch_name, part, flax_name in (("weight", "scale", "scale"), ("bias", "shift", "bias")):
        b = torch_params[f"norm.{torch_name}"].tobytes()
        assert (
            onnx_params[f"norm.{part}"].tobytes() == b == flax_params["norm"][flax_name].tobytes()
        )

    # Forward outputs on the same input, each framework's own kernels.
    with torch.no_grad():
        y_torch = torch_model(torch.from_numpy(X)).numpy()
    y_jax = np.asarray(flax_model.apply(filled, x_nhwc))
    session = ort.InferenceSession(seeded.content, providers=["CPUExecutionProvider"])
    (y_onnx,) = session.run(None, {"x": X})
    assert y_torch.std() > 0
    np.testing.assert_allclose(y_jax, y_torch, rtol=1e-4, atol=1e-5)
    np.testing.assert_allclose(y_onnx, y_torch, rtol=1e-4, atol=1e-5)
