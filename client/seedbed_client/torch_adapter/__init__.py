"""PyTorch bridge (extra "torch"): read a module as a seedbed request, fetch the weights, fill the
module in place or write a file with the module's own state names.

    from seedbed_client import Client
    from seedbed_client.torch_adapter import describe_module, seed_module

    model = build_my_model()
    print(describe_module(model, seed="sonar/run-12").table())   # what was inferred, from where
    with Client() as client:
        report = seed_module(model, client, seed="sonar/run-12",
                             depth_policy={"name": "scaled_residual"})

Modules: `graph` (reading the data flow: torch.fx, else forward hooks, else module order),
`modules` (torch classes -> seedbed layers and parameter copies), `describe` (the request and
the inference table), `overrides` (strict override keys), `export` (a safetensors file keyed by
the module's state names), `calibrate` (optional data-aware rescaling, LSUV).
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np
import torch
from torch import nn

from seedbed_client.client import Client
from seedbed_client.errors import Problem, ServiceError, SpecInvalid
from seedbed_client.torch_adapter.calibrate import apply_calibration, calibrate_module
from seedbed_client.torch_adapter.describe import describe_module
from seedbed_client.torch_adapter.description import LayerFacts, ModuleDescription
from seedbed_client.torch_adapter.export import parameter_values, write_state_file
from seedbed_client.torch_adapter.modules import ParameterCopy

__all__ = [
    "LayerFacts",
    "ModuleDescription",
    "ParameterCopy",
    "apply_calibration",
    "apply_weights",
    "calibrate_module",
    "describe_module",
    "fetch_for",
    "parameter_values",
    "seed_module",
    "write_state_file",
]


def as_torch(values: np.ndarray, dtype: torch.dtype) -> torch.Tensor:
    if dtype == torch.bfloat16:  # numpy has no bfloat16 torch understands: go through the bits
        bits = np.ascontiguousarray(values).view(np.int16)
        return torch.from_numpy(bits).view(torch.bfloat16)
    return torch.from_numpy(np.ascontiguousarray(values))


def apply_weights(
    module: nn.Module, description: ModuleDescription, arrays: Mapping[str, np.ndarray]
) -> None:
    """Copy served arrays into the module's parameters in place, one tensor at a time."""
    params = dict(module.named_parameters())
    with torch.no_grad():
        for item in description.copies:
            target = params[item.parameter]
            if item.zero:
                target.zero_()
                continue
            values = as_torch(parameter_values(item, arrays), target.dtype)
            if tuple(values.shape) != tuple(target.shape):
                raise SpecInvalid(
                    [
                        Problem(
                            item.parameter,
                            "invalid_value",
                            f"served shape {tuple(values.shape)} does not fit the parameter's "
                            f"{tuple(target.shape)}",
                        )
                    ]
                )
            target.copy_(values)
        for sub in module.modules():
            if isinstance(sub, nn.Embedding) and sub.padding_idx is not None:
                sub.weight[sub.padding_idx].zero_()


def fetch_for(
    client: Client, description: ModuleDescription, format: str
) -> Mapping[str, np.ndarray]:
    """The served arrays for a description; service errors about `layers[i]` also name the
    module (a note on the exception), and the plan's multipliers land in the description."""
    try:
        arrays = client.weights(description.request, format=format)
    except ServiceError as exc:
        modules = description.layer_modules()
        where = [
            f"layers[{i}] is module {m or '(root)'} (layer {f.layer})"
            for i, (m, f) in enumerate(zip(modules, description.facts, strict=True))
            if f"layers[{i}]" in str(exc)
        ]
        for line in where:
            exc.add_note(line)
        raise
    manifest = getattr(arrays, "manifest", {}) or {}
    description.multipliers = list(manifest.get("multipliers") or [])
    used = {s for c in description.copies for s in c.sources}
    description.unused_tensors = sorted(set(arrays) - used)
    if description.unused_tensors:
        description.notes.append(
            "served tensors with no parameter in the module (a policy's gates, multipliers or "
            "offsets; the model must implement them): " + ", ".join(description.unused_tensors)
        )
    return arrays


def seed_module(
    module: nn.Module,
    client: Client,
    *,
    seed: int | str,
    format: str = "safetensors",
    **options: Any,
) -> ModuleDescription:
    """Describe `module`, fetch its weights (verified), and copy them in place.

    `options` go to `describe_module` (activations, roles, branches, layer_options,
    depth_policy, example_input, graph, allow_defaults, root_name, allow_untouched). Returns
    the description; `.table()` shows what was inferred and from where, `.multipliers` what a
    depth or width policy asks the training script to apply.
    """
    description = describe_module(module, seed=seed, **options)
    arrays = fetch_for(client, description, format)
    apply_weights(module, description, arrays)
    return description
