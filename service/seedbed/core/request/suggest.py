"""Did-you-mean: the one valid name a mistyped field, option or value most likely meant.

Used wherever a name is refused (body fields, query parameters, activations, kinds, enum
values) so that every refusal suggests the same way:

1. the same name up to case, '-', '_' and spaces (`ReLU` -> `relu`, `Float32` -> `float32`);
2. another common name of the same thing (`swish` -> `silu`: Ramachandran et al. 2017 named
   x*sigmoid(x) "Swish"; Hendrycks & Gimpel 2016 called it SiLU, the name used here);
3. a close spelling (`formt` -> `format`), when exactly one allowed name is clearly closest.

No suggestion is better than a wrong one: ties and distant names give None.
"""

from __future__ import annotations

import difflib
from collections.abc import Iterable

# Other names in use for what this service calls by the value (keys are normalised).
SYNONYMS: dict[str, str] = {
    "swish": "silu",
    "swish1": "silu",
    "identity": "linear",
    "none": "linear",
    "logistic": "sigmoid",
    "lrelu": "leaky_relu",
    "kaiming": "he",
    "xavier": "glorot",
    "gaussian": "normal",
    "truncnormal": "truncated_normal",
    "layernorm": "norm",
    "linearlayer": "dense",
    "fullyconnected": "dense",
    "convolution": "conv",
    "rnn": "recurrent",
}
# How similar a spelling must be (difflib's ratio) to be suggested, and by how much the best
# must beat the runner-up.
CUTOFF = 0.75
MARGIN = 0.05


def _key(name: str) -> str:
    return "".join(ch for ch in name.lower() if ch not in "-_ .")


def closest(name: object, allowed: Iterable[str]) -> str | None:
    """The allowed name `name` most likely meant, or None when none is clearly meant."""
    if not isinstance(name, str) or not name or len(name) > 200:
        return None
    choices = [a for a in allowed if a != name]
    if not choices:
        return None
    key = _key(name)
    same = [a for a in choices if _key(a) == key]
    if len(same) == 1:
        return same[0]
    synonym = SYNONYMS.get(key)
    if synonym is not None and synonym in choices:
        return synonym
    scored = sorted(
        ((difflib.SequenceMatcher(None, key, _key(a)).ratio(), a) for a in choices),
        reverse=True,
    )
    best_score, best = scored[0]
    if best_score < CUTOFF:
        return None
    if len(scored) > 1 and best_score - scored[1][0] < MARGIN:
        return None
    return best


def did_you_mean(name: object, allowed: Iterable[str]) -> str:
    """ "; did you mean 'x'?" to end a message with, or "" when no suggestion is clear."""
    hit = closest(name, allowed)
    return f"; did you mean {hit!r}?" if hit is not None else ""


__all__ = ["SYNONYMS", "closest", "did_you_mean"]
