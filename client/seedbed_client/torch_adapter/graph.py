"""Reading a module's data flow: which activation follows each layer, and where residual adds are.

Three readers, tried in order, all producing the same small graph (`Flow`):

1. torch.fx symbolic tracing: sees functional calls (F.relu, torch.tanh), method calls
   (x.relu()) and operator.add, without running anything;
2. a forward pass on a sample input with hooks on torch's own modules and a function mode that
   records every torch call made outside them: works with data-dependent control flow (it
   records the path the sample input took);
3. nothing: the caller falls back to module order (siblings in an nn.Sequential) and says so.

torch's own modules (torch.nn.*) are leaves in both readers, so the graph holds one node per
call of a Linear, a MultiheadAttention or a TransformerEncoderLayer, and the caller's own
code in between as individual torch calls.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any

import torch
from torch import nn

from seedbed_client.torch_adapter.catalog import (
    activation_of_call,
    activation_of_module,
    is_leaf_module,
    is_pass_through_module,
)

__all__ = ["Flow", "FlowOp", "build_sample_input", "read_by_hooks", "read_by_tracing"]

# Calls whose result carries the same signal as their input: the search for "what follows a
# layer" looks through them.
_PASS_CALLS = frozenset(
    {
        "dropout", "dropout1d", "dropout2d", "dropout3d", "alpha_dropout",
        "feature_alpha_dropout", "view", "reshape", "permute", "transpose", "flatten",
        "contiguous", "squeeze", "unsqueeze", "clone", "to", "float", "double", "half",
        "type_as", "getitem", "max_pool1d", "max_pool2d", "max_pool3d", "avg_pool1d",
        "avg_pool2d", "avg_pool3d", "adaptive_avg_pool1d", "adaptive_avg_pool2d",
        "adaptive_avg_pool3d", "adaptive_max_pool1d", "adaptive_max_pool2d",
        "adaptive_max_pool3d", "mean", "expand", "expand_as", "detach", "split", "chunk",
        "unbind", "tensor_split",
    }
)  # fmt: skip
# Calls that only read metadata: no data edge (a position index built from x.size(1) is not
# a path from x).
_META_CALLS = frozenset({"size", "dim", "numel", "shape", "get", "device", "dtype", "ndim"})
_ADD_CALLS = frozenset({"add", "radd", "iadd"})
# Calls that consume a projection as attention's query, key or value: no elementwise
# nonlinearity acts on it, so the projection is linear (as the service plans attention).
_ATTENTION_CALLS = frozenset({"scaled_dot_product_attention"})
_MUL_CALLS = frozenset({"mul", "rmul", "imul", "multiply", "matmul", "bmm", "einsum", "div"})


def call_name(target: Any) -> str:
    """A torch call's plain name: operator.iadd, Tensor.__iadd__ and torch.add_ all -> iadd/add."""
    if isinstance(target, str):
        name = target
    else:
        name = getattr(target, "__name__", None) or type(target).__name__
    name = name.strip("_")
    if name.endswith("_") and name != "_":
        name = name.rstrip("_")
    return name


@dataclass
class FlowOp:
    """One node: a call of a torch module (`module` is its qualified name), a torch call, the
    input or the output. `inputs` are the ops whose tensors this op reads (data edges only)."""

    index: int
    kind: str  # "input" | "module" | "call" | "output"
    target: str  # module qualname, or the call's plain name
    inputs: tuple[int, ...] = ()
    args: tuple[Any, ...] = ()
    kwargs: Mapping[str, Any] = field(default_factory=dict)


@dataclass
class Flow:
    """The graph one reader produced, and how (`source`: "traced graph" or "forward hooks")."""

    ops: list[FlowOp]
    source: str
    note: str = ""
    users: dict[int, list[int]] = field(default_factory=dict)

    def __post_init__(self) -> None:
        self.users = {op.index: [] for op in self.ops}
        for op in self.ops:
            for i in op.inputs:
                self.users[i].append(op.index)
        self._ancestors: list[int] = []
        for op in self.ops:  # ops are in execution order: inputs come first
            bits = 0
            for i in op.inputs:
                bits |= self._ancestors[i] | (1 << i)
            self._ancestors.append(bits)

    def is_ancestor(self, a: int, b: int) -> bool:
        """Whether op a's tensor reaches op b through data edges."""
        return bool(self._ancestors[b] >> a & 1)

    def module_calls(self) -> dict[str, list[int]]:
        calls: dict[str, list[int]] = {}
        for op in self.ops:
            if op.kind == "module":
                calls.setdefault(op.target, []).append(op.index)
        return calls


# ---------------------------------------------------------------------------------------------
# Reader 1: torch.fx


def read_by_tracing(module: nn.Module) -> Flow:
    """The graph from torch.fx symbolic tracing; raises whatever tracing raises."""
    from torch import fx

    class _Tracer(fx.Tracer):
        def is_leaf_module(self, m: nn.Module, qualname: str) -> bool:
            return is_leaf_module(m)

    tracer = _Tracer()
    graph = tracer.trace(module)
    ops: list[FlowOp] = []
    index: dict[fx.Node, int] = {}
    for node in graph.nodes:
        if node.op == "get_attr":
            continue  # parameters and buffers: constants, no data edge
        if node.op == "call_function" and node.target is getattr:
            name = call_name(node.args[1]) if len(node.args) > 1 else "getattr"
        elif node.op in ("call_function", "call_method"):
            name = call_name(node.target)
        else:
            name = str(node.target)
        if name in _META_CALLS:
            continue
        inputs = tuple(
            sorted({index[n] for n in _nodes_in((node.args, node.kwargs)) if n in index})
        )
        kind = {"placeholder": "input", "call_module": "module", "output": "output"}.get(
            node.op, "call"
        )
        op = FlowOp(len(ops), kind, name, inputs, tuple(node.args), dict(node.kwargs))
        index[node] = op.index
        ops.append(op)
    return Flow(ops, "traced graph")


def _nodes_in(value: Any) -> Iterable[Any]:
    from torch import fx

    if isinstance(value, fx.Node):
        yield value
    elif isinstance(value, (list, tuple)):
        for v in value:
            yield from _nodes_in(v)
    elif isinstance(value, dict):
        for v in value.values():
            yield from _nodes_in(v)


# ---------------------------------------------------------------------------------------------
# Reader 2: a forward pass with hooks


def _tensors_in(value: Any) -> Iterable[torch.Tensor]:
    if isinstance(value, torch.Tensor):
        yield value
    elif isinstance(value, (list, tuple)):
        for v in value:
            yield from _tensors_in(v)
    elif isinstance(value, dict):
        for v in value.values():
            yield from _tensors_in(v)


class _Recorder(torch.overrides.TorchFunctionMode):
    """Records torch calls made outside torch's own modules; module calls come from hooks."""

    def __init__(self) -> None:
        super().__init__()
        self.ops: list[FlowOp] = []
        self.producer: dict[int, int] = {}  # id(tensor) -> op index
        self.alive: list[torch.Tensor] = []  # keeps ids unique while recording
        self.inside = 0  # > 0 while a torch module runs: its own calls are not ours

    def add(self, kind: str, target: str, reads: Any, result: Any, args: tuple[Any, ...] = (),
            kwargs: Mapping[str, Any] | None = None) -> None:  # fmt: skip
        inputs = tuple(
            sorted({self.producer[id(t)] for t in _tensors_in(reads) if id(t) in self.producer})
        )
        op = FlowOp(len(self.ops), kind, target, inputs, args, dict(kwargs or {}))
        self.ops.append(op)
        for t in _tensors_in(result):
            self.producer[id(t)] = op.index
            self.alive.append(t)

    def __torch_function__(
        self,
        func: Callable[..., Any],
        types: Any,
        args: tuple[Any, ...] = (),
        kwargs: Mapping[str, Any] | None = None,
    ) -> Any:
        kwargs = dict(kwargs or {})
        result = func(*args, **kwargs)
        name = call_name(func)
        produced = next(iter(_tensors_in(result)), None) is not None
        if self.inside == 0 and name not in _META_CALLS and produced:
            self.add("call", name, (args, kwargs), result, tuple(args), kwargs)
        return result


def read_by_hooks(module: nn.Module, sample: Any) -> Flow:
    """The graph of one forward pass on `sample` (a tensor or a tuple of positional inputs), in
    eval mode and without gradients; the module's state is left as it was."""
    recorder = _Recorder()
    names = {id(m): q for q, m in module.named_modules()}
    leaves: list[nn.Module] = []

    def collect(m: nn.Module) -> None:
        for child in m.children():
            if is_leaf_module(child):
                leaves.append(child)
            else:
                collect(child)

    collect(module)
    handles = []
    for leaf in leaves:
        qualname = names[id(leaf)]

        def before(m: nn.Module, args: Any, kwargs: Any) -> None:
            recorder.inside += 1

        def after(m: nn.Module, args: Any, kwargs: Any, output: Any, q: str = qualname) -> None:
            recorder.inside -= 1
            if recorder.inside == 0:
                recorder.add("module", q, (args, kwargs), output, tuple(args), kwargs)

        handles.append(leaf.register_forward_pre_hook(before, with_kwargs=True))
        handles.append(leaf.register_forward_hook(after, with_kwargs=True))
    inputs = sample if isinstance(sample, tuple) else (sample,)
    was_training = module.training
    try:
        module.eval()
        for t in inputs:
            recorder.add("input", "input", (), t)
        with torch.no_grad(), recorder:
            output = module(*inputs)
        recorder.add("output", "output", output, ())
    finally:
        for h in handles:
            h.remove()
        module.train(was_training)
    return Flow(recorder.ops, "forward hooks")


def build_sample_input(
    module: nn.Module, shape: tuple[int, ...] | None = None
) -> tuple[Any, str] | None:
    """A small sample input, and a sentence saying how it was built: of the caller's declared
    `shape` (token ids when the first parameterised module is an embedding, else standard
    normal values), or from the first parameterised module's declared size; None when neither
    says enough."""
    gen = torch.Generator().manual_seed(0)
    dtype = next((p.dtype for p in module.parameters()), torch.float32)
    if shape is not None:
        first = next(
            (
                m
                for m in module.modules()
                if is_leaf_module(m) and next(m.parameters(), None) is not None
            ),
            None,
        )
        if isinstance(first, nn.Embedding):
            ids = torch.randint(0, first.num_embeddings, shape, generator=gen)
            return ids, f"token ids of the declared shape {tuple(shape)}"
        x = torch.randn(shape, generator=gen, dtype=dtype)
        return x, f"a standard normal batch of the declared shape {tuple(shape)}"
    for qualname, m in module.named_modules():
        shape = None
        if isinstance(m, nn.Embedding):
            ids = torch.randint(0, m.num_embeddings, (2, 8), generator=gen)
            return ids, f"token ids (2, 8) below {qualname}'s vocabulary of {m.num_embeddings}"
        if isinstance(m, nn.Linear):
            shape = (2, m.in_features)
        elif isinstance(m, (nn.Conv1d, nn.Conv2d, nn.Conv3d)):
            shape = (2, m.in_channels, *([16] * len(m.kernel_size)))
        elif isinstance(m, nn.RNNBase):
            shape = (2, 5, m.input_size) if m.batch_first else (5, 2, m.input_size)
        elif isinstance(m, nn.TransformerEncoderLayer):
            dim = m.self_attn.embed_dim
            shape = (2, 6, dim) if m.self_attn.batch_first else (6, 2, dim)
        if shape is not None:
            x = torch.randn(shape, generator=gen, dtype=dtype)
            return x, f"a standard normal batch of shape {shape}, from {qualname}'s declared size"
    return None


# ---------------------------------------------------------------------------------------------
# What follows a layer


@dataclass(frozen=True)
class Following:
    """What the output of one module call runs into, looking through shape-only calls."""

    activation: tuple[str, float | None] | None  # None: not decided (see `problem`)
    reason: str
    problem: str = ""  # why nothing could be decided: unknown call, gated product, mixed uses
    to_output: bool = False  # feeds the network's output directly


def following(flow: Flow, op_index: int, modules: Mapping[str, nn.Module],
              layer_modules: frozenset[str]) -> Following:  # fmt: skip
    """Classify everything op `op_index`'s output meets first (see module docstring)."""
    found: set[tuple[str, Any]] = set()
    stack = list(flow.users[op_index])
    seen: set[int] = set()
    while stack:
        u = flow.ops[stack.pop()]
        if u.index in seen:
            continue
        seen.add(u.index)
        if u.kind == "output":
            found.add(("output", None))
        elif u.kind == "module":
            m = modules.get(u.target)
            act = activation_of_module(m) if m is not None else None
            if u.target in layer_modules:
                found.add(("map", u.target))
            elif act is not None:
                found.add(("act", act))
            elif m is not None and is_pass_through_module(m):
                stack.extend(flow.users[u.index])
            else:
                found.add(("unknown", f"module {u.target} ({type(m).__name__})"))
        else:
            act = activation_of_call(u.target, u.args, u.kwargs)
            if act is not None:
                found.add(("act", act))
            elif u.target in _PASS_CALLS or (u.target in _ADD_CALLS and len(u.inputs) == 1):
                stack.extend(flow.users[u.index])
            elif u.target in _ADD_CALLS:
                found.add(("add", u.index))
            elif u.target in _ATTENTION_CALLS:
                found.add(("attention", u.target))
            elif u.target in _MUL_CALLS and len(u.inputs) >= 2:
                found.add(("mul", u.target))
            elif u.target in _MUL_CALLS:
                stack.extend(flow.users[u.index])  # a product with a constant: same signal
            else:
                found.add(("unknown", f"call {u.target}"))
    kinds = {k for k, _ in found}
    if not found:
        return Following(None, "", "its output is not used in forward")
    if "mul" in kinds:
        return Following(
            None, "", "its output multiplies another path (a gated or multiplicative path)"
        )
    if "unknown" in kinds:
        what = ", ".join(sorted(str(v) for k, v in found if k == "unknown"))
        return Following(None, "", f"its output goes into {what}, which the adapter does not read")
    acts = {v for k, v in found if k == "act"}
    if acts and kinds != {"act"}:
        return Following(None, "", "its output feeds both an activation and other paths")
    if len(acts) > 1:
        return Following(None, "", f"its output feeds different activations {sorted(acts)}")
    if acts:
        act = next(iter(acts))
        return Following(act, f"followed by {act[0]}")
    reasons = []
    if "map" in kinds:
        reasons.append(
            "another layer (" + ", ".join(sorted(v for k, v in found if k == "map")) + ")"
        )
    if "add" in kinds:
        reasons.append("a residual add")
    if "attention" in kinds:
        reasons.append("scaled dot-product attention")
    if "output" in kinds:
        reasons.append("the network output")
    return Following(("linear", None), "feeds " + " and ".join(reasons), "",
                     to_output=kinds == {"output"})  # fmt: skip


# ---------------------------------------------------------------------------------------------
# Residual adds


@dataclass(frozen=True)
class ResidualAdd:
    """One add of a skip path and a branch; `branch` lists the module calls on the branch side,
    `skip` those on the skip side (empty for an identity skip: a projection otherwise)."""

    op: int
    branch: tuple[int, ...]
    skip: tuple[int, ...]
    # The latest layer call whose output feeds both paths (None: the network input or no
    # layer): what a projection skip reads.
    source: int | None = None


def residual_adds(flow: Flow, layer_modules: frozenset[str]) -> tuple[list[ResidualAdd], list[str]]:
    """Every add of two paths that share an origin, and notes on adds that are not residual."""
    layer_calls = [
        op.index for op in flow.ops if op.kind == "module" and op.target in layer_modules
    ]
    adds: list[ResidualAdd] = []
    notes: list[str] = []
    for op in flow.ops:
        if op.kind != "call" or op.target not in _ADD_CALLS or len(op.inputs) != 2:
            continue
        a, b = op.inputs

        def side(end: int, origin: int) -> tuple[int, ...]:
            return tuple(
                c for c in layer_calls
                if (c == end or flow.is_ancestor(c, end)) and flow.is_ancestor(origin, c)
            )  # fmt: skip

        if flow.is_ancestor(a, b) or flow.is_ancestor(b, a):
            origin_op, out = (a, b) if flow.is_ancestor(a, b) else (b, a)
            members = side(out, origin_op)
            if members:
                adds.append(ResidualAdd(op.index, members, ()))
            continue
        common = [
            i for i in range(min(a, b))
            if flow.is_ancestor(i, a) and flow.is_ancestor(i, b)
        ]  # fmt: skip
        if not common:
            notes.append(
                f"an add of two independent inputs ({_describe(flow, a)} + {_describe(flow, b)}) "
                "is not a residual connection"
            )
            continue
        origin = max(common)
        side_a, side_b = side(a, origin), side(b, origin)
        if not side_a or not side_b:
            members = side_a or side_b
            if members:
                adds.append(ResidualAdd(op.index, members, ()))
            continue
        branch, skip = (side_a, side_b) if len(side_a) >= len(side_b) else (side_b, side_a)
        upstream = [c for c in layer_calls if c == origin or flow.is_ancestor(c, origin)]
        adds.append(ResidualAdd(op.index, branch, skip, max(upstream) if upstream else None))
    return adds, notes


def _describe(flow: Flow, i: int) -> str:
    op = flow.ops[i]
    return op.target if op.kind == "module" else f"{op.target}()"
