"""describe_module: a torch module read as a seedbed request, with every inference visible."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import torch
from torch import nn

from seedbed_client.errors import Problem, SpecInvalid
from seedbed_client.torch_adapter import graph as g
from seedbed_client.torch_adapter.catalog import Activation, activation_of_module, activation_text
from seedbed_client.torch_adapter.description import (
    FROM_CALLER,
    FROM_DEFAULT,
    FROM_MODULE,
    FROM_ORDER,
    LayerFacts,
    ModuleDescription,
)
from seedbed_client.torch_adapter.modules import (
    ParameterCopy,
    Part,
    is_layer_module,
    module_parts,
)
from seedbed_client.torch_adapter.overrides import qualified_problems, raise_unknown_keys

DTYPES: Mapping[torch.dtype, str] = {
    torch.float32: "float32",
    torch.float64: "float64",
    torch.float16: "float16",
    torch.bfloat16: "bfloat16",
}
GRAPH_MODES = ("auto", "trace", "hooks", "order")


@dataclass
class _Read:
    flow: g.Flow | None
    source: str
    notes: list[str]


def _read_graph(
    module: nn.Module, mode: str, example_input: Any, input_shape: tuple[int, ...] | None = None
) -> _Read:
    notes: list[str] = []
    if mode in ("auto", "trace"):
        try:
            flow = g.read_by_tracing(module)
            return _Read(flow, flow.source, notes)
        except Exception as exc:  # any tracing failure: try the next reader
            first_line = (str(exc).strip().splitlines() or [type(exc).__name__])[0]
            notes.append(
                f"torch.fx could not trace the module ({type(exc).__name__}: {first_line[:160]})"
            )
            if mode == "trace":
                raise SpecInvalid([Problem("graph", "not_allowed", notes[-1])]) from exc
    if mode in ("auto", "hooks"):
        sample, how = example_input, "the caller's sample input"
        if sample is None:
            built = g.build_sample_input(module, input_shape)
            if built is not None:
                sample, how = built
        if sample is not None:
            try:
                flow = g.read_by_hooks(module, sample)
                notes.append(f"read by a forward pass on {how}")
                return _Read(flow, "forward hooks", notes)
            except Exception as exc:  # a failing forward: module order
                notes.append(
                    f"the forward pass on {how} failed ({type(exc).__name__}: {exc})"[:240]
                )
        else:
            notes.append(
                "no sample input: pass example_input or input_shape to read the graph by a "
                "forward pass"
            )
        if mode == "hooks":
            raise SpecInvalid([Problem("graph", "not_allowed", notes[-1])])
    notes.append(
        "activations and residuals read from module order only (siblings in an nn.Sequential): "
        "a last resort that cannot see functional calls or residual adds"
    )
    return _Read(None, FROM_ORDER, notes)


def _sibling_activation(
    parents: Mapping[str, tuple[nn.Module, str]], q: str
) -> tuple[Activation | None, str]:
    """Module-order reading: the activation module after `q` inside its nn.Sequential."""
    if q not in parents or not isinstance(parents[q][0], nn.Sequential):
        return None, "not inside an nn.Sequential"
    from seedbed_client.torch_adapter.catalog import is_pass_through_module

    parent, key = parents[q]
    siblings = list(parent._modules.items())
    index = [k for k, _ in siblings].index(key)
    for _, nxt in siblings[index + 1 :]:
        if nxt is None or is_pass_through_module(nxt):
            continue
        if is_layer_module(nxt):
            return ("linear", None), "the next module in its nn.Sequential is a layer"
        act = activation_of_module(nxt)
        if act is None:
            return None, f"the next module in its nn.Sequential is {type(nxt).__name__}"
        return act, f"the next module in its nn.Sequential is {type(nxt).__name__}"
    return None, "it is the last module of its nn.Sequential"


def _given(value: str | tuple[str, float]) -> Activation:
    return (value, None) if isinstance(value, str) else (value[0], float(value[1]))


def describe_module(
    module: nn.Module,
    *,
    seed: int | str,
    activations: Mapping[str, str | tuple[str, float]] | None = None,
    roles: Mapping[str, str] | None = None,
    branches: Mapping[str, str | None] | None = None,
    layer_options: Mapping[str, Mapping[str, Any]] | None = None,
    depth_policy: Mapping[str, Any] | Any | None = None,
    example_input: Any = None,
    input_shape: tuple[int, ...] | None = None,
    graph: str = "auto",
    allow_defaults: bool = False,
    root_name: str = "model",
    allow_untouched: bool = False,
) -> ModuleDescription:
    """The seedbed request for `module`'s parameters, how to copy the answer back, and what was
    inferred from where (`.table()`).

    Activations, residual branches and output roles are read from the module's graph
    (`graph="auto"`: torch.fx tracing, else a forward pass on `example_input` (a tensor or a
    tuple of positional inputs), on a sample of the declared `input_shape`, or on a sample
    built from the first layer's declared size, else module order). Overrides are keyed by
    layer name (the module's qualified name; recurrent layers `<name>.l<k>`): `activations`
    (a name or (name, parameter)), `roles`, `branches` (a branch name, or None for none),
    `layer_options` (extra request fields, e.g. an `init`). Unknown keys raise. A dense, conv
    or norm layer whose activation cannot be inferred raises, listing the fix, unless
    `allow_defaults` (then it is linear, and the table says so). `depth_policy` is the
    request's policy object (a dict, or a policy spec from seedbed_client.layers).
    """
    if graph not in GRAPH_MODES:
        raise SpecInvalid(
            [Problem("graph", "invalid_value", f"got {graph!r}; allowed: {', '.join(GRAPH_MODES)}")]
        )
    dtypes = {p.dtype for p in module.parameters()}
    if len(dtypes) != 1 or next(iter(dtypes)) not in DTYPES:
        raise SpecInvalid(
            [
                Problem(
                    "dtype",
                    "not_allowed",
                    f"the module's parameters have dtypes {sorted(map(str, dtypes))}; allowed: "
                    "one of float32, float64, float16, bfloat16 for all",
                )
            ]
        )
    notes: list[str] = []
    # 1. Parts, in registration order; weight tying found by parameter identity.
    parts: list[Part] = []
    owner: dict[int, str] = {}
    ties: dict[str, list[str]] = {}
    tie_copies: list[ParameterCopy] = []
    covered: set[str] = set()
    handled: list[str] = []
    modules = dict(module.named_modules())
    for q, sub in modules.items():
        if any(q.startswith(h + ".") for h in handled) or not is_layer_module(sub):
            continue
        handled.append(q)
        weight = getattr(sub, "weight", None)
        weight_name = f"{q}.weight" if q else "weight"
        if isinstance(weight, nn.Parameter) and id(weight) in owner:
            planned = owner[id(weight)]
            ties.setdefault(planned, []).append(weight_name)
            covered.add(weight_name)
            bias = getattr(sub, "bias", None)
            if isinstance(bias, nn.Parameter):
                tie_copies.append(ParameterCopy(f"{q}.bias", (), zero=True))
                covered.add(f"{q}.bias")
            notes.append(
                f"{q}: weight tied to {planned} (the same parameter); planned once, as "
                f"{planned.rsplit('.', 1)[0] or root_name}"
                + ("; its bias set to zero" if isinstance(bias, nn.Parameter) else "")
            )
            continue
        if isinstance(weight, nn.Parameter):
            owner[id(weight)] = weight_name
        parts.extend(module_parts(q or root_name, q, sub))
    copies = [c for p in parts for c in p.copies] + tie_copies
    covered |= {c.parameter for c in copies}
    untouched = [n for n, _ in module.named_parameters() if n not in covered]
    if untouched and not allow_untouched:
        raise SpecInvalid(
            [
                Problem(n, "not_allowed", "no seedbed layer describes this parameter; pass "
                        "allow_untouched=True to leave it as it is")
                for n in untouched
            ]
        )  # fmt: skip
    names = [p.layer["name"] for p in parts]
    raise_unknown_keys(
        {
            "activations": activations,
            "roles": roles,
            "branches": branches,
            "layer_options": layer_options,
        },
        names,
    )
    # 2. The graph.
    read = _read_graph(module, graph, example_input, input_shape)
    notes.extend(read.notes)
    flow = read.flow
    calls = flow.module_calls() if flow is not None else {}
    layer_modules = frozenset(q for q in modules if q in handled)
    parents: dict[str, tuple[nn.Module, str]] = {}
    for q, sub in modules.items():
        for key, child in sub._modules.items():
            if child is not None:
                parents[f"{q}.{key}" if q else key] = (sub, key)

    def position(p: Part) -> int:
        c = calls.get(p.call or p.module)
        return c[0] if c else 1 << 30

    if flow is not None:
        order = sorted(range(len(parts)), key=lambda i: (position(parts[i]), i))
        parts = [parts[i] for i in order]
        unused = sorted({p.module for p in parts if position(p) == 1 << 30})
        if unused:
            notes.append(f"not called in forward (listed last): {', '.join(unused)}")
    # 3. Activations and roles.
    facts: list[LayerFacts] = []
    problems: list[Problem] = []
    inferred: dict[str, str] = {}
    not_inferred: list[str] = []
    for p in parts:
        layer = p.layer
        name = layer["name"]
        f = LayerFacts(name, p.module, layer["kind"], why=list(p.notes))
        notes.extend(f"{name}: {n}" for n in p.notes)
        facts.append(f)
        act: Activation | None = None
        given = (activations or {}).get(name)
        if given is not None:
            act, f.activation_from = _given(given), FROM_CALLER
        elif p.fixed_activation is not None:
            act, f.activation_from = p.fixed_activation, FROM_MODULE
            f.why.append(p.fixed_reason)
        elif p.needs_activation and p.module == "":
            # The module is one layer: its output is the network's output.
            act, f.activation_from = ("linear", None), FROM_MODULE
            f.why.append("the module is a single layer; its output is the network's output")
        elif p.needs_activation:
            reason = ""
            if flow is not None:
                results = [
                    g.following(flow, c, modules, layer_modules)
                    for c in calls.get(p.call or p.module, [])
                ]
                if not results:
                    reason = "its module is not called in forward"
                elif any(r.activation is None for r in results):
                    reason = next(r.problem for r in results if r.activation is None)
                elif len({r.activation for r in results}) > 1:
                    reason = "its calls are followed by different activations"
                else:
                    act, f.activation_from = results[0].activation, read.source
                    f.why.append(results[0].reason)
                    if all(r.to_output for r in results) and layer["kind"] in ("dense", "conv"):
                        layer.setdefault("role", "output")
                        f.role_from = read.source
            else:
                act, reason = _sibling_activation(parents, p.module)
                if act is None and read.notes[:-1]:
                    reason += f" (module order only: {read.notes[0]})"
                if act is not None:
                    f.activation_from = FROM_ORDER
                    f.why.append(reason)
            if act is None and layer["kind"] == "norm":
                # A norm's scale and shift are constants whatever follows: nothing to guess.
                f.activation, f.activation_from = "-", "-"
                f.why.append(f"activation not inferred ({reason}); no effect on a norm's constants")
            elif act is None:
                if allow_defaults:
                    act, f.activation_from = ("linear", None), FROM_DEFAULT
                    not_inferred.append(name)
                    f.why.append(f"not inferred: {reason}")
                else:
                    problems.append(
                        Problem(
                            p.module,
                            "activation_unknown",
                            f"the activation after layer {name!r} could not be inferred: {reason}. "
                            f"Pass activations={{{name!r}: 'relu'}} (or the right name), or "
                            "allow_defaults=True to plan it as linear",
                        )
                    )
                    continue
            elif f.activation_from != FROM_CALLER:
                inferred[name] = activation_text(act)
        if act is not None:
            f.activation = activation_text(act)
            if p.needs_activation or layer["kind"] == "recurrent" or given is not None:
                layer["activation"] = act[0]
                if act[1] is not None:
                    layer["activation_param"] = act[1]
            if act[0] == "softmax":
                layer.setdefault("role", "output")
                f.role_from = f.activation_from
        if p.fixed_role is not None:
            layer["role"], f.role_from = p.fixed_role, FROM_MODULE
        if p.fixed_branch is not None:
            layer["branch"], f.branch_from = p.fixed_branch, FROM_MODULE
    if problems:
        raise SpecInvalid(problems)
    # 4. Residual branches from the graph.
    if flow is not None:
        notes.extend(_assign_branches(flow, parts, facts, layer_modules, read.source))
    # 5. Caller overrides of roles and branches, then extra fields.
    for p, f in zip(parts, facts, strict=True):
        name = p.layer["name"]
        if roles and name in roles:
            p.layer["role"], f.role_from = roles[name], FROM_CALLER
        if branches and name in branches:
            f.branch_from = FROM_CALLER
            if branches[name] is None:
                p.layer.pop("branch", None)
            else:
                p.layer["branch"] = branches[name]
        p.layer.update((layer_options or {}).get(name, {}))
        f.role = p.layer.get("role", "hidden")
        f.branch = p.layer.get("branch")
    _say_what_bidirectional_layers_read([p.layer for p in parts])
    request: dict[str, Any] = {
        "seed": seed,
        "dtype": DTYPES[next(iter(dtypes))],
        "layout": "out_in",
        "layers": [p.layer for p in parts],
    }
    if depth_policy is not None:
        request["depth_policy"] = _policy_dict(depth_policy)
    _check_locally(request, [p.module for p in parts])
    return ModuleDescription(
        request=request,
        copies=copies,
        facts=facts,
        graph_source=read.source,
        inferred=inferred,
        not_inferred=not_inferred,
        skipped=untouched,
        notes=notes,
        ties=ties,
    )


def _assign_branches(flow: g.Flow, parts: list[Part], facts: list[LayerFacts],
                     layer_modules: frozenset[str], source: str) -> list[str]:  # fmt: skip
    """Identity-skip adds become `branch` on their layers (innermost wins); projection skips
    and nesting seedbed cannot express are reported instead."""
    notes: list[str] = []
    adds, add_notes = g.residual_adds(flow, layer_modules)
    notes.extend(add_notes)
    by_call: dict[int, list[int]] = {}
    for k, p in enumerate(parts):
        if p.inner and p.fixed_branch is not None:
            continue  # composite layers carry their own branches
        for c in flow.module_calls().get(p.call or p.module, []):
            by_call.setdefault(c, []).append(k)
    taken: dict[int, int] = {}  # part index -> size of the branch it was given
    names = {p.layer["name"] for p in parts}
    for add in sorted(adds, key=lambda a: len(a.branch)):
        members = sorted({k for c in add.branch for k in by_call.get(c, [])})
        if not members:
            continue
        maps = [
            k
            for k in members
            if parts[k].layer["kind"] in ("dense", "conv", "attention", "recurrent")
        ]
        last = maps[-1] if maps else None
        if add.skip:
            skip_layers = sorted(
                {parts[k].layer["name"] for c in add.skip for k in by_call.get(c, [])}
            )
            feeds = (
                [parts[k].layer["name"] for k in by_call.get(add.source, [])]
                if add.source is not None
                else []
            )
            reads_text = (
                f"; {skip_layers[0]} reads the block's input, the output of {feeds[-1]}"
                if feeds and skip_layers
                else ""
            )
            notes.append(
                f"residual add with a projection on the skip path ({', '.join(skip_layers)}): "
                f"seedbed branches add an identity skip, so {parts[members[0]].layer['name']} .. "
                f"{parts[members[-1]].layer['name']} carry no branch; "
                + (
                    f"{parts[last].layer['name']} is marked residual_out"
                    if last is not None
                    else ""
                )
                + reads_text
            )
            if last is not None and parts[last].layer.get("role", "hidden") == "hidden":
                parts[last].layer["role"], facts[last].role_from = "residual_out", source
            if feeds and skip_layers:
                # The projection does not read the layer listed before it (the branch's end)
                # but the block's input: say so, or the service's width check would refuse it.
                for part in parts:
                    if part.layer["name"] == skip_layers[0]:
                        part.layer["reads"] = [feeds[-1]]
            continue
        if any(k in taken for k in members):
            notes.append(
                f"a residual add around {parts[members[0]].layer['name']} .. "
                f"{parts[members[-1]].layer['name']} encloses smaller branches: nested residuals "
                "are not expressible, the inner branches are kept"
            )
            continue
        if members != list(range(members[0], members[-1] + 1)):
            notes.append(
                f"the branch ending at {parts[members[-1]].layer['name']} is not a run of "
                "consecutive layers in signal order: left without branch"
            )
            continue
        if last is None or any(parts[k].layer.get("role") == "output" for k in members):
            continue
        base = f"{parts[last].layer['name']}.skip"
        branch, n = base, 2
        while branch in names:
            branch, n = f"{base}{n}", n + 1
        names.add(branch)
        for k in members:
            parts[k].layer["branch"], facts[k].branch_from = branch, source
            taken[k] = len(members)
        if parts[last].layer.get("role", "hidden") == "hidden":
            parts[last].layer["role"], facts[last].role_from = "residual_out", source
    return notes


def _policy_dict(policy: Mapping[str, Any] | Any) -> dict[str, Any]:
    if hasattr(policy, "to_dict"):
        return dict(policy.to_dict())
    if isinstance(policy, Mapping):
        return dict(policy)
    raise SpecInvalid(
        [Problem("depth_policy", "invalid_type", f"got {type(policy).__name__}; allowed: a policy "
                 "object such as {'name': 'scaled_residual'} or a policy spec")]
    )  # fmt: skip


def _check_locally(request: dict[str, Any], modules: list[str]) -> None:
    """The client's own request checks (seedbed_client.layers), restated at qualified names."""
    from seedbed_client.layers import request_problems

    problems = request_problems(request)
    if problems:
        raise SpecInvalid(qualified_problems(problems, modules))


def _say_what_bidirectional_layers_read(layers: list[dict[str, Any]]) -> None:
    """A bidirectional recurrent layer is two seedbed layers side by side: its reverse half reads
    what the forward half reads, and whatever comes next reads both halves joined. The layer
    list alone would chain them one after the other, so each such step names what it reads."""
    names = [layer["name"] for layer in layers]
    for i, layer in enumerate(layers):
        if layer["kind"] != "recurrent" or not layer["name"].endswith("_reverse"):
            continue
        forward = layer["name"][: -len("_reverse")]
        if i == 0 or names[i - 1] != forward:
            continue
        if "reads" not in layer and "branch" not in layer:
            before = layers[i - 1].get("reads", [names[i - 2]] if i >= 2 else [])
            layer["reads"] = list(before)
        if i + 1 < len(layers):
            after = layers[i + 1]
            if "reads" not in after and "branch" not in after:
                after["reads"] = [forward, layer["name"]]
