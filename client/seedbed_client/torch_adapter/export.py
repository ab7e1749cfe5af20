"""A weights file keyed by the module's own state names, so that the framework's strict state
loading accepts it, built from the same keyed streams as the module fill.

The file is safetensors (a JSON header of names, dtypes, shapes and offsets, then raw
little-endian bytes); its header is computed from the shapes first, then each tensor is made
and written on its own, so at most one tensor's values are held at a time besides the served
arrays. Every state entry is written: parameters from the served arrays (fused tensors as the
concatenation of their independently keyed parts, transposed-conv kernels rearranged), tied
aliases with the values of the parameter they share, buffers (running statistics, counters) as
the module holds them now.
"""

from __future__ import annotations

import json
import os
import struct
from collections.abc import Mapping
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import torch
from torch import nn

from seedbed_client import framework_layouts as fl
from seedbed_client.errors import Problem, SpecInvalid
from seedbed_client.torch_adapter.modules import ParameterCopy

if TYPE_CHECKING:
    from seedbed_client.torch_adapter.description import ModuleDescription

# safetensors dtype codes (the format's documentation).
_CODES: Mapping[torch.dtype, str] = {
    torch.float64: "F64",
    torch.float32: "F32",
    torch.float16: "F16",
    torch.bfloat16: "BF16",
    torch.int64: "I64",
    torch.int32: "I32",
    torch.int16: "I16",
    torch.int8: "I8",
    torch.uint8: "U8",
    torch.bool: "BOOL",
}


def parameter_values(item: ParameterCopy, arrays: Mapping[str, np.ndarray]) -> np.ndarray:
    """One parameter's values in torch's layout, from the served arrays."""
    fused = fl.FusedTensor(item.parameter, item.sources, axis=0)
    return item.convert(fused.assemble(arrays))


def _to_torch(values: np.ndarray, dtype: torch.dtype) -> torch.Tensor:
    if dtype == torch.bfloat16:
        return torch.from_numpy(np.ascontiguousarray(values).view(np.int16)).view(torch.bfloat16)
    return torch.from_numpy(np.ascontiguousarray(values))


def _raw(t: torch.Tensor) -> bytes:
    flat = t.detach().contiguous().reshape(-1)
    return bytes(flat.view(torch.uint8).numpy()) if flat.numel() else b""


def write_state_file(
    module: nn.Module,
    description: ModuleDescription,
    arrays: Mapping[str, np.ndarray],
    path: str | os.PathLike[str],
) -> list[str]:
    """Write `path` (safetensors) with exactly the keys and shapes of `module.state_dict()`;
    returns the keys. Calibration factors recorded in the description are applied, so the file
    equals the module after `seed_module` and `calibrate_module`."""
    from seedbed_client.torch_adapter.calibrate import scaled_weight

    state = module.state_dict(keep_vars=True)
    params = dict(module.named_parameters(remove_duplicate=False))
    copy_of = {c.parameter: c for c in description.copies}
    alias_of = {a: planned for planned, aliases in description.ties.items() for a in aliases}
    factors = (description.calibration or {}).get("factors", {})
    padding = {
        (f"{q}.weight" if q else "weight"): m.padding_idx
        for q, m in module.named_modules()
        if isinstance(m, nn.Embedding) and m.padding_idx is not None
    }
    problems = []
    for key in state:
        source = alias_of.get(key, key)
        if key in params and source not in copy_of and key not in description.skipped:
            problems.append(Problem(key, "not_allowed", "no served tensor fills this parameter"))
    if problems:
        raise SpecInvalid(problems)

    def value(key: str) -> torch.Tensor:
        target = state[key]
        source = alias_of.get(key, key)
        item = copy_of.get(source)
        if item is None:  # a buffer, or a parameter the caller allowed to stay as it is
            return target.detach()
        if item.zero:
            return torch.zeros_like(target)
        values = _to_torch(parameter_values(item, arrays), target.dtype)
        if source in factors:
            values = scaled_weight(values, factors[source])
        if source in padding:
            values = values.clone()
            values[padding[source]] = 0
        if tuple(values.shape) != tuple(target.shape):
            raise SpecInvalid(
                [
                    Problem(
                        key,
                        "invalid_value",
                        f"served shape {tuple(values.shape)} does not fit {tuple(target.shape)}",
                    )
                ]
            )
        return values

    header: dict[str, object] = {}
    offset = 0
    for key, t in state.items():
        if t.dtype not in _CODES:
            raise SpecInvalid([Problem(key, "not_allowed", f"dtype {t.dtype} has no file code")])
        size = t.numel() * t.element_size()
        header[key] = {
            "dtype": _CODES[t.dtype],
            "shape": list(t.shape),
            "data_offsets": [offset, offset + size],
        }
        offset += size
    meta = {"seedbed_request": json.dumps(description.request, sort_keys=True)}
    if description.calibration is not None:
        meta["seedbed_calibration"] = json.dumps(description.calibration, sort_keys=True)
    header["__metadata__"] = meta
    text = json.dumps(header, separators=(",", ":")).encode()
    text += b" " * (-len(text) % 8)
    target = Path(path)
    partial = target.with_name(target.name + ".partial")
    with open(partial, "wb") as fh:
        fh.write(struct.pack("<Q", len(text)))
        fh.write(text)
        for key in state:
            fh.write(_raw(value(key)))
    partial.replace(target)
    return list(state)
