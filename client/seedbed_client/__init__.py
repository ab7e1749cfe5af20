"""seedbed_client: fetch seeded, reproducible, verified initial weights from a seedbed service.

    from seedbed_client import Client, NetworkSpec, DenseSpec

    net = NetworkSpec(seed=7).add(DenseSpec("body", 32, 16, activation="relu"))
    with Client("http://127.0.0.1:8600") as client:
        weights = client.weights(net, format="safetensors")   # name -> numpy array, verified

The framework adapter lives in `seedbed_client.torch_adapter` (extra "torch"); the command
line in `seedbed_client.cli` (`python -m seedbed_client --help`).
"""

from seedbed_client._version import __version__
from seedbed_client.cache import WeightCache, default_cache_dir
from seedbed_client.client import AsyncClient, Client, SavedWeights, Timeouts, WeightSet
from seedbed_client.containers import (
    BFloat16AsBits,
    Inspection,
    TensorCheck,
    inspect_body,
    sniff_format,
)
from seedbed_client.errors import (
    BadRequest,
    CacheCorrupted,
    IntegrityError,
    NotFound,
    Problem,
    RequestInvalid,
    RequestTooLarge,
    SeedbedError,
    ServiceError,
    ServiceUnavailable,
    SpecInvalid,
    UnknownTensor,
    UnsupportedMedia,
    service_error,
)
from seedbed_client.layers import (
    AttentionSpec,
    ConvSpec,
    DenseSpec,
    DepthPolicy,
    EmbeddingSpec,
    InitOverride,
    LayerSpec,
    NetworkSpec,
    NormSpec,
    RecurrentSpec,
    ResidualConvBlockSpec,
    TransformerBlockSpec,
    request_problems,
)
from seedbed_client.limits import RequestLimits, limit_problems
from seedbed_client.retry import RetryPolicy

__all__ = [
    "AsyncClient",
    "AttentionSpec",
    "BFloat16AsBits",
    "BadRequest",
    "CacheCorrupted",
    "Client",
    "ConvSpec",
    "DenseSpec",
    "DepthPolicy",
    "EmbeddingSpec",
    "InitOverride",
    "Inspection",
    "IntegrityError",
    "LayerSpec",
    "NetworkSpec",
    "NormSpec",
    "NotFound",
    "Problem",
    "RecurrentSpec",
    "RequestInvalid",
    "RequestLimits",
    "RequestTooLarge",
    "ResidualConvBlockSpec",
    "RetryPolicy",
    "SavedWeights",
    "SeedbedError",
    "ServiceError",
    "ServiceUnavailable",
    "SpecInvalid",
    "TensorCheck",
    "Timeouts",
    "TransformerBlockSpec",
    "UnknownTensor",
    "UnsupportedMedia",
    "WeightCache",
    "WeightSet",
    "__version__",
    "default_cache_dir",
    "inspect_body",
    "limit_problems",
    "request_problems",
    "service_error",
    "sniff_format",
]
