"""The did-you-mean rule on its own: case, synonyms, close spellings, and silence when unsure."""

from __future__ import annotations

from seedbed.core.activations import activation_names
from seedbed.core.request.suggest import closest

ACTIVATIONS = activation_names()


def test_case_and_separators() -> None:
    assert closest("ReLU", ACTIVATIONS) == "relu"
    assert closest("LeakyReLU", ACTIVATIONS) == "leaky_relu"
    assert closest("leaky-relu", ACTIVATIONS) == "leaky_relu"


def test_synonyms_name_the_same_function() -> None:
    # Ramachandran et al. 2017 ("Swish", beta = 1) and Hendrycks & Gimpel 2016 ("SiLU").
    assert closest("swish", ACTIVATIONS) == "silu"
    assert closest("Swish", ACTIVATIONS) == "silu"
    assert closest("identity", ACTIVATIONS) == "linear"


def test_close_spellings() -> None:
    assert closest("formt", ["format", "tensor", "rows"]) == "format"
    assert closest("sigmiod", ACTIVATIONS) == "sigmoid"


def test_nothing_when_unsure() -> None:
    assert closest("quartic", ACTIVATIONS) is None
    assert closest("x", ["format", "tensor", "rows"]) is None
    assert closest("rows", ["rows"]) is None
    assert closest(5, ACTIVATIONS) is None
    # Two equally close names: no guess.
    assert closest("ab", ["abc", "abd"]) is None
