"""The data a plan is made of: what every layer of the system passes around.

A `TensorPlan` says everything about one tensor except its values: where it sits, how it is
laid out, which method and scale were chosen and why, and the recipe the generator follows to
produce the values. A `Plan` is the ordered list for one request plus request-wide warnings.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Literal

from seedbed_client.generator.materialize import TensorRecipe

Reproducibility = Literal["exact", "platform"]

# How the generator produces values; `TensorPlan.sampler` is one of these.
#   uniform            scale * U[-1, 1)                      (bound = scale)
#   normal             scale * N(0, 1)                       (std = scale)
#   truncated_normal   scale * N(0, 1) truncated to [-2, 2]  (std = scale * truncation factor)
#   orthogonal         gain * Haar-orthogonal blocks (one per gate block along the output axis)
#   identity           gain * identity / Dirac delta (per gate block for recurrent weights)
#   constant           every element equals `value`
SamplerKind = Literal["uniform", "normal", "truncated_normal", "orthogonal", "identity", "constant"]


@dataclass(frozen=True)
class TensorPlan:
    tensor: str  # "<layer>.weight", "<layer>.query.weight", ...
    layer: str
    layer_kind: str  # dense | conv | embedding | recurrent | attention | norm
    part: str  # weight | bias | input_weight | recurrent_weight | query.weight | scale | ...
    shape: tuple[int, ...]  # as served (after `layout`)
    logical_shape: tuple[int, ...]  # generation order: output axis first (the out_in layout)
    served_axes: tuple[int, ...]  # served array = logical array.transpose(served_axes)
    dtype: str  # float32 | float64 | float16 | bfloat16
    method: str  # symmetric_uniform | glorot | he | lecun | orthogonal | identity | constant | ...
    distribution: str | None  # uniform | normal | truncated_normal; None when not random
    sampler: SamplerKind
    scale: float  # see SamplerKind; for orthogonal/identity the gain; for constant the value
    fan_in: int | float | None  # a float only when a stride makes the count an average
    fan_out: int | float | None
    gain: float | None
    std: float | None  # of the distribution as realised (after truncation)
    bound: float | None  # uniform and truncated only
    value: float | None  # constant only
    gate_blocks: int = 1  # recurrent weights: gates stacked along the logical output axis
    # constant sampler with one value per gate block (an LSTM bias whose forget block is 1)
    block_values: tuple[float, ...] | None = None
    reproducible: Reproducibility = "exact"
    rationale: str = ""
    references: tuple[str, ...] = ()
    warnings: tuple[str, ...] = ()

    @property
    def count(self) -> int:
        n = 1
        for d in self.shape:
            n *= d
        return n

    @property
    def itemsize(self) -> int:
        return {"float64": 8, "float32": 4, "float16": 2, "bfloat16": 2}[self.dtype]

    @property
    def nbytes(self) -> int:
        return self.count * self.itemsize

    def recipe(self, seed: int | str) -> TensorRecipe:
        """What the shared generator needs to produce this tensor's values."""
        return TensorRecipe(
            seed=seed,
            tensor=self.tensor,
            sampler=self.sampler,
            scale=self.scale,
            dtype=self.dtype,
            logical_shape=self.logical_shape,
            served_axes=self.served_axes,
            gate_blocks=self.gate_blocks,
            block_values=self.block_values,
        )

    def manifest(self) -> dict[str, Any]:
        """The JSON-ready entry shared by the plan response and every weights manifest."""
        return {
            "tensor": self.tensor,
            "layer": self.layer,
            "shape": list(self.shape),
            "dtype": self.dtype,
            "method": self.method,
            "distribution": self.distribution,
            "fan_in": self.fan_in,
            "fan_out": self.fan_out,
            "gain": self.gain,
            "std": self.std,
            "bound": self.bound,
            "value": self.value,
            "block_values": None if self.block_values is None else list(self.block_values),
            "reproducible": self.reproducible,
            "rationale": self.rationale,
            "references": list(self.references),
            "warnings": list(self.warnings),
        }


@dataclass(frozen=True)
class Plan:
    algorithm: str
    seed: int | str
    dtype: str
    layout: str
    tensors: tuple[TensorPlan, ...]
    warnings: tuple[str, ...] = ()
    # The request in canonical form (sorted keys, defaults filled): the basis of ETags.
    canonical_request: dict[str, Any] = field(default_factory=dict)
    # Set by a request's depth_policy (seedbed.core.policies): what the training script must
    # apply besides the weights (residual alpha, learning-rate scalings ...), JSON-ready, and
    # the policy's resolved parameters with rationale and references.
    multipliers: tuple[dict[str, Any], ...] = ()
    policy: dict[str, Any] | None = None

    def tensor(self, name: str) -> TensorPlan:
        for t in self.tensors:
            if t.tensor == name:
                return t
        raise KeyError(name)

    @property
    def total_count(self) -> int:
        return sum(t.count for t in self.tensors)
