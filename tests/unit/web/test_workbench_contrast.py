"""The workbench's colour pairs meet WCAG 2.1's contrast minimum (success criterion 1.4.3: 4.5:1
for normal text), computed with WCAG's relative-luminance and contrast-ratio definitions from
the colours the stylesheet actually declares."""

from __future__ import annotations

import re
from importlib import resources

import pytest

CSS = (resources.files("seedbed.web.workbench") / "static" / "workbench.css").read_text()
VARIABLES = dict(re.findall(r"--([a-z-]+):\s*(#[0-9a-fA-F]{6})", CSS))


def _channel(c: float) -> float:
    # WCAG 2.1, definition of relative luminance (sRGB).
    return c / 12.92 if c <= 0.04045 else ((c + 0.055) / 1.055) ** 2.4


def luminance(hex_colour: str) -> float:
    r, g, b = (int(hex_colour[i : i + 2], 16) / 255 for i in (1, 3, 5))
    return 0.2126 * _channel(r) + 0.7152 * _channel(g) + 0.0722 * _channel(b)


def contrast(a: str, b: str) -> float:
    hi, lo = sorted((luminance(a), luminance(b)), reverse=True)
    return (hi + 0.05) / (lo + 0.05)


def colour(name: str) -> str:
    return VARIABLES[name] if not name.startswith("#") else name


def test_wcag_formula_on_known_pairs() -> None:
    # Black on white is 21:1 and equal colours 1:1 (WCAG 2.1, contrast ratio definition).
    assert contrast("#000000", "#ffffff") == pytest.approx(21.0)
    assert contrast("#777777", "#777777") == pytest.approx(1.0)


# (text, background) as the stylesheet pairs them.
PAIRS = [
    ("ink", "paper"),
    ("ink", "panel"),
    ("muted", "paper"),
    ("muted", "panel"),
    ("moss", "panel"),
    ("moss", "paper"),
    ("moss-dark", "moss-pale"),
    ("rust", "panel"),
    ("loam", "panel"),
    ("#3d2412", "loam-pale"),
    ("#f4efe1", "moss-dark"),
    ("#e9e4d2", "moss-dark"),
    ("#ffffff", "moss"),
    ("moss-dark", "#f4efe1"),
    ("#7d1f13", "#f8dcd6"),
    ("#5e3415", "loam-pale"),
    ("ink", "#f3f4ee"),
]


@pytest.mark.parametrize(("text", "background"), PAIRS)
def test_text_contrast_is_at_least_4_5(text: str, background: str) -> None:
    assert contrast(colour(text), colour(background)) >= 4.5
