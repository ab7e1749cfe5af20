"""Five ordinary models written with plain torch.nn, and the JSON request each one is by hand.

Invented scenarios: a small decoder for ferry timetables, a conv net for kiln thermal images, a
tagger for beekeeping logs, an encoder of sensor tokens, and a gauge model whose forward pass
branches on its input. The hand-written requests are what a person writing seedbed JSON for
the same network would send (docs/depth.md for branches and roles); tests compare the bridge's
reading with them. Import only with torch installed.
"""

from __future__ import annotations

from typing import Any

import torch
import torch.nn.functional as F  # noqa: N812 - the usual spelling in model code
from torch import nn

# ---------------------------------------------------------------------------------------------
# GPT-style decoder: embedding (tied with the head), pre-norm blocks, functional GELU


class DecoderBlock(nn.Module):
    def __init__(self, dim: int, heads: int) -> None:
        super().__init__()
        self.ln1 = nn.LayerNorm(dim)
        self.attn = nn.MultiheadAttention(dim, heads, batch_first=True)
        self.ln2 = nn.LayerNorm(dim)
        self.fc = nn.Linear(dim, 4 * dim)
        self.proj = nn.Linear(4 * dim, dim)

    def forward(self, x: torch.Tensor, mask: torch.Tensor) -> torch.Tensor:
        h = self.ln1(x)
        a, _ = self.attn(h, h, h, attn_mask=mask, need_weights=False)
        x = x + a
        x = x + self.proj(F.gelu(self.fc(self.ln2(x))))
        return x


class TimetableDecoder(nn.Module):
    def __init__(
        self, vocab: int = 96, dim: int = 32, heads: int = 4, blocks: int = 12, context: int = 16
    ):
        super().__init__()
        self.tokens = nn.Embedding(vocab, dim)
        self.blocks = nn.ModuleList(DecoderBlock(dim, heads) for _ in range(blocks))
        self.ln_f = nn.LayerNorm(dim)
        self.head = nn.Linear(dim, vocab, bias=False)
        self.head.weight = self.tokens.weight  # tied
        mask = torch.triu(torch.full((context, context), float("-inf")), diagonal=1)
        self.register_buffer("mask", mask)

    def forward(self, ids: torch.Tensor) -> torch.Tensor:
        x = self.tokens(ids)
        for block in self.blocks:
            x = block(x, self.mask)
        return self.head(self.ln_f(x))


def decoder_request(
    blocks: int = 12, vocab: int = 96, dim: int = 32, heads: int = 4
) -> dict[str, Any]:
    layers: list[dict[str, Any]] = [
        {"name": "tokens", "kind": "embedding", "vocab": vocab, "dim": dim}
    ]
    for i in range(blocks):
        p = f"blocks.{i}"
        a, m = f"{p}.attn.skip", f"{p}.proj.skip"
        layers += [
            {
                "name": f"{p}.ln1",
                "kind": "norm",
                "dim": dim,
                "bias": True,
                "activation": "linear",
                "branch": a,
            },
            {
                "name": f"{p}.attn",
                "kind": "attention",
                "dim": dim,
                "heads": heads,
                "bias": True,
                "branch": a,
                "role": "residual_out",
            },
            {
                "name": f"{p}.ln2",
                "kind": "norm",
                "dim": dim,
                "bias": True,
                "activation": "linear",
                "branch": m,
            },
            {
                "name": f"{p}.fc",
                "kind": "dense",
                "n_in": dim,
                "n_out": 4 * dim,
                "bias": True,
                "activation": "gelu",
                "branch": m,
            },
            {
                "name": f"{p}.proj",
                "kind": "dense",
                "n_in": 4 * dim,
                "n_out": dim,
                "bias": True,
                "activation": "linear",
                "branch": m,
                "role": "residual_out",
            },
        ]
    layers.append(
        {"name": "ln_f", "kind": "norm", "dim": dim, "bias": True, "activation": "linear"}
    )
    return {
        "seed": "ferry-timetable/base",
        "dtype": "float32",
        "layout": "out_in",
        "layers": layers,
        "depth_policy": {"name": "scaled_residual"},
    }


# ---------------------------------------------------------------------------------------------
# ResNet-style conv net: functional ReLU, bottlenecks, a downsample skip


class Bottleneck(nn.Module):
    def __init__(self, c_in: int, mid: int, c_out: int, stride: int = 1) -> None:
        super().__init__()
        self.conv1 = nn.Conv2d(c_in, mid, 1, bias=False)
        self.bn1 = nn.BatchNorm2d(mid)
        self.conv2 = nn.Conv2d(mid, mid, 3, stride=stride, padding=1, bias=False)
        self.bn2 = nn.BatchNorm2d(mid)
        self.conv3 = nn.Conv2d(mid, c_out, 1, bias=False)
        self.bn3 = nn.BatchNorm2d(c_out)
        self.down = None
        if stride != 1 or c_in != c_out:
            self.down = nn.Sequential(
                nn.Conv2d(c_in, c_out, 1, stride=stride, bias=False), nn.BatchNorm2d(c_out)
            )

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        out = F.relu(self.bn1(self.conv1(x)))
        out = F.relu(self.bn2(self.conv2(out)))
        out = self.bn3(self.conv3(out))
        skip = x if self.down is None else self.down(x)
        return F.relu(out + skip)


class KilnNet(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.stem = nn.Conv2d(3, 16, 3, padding=1, bias=False)
        self.stem_bn = nn.BatchNorm2d(16)
        self.stage = nn.Sequential(
            Bottleneck(16, 8, 16), Bottleneck(16, 8, 32, stride=2), Bottleneck(32, 8, 32)
        )
        self.pool = nn.AdaptiveAvgPool2d(1)
        self.fc = nn.Linear(32, 5)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        x = F.relu(self.stem_bn(self.stem(x)))
        x = self.stage(x)
        return self.fc(torch.flatten(self.pool(x), 1))


def _conv(
    name: str, c_in: int, c_out: int, k: int, stride: int = 1, **extra: Any
) -> dict[str, Any]:
    return {
        "name": name,
        "kind": "conv",
        "channels_in": c_in,
        "channels_out": c_out,
        "kernel": [k, k],
        "groups": 1,
        "stride": [stride, stride],
        "transposed": False,
        "bias": False,
        "activation": "linear",
        **extra,
    }


def _bn(name: str, dim: int, activation: str, **extra: Any) -> dict[str, Any]:
    return {
        "name": name,
        "kind": "norm",
        "dim": dim,
        "bias": True,
        "activation": activation,
        **extra,
    }


def kiln_request() -> dict[str, Any]:
    layers = [_conv("stem", 3, 16, 3), _bn("stem_bn", 16, "relu")]

    def block(i: int, c_in: int, c_out: int, stride: int, block_input: str) -> list[dict[str, Any]]:
        p = f"stage.{i}"
        identity = c_in == c_out and stride == 1
        br = {"branch": f"{p}.conv3.skip"} if identity else {}
        body = [
            _conv(f"{p}.conv1", c_in, 8, 1, **br),
            _bn(f"{p}.bn1", 8, "relu", **br),
            _conv(f"{p}.conv2", 8, 8, 3, stride, **br),
            _bn(f"{p}.bn2", 8, "relu", **br),
            _conv(f"{p}.conv3", 8, c_out, 1, role="residual_out", **br),
            _bn(f"{p}.bn3", c_out, "linear", **br),
        ]
        if not identity:  # the projection skip runs after the branch in forward
            body += [
                # it reads the block's input, not the branch's end listed before it
                _conv(f"{p}.down.0", c_in, c_out, 1, stride, reads=[block_input]),
                _bn(f"{p}.down.1", c_out, "linear"),
            ]
        return body

    layers += (
        block(0, 16, 16, 1, "stem_bn")
        + block(1, 16, 32, 2, "stage.0.bn3")
        + block(2, 32, 32, 1, "stage.1.down.1")
    )
    layers.append(
        {
            "name": "fc",
            "kind": "dense",
            "n_in": 32,
            "n_out": 5,
            "bias": True,
            "activation": "linear",
            "role": "output",
        }
    )
    return {"seed": "kiln-thermal/v1", "dtype": "float32", "layout": "out_in", "layers": layers}


# ---------------------------------------------------------------------------------------------
# LSTM tagger


class HiveTagger(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.words = nn.Embedding(50, 12)
        self.lstm = nn.LSTM(12, 10, num_layers=2, batch_first=True)
        self.tags = nn.Linear(10, 7)

    def forward(self, ids: torch.Tensor) -> torch.Tensor:
        h, _ = self.lstm(self.words(ids))
        return self.tags(h).log_softmax(-1)


def hive_request() -> dict[str, Any]:
    gates = ["input", "forget", "cell", "output"]
    return {
        "seed": 4711,
        "dtype": "float32",
        "layout": "out_in",
        "layers": [
            {"name": "words", "kind": "embedding", "vocab": 50, "dim": 12},
            {
                "name": "lstm.l0",
                "kind": "recurrent",
                "cell": "lstm",
                "n_in": 12,
                "hidden": 10,
                "bias": True,
                "gate_order": gates,
            },
            {
                "name": "lstm.l1",
                "kind": "recurrent",
                "cell": "lstm",
                "n_in": 10,
                "hidden": 10,
                "bias": True,
                "gate_order": gates,
            },
            {
                "name": "tags",
                "kind": "dense",
                "n_in": 10,
                "n_out": 7,
                "bias": True,
                "activation": "softmax",
                "role": "output",
            },
        ],
    }


# ---------------------------------------------------------------------------------------------
# torch's own TransformerEncoderLayer


class SensorEncoder(nn.Module):
    def __init__(self, norm_first: bool = True) -> None:
        super().__init__()
        self.inp = nn.Linear(6, 16)
        self.enc = nn.ModuleList(
            nn.TransformerEncoderLayer(
                16, 2, 32, dropout=0.0, activation="gelu", batch_first=True, norm_first=norm_first
            )
            for _ in range(2)
        )
        self.out = nn.Linear(16, 3)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        h = self.inp(x)
        for layer in self.enc:
            h = layer(h)
        return self.out(h.mean(1))


def sensor_request(norm_first: bool = True) -> dict[str, Any]:
    layers: list[dict[str, Any]] = [
        {
            "name": "inp",
            "kind": "dense",
            "n_in": 6,
            "n_out": 16,
            "bias": True,
            "activation": "linear",
        }
    ]
    for i in range(2):
        p = f"enc.{i}"
        a, m = f"{p}.attn_skip", f"{p}.mlp_skip"
        attn = {
            "name": f"{p}.self_attn",
            "kind": "attention",
            "dim": 16,
            "heads": 2,
            "bias": True,
            "branch": a,
            "role": "residual_out",
        }
        n1 = {"name": f"{p}.norm1", "kind": "norm", "dim": 16, "bias": True, "activation": "linear"}
        n2 = {"name": f"{p}.norm2", "kind": "norm", "dim": 16, "bias": True, "activation": "linear"}
        l1 = {
            "name": f"{p}.linear1",
            "kind": "dense",
            "n_in": 16,
            "n_out": 32,
            "bias": True,
            "activation": "gelu",
            "branch": m,
        }
        l2 = {
            "name": f"{p}.linear2",
            "kind": "dense",
            "n_in": 32,
            "n_out": 16,
            "bias": True,
            "activation": "linear",
            "branch": m,
            "role": "residual_out",
        }
        if norm_first:
            layers += [{**n1, "branch": a}, attn, {**n2, "branch": m}, l1, l2]
        else:
            layers += [attn, n1, l1, l2, n2]
    layers.append(
        {
            "name": "out",
            "kind": "dense",
            "n_in": 16,
            "n_out": 3,
            "bias": True,
            "activation": "linear",
            "role": "output",
        }
    )
    return {"seed": "sensor-tokens/1", "dtype": "float32", "layout": "out_in", "layers": layers}


# ---------------------------------------------------------------------------------------------
# Data-dependent control flow: torch.fx cannot trace it, a forward pass can


class GaugeModel(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.a = nn.Linear(8, 24)
        self.b = nn.Linear(24, 24)
        self.c = nn.Linear(24, 24)
        self.out = nn.Linear(24, 2)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        if x.abs().max() > 1e6:  # a guard on the data: symbolic tracing cannot decide it
            x = x / x.abs().max()
        h = torch.tanh(self.a(x))
        h = h + self.c(self.b(h).relu())
        return self.out(h)


def gauge_request() -> dict[str, Any]:
    return {
        "seed": "gauge/3",
        "dtype": "float32",
        "layout": "out_in",
        "layers": [
            {
                "name": "a",
                "kind": "dense",
                "n_in": 8,
                "n_out": 24,
                "bias": True,
                "activation": "tanh",
            },
            {
                "name": "b",
                "kind": "dense",
                "n_in": 24,
                "n_out": 24,
                "bias": True,
                "activation": "relu",
                "branch": "c.skip",
            },
            {
                "name": "c",
                "kind": "dense",
                "n_in": 24,
                "n_out": 24,
                "bias": True,
                "activation": "linear",
                "branch": "c.skip",
                "role": "residual_out",
            },
            {
                "name": "out",
                "kind": "dense",
                "n_in": 24,
                "n_out": 2,
                "bias": True,
                "activation": "linear",
                "role": "output",
            },
        ],
    }
