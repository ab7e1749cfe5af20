"""Write a locally generated weights file (npz or safetensors), one tensor in memory at a time.

The tensors' bytes are the service's (local.py); the container is written here, so the file is
not byte-identical to a download of the same request (member order and manifest fields such as
`made_locally` differ) but it carries the same per-tensor SHA-256 in its manifest, and
`seedbed verify` and every reader of the container accept it. Written beside the target and
renamed into place once complete.
"""

from __future__ import annotations

import hashlib
import json
import os
import struct
import tempfile
import zipfile
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import Any

import numpy as np

from seedbed_client.containers import NPZ_MANIFEST, SAFETENSORS_CODES, SAFETENSORS_MANIFEST
from seedbed_client.errors import Problem, SpecInvalid
from seedbed_client.local import PlatformChoice, local_manifest, make_tensor, recipes_of

Fetch = Callable[[str], np.ndarray]


def _canonical(doc: Any) -> str:
    return json.dumps(
        doc, sort_keys=True, separators=(",", ":"), ensure_ascii=True, allow_nan=False
    )


def _raw(array: np.ndarray) -> memoryview:
    return memoryview(np.ascontiguousarray(array).reshape(-1).view(np.uint8).data)


def _tensors(plan: Mapping[str, Any], platform: PlatformChoice, fetch: Fetch, threads: int) -> Any:
    """(manifest entry with its sha256, array) per tensor, one at a time."""
    for entry, recipe in recipes_of(plan):
        entry.pop("generation", None)
        if recipe.platform_dependent and platform == "fetch":
            array = np.ascontiguousarray(fetch(recipe.tensor))
            digest = hashlib.sha256(_raw(array)).hexdigest()
        else:
            array, digest = make_tensor(recipe, None, threads)
        entry["sha256"] = digest
        yield entry, array


def write_local(
    plan: Mapping[str, Any],
    path: Path,
    fmt: str,
    platform: PlatformChoice,
    fetch: Fetch,
    threads: int = 1,
) -> tuple[dict[str, Any], int]:
    """Write the plan's tensors to `path`; returns (manifest, size)."""
    if fmt not in ("npz", "safetensors"):
        raise SpecInvalid(
            [
                Problem(
                    "format",
                    "not_allowed",
                    f"got {fmt!r} with origin='local'; allowed: npz, safetensors",
                )
            ]
        )
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, name = tempfile.mkstemp(prefix="local-", suffix=".part", dir=path.parent)
    os.close(fd)
    spool = Path(name)
    try:
        if fmt == "npz":
            manifest = _write_npz(plan, spool, platform, fetch, threads)
        else:
            manifest = _write_safetensors(plan, spool, platform, fetch, threads)
        os.replace(spool, path)
    except BaseException:
        spool.unlink(missing_ok=True)
        raise
    return manifest, path.stat().st_size


def _write_npz(
    plan: Mapping[str, Any], spool: Path, platform: PlatformChoice, fetch: Fetch, threads: int
) -> dict[str, Any]:
    entries = []
    with zipfile.ZipFile(spool, "w", compression=zipfile.ZIP_STORED, allowZip64=True) as zf:
        for entry, array in _tensors(plan, platform, fetch, threads):
            if entry["dtype"] == "bfloat16":  # NPY has no bfloat16: its bit patterns
                array = array.view(np.uint16)
            with zf.open(f"{entry['tensor']}.npy", "w", force_zip64=True) as out:
                little = np.asarray(array, dtype=array.dtype.newbyteorder("<"))
                np.lib.format.write_array(out, little, allow_pickle=False)
            entries.append(entry)
            del array
        manifest = local_manifest(plan, entries)
        zf.writestr(NPZ_MANIFEST, _canonical(manifest))
    return manifest


def _write_safetensors(
    plan: Mapping[str, Any], spool: Path, platform: PlatformChoice, fetch: Fetch, threads: int
) -> dict[str, Any]:
    # The header (with every digest) comes first, so the tensors are made twice: once to hash,
    # once to write; never more than one in memory.
    entries, offsets, at = [], {}, 0
    for entry, array in _tensors(plan, platform, fetch, threads):
        size = array.nbytes
        offsets[entry["tensor"]] = (entry, at, at + size)
        entries.append(entry)
        at += size
        del array
    manifest = local_manifest(plan, entries)
    header: dict[str, Any] = {"__metadata__": {SAFETENSORS_MANIFEST: _canonical(manifest)}}
    for name, (entry, start, end) in offsets.items():
        header[name] = {
            "dtype": SAFETENSORS_CODES[entry["dtype"]],
            "shape": list(entry["shape"]),
            "data_offsets": [start, end],
        }
    text = json.dumps(header, separators=(",", ":")).encode("utf-8")
    text += b" " * (-(8 + len(text)) % 8)
    with open(spool, "wb") as out:
        out.write(struct.pack("<Q", len(text)))
        out.write(text)
        for _entry, array in _tensors(plan, platform, fetch, threads):
            out.write(_raw(array))
            del array
        out.flush()
        os.fsync(out.fileno())
    return manifest
