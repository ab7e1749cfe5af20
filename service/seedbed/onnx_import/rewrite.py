"""The uploaded model with its filled initializers replaced by the seeded values.

Everything else (nodes, attributes, names, kept initializers, metadata) is left as it was sent.
A filled initializer that lived in an external data file is written inline, so the result needs
no side files unless the caller kept an external initializer. Two properties are added to the
model's metadata: the algorithm version and the seed, so the file says where its values came
from.
"""

from __future__ import annotations

from collections.abc import Sequence

import onnx

from seedbed.core.plan_types import Plan
from seedbed.core.render import to_little_endian_bytes
from seedbed.onnx_import.assembly import binding_array
from seedbed.onnx_import.refusals import ModelRefused
from seedbed.onnx_import.translation import Binding

# A protobuf message cannot be serialised at 2 GiB or more.
PROTOBUF_LIMIT = (2 << 30) - 1
ALGORITHM_KEY = "seedbed.algorithm"
SEED_KEY = "seedbed.seed"


def seeded_model(model: onnx.ModelProto, plan: Plan, bindings: Sequence[Binding]) -> bytes:
    filled = {b.initializer: b for b in bindings}
    size = model.ByteSize() + sum(plan.tensor(s).nbytes for b in bindings for s in b.sources)
    if size > PROTOBUF_LIMIT:
        raise ModelRefused(
            "model_too_large",
            f"the seeded model would be about {size} bytes; "
            "an ONNX file holds less than 2 GiB inline: ask for the weights "
            "instead (POST /v1/onnx/weights)",
            status=413,
        )
    out = onnx.ModelProto()
    out.CopyFrom(model)
    for init in out.graph.initializer:
        binding = filled.get(init.name)
        if binding is None:
            continue
        values = binding_array(plan, binding)
        init.ClearField("float_data")
        init.ClearField("double_data")
        init.ClearField("int32_data")
        init.ClearField("external_data")
        init.data_location = onnx.TensorProto.DEFAULT
        init.raw_data = to_little_endian_bytes(values, plan.dtype)
    props = [p for p in out.metadata_props if p.key not in (ALGORITHM_KEY, SEED_KEY)]
    del out.metadata_props[:]
    for key, value in (
        (ALGORITHM_KEY, plan.algorithm),
        (SEED_KEY, str(plan.seed)),
        *((p.key, p.value) for p in props),
    ):
        out.metadata_props.add(key=key, value=value)
    return bytes(out.SerializeToString())
