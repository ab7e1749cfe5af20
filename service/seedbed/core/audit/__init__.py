"""Audit of existing weights: read an uploaded NPZ or safetensors file safely (never
unpickling, sizes checked before anything is decompressed) and report, per tensor, its
statistics, twin units, numerical rank and non-finite values, and, given the request that
describes the network, its scale against the recommended one.

Layout: upload.py recognises the file and dispatches to npz_reader.py / safetensors_reader.py
(every refusal happens there, as UploadRefused); stats.py, twins.py and rank.py analyse one
tensor; matching.py compares with a plan; report.py assembles findings (findings.py) and the
summary. form_parts.py parses multipart/form-data uploads incrementally.
"""

from seedbed.core.audit.findings import Finding
from seedbed.core.audit.form_parts import FormError, FormPartsParser, PartInfo, boundary_of
from seedbed.core.audit.limits import AuditLimits
from seedbed.core.audit.refusals import UploadRefused
from seedbed.core.audit.report import NOTICE, audit_upload

__all__ = [
    "NOTICE",
    "AuditLimits",
    "Finding",
    "FormError",
    "FormPartsParser",
    "PartInfo",
    "UploadRefused",
    "audit_upload",
    "boundary_of",
]
