"""Facts of the wire format that the service and the client must agree on.

Standard library only, so the client package can import it anywhere and the service imports
it too: the service's request models, limits and error vocabulary take their values from here
(or are checked against it by tests/unit/client/test_wire_facts.py where a type checker needs
a literal type), so a local check in the client is the service's check, not a copy of it.

Nothing here decides anything: the request format itself is documented in docs/service.md and
enforced by seedbed.core.request.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from types import MappingProxyType
from typing import Final

# --- sizes and default limits -----------------------------------------------------------------

# Cap on any single size field (n_in, channels_out, kernel entries, vocab, hidden ...): the
# largest dimension every framework and file format indexes with a signed 32-bit integer.
MAX_SIZE: Final = 2**31 - 1

# The service's default request limits (its operators may raise them with SEEDBED_MAX_*):
# layers after expanding block shorthands; elements per tensor (1 GiB of float32); elements per
# request (4 GiB of float32); the larger side of a QR-factorised matrix; characters per name.
DEFAULT_MAX_LAYERS: Final = 4096
DEFAULT_MAX_TENSOR_ELEMENTS: Final = 1 << 28
DEFAULT_MAX_REQUEST_ELEMENTS: Final = 1 << 30
DEFAULT_MAX_ORTHOGONAL_DIM: Final = 8192
DEFAULT_MAX_NAME_LENGTH: Final = 128

# --- vocabulary -------------------------------------------------------------------------------

DTYPES: Final = ("float32", "float64", "float16", "bfloat16")
LAYOUTS: Final = ("out_in", "in_out")
ROLES: Final = ("hidden", "output", "residual_out")
CELLS: Final = ("simple", "lstm", "gru")
WEIGHT_METHODS: Final = (
    "symmetric_uniform",
    "glorot",
    "he",
    "lecun",
    "orthogonal",
    "identity",
    "constant",
)
DISTRIBUTIONS: Final = ("uniform", "normal", "truncated_normal")
FANS: Final = ("in", "out", "mean")
LAYER_KINDS: Final = ("dense", "conv", "embedding", "recurrent", "attention", "norm")
BLOCK_KINDS: Final = ("transformer_block", "residual_conv_block")
POLICY_NAMES: Final = (
    "fixup",
    "skip_gate",
    "scaled_residual",
    "deepnorm",
    "t_fixup",
    "width_transfer",
)
FORMATS: Final = ("json", "npz", "safetensors")

# Gate blocks of a recurrent cell, in the default order (stacked along the output axis).
GATES: Final = MappingProxyType(
    {
        "simple": ("candidate",),
        "lstm": ("input", "forget", "cell", "output"),
        "gru": ("reset", "update", "candidate"),
    }
)
ATTENTION_PROJECTIONS: Final = ("query", "key", "value", "output")

# The layers one copy of a block shorthand expands into ("<block>.<copy>.<part>").
TRANSFORMER_LAYER_PARTS: Final = ("attn_norm", "attn", "mlp_norm", "mlp_in", "mlp_out")
TRANSFORMER_BRANCH_PARTS: Final = ("attn_branch", "mlp_branch")
# A residual conv block has conv1 and conv2, plus norm1 and norm2 when it has norms.
CONV_LAYER_PARTS: Final = ("conv1", "conv2", "norm1", "norm2")
CONV_BRANCH_PART: Final = "branch"

# --- errors -----------------------------------------------------------------------------------

# Codes of the problems a refused request lists (one per offending field).
PROBLEM_CODES: Final = (
    "invalid_type",
    "invalid_value",
    "missing_field",
    "unknown_field",
    "not_allowed",
    "duplicate_name",
    "too_large",
    "out_of_range",
)
# The field path used when the whole body is at fault.
BODY_FIELD: Final = "(body)"


# --- checks both sides run on the raw request, before any layer is validated -----------------


def describe_json_value(value: object) -> str:
    """Name a JSON value briefly, in JSON's terms (true, null, object ...), without huge reprs."""
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        # str() of a gigantic int is slow and may raise (Python's int-to-str digit limit).
        if value.bit_length() > 80:
            return f"an integer of about {int(value.bit_length() * 0.30103) + 1} digits"
        return f"the integer {value}"
    if isinstance(value, float):
        return f"the number {value!r}"
    if isinstance(value, str):
        shown = value if len(value) <= 40 else value[:37] + "..."
        return f"the string {shown!r}"
    if isinstance(value, list | tuple):
        return f"a list of {len(value)} items"
    if isinstance(value, dict):
        return "an object"
    return f"a value of type {type(value).__name__}"


def is_block_item(item: object) -> bool:
    """A raw layer item that names a block kind (kind may be any JSON value here)."""
    if not isinstance(item, Mapping):
        return False
    kind = item.get("kind")
    return isinstance(kind, str) and kind in BLOCK_KINDS


def raw_layer_count(item: object) -> int:
    """Basic layers a raw layer item stands for, from its numbers alone (1 for anything unclear:
    a malformed item counts as one layer here and is reported by validation afterwards)."""
    if not isinstance(item, Mapping) or not is_block_item(item):
        return 1
    repeat = item.get("repeat", 1)
    if isinstance(repeat, bool) or not isinstance(repeat, int) or repeat < 1:
        repeat = 1
    if item["kind"] == "transformer_block":
        return repeat * len(TRANSFORMER_LAYER_PARTS)
    return repeat * (2 if item.get("norm") is None else len(CONV_LAYER_PARTS))


def _number(n: object) -> str:
    """A count for a message; huge integers by their magnitude (str() of one may be refused)."""
    if isinstance(n, int) and not isinstance(n, bool) and n.bit_length() > 80:
        return f"about 10^{int(n.bit_length() * 0.30103)}"
    return describe_json_value(n).removeprefix("the integer ")


Refusal = tuple[str, str, str]  # (field, code, message) of one problem


def layer_count_refusal(layers: Sequence[object], max_layers: int) -> Refusal | None:
    """The raw `layers` list is longer than the limit (only its length is looked at)."""
    if len(layers) <= max_layers:
        return None
    return (
        "layers",
        "too_large",
        f"the request has {len(layers)} layers; the limit is {max_layers} per request",
    )


def raised_by(limit: str, prefix: str = "SEEDBED_") -> str:
    """ "; the service's setting SEEDBED_<LIMIT> raises it": the end of a limit's refusal, so that
    whoever runs the service knows which variable to raise."""
    return f"; the service's setting {prefix}{limit.upper()} raises it"


def expanded_count_refusal(layers: Sequence[object], max_layers: int) -> Refusal | None:
    """The layers expand to more than the limit once block shorthands are expanded.

    Looks only at each block's kind, repeat and norm (no expansion, no validation), so a
    repeat of 10**9 costs one multiplication.
    """
    counts = [raw_layer_count(item) for item in layers]
    total = sum(counts)
    if total <= max_layers:
        return None
    biggest = max(range(len(counts)), key=counts.__getitem__)
    item = layers[biggest]
    assert isinstance(item, Mapping)  # only blocks count more than one
    what = (
        f"; layers[{biggest}] (a {item['kind']} with repeat {_number(item.get('repeat', 1))}) "
        f"alone expands to {_number(counts[biggest])}"
        if counts[biggest] > 1
        else ""
    )
    field = f"layers[{biggest}].repeat" if counts[biggest] > max_layers else "layers"
    return (
        field,
        "too_large",
        f"the layers expand to {_number(total)} layers{what}; the limit is {max_layers} "
        "layers per request, counted after expanding block shorthands",
    )


__all__ = [
    "ATTENTION_PROJECTIONS",
    "BLOCK_KINDS",
    "BODY_FIELD",
    "CELLS",
    "CONV_BRANCH_PART",
    "CONV_LAYER_PARTS",
    "DEFAULT_MAX_LAYERS",
    "DEFAULT_MAX_NAME_LENGTH",
    "DEFAULT_MAX_ORTHOGONAL_DIM",
    "DEFAULT_MAX_REQUEST_ELEMENTS",
    "DEFAULT_MAX_TENSOR_ELEMENTS",
    "DISTRIBUTIONS",
    "DTYPES",
    "FANS",
    "FORMATS",
    "GATES",
    "LAYER_KINDS",
    "LAYOUTS",
    "MAX_SIZE",
    "POLICY_NAMES",
    "PROBLEM_CODES",
    "ROLES",
    "TRANSFORMER_BRANCH_PARTS",
    "TRANSFORMER_LAYER_PARTS",
    "WEIGHT_METHODS",
    "Refusal",
    "describe_json_value",
    "expanded_count_refusal",
    "is_block_item",
    "layer_count_refusal",
    "raised_by",
    "raw_layer_count",
]
