"""The bounded sample behind the workbench's histograms: it is the served values themselves, it
stays within its bound, and the density drawn over it is the law the plan names (scipy.stats as
the oracle)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from seedbed.core.plan import build_plan
from seedbed.core.render import render_rows
from seedbed.core.request.limits import Limits
from seedbed.core.value_sample import MAX_BLOCKS, sample_document

# An invented network: a frost-warning model for an orchard, one tensor per law.
REQUEST = {
    "seed": "orchard/frost/v2",
    "dtype": "float32",
    "layers": [
        {"name": "probe", "kind": "dense", "n_in": 300, "n_out": 700, "activation": "relu"},
        {"name": "blend", "kind": "dense", "n_in": 700, "n_out": 64, "activation": "tanh"},
        {
            "name": "trend",
            "kind": "dense",
            "n_in": 64,
            "n_out": 64,
            "activation": "relu",
            "init": {"method": "he", "distribution": "truncated_normal"},
        },
        {"name": "night", "kind": "recurrent", "cell": "lstm", "n_in": 64, "hidden": 32},
    ],
}


@pytest.fixture(scope="module")
def plan():
    return build_plan(REQUEST, Limits())


def _expected(plan, name, doc):
    full = render_rows(plan, plan.tensor(name)).astype(np.float64)
    rows = full.reshape(full.shape[0], -1)
    return np.concatenate(
        [rows[a:b, : doc["values_per_row"]].reshape(-1) for a, b in doc["blocks"]]
    )


@pytest.mark.parametrize(
    "name", ["probe.weight", "blend.weight", "trend.weight", "night.recurrent_weight", "night.bias"]
)
@pytest.mark.parametrize("limit", [1, 100, 4096, 10**6])
@pytest.mark.parametrize(
    ("dtype", "layout"),
    [("float32", "out_in"), ("bfloat16", "in_out"), ("float16", "out_in"), ("float64", "in_out")],
)
def test_sample_is_the_served_values_within_its_bound(
    name: str, limit: int, dtype: str, layout: str
) -> None:
    plan = build_plan({**REQUEST, "dtype": dtype, "layout": layout}, Limits())
    t = plan.tensor(name)
    doc = sample_document(plan, t, limit)
    values = np.asarray(doc["values"])
    assert 1 <= values.size <= limit
    assert len(doc["blocks"]) <= MAX_BLOCKS
    starts = [a for a, _ in doc["blocks"]]
    assert starts == sorted(starts)
    assert all(b <= nxt for (_, b), nxt in zip(doc["blocks"], starts[1:], strict=False))
    assert np.array_equal(values, _expected(plan, name, doc))
    if t.count <= limit:
        assert values.size == t.count
    assert sum(doc["histogram"]["counts"]) == values.size
    assert doc["summary"]["mean"] == pytest.approx(values.mean(), abs=1e-15)


def _curve_density(doc):
    n = doc["summary"]["count"]
    edges = doc["histogram"]["edges"]
    width = edges[1] - edges[0]
    x = np.asarray(doc["intended"]["curve"]["x"])
    return x, np.asarray(doc["intended"]["curve"]["y"]) / (n * width)


def test_intended_densities_are_the_plans_laws(plan) -> None:
    he = sample_document(plan, plan.tensor("probe.weight"))
    assert he["intended"]["law"] == "normal"
    x, density = _curve_density(he)
    std = plan.tensor("probe.weight").std
    # He et al. 2015, eq. 10: N(0, 2 / fan_in), fan_in 300.
    assert std == pytest.approx(math.sqrt(2 / 300), rel=1e-12)
    assert density == pytest.approx(stats.norm(scale=std).pdf(x), rel=1e-9)

    glorot = sample_document(plan, plan.tensor("blend.weight"))
    assert glorot["intended"]["law"] == "uniform"
    x, density = _curve_density(glorot)
    b = plan.tensor("blend.weight").bound
    inside = np.abs(x) < b * (1 - 1e-9)
    assert density[inside] == pytest.approx(stats.uniform(-b, 2 * b).pdf(x[inside]), rel=1e-12)
    assert np.all(density[np.abs(x) > b * (1 + 1e-9)] == 0)

    cut = sample_document(plan, plan.tensor("trend.weight"))
    assert cut["intended"]["law"] == "truncated_normal"
    x, density = _curve_density(cut)
    scale = plan.tensor("trend.weight").scale
    oracle = stats.truncnorm(-2, 2, scale=scale)
    assert density == pytest.approx(oracle.pdf(x), rel=1e-9, abs=1e-12)
    # The realised std of the law drawn equals the plan's std (truncation factor 0.8796...).
    assert oracle.std() == pytest.approx(plan.tensor("trend.weight").std, rel=1e-9)


def test_sample_statistics_follow_the_plan(plan) -> None:
    t = plan.tensor("probe.weight")
    doc = sample_document(plan, t, 65536)
    n = doc["summary"]["count"]
    # Within 5 standard errors: the sample std of a normal law has std sigma / sqrt(2 n).
    assert abs(doc["summary"]["std"] - t.std) < 5 * t.std / math.sqrt(2 * n)
    assert abs(doc["summary"]["mean"]) < 5 * t.std / math.sqrt(n)


def test_constants_are_point_masses(plan) -> None:
    bias = sample_document(plan, plan.tensor("night.bias"))
    assert bias["intended"]["law"] == "point"
    assert bias["intended"]["curve"] is None
    # The LSTM forget-gate block starts at 1 (Gers et al. 2000), the others at 0.
    assert bias["intended"]["points"] == [0.0, 1.0]
    assert sorted(set(bias["values"])) == [0.0, 1.0]
