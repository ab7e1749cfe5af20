"""Reading a Flax parameter tree (paths and shapes) and a jaxpr of the model's apply.

The tree gives the layers: a mapping holding `kernel` (and maybe `bias`) is a dense layer when
the kernel is 2-D (stored (in, out)) and a conv when it has more axes (stored (*k, in/groups,
out), HWIO for two spatial axes); a mapping holding `embedding` (vocab, dim) is an embedding;
one holding only 1-D `scale`/`bias` is a norm's affine part; a mapping whose children are the
eight gate maps of an LSTM cell (ii, if, ig, io without bias, hi, hf, hg, ho with bias) is one
recurrent layer.

The jaxpr gives what the tree cannot: which activation follows each kernel, a conv's feature
groups and strides, residual adds and which layer produces an output. The model's parameters are
the jaxpr's first inputs, in the tree's flattening order, so each kernel is a known variable and
its first dot_general / conv_general_dilated is the layer.
"""

from __future__ import annotations

from collections.abc import Iterator, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

LSTM_CHILDREN = ("ii", "if", "ig", "io", "hi", "hf", "hg", "ho")
GATE_OF_CHILD = {"i": "input", "f": "forget", "g": "cell", "o": "output"}

# Names of jax.nn / flax.linen activations as they appear on jit / custom_jvp_call equations.
NAMED_ACTIVATIONS = {
    "relu": "relu",
    "leaky_relu": "leaky_relu",
    "elu": "elu",
    "selu": "selu",
    "silu": "silu",
    "swish": "silu",
    "softplus": "softplus",
    "gelu": "gelu",
    "hard_swish": "hard_swish",
    "hard_silu": "hard_swish",
    "hard_sigmoid": "hard_sigmoid",
    "sigmoid": "sigmoid",
    "tanh": "tanh",
    "softmax": "softmax",
}
PRIMITIVE_ACTIVATIONS = {"tanh": "tanh", "logistic": "sigmoid"}
# Primitives that move or pool values without mixing features through weights.
PASS_THROUGH = frozenset(
    {
        "reshape",
        "transpose",
        "convert_element_type",
        "copy",
        "squeeze",
        "expand_dims",
        "reduce_window_max",
        "reduce_window_sum",
        "reduce_window",
        "copy_p",
        "reduce_precision",
    }
)
MAP_PRIMITIVES = ("dot_general", "conv_general_dilated")
# Elementwise steps that are affine when their other operand is a parameter or a constant.
AFFINE = frozenset({"add", "sub", "mul", "div"})


@dataclass
class TreeLayer:
    """One seedbed layer read from the tree."""

    name: str  # the request's layer name: the tree path joined with "."
    path: tuple[str, ...]
    kind: str  # dense | conv | embedding | norm | recurrent
    fields: dict[str, Any]
    leaves: dict[str, tuple[str, ...]]  # seedbed part -> the leaf path it fills (dense, conv...)
    kernel_path: tuple[str, ...] | None = None
    bias_path: tuple[str, ...] | None = None
    activation: str | None = None
    activation_param: float | None = None
    activation_from: str = "-"
    branch: str | None = None
    branch_from: str = "-"
    role: str = "hidden"
    role_from: str = "-"
    notes: list[str] = field(default_factory=list)


def _is_leaf(value: Any) -> bool:
    return hasattr(value, "shape") and hasattr(value, "dtype")


def _walk(
    tree: Mapping[str, Any], path: tuple[str, ...]
) -> Iterator[tuple[tuple[str, ...], Mapping[str, Any]]]:
    yield path, tree
    for key, value in tree.items():
        if isinstance(value, Mapping):
            yield from _walk(value, (*path, str(key)))


def read_tree(params: Mapping[str, Any]) -> tuple[list[TreeLayer], list[tuple[str, ...]]]:
    """(layers in tree order, paths of leaves no layer claims)."""
    layers: list[TreeLayer] = []
    claimed: set[tuple[str, ...]] = set()
    inside_cell: set[tuple[str, ...]] = set()
    for path, node in _walk(params, ()):
        if any(path[: len(c)] == c for c in inside_cell):
            continue
        name = ".".join(path) or "root"
        leaves = {k: v for k, v in node.items() if _is_leaf(v)}
        if set(LSTM_CHILDREN) <= set(node) and all(
            isinstance(node[c], Mapping) for c in LSTM_CHILDREN
        ):
            ii = node["ii"]["kernel"]
            n_in, hidden = int(ii.shape[0]), int(ii.shape[1])
            layer = TreeLayer(
                name,
                path,
                "recurrent",
                {
                    "kind": "recurrent",
                    "cell": "lstm",
                    "n_in": n_in,
                    "hidden": hidden,
                    "bias": "bias" in node["hi"],
                },
                {},
            )
            layer.activation_from = "the LSTM cell"
            layers.append(layer)
            inside_cell.add(path)
            for c in LSTM_CHILDREN:
                for k in node[c]:
                    claimed.add((*path, c, k))
            continue
        if "kernel" in leaves:
            kernel = leaves["kernel"]
            bias = leaves.get("bias")
            shape = tuple(int(d) for d in kernel.shape)
            has_bias = bias is not None and tuple(bias.shape) == (shape[-1],)
            fields: dict[str, Any]
            if len(shape) == 2:
                fields = {"kind": "dense", "n_in": shape[0], "n_out": shape[1], "bias": has_bias}
            else:
                fields = {
                    "kind": "conv",
                    "channels_in": shape[-2],
                    "channels_out": shape[-1],
                    "kernel": list(shape[:-2]),
                    "bias": has_bias,
                }
            parts = {"weight": (*path, "kernel")}
            if has_bias:
                parts["bias"] = (*path, "bias")
            layer = TreeLayer(
                name,
                path,
                str(fields["kind"]),
                fields,
                parts,
                (*path, "kernel"),
                (*path, "bias") if has_bias else None,
            )
            layers.append(layer)
            claimed.update(parts.values())
        elif "embedding" in leaves and len(leaves["embedding"].shape) == 2:
            vocab, dim = (int(d) for d in leaves["embedding"].shape)
            layers.append(
                TreeLayer(
                    name,
                    path,
                    "embedding",
                    {"kind": "embedding", "vocab": vocab, "dim": dim},
                    {"weight": (*path, "embedding")},
                )
            )
            claimed.add((*path, "embedding"))
        elif "scale" in leaves and len(leaves["scale"].shape) == 1:
            dim = int(leaves["scale"].shape[0])
            parts = {"scale": (*path, "scale")}
            if "bias" in leaves and tuple(leaves["bias"].shape) == (dim,):
                parts["shift"] = (*path, "bias")
            layers.append(
                TreeLayer(
                    name,
                    path,
                    "norm",
                    {"kind": "norm", "dim": dim, "bias": "shift" in parts},
                    parts,
                )
            )
            claimed.update(parts.values())
    unclaimed = [
        p
        for p, node in _walk(params, ())
        for k, v in node.items()
        if _is_leaf(v) and (*p, str(k)) not in claimed
        for p in [(*p, str(k))]
    ]
    return layers, unclaimed


# --- the jaxpr ---------------------------------------------------------------------------------


class JaxprFacts:
    """Per kernel path: activation (with parameter and source), conv groups/strides, and the
    data flow needed for residual adds and output roles."""

    def __init__(self, jaxpr: Any, leaf_paths: list[tuple[str, ...]]) -> None:
        self.jaxpr = jaxpr
        self.eqns = list(jaxpr.eqns)
        self.var_of_path = dict(zip(leaf_paths, jaxpr.invars[: len(leaf_paths)], strict=False))
        self.param_vars = set(self.var_of_path.values())
        self.producer: dict[Any, int] = {}
        self.readers: dict[Any, list[int]] = {}
        for i, eqn in enumerate(self.eqns):
            for v in eqn.outvars:
                self.producer[v] = i
            for v in eqn.invars:
                if _is_var(v):
                    self.readers.setdefault(v, []).append(i)
        self.outputs = {v for v in jaxpr.outvars if _is_var(v)}

    def first_map(self, path: tuple[str, ...]) -> int | None:
        """The dot_general / conv equation that reads the kernel at `path`."""
        var = self.var_of_path.get(path)
        for _ in range(8):
            if var is None:
                return None
            readers = self.readers.get(var, [])
            if not readers:
                return None
            eqn = self.eqns[readers[0]]
            if eqn.primitive.name in MAP_PRIMITIVES:
                return readers[0]
            if eqn.primitive.name not in PASS_THROUGH or len(readers) != 1:
                return None
            var = eqn.outvars[0]
        return None

    def first_use(self, path: tuple[str, ...], primitive: str) -> int | None:
        """The first `primitive` equation the leaf at `path` reaches through pass-throughs and
        broadcasts (a norm's scale: the mul that applies it)."""
        var = self.var_of_path.get(path)
        for _ in range(8):
            readers = self.readers.get(var, []) if var is not None else []
            if len(readers) != 1:
                return None
            eqn = self.eqns[readers[0]]
            if eqn.primitive.name == primitive:
                return readers[0]
            if eqn.primitive.name not in (*PASS_THROUGH, "broadcast_in_dim"):
                return None
            var = eqn.outvars[0]
        return None

    def from_params_only(self, var: Any) -> bool:
        """True when `var` is computed from parameters and constants alone (a bias broadcast)."""
        stack, seen = [var], set()
        while stack:
            v = stack.pop()
            if not _is_var(v) or v in seen:
                continue
            seen.add(v)
            if v in self.param_vars:
                continue
            if v not in self.producer:
                return False  # a data input of the apply
            stack.extend(self.eqns[self.producer[v]].invars)
        return True

    def _other_is_constant(self, eqn: Any, var: Any) -> bool:
        others = [v for v in eqn.invars if v is not var]
        return len(others) == 1 and (not _is_var(others[0]) or self.from_params_only(others[0]))

    def layer_output(self, map_eqn: int) -> tuple[Any, list[int]]:
        """The value after the layer (its bias add included) and the equations it spans."""
        out = self.eqns[map_eqn].outvars[0]
        spanned = [map_eqn]
        readers = self.readers.get(out, [])
        if len(readers) == 1 and self.eqns[readers[0]].primitive.name == "add":
            other = [v for v in self.eqns[readers[0]].invars if v is not out]
            if other and self.from_params_only(other[0]):
                spanned.append(readers[0])
                out = self.eqns[readers[0]].outvars[0]
        return out, spanned

    def _tanh_gelu_end(self, var: Any) -> int | None:
        """x * 0.5 * (1 + tanh(sqrt(2/pi) (x + 0.044715 x^3))) (jax.nn.gelu's default)."""
        readers = self.readers.get(var, [])
        pows = [
            j
            for j in readers
            if self.eqns[j].primitive.name == "integer_pow" and self.eqns[j].params.get("y") == 3
        ]
        if not pows:
            return None
        v, seen_tanh = self.eqns[pows[0]].outvars[0], False
        for _ in range(8):
            nxt = self.readers.get(v, [])
            if len(nxt) != 1:
                return None
            eqn = self.eqns[nxt[0]]
            seen_tanh = seen_tanh or eqn.primitive.name == "tanh"
            if seen_tanh and eqn.primitive.name == "mul" and var in eqn.invars:
                return nxt[0]
            v = eqn.outvars[0]
        return None

    def _gelu_end(self, var: Any) -> int | None:
        """x * 0.5 * erfc(-x / sqrt 2) (jax.nn.gelu, approximate=False) read from `var`."""
        tanh_form = self._tanh_gelu_end(var)
        if tanh_form is not None:
            return tanh_form
        for j in self.readers.get(var, []):
            if self.eqns[j].primitive.name != "neg":
                continue
            chain = [j]
            v = self.eqns[j].outvars[0]
            for _ in range(3):
                nxt = self.readers.get(v, [])
                if len(nxt) != 1:
                    break
                chain.append(nxt[0])
                v = self.eqns[nxt[0]].outvars[0]
                if self.eqns[nxt[0]].primitive.name in ("erfc", "erf"):
                    last = self.readers.get(v, [])
                    return last[0] if len(last) == 1 else None
        return None

    def _softmax_end(self, var: Any) -> int | None:
        """exp(x - max x) / sum(exp(x - max x)) (jax.nn.softmax, inlined) read from `var`."""
        readers = self.readers.get(var, [])
        prims = {self.eqns[j].primitive.name: j for j in readers}
        if set(prims) != {"reduce_max", "sub"}:
            return None
        shifted = self.readers.get(self.eqns[prims["sub"]].outvars[0], [])
        if len(shifted) != 1 or self.eqns[shifted[0]].primitive.name != "exp":
            return None
        for j in self.readers.get(self.eqns[shifted[0]].outvars[0], []):
            if self.eqns[j].primitive.name == "div":
                return j
        return None

    def follow(self, var: Any) -> tuple[str, float | None, str, Any]:
        """(activation, parameter, where it was read, the value after it and pass-throughs)."""
        found: tuple[str, float | None, str] | None = None
        for _ in range(64):
            gelu = self._gelu_end(var)
            if gelu is not None and found is None:
                how = "tanh" if self._tanh_gelu_end(var) is not None else "erfc"
                found = ("gelu", None, f"the {how} GELU pattern")
                var = self.eqns[gelu].outvars[0]
                continue
            soft = self._softmax_end(var) if found is None else None
            if soft is not None:
                found = ("softmax", None, "the softmax pattern in the jaxpr")
                var = self.eqns[soft].outvars[0]
                continue
            readers = self.readers.get(var, [])
            if len(readers) != 1 or var in self.outputs:
                break
            eqn = self.eqns[readers[0]]
            prim = eqn.primitive.name
            name = _call_name(eqn) if prim in ("jit", "pjit", "custom_jvp_call") else ""
            if found is None and name in NAMED_ACTIVATIONS:
                found = (
                    NAMED_ACTIVATIONS[name],
                    _activation_param(name, eqn),
                    f"jax.nn.{name} in the jaxpr",
                )
            elif found is None and prim in PRIMITIVE_ACTIVATIONS:
                found = (PRIMITIVE_ACTIVATIONS[prim], None, f"lax.{prim} in the jaxpr")
            elif prim in AFFINE and self._other_is_constant(eqn, var):
                pass  # a stored scale, shift or statistic (BatchNorm with running averages)
            elif prim not in PASS_THROUGH:
                break
            var = eqn.outvars[0]
        if found is None:
            return "linear", None, "no activation follows (jaxpr)", var
        return (*found, var)

    def conv_settings(self, map_eqn: int) -> dict[str, Any]:
        params = self.eqns[map_eqn].params
        out: dict[str, Any] = {"groups": int(params.get("feature_group_count", 1))}
        strides = params.get("window_strides")
        if strides:
            out["stride"] = [int(s) for s in strides]
        dilation = params.get("lhs_dilation")
        if dilation and any(int(d) != 1 for d in dilation):
            out["transposed"] = True
        return out

    def upstream(self, var: Any) -> tuple[set[Any], set[int]]:
        values, eqns, stack = {var}, set(), [var]
        while stack:
            v = stack.pop()
            i = self.producer.get(v)
            if i is None or i in eqns:
                continue
            eqns.add(i)
            for w in self.eqns[i].invars:
                if _is_var(w) and w not in values:
                    values.add(w)
                    stack.append(w)
        return values, eqns

    def residual_adds(self, spanned: set[int]) -> list[tuple[int, set[int], set[int]]]:
        """(add equation, equations on the branch side, equations on the skip side) for every
        add of two data values, one computed from the other."""
        found = []
        for i, eqn in enumerate(self.eqns):
            if eqn.primitive.name != "add" or i in spanned or len(eqn.invars) != 2:
                continue
            a, b = eqn.invars
            if (
                not (_is_var(a) and _is_var(b))
                or self.from_params_only(a)
                or self.from_params_only(b)
            ):
                continue
            a_vals, a_eqns = self.upstream(a)
            b_vals, b_eqns = self.upstream(b)
            if a in b_vals:
                found.append((i, b_eqns - a_eqns, a_eqns))
            elif b in a_vals:
                found.append((i, a_eqns - b_eqns, b_eqns))
        return found


def _call_name(eqn: Any) -> str:
    """The function name a call equation carries (custom_jvp_call keeps it one level in)."""
    name = eqn.params.get("name")
    if not name:
        inner = eqn.params.get("call_jaxpr") or eqn.params.get("jaxpr")
        inner = getattr(inner, "jaxpr", inner)
        eqns = list(getattr(inner, "eqns", []))
        if len(eqns) == 1:
            name = eqns[0].params.get("name")
    return str(name or "")


def _is_var(v: Any) -> bool:
    return type(v).__name__ == "Var" or (hasattr(v, "aval") and not hasattr(v, "val"))


def _literal_values(jaxpr: Any) -> list[float]:
    out = []
    for eqn in getattr(jaxpr, "eqns", []):
        for v in eqn.invars:
            if hasattr(v, "val") and getattr(v.val, "shape", ()) == ():
                out.append(float(v.val))
    return out


def _activation_param(name: str, eqn: Any) -> float | None:
    if name == "leaky_relu":
        lits = [float(v.val) for v in eqn.invars if hasattr(v, "val")]
        return float(str(np.float32(lits[0]))) if lits else 0.01
    if name == "elu":
        # alpha arrives as a literal argument of the call, or folded into its body's mul
        lits = [float(v.val) for v in eqn.invars if hasattr(v, "val")]
        if lits:
            return float(str(np.float32(lits[0])))
        inner = eqn.params.get("jaxpr")
        inner = getattr(inner, "jaxpr", inner)
        muls = [
            float(v.val)
            for e in getattr(inner, "eqns", [])
            if e.primitive.name == "mul"
            for v in e.invars
            if hasattr(v, "val")
        ]
        return muls[0] if muls else 1.0
    return None
