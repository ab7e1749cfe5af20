"""Initializer arrays from a plan: each seeded tensor laid out the way the graph stores it.

The values come from the same keyed streams as POST /v1/weights for the inferred request
(layout out_in, so every seedbed tensor is in its logical, output-axis-first order); a binding
only rearranges them (`Binding.conversion`, documented in seedbed.onnx_import.translation). A
fused initializer (a recurrent node's directions, the two halves of its bias) is the
concatenation of its parts, each byte-identical to the unfused seedbed tensor.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator

import numpy as np

from seedbed.core.plan_types import Plan
from seedbed.core.render import render_rows, to_little_endian_bytes
from seedbed.onnx_import.translation import Binding
from seedbed_client.framework_layouts import (
    FRAMEWORK_GATE_ORDERS,
    SEEDBED_GATE_ORDERS,
    regate,
    transposed_conv_to_in_first,
    two_bias_split,
)
from seedbed_client.generator import round_to_dtype

_CELL_OF_GATES: dict[tuple[str, ...], str] = {
    gates: cell for cell, gates in FRAMEWORK_GATE_ORDERS["onnx"].items()
}


def binding_array(
    plan: Plan, binding: Binding, source: Callable[[str], np.ndarray] | None = None
) -> np.ndarray:
    """The initializer's values, in the plan's dtype, shaped as the graph declares them."""
    get = source if source is not None else (lambda name: render_rows(plan, plan.tensor(name)))
    shape = binding.shape
    conversion = binding.conversion
    if conversion == "constant":
        assert binding.value is not None
        return round_to_dtype(np.full(shape, binding.value, dtype=np.float64), plan.dtype)
    if conversion == "same":
        return get(binding.sources[0]).reshape(shape)
    if conversion == "transposed":
        return np.ascontiguousarray(get(binding.sources[0]).T).reshape(shape)
    if conversion == "transposed_conv":
        return transposed_conv_to_in_first(get(binding.sources[0]), binding.groups).reshape(shape)
    cell = _CELL_OF_GATES[binding.gates]
    ours = SEEDBED_GATE_ORDERS[cell]
    parts = [regate(get(name), ours, binding.gates) for name in binding.sources]
    if conversion == "recurrent_weights":
        return np.stack(parts).reshape(shape)
    if conversion == "recurrent_bias":
        # The graph adds an input bias and a recurrence bias; seedbed plans one bias per gate
        # unit (the LSTM forget gate's 1 among them), so it goes in the input half whole and
        # the recurrence half is zero: their sum is the planned bias.
        return np.stack([np.concatenate(two_bias_split(p)) for p in parts]).reshape(shape)
    raise ValueError(f"unknown conversion {conversion!r}")


def binding_bytes(plan: Plan, binding: Binding) -> Iterator[bytes]:
    yield to_little_endian_bytes(binding_array(plan, binding), plan.dtype)
