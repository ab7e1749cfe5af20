"""Signal-propagation diagnostics: a seeded synthetic batch through the planned weights.

    diagnose(data, limits=None, diagnostic_limits=None, threads=1) -> Diagnosis
    diagnosis_document(diagnosis) -> dict            the POST /v1/diagnose response body
    chart_svg(document) -> str, chart_html(document) -> str

Modules: network (which layers, which grid), ops (forward/backward per kind), unit_stats (dead
and saturated units), twins (twin units), engine (the simulation), verdict (the rules),
budget (limits, 413), body (the request body), report (orchestration), chart (SVG/HTML).
See docs/diagnostics.md.
"""

from seedbed.core.diagnostics.budget import DiagnosticLimits
from seedbed.core.diagnostics.chart import chart_html, chart_svg
from seedbed.core.diagnostics.diagnose_request import DEFAULT_BATCH, RECOMMENDED
from seedbed.core.diagnostics.report import Diagnosis, diagnose, diagnosis_document

__all__ = [
    "DEFAULT_BATCH",
    "RECOMMENDED",
    "Diagnosis",
    "DiagnosticLimits",
    "chart_html",
    "chart_svg",
    "diagnose",
    "diagnosis_document",
]
