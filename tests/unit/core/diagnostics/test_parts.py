"""The parts of the diagnostics: twin units, dead and saturated units, structure checks, limits,
the body, and the chart.

Outside references: twin groups are compared with a brute-force pairwise comparison written
here; saturation thresholds are the documented ones (|tanh| > 0.99, sigmoid outside
(0.01, 0.99)) applied by hand to chosen inputs; the chart is parsed with the standard library's
XML parser.
"""

from __future__ import annotations

import itertools
import xml.etree.ElementTree as ET
from typing import Any

import numpy as np
import pytest

from seedbed.core.diagnostics import DiagnosticLimits, chart_html, chart_svg, diagnose
from seedbed.core.diagnostics.report import diagnosis_document
from seedbed.core.diagnostics.twin_groups import locked_groups, summarise, twin_groups
from seedbed.core.diagnostics.unit_stats import activate, dead_units, saturated_fraction
from seedbed.core.request.problems import RequestRejected

# --- twin units -----------------------------------------------------------------------------


def _brute_force(rows: np.ndarray) -> list[list[int]]:
    parent = list(range(rows.shape[0]))
    for i, j in itertools.combinations(range(rows.shape[0]), 2):
        if np.array_equal(rows[i], rows[j]) and parent[j] == j:
            parent[j] = parent[i]
    groups: dict[int, list[int]] = {}
    for i, p in enumerate(parent):
        groups.setdefault(p, []).append(i)
    return sorted((g for g in groups.values() if len(g) > 1), key=lambda g: g[0])


def test_planted_twins_are_found_and_only_them() -> None:
    rng = np.random.default_rng(3)
    weight = rng.standard_normal((40, 70))
    bias = rng.standard_normal(40)
    weight[[5, 17, 33]] = weight[2]
    bias[[5, 17, 33]] = bias[2]
    weight[9] = weight[30]  # same weights, different bias: not twins
    # equal in every sampled column but one value differs elsewhere: a fingerprint collision
    weight[12] = weight[20]
    weight[12, 1] += 1.0
    weight[21] = -0.0 * weight[21]  # rows of signed zeros ...
    weight[22] = 0.0 * weight[22]  # ... equal the rows of plain zeros as values
    bias[21] = bias[22] = 0.0
    found = [g.tolist() for g in twin_groups([weight, bias.reshape(-1, 1)])]
    assert found == [[2, 5, 17, 33], [21, 22]]
    both = np.concatenate([weight + 0.0, bias.reshape(-1, 1)], axis=1)
    assert found == _brute_force(both)


def test_locked_groups_compare_gradients() -> None:
    groups = [np.array([0, 3]), np.array([1, 2])]
    grad = np.random.default_rng(1).standard_normal((10, 4))
    grad[:, 3] = grad[:, 0] * (1 + 1e-13)  # rounding-level difference: still locked
    assert locked_groups(groups, grad) == [True, False]


def test_summary_caps_what_it_lists_but_counts_everything() -> None:
    groups = [np.arange(i * 30, i * 30 + 30) for i in range(10)]
    summary = summarise(400, groups, [True] * 5 + [False] * 5)
    assert summary.group_count == 10 and len(summary.groups) == 8
    assert all(len(g) == 16 for g in summary.groups) and summary.group_sizes == [30] * 8
    assert summary.twin_fraction == 300 / 400 and summary.locked_fraction == 150 / 400


# --- dead and saturated units ---------------------------------------------------------------


def test_dead_and_saturated_units_follow_the_documented_rules() -> None:
    pre = np.array([[-1.0, 2.0, -0.5, 30.0], [-2.0, -1.0, 0.0, 25.0]])
    assert dead_units("relu", pre, None).tolist() == [True, False, True, False]
    assert dead_units("leaky_relu", pre, None).tolist() == [True, False, True, False]
    tanh = activate("tanh", None, pre)
    assert tanh.dead.tolist() == [False, False, False, True]  # tanh'(25..30) is exactly 0.0
    expected = np.mean(np.abs(np.tanh(pre)) > 0.99)
    assert tanh.saturated == expected == 0.25
    sig = activate("sigmoid", None, np.array([[-5.0, 0.0, 4.0, 9.0]]))
    assert sig.saturated == 0.5  # sigmoid(-5) = 0.0067 and sigmoid(9) = 0.99988
    assert saturated_fraction("relu", pre) is None
    assert not activate("linear", None, pre).dead.any()
    assert activate("softmax", None, pre).saturated is None


# --- structure and limits through diagnose() ------------------------------------------------


def _dense(name: str, n_in: int, n_out: int, **extra: Any) -> dict[str, Any]:
    return {"name": name, "kind": "dense", "n_in": n_in, "n_out": n_out, **extra}


def _fields(body: dict[str, Any], limits: DiagnosticLimits | None = None) -> list[str]:
    with pytest.raises(RequestRejected) as caught:
        diagnose(body, diagnostic_limits=limits)
    return [p.field for p in caught.value.problems]


@pytest.mark.parametrize(
    ("layers", "field"),
    [
        ([_dense("a", 8, 8), _dense("b", 9, 4)], "request.layers[1].n_in"),
        (
            [
                _dense("a", 8, 8),
                {"name": "r", "kind": "recurrent", "cell": "gru", "n_in": 8, "hidden": 8},
            ],
            "request.layers[1].kind",
        ),
        (
            [_dense("a", 8, 8), {"name": "e", "kind": "embedding", "vocab": 5, "dim": 8}],
            "request.layers[1].kind",
        ),
        (
            [
                {
                    "name": "c",
                    "kind": "conv",
                    "channels_in": 2,
                    "channels_out": 2,
                    "kernel": [3, 3],
                },
                {"name": "d", "kind": "conv", "channels_in": 2, "channels_out": 2, "kernel": [3]},
            ],
            "request.layers[1].kernel",
        ),
        (
            [
                {
                    "name": "c",
                    "kind": "conv",
                    "channels_in": 2,
                    "channels_out": 2,
                    "kernel": [3, 3],
                    "branch": "b",
                },
                {
                    "name": "d",
                    "kind": "conv",
                    "channels_in": 2,
                    "channels_out": 2,
                    "kernel": [3, 3],
                    "stride": [2, 2],
                    "branch": "b",
                },
            ],
            "request.layers[1]",
        ),
    ],
)
def test_unsupported_structure_names_the_field(layers: list[dict[str, Any]], field: str) -> None:
    assert _fields({"request": {"seed": 1, "layers": layers}}) == [field]


def test_structure_errors_in_blocks_point_at_the_block() -> None:
    layers = [
        {"name": "tok", "kind": "embedding", "vocab": 10, "dim": 8},
        {"name": "enc", "kind": "transformer_block", "dim": 8, "heads": 2, "mlp_dim": 16},
        {"name": "rnn", "kind": "recurrent", "cell": "lstm", "n_in": 8, "hidden": 8},
    ]
    assert _fields({"request": {"seed": 1, "layers": layers}}) == ["request.layers[2].kind"]


def test_bad_bodies_name_the_field() -> None:
    good = {"seed": 1, "layers": [_dense("a", 4, 4)]}
    assert _fields({"alternatives": []}) == ["request"]
    assert _fields({"request": good, "batch": True}) == ["batch"]
    assert _fields({"request": good, "extra": 1}) == ["extra"]
    assert _fields({"request": {"seed": 1, "layers": []}}) == ["request.layers"]
    assert _fields(
        {
            "request": good,
            "alternatives": [
                {"label": "x", "init": {"method": "he"}},
                {"label": "x", "init": {"method": "he"}},
            ],
        }
    ) == ["alternatives[1].label"]
    assert _fields(
        {"request": good, "alternatives": [{"label": "recommended", "init": {"method": "he"}}]}
    ) == ["alternatives[0].label"]
    assert _fields(
        {"request": good, "alternatives": [{"label": "z", "init": {"method": "constant"}}]}
    ) == ["alternatives[0].init.value"]
    assert _fields(
        {
            "request": {"seed": 1, "layers": [_dense("a", 4, 5)]},
            "alternatives": [{"label": "z", "init": {"method": "identity"}}],
        }
    ) == ["alternatives[0].init"]
    with pytest.raises(RequestRejected) as caught:
        diagnose([1, 2])
    assert caught.value.problems[0].field == "(body)"


def test_limits_refuse_before_running_with_the_numbers() -> None:
    body = {
        "request": {"seed": 1, "layers": [_dense("a", 256, 256), _dense("b", 256, 256)]},
        "alternatives": [{"label": "g", "init": {"method": "glorot"}}],
        "batch": 128,
    }
    for limits, field, number in [
        (DiagnosticLimits(max_batch=100), "batch", "100"),
        (DiagnosticLimits(max_alternatives=1, max_batch=128), None, None),
        (DiagnosticLimits(max_multiply_adds=10**6), "batch", str(10**6)),
        (DiagnosticLimits(max_generated_values=200_000), "alternatives", "200000"),
        (DiagnosticLimits(max_memory_bytes=100_000), "batch", "100000"),
    ]:
        if field is None:
            diagnose(body, diagnostic_limits=limits)  # exactly at the alternatives limit
            continue
        with pytest.raises(RequestRejected) as caught:
            diagnose(body, diagnostic_limits=limits)
        assert caught.value.too_large
        problem = caught.value.problems[0]
        assert problem.field == field and number in problem.message
    with pytest.raises(RequestRejected) as caught:
        diagnose(
            dict(
                body, alternatives=[{"label": f"a{i}", "init": {"method": "he"}} for i in range(9)]
            )
        )
    assert caught.value.too_large and caught.value.problems[0].field == "alternatives"
    with pytest.raises(ValueError, match="max_batch"):
        DiagnosticLimits(max_batch=0)


# --- chart ----------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def small_document() -> dict[str, Any]:
    layers = [_dense(f"h{i}", 32, 32, activation="relu") for i in range(8)]
    body = {
        "request": {"seed": 7, "layers": layers},
        "alternatives": [
            {"label": "tiny (0.01)", "init": {"method": "symmetric_uniform", "bound": 0.01}},
            {"label": "flat", "init": {"method": "constant", "value": 0.0}},
        ],
        "batch": 16,
    }
    return diagnosis_document(diagnose(body))


def test_chart_is_self_contained_deterministic_svg(small_document: dict[str, Any]) -> None:
    svg = chart_svg(small_document)
    assert svg == chart_svg(small_document)
    root = ET.fromstring(svg)
    assert root.tag == "{http://www.w3.org/2000/svg}svg"
    texts = "".join(root.itertext())
    for label in ("recommended", "tiny (0.01)", "flat", "vanishing", "symmetric"):
        assert label in texts
    lowered = svg.lower()
    assert "<script" not in lowered and "href" not in lowered and "@import" not in lowered
    assert lowered.count("http") == 1  # the SVG namespace only
    lines = root.findall("{http://www.w3.org/2000/svg}polyline")
    assert len(lines) == 2 * 3  # two panels, three runs


def test_chart_html_embeds_the_svg_and_the_verdicts(small_document: dict[str, Any]) -> None:
    page = chart_html(small_document)
    assert page.startswith("<!DOCTYPE html>") and chart_svg(small_document) in page
    assert "<script" not in page.lower() and "vanishing" in page and "not a promise" in page


def test_mean_field_groups_are_capped_with_a_note() -> None:
    layers = [
        _dense(
            f"h{i}",
            16,
            16,
            activation="tanh",
            bias_init={"method": "constant", "value": 0.01 * (i + 1)},
        )
        for i in range(10)
    ]
    run = diagnosis_document(diagnose({"request": {"seed": 1, "layers": layers}, "batch": 4}))[
        "runs"
    ][0]
    assert len(run["mean_field"]) == 8
    assert [e["sigma_b2"] for e in run["mean_field"]] == pytest.approx(
        [(0.01 * (i + 1)) ** 2 for i in range(8)]
    )
    (note,) = run["mean_field_notes"]
    assert "2 more group(s) covering 2 layer(s)" in note
