"""Size limits: refused from shapes alone, before any layer is validated or any value exists."""

from __future__ import annotations

from typing import Any

import pytest

from seedbed.core.request.limits import MAX_SIZE, Limits, check_layer_count
from seedbed.core.request.network import NetworkRequest
from seedbed.core.request.parse import parse
from seedbed.core.request.problems import RequestRejected


def dense(name: str, n_in: int, n_out: int, **extra: Any) -> dict[str, Any]:
    return {"name": name, "kind": "dense", "n_in": n_in, "n_out": n_out, **extra}


def rejected(body: object, limits: Limits | None = None) -> RequestRejected:
    with pytest.raises(RequestRejected) as info:
        parse(body, limits)
    return info.value


def test_ten_million_layers_are_refused_before_any_layer_is_validated(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    calls = 0

    def counting_validate(*args: Any, **kwargs: Any) -> Any:
        nonlocal calls
        calls += 1
        raise AssertionError("model validation must not run for an over-long layer list")

    monkeypatch.setattr(NetworkRequest, "model_validate", counting_validate)
    # Items that are not even objects: validating them would produce one problem each.
    body = {"seed": 1, "layers": [None] * 10_000_000}
    err = rejected(body)
    assert calls == 0
    assert len(err.problems) == 1
    (p,) = err.problems
    assert (p.field, p.code) == ("layers", "too_large")
    assert "10000000 layers" in p.message and "limit is 4096" in p.message
    assert err.too_large


def test_layer_count_boundary() -> None:
    limits = Limits(max_layers=3)
    layers = [dense(f"l{i}", 2, 2) for i in range(3)]
    parse({"seed": 1, "layers": layers}, limits)
    err = rejected({"seed": 1, "layers": [*layers, dense("l3", 2, 2)]}, limits)
    assert [(p.field, p.code) for p in err.problems] == [("layers", "too_large")]
    assert "4 layers" in err.problems[0].message and "limit is 3" in err.problems[0].message


def test_check_layer_count_ignores_what_it_cannot_measure() -> None:
    # Non-dict bodies and non-list layers are left to validation, which names them properly.
    for body in (None, [1, 2], {"layers": "x"}, {"layers": None}):
        check_layer_count(body, Limits(max_layers=1))


def test_tensor_element_limit_with_exact_numbers() -> None:
    limits = Limits(max_tensor_elements=1000)
    parse({"seed": 1, "layers": [dense("fits", 25, 40)]}, limits)  # exactly 1000
    err = rejected({"seed": 1, "layers": [dense("ok", 2, 25), dense("big", 25, 41)]}, limits)
    (p,) = err.problems
    assert (p.field, p.code) == ("layers[1]", "too_large")
    assert "'big.weight'" in p.message
    assert "1025 elements" in p.message and "[41, 25]" in p.message and "1000" in p.message
    assert err.too_large


def test_default_tensor_limit_is_checked_without_allocating() -> None:
    # 16384 x 16385 = 268,451,840 > 2**28 = 268,435,456; a float32 array would need 1 GiB.
    err = rejected({"seed": 1, "layers": [dense("wide", 16385, 16384)]})
    messages = [p.message for p in err.problems]
    assert any("268451840 elements" in m and "268435456" in m for m in messages), messages


def test_request_element_limit_sums_every_tensor() -> None:
    limits = Limits(max_request_elements=100)
    # 9*10 weight + 9 bias = 99 elements: fits; one more layer of 2x1 (+1 bias) does not.
    parse({"seed": 1, "layers": [dense("a", 10, 9)]}, limits)
    err = rejected(
        {"seed": 1, "layers": [dense("a", 10, 9), dense("b", 1, 2)], "widths": "unchecked"}, limits
    )
    (p,) = err.problems
    assert (p.field, p.code) == ("layers", "too_large")
    assert "103 elements in total" in p.message and "limit is 100" in p.message


def test_sizes_are_capped_before_any_arithmetic() -> None:
    err = rejected({"seed": 1, "layers": [dense("huge", 10**30, 10**30)]})
    assert {p.field for p in err.problems} == {"layers[0].n_in", "layers[0].n_out"}
    assert all(p.code == "too_large" and str(MAX_SIZE) in p.message for p in err.problems)
    assert err.too_large
    conv = {"name": "c", "kind": "conv", "channels_in": 1, "channels_out": 1,
            "kernel": [3, 2**40]}  # fmt: skip
    err = rejected({"seed": 1, "layers": [conv]})
    assert [(p.field, p.code) for p in err.problems] == [("layers[0].kernel[1]", "too_large")]


def test_largest_allowed_size_reaches_the_element_limit_with_its_numbers() -> None:
    body = {"seed": 1, "layers": [dense("tall", 1, MAX_SIZE, bias=False)]}
    err = rejected(body)
    tensor, total = err.problems
    assert (tensor.field, tensor.code) == ("layers[0]", "too_large")
    assert "2147483647 elements" in tensor.message and "268435456" in tensor.message
    assert (total.field, total.code) == ("layers", "too_large")
    assert "2147483647 elements in total" in total.message and "1073741824" in total.message


def test_orthogonal_override_size() -> None:
    limits = Limits(max_orthogonal_dim=64)
    parse({"seed": 1, "layers": [dense("sq", 64, 64, init={"method": "orthogonal"})]}, limits)
    conv = {"name": "k", "kind": "conv", "channels_in": 8, "channels_out": 16, "kernel": [3, 3],
            "init": {"method": "orthogonal"}}  # fmt: skip
    err = rejected({"seed": 1, "layers": [conv]}, limits)
    (p,) = err.problems
    assert (p.field, p.code) == ("layers[0].init.method", "too_large")
    # The conv weight is orthogonalised as (c_out) x (c_in/groups * prod(kernel)) = 16 x 72.
    assert "16 x 72 matrix" in p.message and "at most 64" in p.message


def test_recurrent_hidden_is_limited_by_qr_size_unless_overridden() -> None:
    limits = Limits(max_orthogonal_dim=32)
    cell = {"name": "r", "kind": "recurrent", "cell": "lstm", "n_in": 4, "hidden": 33}
    err = rejected({"seed": 1, "layers": [cell]}, limits)
    (p,) = err.problems
    assert (p.field, p.code) == ("layers[0].hidden", "too_large")
    assert "hidden = 33" in p.message and "33 x 33" in p.message and "at most 32" in p.message
    # A non-orthogonal override needs no QR; an orthogonal one is checked per gate block.
    parse({"seed": 1, "layers": [{**cell, "init": {"method": "glorot"}}]}, limits)
    err = rejected({"seed": 1, "layers": [{**cell, "init": {"method": "orthogonal"}}]}, limits)
    assert {p.field for p in err.problems} == {"layers[0].init.method"}
    assert any("33 x 33 matrix" in p.message for p in err.problems)


def test_too_large_is_only_set_when_every_problem_is_about_size() -> None:
    err = rejected({"seed": True, "layers": [dense("x", 10**30, 2)]})
    assert {p.code for p in err.problems} == {"invalid_type", "too_large"}
    assert not err.too_large


@pytest.mark.parametrize("field", ["max_layers", "max_tensor_elements", "max_request_elements",
                                   "max_orthogonal_dim", "max_name_length"])  # fmt: skip
@pytest.mark.parametrize("bad", [0, -1, True, 2.5, "10"])
def test_limits_refuse_bad_settings(field: str, bad: object) -> None:
    with pytest.raises(ValueError, match=f"Limits.{field} must be a positive integer"):
        Limits(**{field: bad})  # type: ignore[arg-type]
