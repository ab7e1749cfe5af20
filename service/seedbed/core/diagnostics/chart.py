"""The diagnosis as a picture: std versus depth on a log scale, one line per run.

`chart_svg(document)` draws two panels from a diagnosis document (`diagnosis_document`):
activation std (top) and gradient std (bottom) of the main-path layers, in network order, for
every run, with a legend holding each run's label and verdict and a cross where the verdict
points. `chart_html(document)` wraps the SVG in a page with the verdicts and the notice.

Self-contained and deterministic: no scripts, fonts, styles or images from elsewhere, numbers
written with fixed precision, so the same document always gives the same bytes. Values that
are zero, not finite or below the plotted range sit on the panel's bottom edge as hollow
circles (the caption says so): a log axis has no place for zero.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any
from xml.sax.saxutils import escape

PALETTE = (
    "#1b6ca8",
    "#d1495b",
    "#2e933c",
    "#edae49",
    "#6a4c93",
    "#00798c",
    "#8c564b",
    "#e377c2",
    "#555555",
)
WIDTH = 920
PANEL_HEIGHT = 250
LEFT, RIGHT, TOP, GAP = 70, 250, 40, 70
MAX_DECADES = 40  # a panel spans at most this many decades; lower values sit on its edge
CAPTION = (
    "x: layer number along the main path (layers outside residual branches, and each "
    "branch's sum).",
    "Hollow circles: zero, not finite or below the axis. A cross marks where a verdict points.",
    "Estimates at initialisation from one synthetic batch, not a promise that training will "
    "succeed.",
)


def _f(x: float) -> str:
    return f"{x:.2f}"


def _series(run: dict[str, Any], key: str) -> list[float | None]:
    return [layer[key] for layer in run["layers"] if layer["main_path"]]


def _decades(values: Sequence[float | None]) -> tuple[int, int]:
    logs = [math.log10(v) for v in values if v is not None and v > 0 and math.isfinite(v)]
    if not logs:
        return -1, 1
    hi = math.ceil(max(logs))
    lo = math.floor(min(logs))
    lo = max(lo, hi - MAX_DECADES)
    if hi - lo < 2:
        lo, hi = lo - 1, hi + 1
    return lo, hi


def _panel(runs: list[dict[str, Any]], key: str, title: str, top: float) -> list[str]:
    all_values = [v for run in runs for v in _series(run, key)]
    lo, hi = _decades(all_values)
    width = WIDTH - LEFT - RIGHT
    count = max((len(_series(run, key)) for run in runs), default=1)
    out = [
        f'<text x="{LEFT}" y="{_f(top - 12)}" font-size="14" font-weight="bold">'
        f"{escape(title)}</text>",
        f'<rect x="{LEFT}" y="{_f(top)}" width="{width}" height="{PANEL_HEIGHT}" '
        'fill="none" stroke="#999999"/>',
    ]

    def y_of(v: float | None) -> tuple[float, bool]:
        if v is None or not v > 0 or not math.isfinite(v) or math.log10(v) < lo:
            return top + PANEL_HEIGHT, False
        frac = (min(math.log10(v), hi) - lo) / (hi - lo)
        return top + PANEL_HEIGHT * (1 - frac), True

    def x_of(i: int) -> float:
        return LEFT + (width * i / (count - 1) if count > 1 else width / 2)

    step = max(1, math.ceil((hi - lo) / 8))
    for d in range(lo, hi + 1, step):
        y = top + PANEL_HEIGHT * (1 - (d - lo) / (hi - lo))
        out.append(
            f'<line x1="{LEFT}" y1="{_f(y)}" x2="{LEFT + width}" y2="{_f(y)}" stroke="#e3e3e3"/>'
        )
        out.append(
            f'<text x="{LEFT - 6}" y="{_f(y + 4)}" font-size="11" text-anchor="end">1e{d}</text>'
        )
    ticks = max(1, math.ceil(count / 10))
    for i in range(0, count, ticks):
        out.append(
            f'<text x="{_f(x_of(i))}" y="{_f(top + PANEL_HEIGHT + 16)}" font-size="11" '
            f'text-anchor="middle">{i + 1}</text>'
        )
    for n, run in enumerate(runs):
        colour = PALETTE[n % len(PALETTE)]
        points = [(x_of(i), *y_of(v)) for i, v in enumerate(_series(run, key))]
        path = " ".join(f"{_f(x)},{_f(y)}" for x, y, _ in points)
        dash = ' stroke-dasharray="6 3"' if n % 2 else ""  # tells overlapping lines apart
        out.append(
            f'<polyline points="{path}" fill="none" stroke="{colour}" '
            f'stroke-width="{2.5 if n == 0 else 1.6}"{dash}/>'
        )
        for x, y, inside in points:
            if not inside:
                out.append(
                    f'<circle cx="{_f(x)}" cy="{_f(y)}" r="3.5" fill="white" stroke="{colour}"/>'
                )
        failed = run.get("failed_at")
        quantity = "activation_std" if key == "activation_std" else "gradient_std"
        if failed is not None and run.get("failed_quantity") == quantity:
            names = [layer["layer"] for layer in run["layers"] if layer["main_path"]]
            if failed in names:
                x, y, _ = points[names.index(failed)]
                out.append(
                    f'<path d="M{_f(x - 6)},{_f(y - 6)} L{_f(x + 6)},{_f(y + 6)} '
                    f'M{_f(x - 6)},{_f(y + 6)} L{_f(x + 6)},{_f(y - 6)}" '
                    f'stroke="{colour}" stroke-width="2.5"/>'
                )
    return out


def chart_svg(document: dict[str, Any]) -> str:
    """Self-contained SVG of a diagnosis document (see module doc)."""
    runs: list[dict[str, Any]] = document["runs"]
    height = TOP + 2 * PANEL_HEIGHT + GAP + 36 + 15 * len(CAPTION)
    parts = [
        '<svg xmlns="http://www.w3.org/2000/svg" version="1.1" '
        f'width="{WIDTH}" height="{height}" viewBox="0 0 {WIDTH} {height}" '
        'font-family="sans-serif">',
        "<title>seedbed diagnostics: std versus depth</title>",
        "<desc>Activation and gradient standard deviation of each main-path layer, per "
        "initialisation, on a log scale. Estimates from one synthetic batch.</desc>",
        f'<rect width="{WIDTH}" height="{height}" fill="white"/>',
    ]
    parts += _panel(runs, "activation_std", "Activation std by layer (log scale)", TOP)
    parts += _panel(
        runs, "gradient_std", "Gradient std by layer (log scale)", TOP + PANEL_HEIGHT + GAP
    )
    legend_x = WIDTH - RIGHT + 20
    parts.append(
        f'<text x="{legend_x}" y="{TOP - 12}" font-size="13" font-weight="bold">Runs</text>'
    )
    for n, run in enumerate(runs):
        y = TOP + 8 + 34 * n
        colour = PALETTE[n % len(PALETTE)]
        parts.append(
            f'<line x1="{legend_x}" y1="{y}" x2="{legend_x + 24}" y2="{y}" '
            f'stroke="{colour}" stroke-width="3"/>'
        )
        parts.append(
            f'<text x="{legend_x + 30}" y="{y + 4}" font-size="12">'
            f"{escape(str(run['label']))}</text>"
        )
        where = f" at {run['failed_at']}" if run.get("failed_at") else ""
        parts.append(
            f'<text x="{legend_x + 30}" y="{y + 18}" font-size="11" fill="#555555">'
            f"{escape(str(run['verdict']) + where)[:60]}</text>"
        )
    bottom = TOP + 2 * PANEL_HEIGHT + GAP + 36
    for i, line in enumerate(CAPTION):
        parts.append(
            f'<text x="{LEFT}" y="{bottom + 15 * i}" font-size="11" fill="#555555">'
            f"{escape(line)}</text>"
        )
    parts.append("</svg>")
    return "\n".join(parts) + "\n"


def chart_html(document: dict[str, Any]) -> str:
    """A standalone HTML page: the chart, each run's verdict and reason, and the notice."""
    rows = []
    for run in document["runs"]:
        rows.append(
            f"<tr><td>{escape(str(run['label']))}</td><td>{escape(run['verdict'])}</td>"
            f"<td>{escape(str(run.get('failed_at') or ''))}</td>"
            f"<td>{escape(run.get('reason', ''))}</td></tr>"
        )
    title = "seedbed diagnostics"
    return "\n".join(
        [
            "<!DOCTYPE html>",
            '<html lang="en">',
            "<head>",
            '<meta charset="utf-8">',
            f"<title>{title}</title>",
            "</head>",
            "<body>",
            f"<h1>{title}</h1>",
            f"<p>{escape(document['notice'])}</p>",
            chart_svg(document),
            '<table border="1" cellpadding="4">',
            "<tr><th>run</th><th>verdict</th><th>layer</th><th>reason</th></tr>",
            *rows,
            "</table>",
            "</body>",
            "</html>",
            "",
        ]
    )


__all__ = ["chart_html", "chart_svg"]
