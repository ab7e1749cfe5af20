"""Optional data-aware calibration: layer-sequential unit-variance rescaling (LSUV; Mishkin &
Matas 2016, "All you need is a good init", Algorithm 1) on a batch the caller passes.

After the module holds the served weights, each dense and conv layer is visited in signal order
(the description's request order); while the variance of its output on the batch is further
than `tolerance` from `target` (at most `max_rounds` forward passes), its weight is scaled by
sqrt(target / variance). Only the weight is scaled (as in the paper); biases stay.

Reproducibility: each layer's weight ends as round(served * factor) with one float64 factor per
layer, computed from float64 statistics, so the factors (recorded in the description with the
batch's SHA-256 and the tolerance) reproduce the bytes without the batch
(`apply_calibration`). The factors themselves depend on the batch and on torch's CPU kernels: the
same batch on the same torch build gives the same bytes; a different batch gives different
weights, and the values are no longer the service's.
"""

from __future__ import annotations

import hashlib
import math
from collections.abc import Mapping
from typing import TYPE_CHECKING, Any

import torch
from torch import nn

from seedbed_client.errors import Problem, SpecInvalid

if TYPE_CHECKING:
    from seedbed_client.torch_adapter.description import ModuleDescription

CALIBRATED_KINDS = ("dense", "conv")


def batch_sha256(batch: Any) -> str:
    """SHA-256 over each input's dtype, shape and raw C-order bytes, in order."""
    digest = hashlib.sha256()
    for t in batch if isinstance(batch, tuple) else (batch,):
        t = torch.as_tensor(t).detach().contiguous()
        digest.update(f"{t.dtype}|{tuple(t.shape)}|".encode())
        flat = t.reshape(-1)
        if flat.numel():
            digest.update(bytes(flat.view(torch.uint8).numpy()))
    return digest.hexdigest()


def scaled_weight(values: torch.Tensor, factor: float) -> torch.Tensor:
    """values * factor computed in float64 and rounded once to the values' dtype."""
    return (values.to(torch.float64) * factor).to(values.dtype)


def _weights(module: nn.Module, description: ModuleDescription) -> dict[str, tuple[str, str]]:
    """layer name -> (its weight parameter, the module that computes its output)."""
    out = {}
    sources = {c.parameter: c.sources for c in description.copies}
    kinds = {layer["name"]: layer["kind"] for layer in description.request["layers"]}
    for param, srcs in sources.items():
        if len(srcs) != 1 or not srcs[0].endswith(".weight"):
            continue
        layer = srcs[0][: -len(".weight")]
        if kinds.get(layer) in CALIBRATED_KINDS:
            out[layer] = (param, param[: -len(".weight")] if "." in param else "")
    return out


def calibrate_module(
    module: nn.Module,
    description: ModuleDescription,
    batch: Any,
    *,
    target: float = 1.0,
    tolerance: float = 0.05,
    max_rounds: int = 10,
) -> dict[str, Any]:
    """Rescale the module's dense and conv weights in place until each layer's output variance
    on `batch` (a tensor, or a tuple of positional inputs) is within `tolerance` of `target`.
    Records and returns {"method", "batch_sha256", "target", "tolerance", "factors",
    "variances", "rounds"} in `description.calibration`."""
    if not (target > 0 and tolerance > 0 and max_rounds >= 1):
        raise SpecInvalid(
            [Problem("calibration", "invalid_value", "target and tolerance must be positive, "
                     "max_rounds at least 1")]
        )  # fmt: skip
    inputs = batch if isinstance(batch, tuple) else (batch,)
    params = dict(module.named_parameters())
    modules = dict(module.named_modules())
    order = [f.layer for f in description.facts]
    weights = _weights(module, description)
    factors: dict[str, float] = {}
    variances: dict[str, float] = {}
    rounds: dict[str, int] = {}
    was_training = module.training
    module.eval()
    try:
        for layer in order:
            if layer not in weights:
                continue
            param_name, owner = weights[layer]
            weight = params[param_name]
            served = weight.detach().clone()
            seen: list[torch.Tensor] = []
            handle = modules[owner].register_forward_hook(
                lambda _m, _a, out, seen=seen: seen.append(out.detach())
            )
            factor = 1.0
            try:
                for k in range(max_rounds + 1):
                    seen.clear()
                    with torch.no_grad():
                        module(*inputs)
                    if not seen:
                        raise SpecInvalid(
                            [Problem(owner, "not_allowed", f"layer {layer!r} is not called by "
                                     "forward on this batch; it cannot be calibrated")]
                        )  # fmt: skip
                    out = torch.cat([o.reshape(-1) for o in seen]).to(torch.float64)
                    var = float(out.var(unbiased=False))
                    variances[layer], rounds[layer] = var, k
                    if abs(var - target) < tolerance or k == max_rounds or var == 0.0:
                        break
                    factor *= math.sqrt(target / var)
                    with torch.no_grad():
                        weight.copy_(scaled_weight(served, factor))
            finally:
                handle.remove()
            factors[param_name] = factor
    finally:
        module.train(was_training)
    record = {
        "method": "lsuv",
        "batch_sha256": batch_sha256(batch),
        "target": target,
        "tolerance": tolerance,
        "factors": factors,
        "variances": variances,
        "rounds": rounds,
    }
    description.calibration = record
    return record


def apply_calibration(module: nn.Module, record: Mapping[str, Any]) -> None:
    """Apply recorded factors to a module holding the served weights (no batch needed): the
    same bytes as the calibration that recorded them."""
    params = dict(module.named_parameters())
    unknown = [p for p in record["factors"] if p not in params]
    if unknown:
        raise SpecInvalid(
            [Problem(p, "unknown_parameter", "the module has no such parameter") for p in unknown]
        )
    with torch.no_grad():
        for name, factor in record["factors"].items():
            params[name].copy_(scaled_weight(params[name].detach().clone(), float(factor)))
