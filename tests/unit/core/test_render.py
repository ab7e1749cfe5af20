"""Values of planned tensors: statistics, structure, blocks and independence from other layers."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy import stats

from conftest import require_oracle
from seedbed.core.plan import build_plan
from seedbed.core.render import iter_tensor_bytes, render_float64, render_rows
from seedbed.core.request.problems import RequestRejected
from seedbed.web.weights_response import parse_rows
from seedbed_client.generator.rounding import round_to_dtype


def plan_of(*layers: dict, **top: object):
    return build_plan({"seed": 5, "layers": list(layers), **top})


def dense(name: str, n_in: int, n_out: int, **extra: object) -> dict:
    return {"name": name, "kind": "dense", "n_in": n_in, "n_out": n_out, **extra}


def values(plan, name: str) -> np.ndarray:
    t = plan.tensor(name)
    return render_rows(plan, t).astype(np.float64)


@pytest.mark.parametrize(
    ("init", "frozen"),
    [
        ({"method": "he"}, lambda t: stats.norm(scale=t.std)),
        ({"method": "glorot"}, lambda t: stats.uniform(loc=-t.bound, scale=2 * t.bound)),
        (
            {"method": "lecun", "distribution": "truncated_normal"},
            lambda t: stats.truncnorm(-2, 2, scale=t.bound / 2),
        ),
    ],
)
def test_weights_follow_their_distribution(init: dict, frozen) -> None:
    plan = plan_of(dense("w", 400, 300, activation="relu", init=init), dtype="float64")
    t = plan.tensor("w.weight")
    x = values(plan, "w.weight").ravel()
    ks = stats.kstest(x, frozen(t).cdf)
    assert ks.pvalue > 1e-4, ks
    # std within 5 standard errors (se of a sample std ~ std * sqrt((kurtosis - 1) / 4n))
    assert abs(x.std() - t.std) < 5 * t.std * np.sqrt(2 / (4 * x.size))
    assert abs(x.mean()) < 5 * t.std / np.sqrt(x.size)


def test_no_two_rows_are_equal() -> None:
    plan = plan_of(dense("w", 64, 512, activation="relu"), dtype="float16")
    w = render_rows(plan, plan.tensor("w.weight"))
    assert len(np.unique(w.view(np.uint16), axis=0)) == w.shape[0]


@pytest.mark.parametrize("shape", [(64, 64), (32, 96), (96, 32)])
def test_orthogonal_rows_or_columns_are_orthonormal_times_gain(shape: tuple[int, int]) -> None:
    # Saxe et al. 2014: all singular values equal the gain.
    n_out, n_in = shape
    plan = plan_of(
        dense("q", n_in, n_out, init={"method": "orthogonal", "gain": 1.5}), dtype="float64"
    )
    w = values(plan, "q.weight")
    gram = w @ w.T if n_out <= n_in else w.T @ w
    np.testing.assert_allclose(gram, 1.5**2 * np.eye(min(shape)), atol=1e-12)
    np.testing.assert_allclose(np.linalg.svd(w, compute_uv=False), 1.5, atol=1e-12)


def test_orthogonal_is_haar_not_biased_toward_positive_diagonal() -> None:
    # Mezzadri 2007: without the sign correction QR's Q has a positive-leaning diagonal.
    diag = []
    for seed in range(40):
        p = build_plan(
            {
                "seed": seed,
                "dtype": "float64",
                "layers": [dense("q", 8, 8, init={"method": "orthogonal"})],
            }
        )
        diag.append(np.diag(render_rows(p, p.tensor("q.weight"))))
    d = np.concatenate(diag)
    # Haar: each diagonal entry has mean 0 and variance 1/n (n = 8); 320 samples.
    assert abs(d.mean()) < 5 * np.sqrt(1 / 8 / d.size)


def test_lstm_recurrent_blocks_are_each_orthogonal() -> None:
    plan = plan_of(
        {"name": "c", "kind": "recurrent", "cell": "lstm", "n_in": 6, "hidden": 16}, dtype="float64"
    )
    w = values(plan, "c.recurrent_weight")
    for k in range(4):
        block = w[16 * k : 16 * (k + 1)]
        np.testing.assert_allclose(block @ block.T, np.eye(16), atol=1e-12)


def test_conv_dirac_identity_passes_inputs_through_torch_conv() -> None:
    # Oracle: torch's conv2d with 'same' padding must return its input unchanged.
    torch = require_oracle("torch")
    plan = plan_of(
        {
            "name": "d",
            "kind": "conv",
            "channels_in": 6,
            "channels_out": 6,
            "kernel": [3, 5],
            "groups": 2,
            "init": {"method": "identity"},
        },
        dtype="float64",
    )
    w = torch.from_numpy(values(plan, "d.weight"))
    x = torch.randn(2, 6, 9, 11, dtype=torch.float64)
    y = torch.nn.functional.conv2d(x, w, padding=(1, 2), groups=2)
    assert torch.equal(y, x)


def test_lstm_bias_blocks() -> None:
    plan = plan_of({"name": "c", "kind": "recurrent", "cell": "lstm", "n_in": 3, "hidden": 4})
    b = values(plan, "c.bias")
    np.testing.assert_array_equal(b, [0] * 4 + [1] * 4 + [0] * 8)  # input, forget, cell, output


# One layer of each kind: a collection, not a chain (the requests say widths "unchecked").
_KINDS = [
    dense("fc", 37, 23, activation="relu"),
    {
        "name": "cv",
        "kind": "conv",
        "channels_in": 4,
        "channels_out": 6,
        "kernel": [3, 2, 2],
        "groups": 2,
        "activation": "tanh",
    },
    {"name": "rn", "kind": "recurrent", "cell": "gru", "n_in": 7, "hidden": 5},
    {
        "name": "rs",
        "kind": "recurrent",
        "cell": "simple",
        "n_in": 5,
        "hidden": 5,
        "activation": "relu",
    },
    {"name": "em", "kind": "embedding", "vocab": 30, "dim": 300},
    {"name": "at", "kind": "attention", "dim": 300, "heads": 3},
    dense("id", 9, 9, init={"method": "identity", "gain": 0.5}),
]


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    data=st.data(),
    layout=st.sampled_from(["out_in", "in_out"]),
    dtype=st.sampled_from(["float32", "float64", "float16", "bfloat16"]),
)
def test_any_row_block_equals_the_slice_of_the_whole(data, layout: str, dtype: str) -> None:
    plan = build_plan(
        {
            "seed": "blocks",
            "dtype": dtype,
            "layout": layout,
            "layers": _KINDS,
            "widths": "unchecked",
        }
    )
    t = data.draw(st.sampled_from(plan.tensors))
    whole = render_rows(plan, t)
    start = data.draw(st.integers(0, t.shape[0] - 1))
    stop = data.draw(st.integers(start + 1, t.shape[0]))
    block = render_rows(plan, t, start, stop)
    assert block.tobytes() == whole[start:stop].tobytes()
    # float32/float64 in generation order take a direct path (scaled and rounded inside the
    # generator); it must equal the documented one: float64 values, then one rounding.
    exact = round_to_dtype(np.ascontiguousarray(render_float64(plan, t, start, stop)), dtype)
    assert block.tobytes() == exact.tobytes()
    chunk = data.draw(st.integers(1, 5000))
    streamed = b"".join(iter_tensor_bytes(plan, t, start, stop, chunk_bytes=chunk))
    assert streamed == whole[start:stop].tobytes()


def test_layouts_hold_the_same_numbers() -> None:
    a = build_plan({"seed": 3, "layout": "out_in", "layers": _KINDS, "widths": "unchecked"})
    b = build_plan({"seed": 3, "layout": "in_out", "layers": _KINDS, "widths": "unchecked"})
    for ta, tb in zip(a.tensors, b.tensors, strict=True):
        va, vb = render_rows(a, ta), render_rows(b, tb)
        np.testing.assert_array_equal(va, np.transpose(vb, np.argsort(tb.served_axes)))


@settings(max_examples=25, deadline=None)
@given(order=st.permutations(list(range(len(_KINDS)))), keep=st.integers(1, len(_KINDS)))
def test_a_tensor_does_not_depend_on_other_layers(order: list[int], keep: int) -> None:
    full = build_plan({"seed": 99, "layers": _KINDS, "widths": "unchecked"})
    chosen = [_KINDS[i] for i in order[:keep]]
    partial = build_plan({"seed": 99, "layers": chosen, "widths": "unchecked"})
    for t in partial.tensors:
        if t.reproducible != "exact":
            continue
        alone = render_rows(partial, t).tobytes()
        assert alone == render_rows(full, full.tensor(t.tensor)).tobytes()


def test_different_seeds_and_names_give_different_values() -> None:
    a = plan_of(dense("x", 16, 16))
    b = build_plan({"seed": 6, "layers": [dense("x", 16, 16)]})
    c = plan_of(dense("y", 16, 16))
    va, vb, vc = (render_rows(p, p.tensors[0]) for p in (a, b, c))
    assert not np.array_equal(va, vb) and not np.array_equal(va, vc)


@pytest.mark.parametrize("text", ["5:2", "a:b", "0:999", "3", "-1:2", "1:1", ":4", "0:2:3"])
def test_bad_rows_are_refused_naming_the_field(text: str) -> None:
    plan = plan_of(dense("x", 4, 10))
    with pytest.raises(RequestRejected) as err:
        parse_rows(text, plan.tensor("x.weight"))
    assert err.value.problems[0].field == "rows"
    assert "0 <= START < STOP <= 10" in err.value.problems[0].message


def test_threads_do_not_change_bytes() -> None:
    plan = plan_of(dense("x", 1000, 700, activation="gelu"))
    t = plan.tensor("x.weight")
    assert render_rows(plan, t, threads=1).tobytes() == render_rows(plan, t, threads=2).tobytes()
