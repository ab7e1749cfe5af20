"""Import of ONNX model files: read the graph (never execute it), infer the seedbed request
it stands for, and lay the seeded tensors out as the graph's own initializers.

    loading      bytes -> a checked ModelProto and its nodes in dependency order
    translation  graph -> seedbed request + one binding per initializer (what fills it)
    assembly     plan + bindings -> initializer arrays in the graph's layouts
    rewrite      the same model with its initializers replaced by the seeded values

Depends on seedbed.core and the `onnx` package only; the web layer imports this, never the
reverse. Layout conversions shared with the client's framework bridges live in
seedbed_client.framework_layouts.
"""

from seedbed.onnx_import.refusals import ModelRefused

__all__ = ["ModelRefused"]
