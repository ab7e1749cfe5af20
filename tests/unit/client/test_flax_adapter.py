"""The Flax bridge: what it reads from a tree and a jaxpr, how strict it is, and that the
filled tree computes what seedbed's tensors mean (flax's own modules run as the oracle)."""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest

from conftest import require_oracle
from seedbed.core.plan import build_plan
from seedbed.core.render import render_rows
from seedbed_client.errors import SpecInvalid

jax = require_oracle("jax")
nn = require_oracle("flax.linen")
jnp = jax.numpy

from seedbed_client.flax_adapter import describe_params, fill_params  # noqa: E402


def _served(request: dict[str, Any]) -> dict[str, np.ndarray]:
    plan = build_plan(request)
    return {t.tensor: render_rows(plan, t) for t in plan.tensors}


class Sorter(nn.Module):
    """An invented parcel sorter: conv, batch norm, dense layers with several activations."""

    @nn.compact
    def __call__(self, x: Any) -> Any:
        x = nn.Conv(6, (3, 3), strides=(2, 2), feature_group_count=1, name="scan")(x)
        x = nn.BatchNorm(use_running_average=True, name="steady")(x)
        x = nn.elu(x, alpha=0.5)
        x = x.reshape((x.shape[0], -1))
        x = nn.sigmoid(nn.Dense(5, name="weigh")(x))
        return nn.softmax(nn.Dense(3, name="chute")(x))


def _sorter() -> tuple[Any, Any, Any]:
    model = Sorter()
    x = jnp.ones((2, 7, 7, 2))
    return model, model.init(jax.random.PRNGKey(1), x), x


def test_inference_table_from_the_jaxpr() -> None:
    model, variables, x = _sorter()
    d = describe_params(variables, seed=9, apply_fn=model.apply, example_input=x)
    layers = {layer["name"]: layer for layer in d.request["layers"]}
    assert layers["scan"]["stride"] == [2, 2] and layers["scan"]["kernel"] == [3, 3]
    assert layers["scan"]["activation"] == "elu"  # read through the BatchNorm
    assert layers["scan"]["activation_param"] == 0.5
    assert layers["weigh"]["activation"] == "sigmoid"
    assert layers["chute"]["activation"] == "softmax" and layers["chute"]["role"] == "output"
    assert "jax.nn.elu" in d.table() and "graph read from: jaxpr of apply_fn" in d.table()


def test_strict_without_a_jaxpr_and_for_unknown_keys() -> None:
    _, variables, _ = _sorter()
    with pytest.raises(SpecInvalid, match="was not inferred"):
        describe_params(variables, seed=9)
    d = describe_params(variables, seed=9, allow_defaults=True, activations={"weigh": "tanh"})
    rows = {t.name: t for t in d.layers}
    assert rows["weigh"].activation_from == "caller override"
    assert rows["scan"].activation_from == "default (allowed)"
    with pytest.raises(SpecInvalid, match="did you mean 'weigh'"):
        describe_params(variables, seed=9, allow_defaults=True, activations={"wiegh": "tanh"})


def test_filled_tree_keeps_structure_and_layouts() -> None:
    model, variables, x = _sorter()
    d = describe_params(variables, seed=9, apply_fn=model.apply, example_input=x)
    served = _served(d.request)
    filled = fill_params(variables, d, served)
    assert jax.tree_util.tree_structure(filled) == jax.tree_util.tree_structure(variables)
    p = filled["params"]
    # Flax stores Dense kernels (in, out) and Conv kernels (kH, kW, in/groups, out) [from
    # memory; the shapes init returned agree]: seedbed's out_in transposed.
    assert np.asarray(p["weigh"]["kernel"]).tobytes() == served["weigh.weight"].T.copy().tobytes()
    hwio = served["scan.weight"].transpose(2, 3, 1, 0).copy()
    assert np.asarray(p["scan"]["kernel"]).tobytes() == hwio.tobytes()
    stats = filled["batch_stats"]["steady"]
    assert (np.asarray(stats["mean"]) == 0).all() and (np.asarray(stats["var"]) == 1).all()
    assert np.isfinite(np.asarray(model.apply(filled, x))).all()


def test_lstm_cell_gates_and_forget_bias() -> None:
    # flax.linen.LSTMCell: i = sigmoid(ii(x) + hi(h)), f, g = tanh(...), o likewise;
    # c' = f c + i g, h' = o tanh(c') [from memory; the run below is the check].
    cell = nn.LSTMCell(features=4)
    x = jnp.asarray(np.linspace(-1, 1, 6, dtype=np.float32).reshape(2, 3))
    c0 = jnp.asarray(np.linspace(0.5, -0.5, 8, dtype=np.float32).reshape(2, 4))
    h0 = jnp.asarray(np.linspace(-0.3, 0.9, 8, dtype=np.float32).reshape(2, 4))
    variables = cell.init(jax.random.PRNGKey(0), (c0, h0), x)
    wrapped = {"params": {"gauge": variables["params"]}}
    d = describe_params(wrapped, seed="tide", allow_defaults=True)
    (layer,) = d.request["layers"]
    assert layer["cell"] == "lstm" and (layer["n_in"], layer["hidden"]) == (3, 4)
    served = _served(d.request)
    filled = fill_params(wrapped, d, served)
    np.testing.assert_array_equal(np.asarray(filled["params"]["gauge"]["hf"]["bias"]), 1.0)
    (c, h), _ = cell.apply({"params": filled["params"]["gauge"]}, (c0, h0), x)
    w, r, b = (
        served[f"gauge.{k}"].astype(np.float64)
        for k in ("input_weight", "recurrent_weight", "bias")
    )
    z = np.asarray(x, np.float64) @ w.T + np.asarray(h0, np.float64) @ r.T + b
    i, f, g, o = np.split(z, 4, axis=1)  # seedbed: input, forget, cell, output
    sig = lambda v: 1 / (1 + np.exp(-v))  # noqa: E731
    c_want = sig(f) * np.asarray(c0, np.float64) + sig(i) * np.tanh(g)
    np.testing.assert_allclose(np.asarray(c), c_want, rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(np.asarray(h), sig(o) * np.tanh(c_want), rtol=1e-5, atol=1e-6)


def test_gelu_forms_and_a_residual_branch() -> None:
    class Pollen(nn.Module):
        @nn.compact
        def __call__(self, x: Any) -> Any:
            h = nn.LayerNorm(name="norm")(x)
            h = nn.gelu(nn.Dense(8, name="spread")(h))  # tanh form, flax's default
            x = x + nn.Dense(4, name="mix")(h)
            return nn.Dense(2, name="count")(nn.gelu(x, approximate=False))

    model, x = Pollen(), jnp.ones((2, 4))
    variables = model.init(jax.random.PRNGKey(0), x)
    d = describe_params(variables, seed=1, apply_fn=model.apply, example_input=x)
    rows = {t.name: t for t in d.layers}
    assert rows["spread"].activation == "gelu" and "tanh" in rows["spread"].activation_from
    assert rows["mix"].activation == "linear"  # the add comes first: the GELU is after the join
    assert rows["norm"].branch == rows["spread"].branch == rows["mix"].branch is not None
    assert rows["count"].branch is None and rows["count"].role == "output"
