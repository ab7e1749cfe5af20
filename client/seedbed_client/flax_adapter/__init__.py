"""JAX/Flax bridge (extra "jax"): fill a Flax parameter tree with seedbed's seeded values.

    import jax, jax.numpy as jnp
    from seedbed_client import Client
    from seedbed_client.flax_adapter import describe_params, seed_params

    variables = model.init(jax.random.PRNGKey(0), sample)
    description = describe_params(variables, seed="orchard/7", apply_fn=model.apply,
                                  example_input=sample)
    print(description.table())                  # what was inferred, and from where
    with Client() as client:
        variables, description = seed_params(variables, client, seed="orchard/7",
                                             apply_fn=model.apply, example_input=sample)

Layers and fans come from the tree's paths and shapes (seedbed_client.flax_adapter.reading);
activations, conv groups and strides, residual adds and the output layer from a jaxpr of
`apply_fn(variables, example_input)`. Without a jaxpr, or where it says nothing, the caller
says (`activations`, `roles`, `branches`, `layer_options`); a dense or conv layer whose
activation is neither inferred nor given raises unless `allow_defaults`. The result has the
tree's structure with jax.Array leaves; leaves no layer claims are returned unchanged when
`allow_untouched`, and refused otherwise. BatchNorm statistics (`batch_stats`) start at mean 0
and variance 1.
"""

from __future__ import annotations

import difflib
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from seedbed_client.errors import Problem, SpecInvalid
from seedbed_client.flax_adapter.reading import JaxprFacts, TreeLayer, read_tree
from seedbed_client.framework_layouts import SEEDBED_GATE_ORDERS, change_layout, split_gates

__all__ = ["TreeDescription", "describe_params", "fill_params", "seed_params"]

DTYPES = {"float32": "float32", "float64": "float64", "float16": "float16", "bfloat16": "bfloat16"}
FROM_CALLER = "caller override"
FROM_DEFAULT = "default (allowed)"


@dataclass
class TreeDescription:
    """The tree as a seedbed request, and per layer what was inferred and from where."""

    request: dict[str, Any]
    layers: list[TreeLayer]
    untouched: list[str] = field(default_factory=list)
    graph_source: str = "tree paths and shapes only"
    notes: list[str] = field(default_factory=list)

    def table(self) -> str:
        head = ("layer", "kind", "activation", "from", "branch", "from", "role", "from")
        rows = [head] + [
            (
                t.name,
                t.kind,
                _shown(t),
                t.activation_from,
                t.branch or "-",
                t.branch_from,
                t.role,
                t.role_from,
            )
            for t in self.layers
        ]
        widths = [max(len(r[i]) for r in rows) for i in range(len(head))]
        lines = [
            "  ".join(c.ljust(w) for c, w in zip(r, widths, strict=True)).rstrip() for r in rows
        ]
        lines.insert(1, "  ".join("-" * w for w in widths))
        lines.append(f"graph read from: {self.graph_source}")
        lines += [f"left untouched: {u}" for u in self.untouched]
        lines += [f"note: {n}" for n in self.notes]
        return "\n".join(lines)

    def __str__(self) -> str:
        return self.table()


def _shown(t: TreeLayer) -> str:
    if t.activation is None:
        return "-"
    return t.activation if t.activation_param is None else f"{t.activation}({t.activation_param})"


def _split_collections(variables: Mapping[str, Any]) -> tuple[Mapping[str, Any], bool]:
    if "params" in variables and isinstance(variables["params"], Mapping):
        return variables["params"], True
    return variables, False


def _check_keys(option: str, mapping: Mapping[str, Any] | None, names: list[str]) -> None:
    bad = [k for k in (mapping or {}) if k not in names]
    if bad:
        raise SpecInvalid(
            [
                Problem(
                    f"{option}[{k!r}]",
                    "unknown_layer",
                    f"{k!r} names no layer of this tree"
                    + (
                        f"; did you mean {close[0]!r}?"
                        if (close := difflib.get_close_matches(k, names, n=1, cutoff=0.5))
                        else ""
                    )
                    + f". Layer names: {', '.join(names[:40])}",
                )
                for k in bad
            ]
        )


def _trace(variables: Any, apply_fn: Any, example_input: Any) -> Any:
    import jax

    return jax.make_jaxpr(lambda v, x: apply_fn(v, x))(variables, example_input).jaxpr


def describe_params(
    variables: Mapping[str, Any],
    *,
    seed: int | str,
    apply_fn: Any = None,
    example_input: Any = None,
    activations: Mapping[str, str | tuple[str, float]] | None = None,
    roles: Mapping[str, str] | None = None,
    branches: Mapping[str, str | None] | None = None,
    layer_options: Mapping[str, Mapping[str, Any]] | None = None,
    depth_policy: Mapping[str, Any] | None = None,
    allow_defaults: bool = False,
    allow_untouched: bool = False,
) -> TreeDescription:
    """The seedbed request for a Flax variables tree (what `init` returns, or its `params`)."""
    import jax

    params, _ = _split_collections(variables)
    layers, unclaimed = read_tree(params)
    if not layers:
        raise SpecInvalid(
            [
                Problem(
                    "variables",
                    "invalid_value",
                    "no kernel, embedding, scale or LSTM cell in the tree",
                )
            ]
        )
    names = [t.name for t in layers]
    for option, mapping in (
        ("activations", activations),
        ("roles", roles),
        ("branches", branches),
        ("layer_options", layer_options),
    ):
        _check_keys(option, mapping, names)
    leaves = jax.tree_util.tree_leaves(params)
    dtypes = {
        str(np.dtype(leaf.dtype)) if str(leaf.dtype) != "bfloat16" else "bfloat16"
        for leaf in leaves
    }
    if len(dtypes) != 1 or next(iter(dtypes)) not in DTYPES:
        raise SpecInvalid(
            [
                Problem(
                    "dtype",
                    "not_allowed",
                    f"the tree's leaves have dtypes {sorted(dtypes)}; allowed: "
                    "one of float32, float64, float16, bfloat16 for all",
                )
            ]
        )
    description = TreeDescription({}, layers)
    if apply_fn is not None and example_input is not None:
        _read_jaxpr(description, variables, apply_fn, example_input)
    for t in layers:
        given = (activations or {}).get(t.name)
        if given is not None:
            t.activation, t.activation_param = (given, None) if isinstance(given, str) else given
            t.activation_from = FROM_CALLER
        if t.name in (roles or {}):
            t.role, t.role_from = (roles or {})[t.name], FROM_CALLER
        if t.name in (branches or {}):
            t.branch, t.branch_from = (branches or {})[t.name], FROM_CALLER
        if t.activation is None and t.kind in ("dense", "conv", "norm", "embedding"):
            if t.kind in ("embedding", "norm") or allow_defaults:
                t.activation = "linear"
                t.activation_from = FROM_DEFAULT
            else:
                raise SpecInvalid(
                    [
                        Problem(
                            f"activations[{t.name!r}]",
                            "missing_field",
                            f"the activation after {t.name} ({t.kind}) was not "
                            "inferred: pass apply_fn and example_input so the "
                            "jaxpr can be read, name it in activations, or "
                            "allow_defaults=True for linear",
                        )
                    ]
                )
    if unclaimed and not allow_untouched:
        shown = ", ".join(".".join(p) for p in unclaimed[:10])
        raise SpecInvalid(
            [
                Problem(
                    "variables",
                    "not_allowed",
                    f"leaves no reader claims: {shown}; pass "
                    "allow_untouched=True to return them unchanged",
                )
            ]
        )
    description.untouched = [".".join(p) for p in unclaimed]
    layers_json = []
    for t in layers:
        entry: dict[str, Any] = {"name": t.name, **t.fields}
        if t.kind != "recurrent":
            entry["activation"] = t.activation
            if t.activation_param is not None:
                entry["activation_param"] = t.activation_param
        if t.role != "hidden":
            entry["role"] = t.role
        if t.branch:
            entry["branch"] = t.branch
        entry.update((layer_options or {}).get(t.name, {}))
        layers_json.append(entry)
    description.request = {
        "seed": seed,
        "dtype": dtypes.pop(),
        "layout": "out_in",
        "layers": layers_json,
    }
    if depth_policy is not None:
        description.request["depth_policy"] = dict(depth_policy)
    return description


def _read_jaxpr(
    description: TreeDescription, variables: Mapping[str, Any], apply_fn: Any, example_input: Any
) -> None:
    import jax

    jaxpr = _trace(variables, apply_fn, example_input)
    _params, wrapped = _split_collections(variables)
    flat = jax.tree_util.tree_flatten_with_path(variables)[0]
    paths = [tuple(str(getattr(k, "key", getattr(k, "idx", k))) for k in path) for path, _ in flat]
    if wrapped:
        paths = [p[1:] if p and p[0] == "params" else ("\x00", *p) for p in paths]
    facts = JaxprFacts(jaxpr, paths)
    description.graph_source = "jaxpr of apply_fn"
    spans: dict[int, TreeLayer] = {}
    spanned: set[int] = set()
    for t in description.layers:
        if t.kind == "norm":
            use = facts.first_use(t.leaves["scale"], "mul")
            if use is not None:
                spans[use] = t
            continue
        if t.kernel_path is None:
            continue
        first = facts.first_map(t.kernel_path)
        if first is None:
            t.notes.append("kernel not read by a dot_general or conv in the jaxpr")
            continue
        if t.kind == "conv":
            settings = facts.conv_settings(first)
            groups = settings["groups"]
            t.fields["channels_in"] = t.fields["channels_in"] * groups
            t.fields.update(settings)
        out, span = facts.layer_output(first)
        for i in span:
            spans[i] = t
            spanned.add(i)
        if t.activation is None:
            t.activation, t.activation_param, t.activation_from, end = facts.follow(out)
        else:
            end = facts.follow(out)[3]
        if end in facts.outputs:
            t.role, t.role_from = "output", "jaxpr output"
        elif t.activation == "softmax":
            t.activation, t.activation_from = "linear", "softmax not at the output: linear"
    order = {id(t): k for k, t in enumerate(description.layers)}
    for add, branch_eqns, skip_eqns in facts.residual_adds(spanned):
        members = sorted(
            {
                id(t): t for i, t in spans.items() if i in branch_eqns and i not in skip_eqns
            }.values(),
            key=lambda t: order[id(t)],
        )
        if not members or any(m.branch for m in members):
            continue
        ks = [order[id(m)] for m in members]
        if ks != list(range(ks[0], ks[-1] + 1)):
            description.notes.append(
                f"add #{add}: its branch layers are not one run; not a residual branch"
            )
            continue
        for m in members:
            m.branch, m.branch_from = f"residual_{add}", "jaxpr add of a skip"
            if m.role == "output":
                m.role, m.role_from = "hidden", "inside a residual branch"


def fill_params(
    variables: Mapping[str, Any], description: TreeDescription, arrays: Mapping[str, np.ndarray]
) -> Any:
    """The tree with every claimed leaf replaced by its seeded values (jax.Array leaves), in
    the tree's own structure; `arrays` are the served tensors of `description.request`."""
    import jax
    import jax.numpy as jnp

    replace: dict[tuple[str, ...], np.ndarray] = {}
    for t in description.layers:
        if t.kind == "recurrent":
            order = SEEDBED_GATE_ORDERS["lstm"]
            inputs = split_gates(arrays[f"{t.name}.input_weight"], order)
            hiddens = split_gates(arrays[f"{t.name}.recurrent_weight"], order)
            biases = split_gates(arrays[f"{t.name}.bias"], order) if t.fields["bias"] else {}
            for letter, gate in (("i", "input"), ("f", "forget"), ("g", "cell"), ("o", "output")):
                # Flax's LSTM cell: one Dense per gate and side, kernels (in, hidden); the
                # single seedbed bias goes on the hidden side, which holds the cell's biases.
                replace[(*t.path, f"i{letter}", "kernel")] = inputs[gate].T
                replace[(*t.path, f"h{letter}", "kernel")] = hiddens[gate].T
                if biases:
                    replace[(*t.path, f"h{letter}", "bias")] = biases[gate]
            continue
        for part, leaf in t.leaves.items():
            values = arrays[f"{t.name}.{part}"]
            if part == "weight" and t.kind in ("dense", "conv"):
                values = change_layout(values, t.kind, "out_in", "in_out")
            replace[leaf] = values

    def visit(path: tuple[str, ...], node: Any, collection: str | None) -> Any:
        if isinstance(node, Mapping):
            return {k: visit((*path, str(k)), v, collection) for k, v in node.items()}
        if collection == "batch_stats":
            fill = 1.0 if path[-1] == "var" else 0.0
            return jnp.full(node.shape, fill, dtype=node.dtype)
        if collection == "params" and path in replace:
            values = replace[path]
            if tuple(values.shape) != tuple(node.shape):
                raise SpecInvalid(
                    [
                        Problem(
                            ".".join(path),
                            "invalid_value",
                            f"served shape {values.shape} does not fit the "
                            f"leaf's {tuple(node.shape)}",
                        )
                    ]
                )
            return jnp.asarray(values, dtype=node.dtype)
        return node

    params, wrapped = _split_collections(variables)
    if not wrapped:
        return visit((), params, "params")
    out = {}
    for name, tree in variables.items():
        out[name] = visit((), tree, name)
    _ = jax  # imported for its side effect of selecting the backend before jnp use
    return out


def seed_params(
    variables: Mapping[str, Any],
    client: Any,
    *,
    seed: int | str,
    format: str = "safetensors",
    **options: Any,
) -> tuple[Any, TreeDescription]:
    """Describe the tree, fetch its weights (verified by the client), and return the filled
    tree with the description (`.table()` shows what was inferred and from where)."""
    description = describe_params(variables, seed=seed, **options)
    arrays = client.weights(description.request, format=format)
    return fill_params(variables, description, arrays), description
