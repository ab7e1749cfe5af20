"""`seedbed torch-weights MODULE:FACTORY`: build a model from an importable factory, seed it
through the service, and write a safetensors file keyed by the model's own state names.

    seedbed torch-weights ferry.models:small_decoder --seed ferry/base \\
        --policy '{"name": "scaled_residual"}' -o ferry-init.safetensors

    model = small_decoder()
    model.load_state_dict(safetensors.torch.load_file("ferry-init.safetensors"), strict=True)

The command prints the inference table (what was read from the graph and from where) before
writing. torch is imported only when the command runs.
"""

from __future__ import annotations

import argparse
import importlib
import json
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any


def register_torch_command(
    subparsers: Any,
    *,
    add_service_options: Callable[[argparse.ArgumentParser], None],
    handler_key: str,
    make_client: Callable[[argparse.Namespace], Any],
    usage_error: type[Exception],
) -> None:
    """Add `torch-weights` to an argparse subparsers object. The command line passes in its
    own pieces (service options, client factory, usage error) so this module needs nothing
    from it."""
    cmd = subparsers.add_parser(
        "torch-weights",
        help="seed a PyTorch model from MODULE:FACTORY and write its state-named weights file",
        description="Import MODULE, call FACTORY() for an nn.Module, read its graph, fetch its "
        "weights from the service and write a safetensors file whose keys and shapes are the "
        "module's own state names (loads with strict state loading). Needs torch.",
    )
    cmd.add_argument("target", metavar="MODULE:FACTORY", help="e.g. ferry.models:small_decoder")
    cmd.add_argument("--seed", required=True, help="integer or string seed")
    cmd.add_argument("-o", "--output", required=True, type=Path, help="file to write")
    cmd.add_argument("--policy", metavar="JSON", help='depth policy, e.g. {"name": "fixup"}')
    cmd.add_argument(
        "--activation",
        action="append",
        default=[],
        metavar="LAYER=NAME",
        help="override a layer's activation (repeatable)",
    )
    cmd.add_argument(
        "--allow-defaults",
        action="store_true",
        help="plan layers whose activation cannot be inferred as linear instead of failing",
    )
    add_service_options(cmd)
    cmd.set_defaults(**{handler_key: lambda args: _run(args, make_client, usage_error)})


def _seed(text: str) -> int | str:
    return int(text) if text.isdigit() else text


def _load_factory(target: str, usage_error: type[Exception]) -> Any:
    module_name, _, attr = target.partition(":")
    if not module_name or not attr:
        raise usage_error(f"target {target!r}: allowed: MODULE:FACTORY, e.g. pkg.models:build")
    try:
        factory = getattr(importlib.import_module(module_name), attr)
    except (ImportError, AttributeError) as exc:
        raise usage_error(f"target {target!r}: {exc}") from exc
    return factory()


def _run(
    args: argparse.Namespace,
    make_client: Callable[[argparse.Namespace], Any],
    usage_error: type[Exception],
) -> int:
    try:
        from torch import nn

        from seedbed_client import torch_adapter as ta
    except ImportError as exc:
        raise usage_error(f"torch-weights needs torch installed ({exc})") from exc
    model = _load_factory(args.target, usage_error)
    if not isinstance(model, nn.Module):
        raise usage_error(f"{args.target} returned {type(model).__name__}, not a torch nn.Module")
    activations: dict[str, str] = {}
    for item in args.activation:
        layer, _, name = item.partition("=")
        if not layer or not name:
            raise usage_error(f"--activation {item!r}: allowed: LAYER=NAME")
        activations[layer] = name
    policy = None
    if args.policy:
        try:
            policy = json.loads(args.policy)
        except json.JSONDecodeError as exc:
            raise usage_error(f"--policy is not JSON: {exc}") from exc
    description = ta.describe_module(
        model,
        seed=_seed(args.seed),
        activations=activations or None,
        depth_policy=policy,
        allow_defaults=args.allow_defaults,
    )
    print(description.table())
    with make_client(args) as client:
        arrays = ta.fetch_for(client, description, "safetensors")
    ta.apply_weights(model, description, arrays)
    keys = ta.write_state_file(model, description, arrays, args.output)
    print(f"wrote {len(keys)} state entries to {args.output}", file=sys.stderr)
    return 0
